"""The Redis frontier: admit, lease, complete, reap and counts.

All state changes happen inside the Lua scripts of ``frontier/scripts``, one partition
per call, with ``now`` passed in. This module groups work by partition, hands every key
to the scripts, and translates Redis errors into sluice errors (frontier/redis_boundary.py).
The store's other parts live beside it: operator controls (frontier/store_controls.py),
read-only facts for explain and the admin API (frontier/store_facts.py), and the server
tuning and skiplist marks that keep Redis's encodings compact and fast
(frontier/store_tuning.py).
"""

from __future__ import annotations

import asyncio
import logging
import math
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from redis.asyncio.cluster import RedisCluster

from frontier.exceptions import LeaseNotHeld
from frontier.keys import Keys, PartitionKeys
from frontier.model import AdmitResult, Completion, Counts, Lease, STATES
from frontier.redis_boundary import redis_boundary, reply_text
from frontier.scripts import ScriptCall, Scripts, run_many, run_replicated
from frontier.settings import JobSettings
from frontier.store_controls import HostControls
from frontier.store_facts import FrontierFacts
from frontier.store_tuning import ServerTuning, seen_buckets

# a host's trust is split over at least this many out-linked hosts: its first pages show
# only a few of the hosts it links to; the seeds' hosts on the adversarial webs link to 35
# to 45 (tuned with those webs, no source). Used by admission.
TRUST_SPLIT_MIN_HOSTS = 20

log = logging.getLogger(__name__)

PROMOTE_LIMIT = 1000  # due hosts moved to ready per lease_pick call
REAP_BATCH = 500  # expired leases handled per reap call and partition
ORPHAN_CUTOFF_MS = 2**62  # later than any lease's expiry
ENDED_BATCH = 1000  # ended-journal entries taken per partition and call
CLOCK_RESYNC_S = 60.0  # how often a store synced with the server's clock checks it again
CLOCK_SKEW_WARN_MS = 1000  # a local clock this far off the server's is logged
LEASE_ROUNDS = 2
STAND_IN_SHARE = 4  # a take call gets one stand-in per this many chosen hosts
RELEASE = "release"  # the complete script's outcome for a lease handed back unfinished
TRUST_MEMO_SIZE = 100_000  # leased hosts whose trust this store remembers for admission


def stand_ins(chosen: int) -> int:
    """How many of the hosts picked and not chosen go to a take call as stand-ins for
    ``chosen`` hosts. A stand-in replaces a chosen host another process leased between
    this process's pick and take (its own calls go one at a time): a few hosts, where a
    race happens at all; each stand-in costs the take its keys and a host name (about
    3 % of Redis's work for a lease when all hosts picked went). A shortfall beyond the
    stand-ins is made up by the next round."""
    return max(1, chosen // STAND_IN_SHARE)


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


class FrontierStore(ServerTuning, HostControls, FrontierFacts):
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
                    self._take_call(p, hosts + spare.get(p, [])[:stand_ins(len(hosts))],
                                    len(hosts), expires, t)
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
                statuses[i] = reply_text(status)
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
