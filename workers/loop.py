"""The fetch worker: lease, check robots, fetch, parse, archive, admit links, complete.

Every lease ends in a completion. Discovered links are admitted *before* the lease is
completed, so a worker that dies in between loses nothing: the lease expires, the URL is
fetched again, and URL-seen dedupe absorbs the repeated links (at-least-once).
"""

from __future__ import annotations

import asyncio
import dataclasses
import email.utils
import functools
import logging
import os
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from prometheus_client import CollectorRegistry

from frontier.admission import Admission
from frontier.budget import PageBudget
from frontier.digests import Capture, PayloadDigestIndex
from frontier.focus import build_focus
from frontier.exceptions import (
    AddressRefused, DiskFault, FetchError, SluiceError, StoreError, StoreUnavailable)
from frontier.metrics import WorkerMetrics
from frontier.mirrors import MirrorHosts
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.priority import distribute, url_host
from frontier.redis_boundary import redis_boundary
from frontier.robots import RobotsCache, RobotsFetchResult, robots_url
from frontier.robots_rules import RobotsRules
from frontier.settings import JobSettings
from frontier.simhash import NearDuplicateIndex, hamming, simhash64
from frontier.sitemaps import SitemapReader, sitemap_url, split_sitemap
from frontier.store import FrontierStore
from frontier.revisit_fetch import WorkerRevisits
from frontier.urls import canonicalize
from frontier.worker_report import WorkerReport
from workers.archive import WarcArchive
from workers.fetch_log import FetchEntry, FetchLog
from workers.warc_records import (
    NOT_MODIFIED_PROFILE, OutLink, new_record_id, payload_digest, warc_date)
from workers.fetcher import Fetcher, Response
from workers.offload import PagePool
from workers.parser import ParsedPage, looks_binary, parse_html

log = logging.getLogger(__name__)

