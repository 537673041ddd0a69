"""The Redis frontier: admit, lease, complete, reap, host controls and counts.

All state changes happen inside the Lua scripts of ``frontier/scripts``, one partition
per call, with ``now`` passed in. This module groups work by partition, hands every key
to the scripts, and translates Redis errors into sluice errors.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import time
from collections.abc import AsyncIterator, Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from redis import exceptions as redis_errors
from redis.asyncio.cluster import RedisCluster

from frontier.controls import MAX_BOOST, MIN_BOOST, echo
from frontier.exceptions import LeaseNotHeld, StoreError, StoreUnavailable
from frontier.keys import Keys, PartitionKeys
from frontier.model import AdmitResult, Completion, Counts, Lease, Outcome, STATES
from frontier.scripts import ScriptCall, Scripts, run_many, run_replicated
from frontier.settings import JobSettings

# a host's trust is split over at least this many out-linked hosts: its first pages show
# only a few of the hosts it links to; the seeds' hosts on the adversarial webs link to 35
# to 45 (tuned with those webs, no source). Used by admission.
TRUST_SPLIT_MIN_HOSTS = 20

log = logging.getLogger(__name__)

CONTROL_REFUSED = "control refused:"  # how the control script starts a refusal
PROMOTE_LIMIT = 1000  # due hosts moved to ready per lease_pick call
REAP_BATCH = 500  # expired leases handled per reap call and partition
ORPHAN_CUTOFF_MS = 2**62  # later than any lease's expiry
ENDED_BATCH = 1000  # ended-journal entries taken per partition and call
CLOCK_RESYNC_S = 60.0  # how often a store synced with the server's clock checks it again
CLOCK_SKEW_WARN_MS = 1000  # a local clock this far off the server's is logged
LEASE_ROUNDS = 2
STAND_IN_SHARE = 4  # a take call gets one stand-in per this many chosen hosts


def stand_ins(chosen: int) -> int:
    """How many of the hosts picked and not chosen go to a take call as stand-ins for
    ``chosen`` hosts. A stand-in replaces a chosen host another process leased between
    this process's pick and take (its own calls go one at a time): a few hosts, where a
    race happens at all; each stand-in costs the take its keys and a host name (about
    3 % of Redis's work for a lease when all hosts picked went). A shortfall beyond the
    stand-ins is made up by the next round."""
    return max(1, chosen // STAND_IN_SHARE)
COLD_SCAN_CHUNK = 1000  # cold-list entries read per call when looking for one URL
COLD_SCAN_LIMIT = 200_000  # entries of one cold list searched before giving up
RELEASE = "release"  # the complete script's outcome for a lease handed back unfinished
SKIPLIST_MARK_HEAD = "~sluice keeps this sorted set a skiplist~"
HASH_LISTPACK_ENTRIES = 64  # above a host hash's fields (about 30 at most), below a partition's hosts
TRUST_MEMO_SIZE = 100_000  # leased hosts whose trust this store remembers for admission


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _encodable(text: str) -> bool:
    """True if ``text`` can be sent to Redis (UTF-8: no lone surrogates)."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _in_control_state(row: dict[str, Any], which: str) -> bool:
    """Whether a host-list row is paused, blocked, boosted or delayed (``which``)."""
    if which in ("paused", "blocked"):
        return bool(row["state"] == which)
    if which == "boosted":
        return bool(row["boost"] != 1.0)
    return bool(which == "delayed" and row["delay_s"] > 0)


def _control_value(action: str, value: Any) -> str:
    """A control value as the control script reads it: a delay in whole ms, a boost as
    given. Values that are not finite pass as text for the script to refuse."""
    if value is None:
        return ""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise StoreError(f"host control refused: {action} value {echo(value)} is not a number")
    try:
        number = float(value)
    except OverflowError:
        number = math.inf if value > 0 else -math.inf
    if action == "delay" and math.isfinite(number) and abs(number) < 1e12:
        return str(round(number * 1000))
    return repr(number)


def _linking_args(args: list[Any],
                  linking: dict[str, tuple[float, bool | None]] | None) -> None:
    """The admit script's linking-host arguments: m, then m times (host, trust share,
    trusted: '1', '0', or '-' for a host whose trust is not known)."""
    if not linking:
        args.append(0)
        return
    args.append(len(linking))
    for source, (share, trusted) in linking.items():
        args += (source, repr(share) if share > 0 else "0",
                 "-" if trusted is None else "1" if trusted else "0")


def now_ms(clock: Callable[[], float] = time.time) -> int:
    return int(clock() * 1000)


def raised_inside_redis_client(exc: BaseException) -> bool:
    """True if ``exc`` was raised by code of the redis-py package (or the event loop's
    transport under it), not by sluice: during a Cluster failover redis-py's asyncio
    client can raise AttributeError or RuntimeError on a connection torn down under a
    command, where a ConnectionError was meant."""
    files = []
    tb = exc.__traceback__
    while tb is not None:
        files.append(tb.tb_frame.f_code.co_filename)
        tb = tb.tb_next
    if not files or not any("/redis/" in f for f in files):
        return False
    # raised in redis-py itself, or in the event loop's transport it was writing to
    # (uvloop's handles are Cython: their frames name .pyx files)
    return "/redis/" in files[-1] or "uvloop" in files[-1]


@contextlib.asynccontextmanager
async def redis_boundary(what: str) -> AsyncIterator[None]:
    """Translate redis-py errors into sluice errors."""
    try:
        yield
    except (redis_errors.ConnectionError, redis_errors.TimeoutError, OSError) as exc:
        raise StoreUnavailable(f"Redis unavailable during {what}: {exc}") from exc
    except redis_errors.RedisError as exc:
        raise StoreError(f"Redis error during {what}: {exc}") from exc
    except (AttributeError, RuntimeError) as exc:
        if not raised_inside_redis_client(exc):
            raise
        raise StoreUnavailable(
            f"Redis unavailable during {what} (connection torn down: {exc!r})") from exc


class QueuedUrl(NamedTuple):
    """A canonical URL ready for the admit script."""

    url: str
    fingerprint: int
    score: int
    credit: int = 0


@dataclass
class PartitionBatch:
    """Admissions for one partition: queued URLs by host, and refusals."""

    hosts: dict[str, list[QueuedUrl]] = field(default_factory=dict)  # those with URLs
    budgets: dict[str, int] = field(default_factory=dict)
    refused: list[tuple[int, str, str]] = field(default_factory=list)  # (fingerprint, reason, URL)
    # host -> {other politeness key whose pages link to it in this batch: (the trust share
    # that link hands on, whether the linking host is trusted)}; a host with no URLs here,
    # linked to only by pages fetched already, is a link-only host
    sources: dict[str, dict[str, tuple[float, bool | None]]] = field(default_factory=dict)
    seeded: set[str] = field(default_factory=set)  # hosts of seeds in this batch
    # politeness key of this partition -> the other keys its fetched pages link to
    out_links: dict[str, set[str]] = field(default_factory=dict)

    def __len__(self) -> int:
        """URLs in the batch."""
        return sum(len(v) for v in self.hosts.values()) + len(self.refused)


PARTITION_SKEW = 4.0  # room for partitions that hold big hosts (Zipf-sized sites)
BUCKET_FILL = 0.75  # target fill of a seen bucket at the expected crawl size


def seen_buckets(settings: JobSettings) -> int:
    """URL-seen buckets per partition, sized so each stays a compact intset.

    A bucket past ``seen_bucket_entries`` members turns into a hash table: still exact,
    only bigger (about 50 bytes a URL instead of 8).
    """
    s = settings.store
    assert s.partitions is not None, "decide the layout first (JobSettings.laid_out)"
    per_partition = min(s.expected_urls, s.expected_urls / s.partitions * PARTITION_SKEW)
    return max(1, math.ceil(per_partition / (s.seen_bucket_entries * BUCKET_FILL)))


def redis_tuning(settings: JobSettings) -> dict[str, str]:
    """Server settings that keep the frontier compact (listpack hot windows, intset buckets)
    and its per-partition hashes fast: a listpack hash is searched field by field, so the
    partitions' host priorities ('prio', read for every lease) turn into hash tables past
    ``HASH_LISTPACK_ENTRIES`` hosts, while a host's own hash (a few dozen fields at most)
    stays a compact listpack."""
    return {
        "zset-max-listpack-entries": str(settings.store.hot_capacity),
        "zset-max-listpack-value": str(settings.scope.max_url_length + 16),
        "set-max-intset-entries": str(settings.store.seen_bucket_entries),
        "hash-max-listpack-entries": str(HASH_LISTPACK_ENTRIES),
    }


class FrontierStore:
    """One job's frontier in Redis (a single server or a Cluster)."""

    def __init__(
        self,
        redis: Any,
        settings: JobSettings,
        *,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.redis = redis
        settings = settings.laid_out(cluster=isinstance(redis, RedisCluster))
        self.settings = settings
        self.keys = Keys(settings.name, self.partitions)
        self.clock = clock
        self.buckets = seen_buckets(settings)
        self.scripts = Scripts.register(redis)
        # lease calls of one process go one at a time: picking writes nothing, so calls
        # made at once would all choose the same best hosts (and fall back to stand-ins).
        # (Letting one call's take run while the next one picks, each passing over the
        # hosts the others chose, cost Redis 5 % more instructions per URL: the later picks
        # must show the chosen hosts too, and Redis, not Python, bounds the rate.)
        self._lease_lock = asyncio.Lock()
        self._marked = False  # the skiplist marks are in place (mark_sets, at the first lease)
        self._next_partition = 0
        self._offset_ms = 0  # server clock - local clock, once synced
        # politeness key -> (trust its links hand on, out-linked hosts), as last leased here
        self._leased_trust: dict[str, tuple[float, int]] = {}
        self._synced_at: float | None = None  # time.monotonic() of the last sync

    @property
    def partitions(self) -> int:
        """The job's partition count (decided when the store was made)."""
        assert self.settings.store.partitions is not None
        return self.settings.store.partitions

    # -- setup ---------------------------------------------------------------------------

    async def tune_server(self) -> bool:
        """Apply :func:`redis_tuning` with CONFIG SET; False if the server refuses."""
        try:
            for name, value in redis_tuning(self.settings).items():
                await self.redis.config_set(name, value)
        except redis_errors.RedisError as exc:
            log.warning("could not tune Redis (%s): memory per URL will be higher", exc)
            return False
        return True

    def skiplist_mark(self) -> str:
        """The member that keeps a partition's due, ready and leases sets skiplists: longer
        than any member a listpack may hold (``zset-max-listpack-value``, tuned to the
        longest URL), so Redis converts the set at once and, the mark never leaving, keeps
        it so. A listpack set is searched member by member (scores read back as text):
        at the hundred-odd hosts or leases of a busy partition each insert or lookup cost
        more than the whole rest of a lease (docs/benchmarks.md). Hosts and leases never
        look like it (no URL is this long); scripts pass over it by its score (+inf in due
        and leases, -inf in ready) or its missing priority."""
        return SKIPLIST_MARK_HEAD + "~" * (self.settings.scope.max_url_length + 17)

    async def mark_sets(self) -> None:
        """Put the skiplist mark in every partition's due, ready and leases sets (a store
        does at its first lease; idempotent)."""
        mark = self.skiplist_mark()
        async with redis_boundary("mark sets"):
            await asyncio.gather(*(
                self.redis.zadd(key, {mark: score}, nx=True)
                for pk in self.keys.parts
                for key, score in ((pk.due, math.inf), (pk.leases, math.inf),
                                   (pk.ready, -math.inf))))

    async def set_size(self, key: str) -> int:
        """Members of a due, ready or leases set, the skiplist mark not counted."""
        size = int(await self.redis.zcard(key))
        if size and await self.redis.zscore(key, self.skiplist_mark()) is not None:
            size -= 1
        return size

    def _now(self, now: int | None) -> int:
        return now_ms(self.clock) + self._offset_ms if now is None else now

    async def sync_clock(self) -> int:
        """Take the Redis server's clock as this store's: lease expiries, schedules and
        reaps then agree between machines whose own clocks differ. Returns the offset
        (server - local, ms). A synced store checks again every ``CLOCK_RESYNC_S``."""
        async with redis_boundary("clock"):
            before = self.clock()
            seconds, micros = await self.redis.execute_command("TIME")
            after = self.clock()
        server = int(seconds) + int(micros) / 1e6
        offset = int((server - (before + after) / 2) * 1000)
        if abs(offset) > CLOCK_SKEW_WARN_MS and abs(offset - self._offset_ms) > CLOCK_SKEW_WARN_MS:
            log.warning("this machine's clock is %.1f s off the Redis server's; sluice uses the "
                        "server's for leases and schedules", offset / 1000)
        self._offset_ms = offset
        self._synced_at = time.monotonic()
        return offset

    async def _resync_clock(self) -> None:
        if self._synced_at is not None and time.monotonic() - self._synced_at > CLOCK_RESYNC_S:
            await self.sync_clock()

    def bucket_of(self, fingerprint: int) -> int:
        return fingerprint % self.buckets

    def leased_trust(self, key: str) -> tuple[float, int] | None:
        """(trust its links hand on, distinct out-linked hosts) of a politeness key as this
        store last leased it, or None (not leased here, or its trust is not tracked)."""
        return self._leased_trust.get(key)

    def _remember_trust(self, leases: Iterable[Lease]) -> None:
        memo = self._leased_trust
        for lease in leases:
            passes = lease.passes_trust
            if passes is None:
                continue
            if len(memo) >= TRUST_MEMO_SIZE:
                memo.clear()
            memo[lease.host] = (passes, lease.out_hosts)

    # -- admit ---------------------------------------------------------------------------

    async def admit_batches(
        self, batches: dict[int, PartitionBatch], now: int | None = None
    ) -> AdmitResult:
        """Run the admit script once per partition, all in one go."""
        t = self._now(now)
        calls = [self._admit_call(p, b, t) for p, b in batches.items()
                 if b.hosts or b.refused or b.sources or b.out_links]
        total = AdmitResult()
        async with redis_boundary("admit"):
            rs = self.settings.redis
            for new, credited, excluded, dups in await run_replicated(
                    self.redis, calls, rs.wait_replicas, rs.wait_timeout_ms):
                total.add(AdmitResult(new, credited, excluded, dups))
        return total

    def _admit_call(self, partition: int, batch: PartitionBatch, now: int) -> ScriptCall:
        pk = self.keys.part(partition)
        keys: list[str] = [pk.counts, pk.reasons, pk.due, pk.ready, pk.prio, pk.touched, pk.hosts]
        prio = self.settings.priority
        sources, seeded, out_links = batch.sources, batch.seeded, batch.out_links
        link_only = [host for host in sources if host not in batch.hosts]
        args: list[Any] = [now, self.settings.store.hot_capacity, len(batch.hosts), len(batch.refused),
                           prio.host_budget_base, prio.host_budget_per_linking_host, len(link_only),
                           len(out_links), prio.host_budget_per_untrusted_host,
                           repr(prio.trust_threshold), prio.reciprocal_hosts,
                           repr(prio.suspect_penalty), repr(prio.reciprocal_ratio),
                           prio.probation_linking_hosts,
                           # one link from a seed-level host (trust 1) ends a probation too
                           repr(min(prio.vouch_threshold,
                                    prio.trust_damping / TRUST_SPLIT_MIN_HOSTS)),
                           prio.endorse_hosts, int(prio.suspect_delay_s * 1000),
                           int(prio.untrusted_delay_s * 1000), int(prio.probation_s * 1000)]
        for host, targets in out_links.items():
            args += (host, len(targets), *targets)
        slots: dict[int, int] = {}  # seen bucket -> its 1-based place among the seen keys
        buckets = self.buckets

        def slot(fp: int) -> int:
            b = fp % buckets
            s = slots.get(b)
            if s is None:
                s = slots[b] = len(slots) + 1
            return s

        default_budget = self.settings.budget.max_pages_per_host or 0
        for host, items in batch.hosts.items():
            keys += (pk.host(host), pk.hot(host), pk.cold(host), pk.linking_hosts(host),
                     pk.out_hosts(host), pk.trusted_hosts(host))
            linking = sources.get(host)
            args += (host, batch.budgets.get(host, default_budget), 1 if host in seeded else 0)
            _linking_args(args, linking)
            args.append(len(items))
            for url, fp, score, credit in items:
                b = fp % buckets
                args += (slots.get(b) or slot(fp), fp, score, credit, url)
        for host in link_only:  # only links to pages fetched already: count the links
            keys += (pk.host(host), pk.linking_hosts(host), pk.out_hosts(host),
                     pk.trusted_hosts(host))
            args.append(host)
            _linking_args(args, sources[host])
        for host in out_links:
            keys += (pk.host(host), pk.hot(host), pk.cold(host), pk.linking_hosts(host),
                     pk.out_hosts(host), pk.trusted_hosts(host))
        for fp, reason, url in batch.refused:
            args += (slot(fp), fp, reason, url.encode("utf-8", "replace"))
        keys += [pk.seen(b) for b in slots]  # dicts keep insertion order: slot i is key i
        keys.append(pk.ended)
        return (self.scripts.admit, keys, args)

    # -- lease ---------------------------------------------------------------------------

    async def lease(self, n: int, now: int | None = None) -> list[Lease]:
        """Lease up to ``n`` URLs, at most one per politeness key, best hosts first.

        Every partition is asked at once for a share of ``n`` (``lease.rank_spread`` times
        its fair part, so a partition with many ready hosts can fill in for empty ones and
        the best hosts of the whole job win); the best ``n`` hosts over all partitions are
        leased. Picking writes nothing: the hosts not chosen stay ready and serve as
        stand-ins, in order, for chosen hosts another caller took meanwhile. A second round
        asks the partitions that gave all they were asked for, if ``n`` is not reached.
        """
        async with self._lease_lock:
            return await self._lease(n, now)

    async def _lease(self, n: int, now: int | None) -> list[Lease]:
        await self._resync_clock()
        if not self._marked:
            await self.mark_sets()
            self._marked = True
        t = self._now(now)
        parts = list(range(self.partitions))
        leases: list[Lease] = []
        async with redis_boundary("lease"):
            for _ in range(LEASE_ROUNDS):
                want = n - len(leases)
                if want <= 0 or not parts:
                    break
                spread = self.settings.lease.rank_spread
                ask = min(want, max(1, math.ceil(spread * want / len(parts))))
                picked = [self._picked(r) for r in await run_many(
                    self.redis, [self._pick_call(p, ask, t) for p in parts])]
                ranked = sorted(((score, p, host) for p, hosts in zip(parts, picked)
                                 for host, score in hosts), reverse=True)
                chosen: dict[int, list[str]] = {}
                spare: dict[int, list[str]] = {}
                for i, (_, p, host) in enumerate(ranked):
                    (chosen if i < want else spare).setdefault(p, []).append(host)
                expires = t + int(self.settings.lease.ttl_s * 1000)
                got = await run_many(self.redis, [
                    self._take_call(p, hosts + spare.get(p, [])[:stand_ins(len(hosts))], len(hosts),
                                    expires, t)
                    for p, hosts in chosen.items()])
                for members in got:
                    leases += [Lease.from_member(m.decode(), expires) for m in members]
                self._remember_trust(leases)
                parts = [p for p, hosts in zip(parts, picked) if len(hosts) == ask]
        return leases

    def _pick_call(self, partition: int, n: int, now: int) -> ScriptCall:
        pk = self.keys.part(partition)
        return (self.scripts.lease_pick, [pk.due, pk.ready, pk.prio, pk.claims],
                [now, n, 0, PROMOTE_LIMIT])

    @staticmethod
    def _picked(flat: list[Any]) -> list[tuple[str, float]]:
        return [(flat[i].decode(), float(flat[i + 1])) for i in range(0, len(flat), 2)]

    def _take_call(self, partition: int, hosts: Sequence[str], want: int, expires: int,
                   now: int) -> ScriptCall:
        pk = self.keys.part(partition)
        prio = self.settings.priority
        keys = [pk.counts, pk.ready, pk.leases, pk.attempts, pk.prio, pk.due]
        for h in hosts:
            keys += (pk.host(h), pk.hot(h), pk.cold(h), pk.out_hosts(h))
        return (self.scripts.lease_take, keys,
                [expires, partition, len(hosts), self.settings.store.hot_capacity, now,
                 int(prio.suspect_delay_s * 1000), int(prio.untrusted_delay_s * 1000),
                 repr(prio.trust_threshold), int(prio.probation_s * 1000), want, *hosts])

    # -- complete and reap ---------------------------------------------------------------

    def _outcome_keys(self, pk: PartitionKeys) -> list[str]:
        return [pk.counts, pk.reasons, pk.leases, pk.attempts, pk.dead,
                pk.due, pk.ready, pk.prio, pk.touched]

    async def complete_many(
        self, completions: Iterable[Completion], now: int | None = None, *,
        also: Sequence[ScriptCall] = (),
    ) -> list[str]:
        """End leases; one status per completion, in order: 'ok', 'not_held' or 'expired'.
        ``also``: more script calls sent after the completions, in the same pipeline (the
        revisit records of the same fetches: frontier/revisit_store.py)."""
        t = self._now(now)
        items = list(completions)
        by_part: dict[int, list[int]] = {}
        for i, c in enumerate(items):
            by_part.setdefault(c.lease.partition, []).append(i)
        statuses = [""] * len(items)
        async with redis_boundary("complete"):
            results = await run_many(self.redis, [
                *(self._complete_call(p, [items[i] for i in idx], t)
                  for p, idx in by_part.items()), *also])
        for idx, res in zip(by_part.values(), results):
            for i, status in zip(idx, res):
                statuses[i] = status.decode() if isinstance(status, bytes) else status
        return statuses

    async def complete(self, completion: Completion, now: int | None = None) -> None:
        """End one lease; raises LeaseNotHeld if it expired or is unknown."""
        (status,) = await self.complete_many([completion], now)
        if status != "ok":
            raise LeaseNotHeld(f"lease {completion.lease.id} for {completion.lease.url}: {status}")

    def _complete_call(self, partition: int, items: list[Completion], now: int) -> ScriptCall:
        pk = self.keys.part(partition)
        pol = self.settings.politeness
        keys = self._outcome_keys(pk)
        args: list[Any] = [
            now, self.settings.store.hot_capacity, self.settings.lease.max_attempts,
            int(pol.min_delay_s * 1000), pol.response_time_factor, int(pol.max_delay_s * 1000),
            len(items),
        ]
        for c in items:
            h = c.lease.host
            keys += (pk.host(h), pk.hot(h), pk.cold(h))
            crawl = "" if c.crawl_delay_s is None else int(
                min(c.crawl_delay_s, pol.crawl_delay_cap_s) * 1000)
            args += (c.lease.member, c.outcome.value, c.reason or "none", int(c.response_s * 1000),
                     int(c.extra_delay_s * 1000), crawl)
        keys.append(pk.ended)
        return (self.scripts.complete, keys, args)

    # -- extend and release (a worker's held leases) -------------------------------------

    async def extend(self, leases: Iterable[Lease], now: int | None = None) -> list[str]:
        """Push the expiry of held leases to ``now + lease.ttl_s`` (a worker's heartbeat).

        One status per lease, in order: 'ok', 'not_held' (completed, reaped or unknown) or
        'expired' (past its expiry: the reaper's now, so it is not extended).
        """
        t = self._now(now)
        expires = t + int(self.settings.lease.ttl_s * 1000)

        def call(partition: int, items: list[Lease]) -> ScriptCall:
            return (self.scripts.extend, [self.keys.part(partition).leases],
                    [t, expires, *(lease.member for lease in items)])

        return await self._per_partition("extend", list(leases), call)

    async def release(self, leases: Iterable[Lease], now: int | None = None) -> list[str]:
        """Hand held leases back unfinished (a worker stopping, or one that cannot write).

        Each URL is queued again as it was: no attempt is counted and no ended state, so
        ``admitted = queued + leased + fetched + failed + excluded + dead`` still holds
        (leased - 1, queued + 1). The host is scheduled as after any completion. Statuses
        as :meth:`complete_many`.
        """
        t = self._now(now)
        pol = self.settings.politeness

        def call(partition: int, items: list[Lease]) -> ScriptCall:
            pk = self.keys.part(partition)
            keys = self._outcome_keys(pk)
            args: list[Any] = [
                t, self.settings.store.hot_capacity, self.settings.lease.max_attempts,
                int(pol.min_delay_s * 1000), pol.response_time_factor,
                int(pol.max_delay_s * 1000), len(items)]
            for lease in items:
                keys += (pk.host(lease.host), pk.hot(lease.host), pk.cold(lease.host))
                args += (lease.member, RELEASE, RELEASE, 0, 0, "")
            keys.append(pk.ended)
            return (self.scripts.complete, keys, args)

        return await self._per_partition("release", list(leases), call)

    async def _per_partition(
        self, what: str, leases: list[Lease], call: Callable[[int, list[Lease]], ScriptCall]
    ) -> list[str]:
        """One script call per partition of ``leases`` (all in one go); their statuses in
        the order of ``leases``."""
        by_part: dict[int, list[int]] = {}
        for i, lease in enumerate(leases):
            by_part.setdefault(lease.partition, []).append(i)
        statuses = [""] * len(leases)
        async with redis_boundary(what):
            results = await run_many(self.redis, [
                call(p, [leases[i] for i in idx]) for p, idx in by_part.items()])
        for idx, res in zip(by_part.values(), results):
            for i, status in zip(idx, res):
                statuses[i] = _text(status)
        return statuses

    async def reap(self, now: int | None = None, *, orphans: bool = False) -> dict[str, int]:
        """Return expired leases to their hosts; counts of 'requeued', 'dead', 'excluded'.

        ``orphans=True`` returns every lease, expired or not (a resumed embedded job: the
        process that held them is gone); hosts are still scheduled at ``now``.
        """
        t = self._now(now)
        cutoff = ORPHAN_CUTOFF_MS if orphans else t
        totals: dict[str, int] = {}
        s = self.settings
        async with redis_boundary("reap"):
            for pk in self.keys.parts:
                while True:
                    members = await self.redis.zrangebyscore(
                        pk.leases, "-inf", f"({cutoff}", 0, REAP_BATCH)
                    if not members:
                        break
                    keys = self._outcome_keys(pk)
                    for m in members:
                        host = m.decode().split("\n", 2)[1]
                        keys += (pk.host(host), pk.hot(host), pk.cold(host))
                    keys.append(pk.ended)
                    flat = await self.scripts.reap(
                        keys, [t, cutoff, s.store.hot_capacity, s.lease.max_attempts,
                               len(members), *members])
                    for result in flat[1::2]:
                        r = result.decode() if isinstance(result, bytes) else result
                        totals[r] = totals.get(r, 0) + 1
                    if len(members) < REAP_BATCH:
                        break
        return totals

    async def recover(self, now: int | None = None) -> dict[str, int]:
        """Make a resumed embedded job runnable: every lease is an orphan of a process
        that is gone (reaped as expired), and no host waits past ``now`` plus the longest
        gap the settings allow (a schedule written by a faulty clock, say)."""
        t = self._now(now)
        totals = await self.reap(t, orphans=True)
        latest = t + int(self.settings.politeness.max_delay_s * 1000)
        pulled = 0
        async with redis_boundary("recover"):
            for pk in self.keys.parts:
                late = await self.redis.zrangebyscore(pk.due, f"({latest}", "(+inf")
                if late:
                    await self.redis.zadd(pk.due, {h: t for h in late}, xx=True)
                    pulled += len(late)
        if pulled:
            totals["rescheduled"] = pulled
        return totals

    # -- operator controls -----------------------------------------------------------------

    async def control(self, host: str, action: str, value: float | None = None,
                      now: int | None = None, *, create: bool = True) -> str:
        """Apply an operator's action (one of ``HOST_ACTIONS``) to one politeness key;
        returns its state. ``value``: the boost multiplier, or the delay in seconds.

        The control script checks every argument before its first write and refuses with
        nothing changed (StoreError): an unknown action, a value that is missing, not
        finite or out of range, an odd key, or (``create=False``) a key the frontier has
        no record of. Operator input is validated before this by frontier.controls.
        """
        for text in (host, action):
            if not isinstance(text, str) or not _encodable(text):
                raise StoreError(f"host control refused: {echo(text)} is not text")
        pk = self.keys.part_for(host)
        pol = self.settings.politeness
        keys = [pk.counts, pk.reasons, pk.due, pk.ready, pk.prio, pk.touched, pk.hosts,
                pk.controlled, pk.host(host), pk.hot(host), pk.cold(host), pk.held_hot(host),
                pk.held_cold(host)]
        args = [self._now(now), host, action, _control_value(action, value),
                self.settings.store.hot_capacity, 1 if create else 0, repr(MIN_BOOST),
                repr(MAX_BOOST), int(pol.max_delay_s * 1000), int(pol.min_delay_s * 1000),
                repr(float(pol.response_time_factor)), int(pol.max_delay_s * 1000),
                repr(self.settings.priority.suspect_penalty)]
        try:
            async with redis_boundary("control"):
                state = await self.scripts.control(keys, args)
        except StoreError as exc:
            cause = exc.__cause__
            if isinstance(cause, redis_errors.ResponseError) and str(cause).startswith(
                    CONTROL_REFUSED):
                raise StoreError(f"host {echo(host)}: {cause}") from None
            raise
        return _text(state)

    async def host_known(self, host: str) -> bool:
        """True if the frontier has a record of this politeness key (found by admission,
        or made by an operator's control). Records are never removed."""
        if not _encodable(host):
            return False
        async with redis_boundary("host info"):
            return bool(await self.redis.exists(self.keys.part_for(host).host(host)))

    async def controlled_hosts(self, which: str | None = None) -> list[dict[str, Any]]:
        """The hosts under operator control (paused, blocked, boosted or delayed), by name;
        ``which`` (one of those four words) keeps the hosts in that state."""
        async with redis_boundary("host list"):
            members = await asyncio.gather(
                *(self.redis.smembers(pk.controlled) for pk in self.keys.parts))
            hosts = sorted(_text(h) for row in members for h in row)
            rows = await asyncio.gather(*(self._control_row(h) for h in hosts))
        return [r for r in rows if which is None or _in_control_state(r, which)]

    async def _control_row(self, host: str) -> dict[str, Any]:
        pk = self.keys.part_for(host)
        state, boost, delay, held = await self.redis.hmget(
            pk.host(host), "state", "boost", "delay_ms", "held")
        queued = await self.redis.zcard(pk.hot(host)) + await self.redis.llen(pk.cold(host))
        due = await self.redis.zscore(pk.due, host)
        return {"host": host, "state": _text(state) if state is not None else None,
                "boost": float(boost or 1), "delay_s": int(delay or 0) / 1000,
                "queued": queued, "held": int(held or 0),
                "due_ms": None if due is None else int(due)}

    # -- reading ---------------------------------------------------------------------------

    async def counts(self) -> Counts:
        """URLs by state, summed over partitions."""
        out = Counts()
        async with redis_boundary("counts"):
            rows = await asyncio.gather(
                *(self.redis.hgetall(pk.counts) for pk in self.keys.parts),
                *(self.redis.hgetall(pk.reasons) for pk in self.keys.parts),
            )
        parts = self.partitions
        for row in rows[:parts]:
            for k, v in row.items():
                name = k.decode() if isinstance(k, bytes) else k
                if name == "admitted" or name in STATES:
                    setattr(out, name, getattr(out, name) + int(v))
        for row in rows[parts:]:
            for k, v in row.items():
                name = k.decode() if isinstance(k, bytes) else k
                out.reasons[name] = out.reasons.get(name, 0) + int(v)
        return out

    async def host_info(self, host: str) -> dict[str, Any]:
        """The stored fields of one politeness key plus its queue length and schedule."""
        pk = self.keys.part_for(host)
        async with redis_boundary("host info"):
            fields = await self.redis.hgetall(pk.host(host))
            hot = await self.redis.zcard(pk.hot(host))
            cold = await self.redis.llen(pk.cold(host))
            due = await self.redis.zscore(pk.due, host)
            ready = await self.redis.zscore(pk.ready, host)
        info: dict[str, Any] = {
            (k.decode() if isinstance(k, bytes) else k): (v.decode() if isinstance(v, bytes) else v)
            for k, v in fields.items()
        }
        info.update(queued=hot + cold, due_ms=due, ready_priority=ready)
        return info

    async def url_facts(self, url: str, fingerprint: int, host: str) -> dict[str, Any]:
        """Everything stored about one canonical URL and its politeness key (for explain).

        Reads only: URL-seen bucket, hot window (score and rank), cold list (position),
        leases, attempts, dead letters, the host hash, its linking-hosts count and the
        partition's schedule sets. Per-URL ended states are not stored.
        """
        pk = self.keys.part_for(host)
        r = self.redis
        out: dict[str, Any] = {"partition": pk.index}
        async with redis_boundary("explain"):
            out["seen"] = bool(await r.sismember(pk.seen(self.bucket_of(fingerprint)), fingerprint))
            out["hot_score"] = await r.zscore(pk.hot(host), url)
            out["hot_rank"] = await r.zrevrank(pk.hot(host), url)
            out["hot_size"] = await r.zcard(pk.hot(host))
            out["cold_size"] = await r.llen(pk.cold(host))
            out["cold_position"], out["cold_score"] = await self._find_cold(pk.cold(host), url)
            out["lease"] = None
            for member, expiry in await r.zrange(pk.leases, 0, -1, withscores=True):
                text = member.decode() if isinstance(member, bytes) else member
                if text.rsplit("\n", 1)[-1] == url:
                    out["lease"] = Lease.from_member(text, int(expiry))
            attempts = await r.hget(pk.attempts, url)
            out["attempts"] = int(attempts) if attempts is not None else 0
            dead = await r.hget(pk.dead, url)
            out["dead_reason"] = dead.decode() if isinstance(dead, bytes) else dead
            fields = await r.hgetall(pk.host(host))
            out["host"] = {_text(k): _text(v) for k, v in fields.items()}
            out["linking_hosts"] = int(await r.pfcount(pk.linking_hosts(host)))
            out["spam"] = await self._spam_counts(pk, host)
            out["due_ms"] = await r.zscore(pk.due, host)
            out["ready_priority"] = await r.zscore(pk.ready, host)
            out["ready_rank"] = await r.zrevrank(pk.ready, host)
            out["ready_size"] = await self.set_size(pk.ready)
            out["due_size"] = await self.set_size(pk.due)
            out["claimed_until_ms"] = await r.zscore(pk.claims, host)
            prio = await r.hget(pk.prio, host)
            out["priority"] = float(prio) if prio is not None else None
        return out

    async def _spam_counts(self, pk: PartitionKeys, host: str) -> dict[str, int]:
        """The link counts behind a host's link-spam signals (HyperLogLog estimates):
        trusted linking hosts, out-linked hosts, reciprocal hosts (linking and linked) and
        trusted one-way linking hosts (trusted, not linked back)."""
        r = self.redis
        linking, out, trusted = pk.linking_hosts(host), pk.out_hosts(host), pk.trusted_hosts(host)
        ins, outs, good = [int(await r.pfcount(k)) for k in (linking, out, trusted)]
        both = int(await r.pfcount(linking, out))
        return {"trusted_linking_hosts": good, "out_hosts": outs,
                "reciprocal_hosts": max(0, ins + outs - both),
                "trusted_one_way": max(0, int(await r.pfcount(trusted, out)) - outs)}

    async def _find_cold(self, key: str, url: str) -> tuple[int | None, int | None]:
        """(0-based position, score) of ``url`` in a cold list, or (None, None)."""
        suffix = " " + url
        for start in range(0, COLD_SCAN_LIMIT, COLD_SCAN_CHUNK):
            chunk = await self.redis.lrange(key, start, start + COLD_SCAN_CHUNK - 1)
            for i, raw in enumerate(chunk):
                entry = _text(raw)
                if entry.endswith(suffix) and " " not in entry[: len(entry) - len(suffix)]:
                    return start + i, int(float(entry[: len(entry) - len(suffix)]))
            if len(chunk) < COLD_SCAN_CHUNK:
                break
        return None, None

    async def take_ended(self, most: int = ENDED_BATCH) -> list[tuple[str, str, str]]:
        """Take up to ``most`` entries of each partition's ended journal: (outcome, reason,
        URL) of URLs that reached a final state outside a worker's completion (excluded
        on admission, dead, dropped with a blocked host). The caller writes them to its
        fetch log; an entry is taken once."""
        async with redis_boundary("ended journal"):
            rows = await asyncio.gather(*(self.redis.lpop(pk.ended, most) for pk in self.keys.parts))
        out = []
        for row in rows:
            for raw in row or ():
                outcome, reason, url = raw.decode("utf-8", "replace").split(" ", 2)
                out.append((outcome, reason, url))
        return out

    async def is_drained(self) -> bool:
        """True when nothing is queued or leased."""
        c = await self.counts()
        return c.queued == 0 and c.leased == 0