HTML_TYPES = ("text/html", "application/xhtml+xml")
ROBOTS_REDIRECTS = 5  # RFC 9309 s.2.3.1.2: follow at least five redirects
ROBOTS_MAX_BYTES = 512 * 1024  # RFC 9309 s.2.5: parse at least 500 KiB
FLUSH_LINGER_S = 0.03  # gather finished leases this long before writing them back ...
LINGER_BELOW = 2  # ... unless fewer than 1/LINGER_BELOW of the fetch slots are busy
LEASE_CHUNK_DIVISOR = 4  # lease once a quarter of a batch of slots is free
IDLE_SLEEP_MIN_S = 0.01
IDLE_SLEEP_MAX_S = 0.25  # a worker with nothing to lease looks again at least this often
STORE_RETRY_S = 0.5
FETCHED_MEMORY = 200_000  # URLs this worker fetched, remembered to skip links back to them
ENDED_EVERY_S = 1.0  # how often the frontier's ended journal is copied to the fetch log
HEARTBEATS_PER_TTL = 3  # held leases are extended every lease.ttl_s / this
CANCEL_WAIT_S = 2.0  # how long cancelled leases get to end before they are handed back
# child processes for big pages: half the cores (the event loop and Redis want the rest)
PAGE_PROCESSES = max(1, (os.cpu_count() or 2) // 2)


@dataclass
class Finished:
    """A lease's end, waiting to be written to the fetch log and then to the frontier."""

    completion: Completion
    links: list[Candidate] = field(default_factory=list)
    linked: list[tuple[str, str]] = field(default_factory=list)  # (host, URL fetched already)
    entry: FetchEntry | None = None
    simhash: int | None = None  # checked against the near-duplicate index at flush time
    simhash_checked: bool = False  # a retried flush must not find the page itself
    logged: bool = False  # its fetch-log line is written (a retried flush writes no second)
    copies_counted: bool = False  # counted for its host's mirror figures (frontier/mirrors.py)


@dataclass(slots=True)
class FetchedPage:
    """An HTML response waiting for the batched page phase (parse, fingerprint, archive)."""

    lease: Lease
    resp: Response
    base: Completion
    reason: str | None  # e.g. truncated_length
    fetched_at: datetime  # WARC-Date and the log's time: when the response came, not later
    digest: str | None = None  # payload digest, once checked against the job's first captures
    record_id: str | None = None  # the response record's ID, chosen before it is written


def retry_after_s(value: str | None, now: float) -> float | None:
    """Seconds from a Retry-After header (delta-seconds or HTTP-date, RFC 9110 s.10.2.3)."""
    if not value:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        moment = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    return max(0.0, moment.timestamp() - now)


def origin_of(url: str) -> str:
    """scheme://host[:port] of a canonical URL."""
    end = url.find("/", url.find("://") + 3)
    return url if end < 0 else url[:end]


async def _set_within(event: asyncio.Event, seconds: float) -> bool:
    """Wait until ``event`` is set or ``seconds`` pass; True if it was set."""
    try:
        await asyncio.wait_for(event.wait(), seconds)
    except TimeoutError:
        return False
    return True


def join_reasons(*reasons: str | None) -> str | None:
    """Several reasons for one fetch-log line, comma-separated in the order given (the
    worker's order: truncation, links_capped, off_topic, exact_duplicate, near_duplicate);
    None if there are none."""
    kept = [r for r in reasons if r]
    return ",".join(kept) if kept else None


def link_record(page: ParsedPage, follow_nofollow: bool,
                duplicate: bool) -> list[tuple[str, str, str | None]]:
    """Each link of ``page`` as (URL, anchor, why it is not followed or None)."""
    if duplicate:
        return [(ln.url, ln.anchor, "exact_duplicate") for ln in page.links]
    if follow_nofollow:
        return [(ln.url, ln.anchor, None) for ln in page.links]
    if page.meta_nofollow:
        return [(ln.url, ln.anchor, "meta_nofollow") for ln in page.links]
    return [(ln.url, ln.anchor, "nofollow" if ln.nofollow else None) for ln in page.links]


class Worker:
    """One asyncio fetch worker; run several per machine and on many machines."""

    def __init__(
        self,
        store: FrontierStore,
        admission: Admission,
        out_dir: Path,
        *,
        metrics: WorkerMetrics | None = None,
        drain: bool = False,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.store = store
        self.settings: JobSettings = store.settings
        ua = self.settings.fetch.user_agent
        if not ua:
            raise SluiceError(
                "fetch.user_agent is required: an honest User-Agent with a contact URL, "
                "e.g. --user-agent 'mycrawl/1.0 (+https://example.test/contact)'")
        self.user_agent = ua
        self.admission = admission
        self.out_dir = Path(out_dir)
        self.drain = drain
        self.clock = clock
        self.metrics = metrics or WorkerMetrics(CollectorRegistry())
        self.report = WorkerReport(store, self.metrics)  # heartbeat, robots outcomes, job label
        self.budget = PageBudget(store.redis, store.keys, self.settings.budget.max_pages)
        self.near_dups = NearDuplicateIndex(store.redis, store.keys.near_dup,
                                            page_key=store.keys.near_dup_page)
        self.first_captures = PayloadDigestIndex(store.redis, store.keys.payload_digests)
        # revisits (frontier/revisit_fetch.py): conditional GETs, records, due pages
        self.revisits = (WorkerRevisits(store, self.first_captures)
                         if self.settings.revisit.enabled else None)
        self.focus = build_focus(self.settings)  # None without [focus] (docs/focus.md)
        self.mirrors = MirrorHosts(store)
        self._fetcher = Fetcher(self.settings.fetch, ua)
        self._robots = RobotsCache(
            store.redis, lambda h: store.keys.part_for(h).robots(h),
            self.report.robots_fetcher(self._fetch_robots),
            user_agent=ua, ttl_s=self.settings.politeness.robots_ttl_s,
            error_ttl_s=self.settings.politeness.robots_error_ttl_s,
            crawl_delay_cap_s=self.settings.politeness.crawl_delay_cap_s,
            lock_key_for_host=lambda h: store.keys.part_for(h).robots_lock(h))
        self.sitemaps = SitemapReader(self.settings, store.redis, store.keys,
                                      self._robots.rules_for)
        self._finished: list[Finished] = []
        self._fetched: list[FetchedPage] = []  # HTML pages not yet parsed and archived
        # URLs this worker fetched (completion accepted): links to them are not offered as
        # URLs again (no credit for a URL no longer queued); see _links_to_fetched.
        # Cleared when full.
        self._fetched_urls: set[str] = set()
        self._tasks: set[asyncio.Task[None]] = set()
        self._stop = asyncio.Event()
        self._to_flush = asyncio.Event()  # set when a lease finished
        # set when hosts were released back to the frontier or a chunk of slots came free
        self._lease_wanted = asyncio.Event()
        s = self.settings
        # lease in chunks: a call per freed slot would cost a round trip per page
        self._lease_chunk = max(1, min(s.lease.batch, s.fetch.concurrency) // LEASE_CHUNK_DIVISOR)
        self.pages = 0
        self._ended_at = 0.0  # time.monotonic() of the last copy of the ended journal
        self.archive: WarcArchive | None = None
        self.fetch_log: FetchLog | None = None
        # leases taken and not yet completed or handed back, by member (the stored string)
        self._held: dict[str, Lease] = {}
        self._stop_requested: float | None = None  # time.monotonic() of stop()
        self._abandon = asyncio.Event()  # hand back what is in flight now
        self._drained = asyncio.Event()  # nothing in flight any more: last write-back
        self._done = asyncio.Event()  # the worker has returned everything it held
        self._fault: DiskFault | None = None  # the output folder stopped taking writes
        self.handed_back = 0  # leases handed back unfinished
        # pages over fetch.offload_bytes: parsed in child processes, archived in a thread
        # of their own (to their own WARC files: one writer per WarcArchive)
        self._pages: PagePool | None = None
        self._big_archive: WarcArchive | None = None
        self._archive_thread: ThreadPoolExecutor | None = None

    def stop(self) -> None:
        """Lease no more; in-flight leases get ``fetch.stop_grace_s`` to finish and be
        written back, then what is still in flight is handed back (see :meth:`abandon`)."""
        if self._stop_requested is None:
            self._stop_requested = time.monotonic()
        self._stop.set()
        self._lease_wanted.set()

    def abandon(self) -> None:
        """Stop at once: what is finished is written back, what is in flight is handed
        back to the frontier (queued again without counting an attempt)."""
        self.stop()
        self._abandon.set()

    # -- the main loop -------------------------------------------------------------------

    async def run(self) -> None:
        """Lease and fetch until stopped (with ``drain``: until the frontier is done).

        On the way out, what is finished is written back and every lease still held is
        handed back to the frontier. Raises DiskFault, after handing back, when the
        output folder stopped taking writes.
        """
        self.archive = self._new_archive()
        try:
            self.fetch_log = FetchLog(self.out_dir)
        except DiskFault as exc:
            self._fault = exc
            raise self._fault_report() from exc
        self.metrics.watch_archive(self.archive)
        await self._offer_sitemaps(self.sitemaps.operator_candidates())
        flusher = asyncio.create_task(self._flush_loop(), name="write-back")
        flusher.add_done_callback(self._loop_ended)
        heartbeat = asyncio.create_task(self._heartbeat_loop(), name="lease heartbeat")
        heartbeat.add_done_callback(self._loop_ended)
        try:
            async with self._fetcher:
                try:
                    await self._lease_loop()
                except BaseException:
                    self.abandon()  # an error, or cancelled: what is in flight goes back
                    raise
                finally:
                    await self._finish_in_flight()
        finally:
            self._stop.set()
            self._drained.set()
            try:
                await flusher  # re-raises what stopped it
                await self._flush()
                await self._log_ended(force=True)
                await self.report.beat(self.pages, 0, force=True)  # the final figures
            finally:
                try:
                    await self._hand_back()
                finally:
                    self._done.set()
                    await heartbeat
                    self._close_outputs()
        if self._fault is not None:
            raise self._fault_report() from self._fault

    def _new_archive(self) -> WarcArchive:
        s = self.settings
        return WarcArchive(
            self.out_dir, prefix=s.output.warc_prefix, max_file_bytes=s.output.warc_max_bytes,
            software="sluice/0.1", operator=self.user_agent, job=s.name)

    def _loop_ended(self, loop_task: asyncio.Task[None]) -> None:
        """A write-back or heartbeat loop that died of a bug stops the worker (loudly) at
        once instead of leaving it to lease pages that are never written back."""
        if not loop_task.cancelled() and loop_task.exception() is not None:
            log.error("%s failed; stopping this worker", loop_task.get_name(),
                      exc_info=loop_task.exception())
            self.abandon()

    async def _finish_in_flight(self) -> None:
        """After a stop, leases in flight get what is left of ``fetch.stop_grace_s`` to
        finish (and be written back); then those still running are cancelled, to be
        handed back. :meth:`abandon` ends the wait at once."""
        grace = self.settings.fetch.stop_grace_s
        since = self._stop_requested if self._stop_requested is not None else time.monotonic()
        abandon = asyncio.create_task(self._abandon.wait())
        try:
            while self._tasks and not self._abandon.is_set():
                left = since + grace - time.monotonic()
                if left <= 0:
                    break
                await asyncio.wait({*self._tasks, abandon}, timeout=left,
                                   return_when=asyncio.FIRST_COMPLETED)
        finally:
            abandon.cancel()
        if self._tasks:
            log.info("handing back %d leases still in flight", len(self._tasks))
            for task in self._tasks:
                task.cancel()
            await asyncio.wait(set(self._tasks), timeout=CANCEL_WAIT_S)

    async def _hand_back(self) -> None:
        """Return every lease still held to the frontier: queued again as it was, no
        attempt counted (the complete script's release)."""
        held = list(self._held.values())
        self._held.clear()
        if not held:
            return
        try:
            statuses = await self.store.release(held)
            await self.budget.release(len(held))
        except StoreUnavailable as exc:
            log.warning("could not hand back %d leases (they return to the frontier when "
                        "they expire, within %.0f s): %s", len(held),
                        self.settings.lease.ttl_s, exc)
            return
        self.handed_back += statuses.count("ok")

    async def _heartbeat_loop(self) -> None:
        """Extend the held leases every ``lease.ttl_s / 3`` until the worker has returned
        them all: a lease still worked on (a slow server, a big page, the stop grace) is
        not reaped and fetched again elsewhere."""
        every = self.settings.lease.ttl_s / HEARTBEATS_PER_TTL
        while not await _set_within(self._done, every):
            held = list(self._held.values())
            if not held:
                continue
            try:
                statuses = await self.store.extend(held)
            except StoreUnavailable as exc:
                self.metrics.store_errors.inc()
                log.warning("could not extend %d leases, trying again: %s", len(held), exc)
                continue
            for lease, status in zip(held, statuses):
                if status != "ok" and self._held.pop(lease.member, None) is not None:
                    log.info("lease %s for %s was %s when extended", lease.id, lease.url, status)

    def _disk_fault(self, exc: DiskFault) -> None:
        """The output folder stopped taking writes: lease no more, hand back what is held."""
        if self._fault is None:
            self._fault = exc
        self.abandon()

    def _fault_report(self) -> DiskFault:
        """The one line an operator needs: what happened, what was done, what to do."""
        n = self.handed_back
        return DiskFault(
            f"cannot write to {self.out_dir} ({self._fault}); stopped leasing and handed back "
            f"{n} unfinished {'lease' if n == 1 else 'leases'} to the frontier (queued again, "
            f"no attempt counted). Free space or repair the folder, then run the same command "
            f"again to resume the job")

    def _close_outputs(self) -> None:
        """Close the page pool, the archive thread (after its last write), the WARC
        files and the fetch log; a disk fault on the way is kept for the report."""
        if self._pages is not None:
            self._pages.close()
        if self._archive_thread is not None:
            self._archive_thread.shutdown(wait=True)
        for out in (self._big_archive, self.archive, self.fetch_log):
            try:
                if out is not None:
                    out.close()
            except DiskFault as exc:
                if self._fault is None:
                    self._fault = exc

    async def _lease_loop(self) -> None:
        s = self.settings
        idle = IDLE_SLEEP_MIN_S
        while not self._stop.is_set():
            free = s.fetch.concurrency - len(self._tasks)
            leases: list[Lease] = []
            if free >= self._lease_chunk or (free > 0 and not self._tasks):
                try:
                    leases = await self._lease(min(free, s.lease.batch))
                except StoreUnavailable as exc:
                    self.metrics.store_errors.inc()
                    log.warning("lease failed, retrying: %s", exc)
            for lease in leases:
                self._held[lease.member] = lease
                task = asyncio.create_task(self._handle(lease))
                self._tasks.add(task)
                task.add_done_callback(self._tasks.discard)
            self.metrics.in_flight.set(len(self._tasks))
            await self.report.beat(self.pages, len(self._tasks))
            if leases:
                idle = IDLE_SLEEP_MIN_S
                await asyncio.sleep(0)
                continue
            if self.drain and not self._tasks and not self._finished and not self._fetched:
                if await self._frontier_done():
                    return
            # wait until completions released hosts, slots came free, or a host's time may
            # have come
            self._lease_wanted.clear()
            try:
                await asyncio.wait_for(self._lease_wanted.wait(), idle)
            except TimeoutError:
                idle = min(IDLE_SLEEP_MAX_S, idle * 2)

    async def _lease(self, wanted: int) -> list[Lease]:
        granted = await self.budget.reserve(wanted)
        if granted <= 0:
            return []
        if self.revisits is not None:
            await self.revisits.release_due()
        leases = await self.store.lease(granted)
        await self.budget.release(granted - len(leases))
        if self.revisits is not None and leases:
            await self.revisits.leased(leases)
        return leases

    async def _frontier_done(self) -> bool:
        try:
            counts = await self.store.counts()
        except StoreUnavailable:
            return False
        if self.revisits is not None:  # continuous: done once the page budget is spent
            return counts.leased == 0 and await self.budget.spent(counts.fetched)
        if counts.leased == 0 and (counts.queued == 0 or await self.budget.spent(counts.fetched)):
            return True
        return False

    # -- one lease ----------------------------------------------------------------------

    async def _handle(self, lease: Lease) -> None:
        started = time.monotonic()
        try:
            result = await self._process(lease)
            if (isinstance(result, FetchedPage)
                    and len(result.resp.body) > self.settings.fetch.offload_bytes):
                result = await self._finish_big_page(result)
        except DiskFault as exc:  # the lease stays held: it is handed back, not ended
            self._disk_fault(exc)
            return
        except Exception as exc:  # a bug must not lose the lease: end it as a retry
            result = self._internal_error(lease, exc)
        self.metrics.duration.observe(time.monotonic() - started)
        if isinstance(result, FetchedPage):
            self._fetched.append(result)
        else:
            self._record(*result)
        self._to_flush.set()
        # this task still counts as running until it returns
        if self.settings.fetch.concurrency - len(self._tasks) + 1 >= self._lease_chunk:
            self._lease_wanted.set()

    def _internal_error(self, lease: Lease, exc: Exception) -> tuple[Finished, None]:
        log.error("unexpected error on %s", lease.url, exc_info=exc)
        return Finished(Completion(lease, Outcome.RETRY, reason=f"internal_{type(exc).__name__}")), None

    def _record(self, finished: Finished, entry: FetchEntry | None) -> None:
        """Queue a lease's end for the next write-back."""
        c = finished.completion
        self.metrics.count_outcome(c.outcome.value, c.reason)
        if c.outcome is not Outcome.RETRY:
            finished.entry = entry
        if c.outcome is Outcome.FETCHED:
            self.pages += 1
        self._finished.append(finished)

    def _entry(self, lease: Lease, outcome: Outcome, reason: str | None,
               resp: Response | None = None, at: datetime | None = None,
               **kw: Any) -> FetchEntry:
        return FetchEntry(
            url=lease.url, outcome=outcome.value, reason=reason,
            fetched_at=at or datetime.now(UTC), status=resp.status if resp else None,
            bytes=len(resp.body) if resp else 0, duration_s=resp.elapsed_s if resp else 0.0,
            depth=lease.depth, host=lease.host,
            content_type=resp.content_type if resp else None, **kw)

    async def _process(self, lease: Lease) -> tuple[Finished, FetchEntry | None] | FetchedPage:
        """Robots, then the fetch; an HTML page is left for the batched page phase."""
        pol = self.settings.politeness
        crawl_delay: float | None = None
        sitemap = split_sitemap(lease.url)  # a sitemap: fetched at its URL, read apart
        target = sitemap[0] if sitemap else lease.url
        if pol.obey_robots:
            rules = await self._rules(target)
            crawl_delay = rules.crawl_delay()
            if not rules.allowed(target):
                c = Completion(lease, Outcome.EXCLUDED, "robots", crawl_delay_s=crawl_delay)
                return Finished(c), self._entry(lease, Outcome.EXCLUDED, "robots")
        try:
            if sitemap:
                cap = self.settings.sitemaps.max_bytes
                resp = await self._fetcher.get(target, max_body=cap, max_decoded=cap)
            else:
                resp = await self._fetcher.get(
                    lease.url, headers=self.revisits.headers(lease) if self.revisits else None)
        except AddressRefused as exc:
            c = Completion(lease, Outcome.EXCLUDED, f"address_{exc.reason}")
            return Finished(c), self._entry(lease, Outcome.EXCLUDED, c.reason)
        except FetchError as exc:
            outcome = Outcome.RETRY if exc.retryable else Outcome.FAILED
            backoff = pol.retry_backoff_s * (2 ** lease.attempts) if exc.retryable else 0.0
            c = Completion(lease, outcome, exc.reason, extra_delay_s=min(backoff, pol.max_delay_s),
                           crawl_delay_s=crawl_delay)
            return Finished(c), self._entry(lease, outcome, exc.reason)
        self.metrics.count_response(resp.status)
        self.metrics.bytes.inc(len(resp.body))
        base = Completion(lease, Outcome.FETCHED, f"http_{resp.status}",
                          response_s=resp.elapsed_s, crawl_delay_s=crawl_delay)
        if resp.status in (429, 503) or resp.status >= 500:
            wait = retry_after_s(resp.header("Retry-After"), self.clock())
            if wait is None:
                wait = pol.retry_backoff_s * (2 ** lease.attempts)
            c = Completion(lease, Outcome.RETRY, f"http_{resp.status}", response_s=resp.elapsed_s,
                           extra_delay_s=min(wait, pol.max_delay_s), crawl_delay_s=crawl_delay)
            return Finished(c), self._entry(lease, Outcome.RETRY, c.reason, resp)
        if resp.status == 304 and self.revisits is not None and self.revisits.state(lease):
            return await self._not_modified(lease, resp, base)
        if 300 <= resp.status < 400:
            return await self._redirect(lease, resp, base)
        if resp.status >= 400:
            c = Completion(lease, Outcome.FAILED, f"http_{resp.status}", response_s=resp.elapsed_s,
                           crawl_delay_s=crawl_delay)
            return Finished(c), self._entry(lease, Outcome.FAILED, c.reason, resp)
        if sitemap:
            return await self._sitemap(lease, resp, base, *sitemap)
        return await self._page(lease, resp, base)

    async def _sitemap(self, lease: Lease, resp: Response, base: Completion, url: str,
                       level: int) -> tuple[Finished, FetchEntry]:
        """A fetched sitemap: archived under its own URL, read into candidates (its URLs,
        or an index's sitemaps); a hostile or broken one ends failed with its reason."""
        read = await self.sitemaps.read(lease, url, level, resp.body, resp.truncated)
        at = datetime.now(UTC)
        ref = await self._archive_any(dataclasses.replace(lease, url=url), resp, None, at)
        c = dataclasses.replace(base, outcome=read.outcome, reason=read.reason)
        return Finished(c, read.candidates), self._entry(lease, read.outcome, read.reason,
                                                         resp, at, **ref)

    async def _offer_sitemaps(self, candidates: list[Candidate]) -> None:
        """Admit sitemaps found outside a lease (the job's own, robots.txt lines), within
        their hosts' quota; a Redis failure loses them until the robots.txt is read again."""
        if not candidates:
            return
        try:
            kept, _ = await self.sitemaps.within_quota(candidates)
            self.metrics.count_admitted(await self.admission.admit(kept))
        except StoreError as exc:
            log.warning("could not admit %d sitemaps: %s", len(candidates), exc)

    async def _not_modified(self, lease: Lease, resp: Response,
                            base: Completion) -> tuple[Finished, FetchEntry]:
        """A 304 answer to a conditional GET: archived as a revisit record with the
        server-not-modified profile, referring to the page's last full capture."""
        assert self.revisits is not None and self.archive is not None
        at = datetime.now(UTC)
        path = "/" + lease.url.split("/", 3)[3] if lease.url.count("/") >= 3 else "/"
        ref = self.archive.write_exchange(
            lease.url, ("GET", path, resp.request_headers), resp.status, resp.reason,
            resp.headers, b"", at, remote_ip=resp.remote_ip,
            revisit_of=await self.revisits.earlier_capture(lease),
            revisit_profile=NOT_MODIFIED_PROFILE)
        self.revisits.observe(lease, resp.header, None, not_modified=True)
        return Finished(base), self._entry(lease, Outcome.FETCHED, "not_modified", resp, at,
                                           warc_file=ref.file, warc_offset=ref.offset)

    async def _redirect(self, lease: Lease, resp: Response,
                        base: Completion) -> tuple[Finished, FetchEntry]:
        location = resp.header("Location")
        links: list[Candidate] = []
        if location and lease.hops >= self.settings.fetch.max_redirects:
            c = Completion(lease, Outcome.FAILED, "redirect_limit", response_s=resp.elapsed_s,
                           crawl_delay_s=base.crawl_delay_s)
            return Finished(c), self._entry(lease, Outcome.FAILED, "redirect_limit", resp)
        if location:  # one more depth and one more hop: a chain's hosts are not seeded
            target = canonical_or_raw(location, lease.url)
            if sitemap := split_sitemap(lease.url):  # a moved sitemap is still one
                target = sitemap_url(target, sitemap[1])
            links.append(Candidate(target, depth=lease.depth + 1,
                                   cash=lease.cash, credit=lease.cash, source_host=lease.host,
                                   hops=lease.hops + 1))
        at = datetime.now(UTC)
        ref = await self._archive_any(lease, resp, [(c.url, "redirect") for c in links], at)
        return Finished(base, links), self._entry(
            lease, Outcome.FETCHED, f"redirect_{resp.status}", resp, at, **ref)

    async def _page(self, lease: Lease, resp: Response,
                    base: Completion) -> tuple[Finished, FetchEntry] | FetchedPage:
        fetch = self.settings.fetch
        ctype = resp.content_type
        reason = f"truncated_{resp.truncated}" if resp.truncated else None
        if ctype and ctype not in HTML_TYPES or looks_binary(resp.body[:1024]):
            if not fetch.archive_other_types:
                c = Completion(lease, Outcome.EXCLUDED, "content_type", response_s=resp.elapsed_s,
                               crawl_delay_s=base.crawl_delay_s)
                return Finished(c), self._entry(lease, Outcome.EXCLUDED, "content_type", resp)
            at = datetime.now(UTC)
            ref = await self._archive_any(lease, resp, None, at)
            kind = "binary" if looks_binary(resp.body[:1024]) else "not_html"
            return Finished(base), self._entry(lease, Outcome.FETCHED, reason or kind, resp, at,
                                               **ref)
        return FetchedPage(lease, resp, base, reason, datetime.now(UTC))

    async def _finish_pages(self) -> None:
        """Parse, fingerprint, check payload digests (one round trip), archive and score
        the fetched HTML pages, a step at a time.

        Each step runs over the whole batch before the next begins, so its code and data
        stay hot in the CPU caches: a page's steps run one after another, interleaved
        with the event loop's network and Redis code, cost about a third more (measured).
        A page whose step raises ends as a retry; the others go on. Once the output
        folder stopped taking writes, pages are left held, to be handed back.
        """
        pending, self._fetched = self._fetched, []
        if not pending or self._fault is not None:
            return
        max_links = self.settings.fetch.max_links_per_page
        parsed = []
        for p in pending:
            try:
                page = parse_html(p.resp.body, p.lease.url, max_links=max_links,
                                  content_type=p.resp.header("Content-Type"))
            except Exception as exc:  # parse_html never raises; kept for a bug
                self._record(*self._internal_error(p.lease, exc))
                continue
            parsed.append((p, page))
        fingerprinted = []
        for p, page in parsed:
            try:
                fingerprint = simhash64(page.text) if page.text else None
            except Exception as exc:  # a bug must not stop the batch
                self._record(*self._internal_error(p.lease, exc))
                continue
            fingerprinted.append((p, page, fingerprint))
        firsts = await self._first_captures([p for p, _, _ in fingerprinted])
        follow_nofollow = self.settings.fetch.follow_nofollow
        for (p, page, fingerprint), first in zip(fingerprinted, firsts):
            if self._fault is not None:
                break  # left held: handed back when the worker stops
            try:
                links = link_record(page, follow_nofollow, first is not None)
                ref = self._archive(p.lease, p.resp, links, p.fetched_at, page=p, first=first)
                self._record(*self._finish_page(p, page, fingerprint, links, ref, first))
            except DiskFault as exc:
                self._disk_fault(exc)
            except Exception as exc:  # a bug must not stop the batch: fetch it again later
                self._record(*self._internal_error(p.lease, exc))

    async def _first_captures(self, pages: list[FetchedPage]) -> list[Capture | None]:
        """Before pages are archived: for each, the job's earlier capture of the same
        payload under another URL (to refer to with a revisit record), or None. One round
        trip for the batch. Truncated and empty bodies are not compared. When Redis fails
        the pages are archived in full (a copy too many, never a page lost)."""
        out: list[Capture | None] = [None] * len(pages)
        checked = [i for i, p in enumerate(pages) if p.resp.body and not p.resp.truncated]
        if not checked:
            return out
        for i in checked:
            p = pages[i]
            p.digest, p.record_id = payload_digest(p.resp.body), new_record_id()
        if self.revisits is not None:  # unchanged since its last capture: refer to that
            for i in [i for i in checked if self.revisits.unchanged(pages[i].lease,
                                                                     pages[i].digest)]:
                checked.remove(i)
                try:
                    out[i] = await self.first_captures.first(pages[i].digest or "")
                except StoreError:
                    self.metrics.store_errors.inc()
            if not checked:
                return out
        try:
            firsts = await self.first_captures.claim(
                [pages[i].digest or "" for i in checked],
                [Capture(pages[i].lease.url, warc_date(pages[i].fetched_at),
                         pages[i].record_id or "") for i in checked])
        except StoreError as exc:
            self.metrics.store_errors.inc()
            log.warning("payload digests unavailable, archiving %d pages in full: %s",
                        len(checked), exc)
            return out
        for i, first in zip(checked, firsts):
            out[i] = first
        return out

    async def _finish_big_page(self, p: FetchedPage) -> tuple[Finished, FetchEntry]:
        """A page over ``fetch.offload_bytes``: parsed and fingerprinted in a child
        process and archived in the archive thread, while the event loop goes on with
        the other leases. Past ``fetch.parse_timeout_s`` it ends as failed
        (``parse_timeout``), unarchived, and its child is replaced."""
        fetch = self.settings.fetch
        if self._pages is None:
            self._pages = PagePool(PAGE_PROCESSES, fetch.parse_timeout_s)
        try:
            page, fingerprint = await self._pages.digest(
                p.resp.body, p.lease.url, p.resp.header("Content-Type"), fetch.max_links_per_page)
        except TimeoutError:
            c = Completion(p.lease, Outcome.FAILED, "parse_timeout", response_s=p.resp.elapsed_s,
                           crawl_delay_s=p.base.crawl_delay_s)
            return Finished(c), self._entry(p.lease, Outcome.FAILED, "parse_timeout", p.resp,
                                            p.fetched_at)
        first = (await self._first_captures([p]))[0]
        links = link_record(page, fetch.follow_nofollow, first is not None)
        ref = await self._archive_any(p.lease, p.resp, links, p.fetched_at, page=p, first=first)
        return self._finish_page(p, page, fingerprint, links, ref, first)

    def _finish_page(self, p: FetchedPage, page: ParsedPage, fingerprint: int | None,
                     links: list[tuple[str, str, str | None]], ref: dict[str, Any],
                     first: Capture | None) -> tuple[Finished, FetchEntry]:
        """Hand an archived page's cash on to the links it follows. An exact duplicate
        (``first``: the earlier capture of its payload) follows none: its content was seen."""
        lease = p.lease
        follow = [(url, anchor) for url, anchor, why in links if why is None]
        done = self._fetched_urls
        candidates = distribute(lease.url, lease.cash, lease.depth, follow,
                                self.settings.priority, known=done)
        linked = self._links_to_fetched(lease, follow) if done else []
        off_topic = None
        if self.focus is not None and first is None:  # soft focus (frontier/focus.py)
            relevance = self.focus.relevance(f"{page.title} {page.text}")
            candidates = self.focus.steer(candidates, relevance)
            off_topic = None if self.focus.expands(relevance) else "off_topic"
        reason = join_reasons(p.reason, "links_capped" if page.links_capped else None,
                              off_topic, "exact_duplicate" if first is not None else None)
        if first is not None:
            self.metrics.exact_duplicates.inc()
        entry = self._entry(lease, Outcome.FETCHED, reason, p.resp, p.fetched_at,
                            simhash=fingerprint, duplicate_of=first.url if first else None,
                            **ref)
        if self.revisits is not None:
            self.revisits.observe(lease, p.resp.header, p.digest)
        # an exact copy is not compared by SimHash: its near-duplicate is its own original
        return Finished(p.base, candidates, linked,
                        simhash=fingerprint if first is None else None), entry

    def _links_to_fetched(self, lease: Lease,
                          follow: list[tuple[str, str]]) -> list[tuple[str, str]]:
        """Links to pages this worker fetched get no candidate (see ``distribute``). One
        from the same host changes nothing in the frontier; one from another host still
        counts for the target host's linking hosts, so it goes as a link between hosts."""
        own = origin_of(lease.url) + "/"
        done, host = self._fetched_urls, url_host(lease.url)
        return [(host, url) for url, _ in follow if url in done and not url.startswith(own)]

    async def _archive_any(self, lease: Lease, resp: Response,
                           outlinks: Sequence[OutLink] | None, at: datetime, *,
                           page: FetchedPage | None = None,
                           first: Capture | None = None) -> dict[str, Any]:
        """Archive a response: one over ``fetch.offload_bytes`` in the archive thread (to
        WARC files of its own), any other at once."""
        if len(resp.body) <= self.settings.fetch.offload_bytes:
            return self._archive(lease, resp, outlinks, at, page=page, first=first)
        if self._archive_thread is None or self._big_archive is None:
            self._archive_thread = ThreadPoolExecutor(1, thread_name_prefix="sluice-archive")
            self._big_archive = self._new_archive()
            self.metrics.watch_archive(self._big_archive)
        return await asyncio.get_running_loop().run_in_executor(
            self._archive_thread, functools.partial(
                self._archive, lease, resp, outlinks, at, self._big_archive, page=page,
                first=first))

    def _archive(self, lease: Lease, resp: Response, outlinks: Sequence[OutLink] | None,
                 at: datetime, archive: WarcArchive | None = None, *,
                 page: FetchedPage | None = None, first: Capture | None = None) -> dict[str, Any]:
        """Write the exchange; a page with an earlier capture of its payload (``first``)
        as a revisit record referring to it, under the record ID its digest was claimed
        with."""
        archive = archive or self.archive
        assert archive is not None
        path = "/" + lease.url.split("/", 3)[3] if lease.url.count("/") >= 3 else "/"
        ref = archive.write_exchange(
            lease.url, ("GET", path, resp.request_headers), resp.status, resp.reason,
            resp.headers, resp.body, at, remote_ip=resp.remote_ip,
            outlinks=outlinks, truncated=resp.truncated,
            record_id=page.record_id if page else None,
            payload_digest=page.digest if page else None, revisit_of=first)
        return {"warc_file": ref.file, "warc_offset": ref.offset}

    # -- robots -------------------------------------------------------------------------

    async def _rules(self, url: str) -> RobotsRules:
        return await self._robots.rules_for(origin_of(url))

    async def _fetch_robots(self, url: str) -> RobotsFetchResult:
        """GET robots.txt, following up to five redirects (RFC 9309 s.2.3.1.2)."""
        target = url
        for _ in range(ROBOTS_REDIRECTS + 1):
            try:
                resp = await self._fetcher.get(target, max_body=ROBOTS_MAX_BYTES)
            except (FetchError, AddressRefused) as exc:
                return RobotsFetchResult(None, b"", str(exc))
            if 300 <= resp.status < 400 and resp.header("Location"):
                target = canonical_or_raw(resp.header("Location") or "", target)
                continue
            result = RobotsFetchResult(resp.status, resp.body, None)
            if self.settings.sitemaps.enabled and 200 <= resp.status < 300:
                named = RobotsRules.from_entry(resp.status, resp.body,
                                               user_agent=self.user_agent).sitemaps
                await self._offer_sitemaps(
                    self.sitemaps.robots_candidates(origin_of(url), named))
            return result
        return RobotsFetchResult(None, b"", "too_many_redirects")

    # -- writing back -------------------------------------------------------------------

    async def _flush_loop(self) -> None:
        """Write back finished leases until nothing is in flight any more (a stopped worker
        still writes back what finishes within its grace)."""
        stop = asyncio.create_task(self._drained.wait())
        try:
            while not self._drained.is_set():
                wanted = asyncio.create_task(self._to_flush.wait())
                await asyncio.wait([wanted, stop], return_when=asyncio.FIRST_COMPLETED)
                wanted.cancel()
                if len(self._tasks) * LINGER_BELOW >= self.settings.fetch.concurrency:
                    await asyncio.sleep(FLUSH_LINGER_S)  # busy: gather a batch first
                self._to_flush.clear()
                await self._flush()
                self._lease_wanted.set()
        finally:
            stop.cancel()

    async def _flush(self) -> None:
        """Finish fetched pages, admit the links of finished leases, then complete them."""
        await self._finish_pages()
        while self._finished:
            batch, self._finished = self._finished, []
            try:
                await self._mark_near_duplicates(batch)
                await self._count_copies(batch)  # before the admit: a mirror's links are cut
                links = [c for f in batch for c in f.links]
                linked = [pair for f in batch for pair in f.linked]
                if links or linked:
                    self.metrics.count_admitted(await self.admission.admit(links, linked=linked))
                    self.metrics.links.inc(len(links) + len(linked))
                if self.revisits is not None and links:  # a sitemap's newer <lastmod>
                    await self.revisits.listed(links, self.admission.locate)
                # the lines go to the log (flushed, fsynced) before the completions: a
                # worker killed between the two leaves a line for a page the frontier
                # then has fetched again (at least once), never a page without a line
                for f in batch:
                    if f.entry is not None and not f.logged:
                        self._log(f.entry)
                        f.logged = True
                self._log_flush()
                if self._fault is not None:  # the log took no lines: complete nothing, the
                    self._finished = batch + self._finished  # leases are handed back
                    return
                statuses = await self.store.complete_many(
                    [f.completion for f in batch],
                    also=self.revisits.record_calls([f.completion for f in batch])
                    if self.revisits else ())
            except StoreUnavailable as exc:
                self.metrics.store_errors.inc()
                log.warning("frontier unavailable, will retry %d completions: %s", len(batch), exc)
                self._finished = batch + self._finished
                if self._stop.is_set() and not self._tasks or self._abandon.is_set():
                    raise
                await asyncio.sleep(STORE_RETRY_S)
                continue
            released = 0
            for f, status in zip(batch, statuses):
                self._held.pop(f.completion.lease.member, None)
                if status != "ok":  # expired: another worker fetches and logs it again
                    self.metrics.count_lost(status)
                    log.info("lease %s for %s was %s", f.completion.lease.id,
                             f.completion.lease.url, status)
                if status != "ok" or f.completion.outcome is not Outcome.FETCHED:
                    released += 1
                else:
                    self._remember_fetched(f.completion.lease.url)
            if await self._log_ended():
                self._log_flush()
            await self.budget.release(released)
            if self.revisits is not None:
                await self.revisits.settle([f.completion for f in batch])
            await self._finish_pages()  # pages fetched while this batch was written back

    async def _log_ended(self, *, force: bool = False) -> bool:
        """Copy the frontier's ended journal (URLs excluded on admission, dead, dropped
        with a blocked host) into the fetch log, at most once a second unless forced, so
        that the log has a line for every URL's final state. True if it wrote lines."""
        now = time.monotonic()
        if self.fetch_log is None or (not force and now - self._ended_at < ENDED_EVERY_S):
            return False
        if self._fault is not None:
            return False  # the journal keeps them for a worker that can write
        self._ended_at = now
        try:
            ended = await self.store.take_ended()
        except StoreUnavailable:
            return False  # the journal keeps them for the next time
        at = datetime.now(UTC)
        for outcome, reason, url in ended:
            self._log(FetchEntry(url=url, outcome=outcome, reason=reason,
                                 fetched_at=at, host=url_host(url) or ""))
        return bool(ended)

    def _log(self, entry: FetchEntry) -> None:
        """One fetch-log line; a disk fault stops the worker (the line is lost, its
        completion is not: the page is in the WARC files and the frontier)."""
        if self.fetch_log is None:
            return
        try:
            self.fetch_log.write(entry)
        except DiskFault as exc:
            self._disk_fault(exc)

    def _log_flush(self) -> None:
        if self.fetch_log is None:
            return
        try:
            self.fetch_log.flush()
        except DiskFault as exc:
            self._disk_fault(exc)

    def _remember_fetched(self, url: str) -> None:
        if len(self._fetched_urls) >= FETCHED_MEMORY:
            self._fetched_urls.clear()
        self._fetched_urls.add(url)

    async def _count_copies(self, batch: list[Finished]) -> None:
        """Each fetched page compared for copies (a payload digest or a SimHash) counts
        for its host's mirror figures, as a copy when it copies another host's page
        (frontier/mirrors.py); a batch retried after a Redis error is not counted twice."""
        fresh = [f for f in batch if not f.copies_counted and f.entry is not None
                 and f.entry.outcome == Outcome.FETCHED.value
                 and (f.entry.simhash is not None or f.entry.duplicate_of is not None)]
        if not fresh:
            return
        await self.mirrors.record([
            (f.completion.lease.host, f.completion.lease.url,
             f.entry.duplicate_of or f.entry.near_duplicate_of)
            for f in fresh if f.entry is not None])
        for f in fresh:
            f.copies_counted = True

    async def _mark_near_duplicates(self, batch: list[Finished]) -> None:
        """A near-duplicate page stays archived in full and its links still go to
        admission (a near copy may be the only way to a page; URL-seen absorbs the
        repeats); its log line names the page it matched and the bits between them."""
        checked = [f for f in batch if f.simhash is not None and f.simhash_checked is False]
        if not checked:
            return
        async with redis_boundary("near-duplicate check"):  # a failover: retried later
            matches = await self.near_dups.match_pages(
                [f.simhash for f in checked], [f.completion.lease.url for f in checked])
        for f, match in zip(checked, matches):
            f.simhash_checked = True
            if match is not None:
                self.metrics.near_duplicates.inc()
                if f.entry is not None and f.simhash is not None:
                    fingerprint, url = match
                    f.entry = dataclasses.replace(
                        f.entry, reason=join_reasons(f.entry.reason, "near_duplicate"),
                        near_duplicate_of=url, hamming=hamming(f.simhash, fingerprint))


def canonical_or_raw(href: str, base: str) -> str:
    """An absolute URL for ``href``; the raw text if it cannot be resolved (admission reports it)."""
    try:
        return canonicalize(href, base)
    except SluiceError:
        return href
