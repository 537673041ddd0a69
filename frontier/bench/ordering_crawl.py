"""A crawl of a synthetic web by the real frontier, with simulated fetches and clock.

The frontier is real: ``FrontierStore`` on a private redis-server with the job's own
scripts, ``Admission`` with the job's scope, seeds admitted by ``admit_seeds``, cash
handed on by ``frontier.priority.distribute``. The fetches are simulated from the web's
graph, the way the worker (``workers/loop.py``) treats their answers: robots.txt
exclusions, 5xx and flaky 503s with Retry-After, redirects handing on all their cash,
nofollow, links to pages already fetched offered only as links between hosts. Time is
simulated too: ``concurrency`` fetch slots, leases taken in chunks of a quarter batch as
slots come free (as the worker does), every fetch taking ``latency_s`` (plus
``slow_s`` on the web's slow hosts), and the store scheduling each host's next fetch
on the injected clock by its politeness rules. So the order is what a worker on a fast
network would fetch, without waiting for it. Not simulated: SimHash near-duplicates
and the page-size limits.
"""

from __future__ import annotations

import heapq
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from frontier.admission import Admission, scope_from_settings
from frontier.embedded import RedisProcess
from frontier.job import Job, admit_seeds
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.priority import distribute
from frontier.redis_client import connect
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from synthweb.graph import SyntheticWeb
from synthweb.model import Behaviour

CLOCK_START = 1_000_000.0
LEASE_CHUNK_DIVISOR = 4  # as workers/loop.py: lease once a quarter of a batch is free
IDLE_MIN_S = 0.01  # as workers/loop.py: a worker with nothing to lease looks again ...
IDLE_MAX_S = 0.25  # ... after this long at most
FETCHED_KINDS = (Behaviour.OK, Behaviour.ASSET, Behaviour.REDIRECT, Behaviour.ENDLESS_REDIRECT)


@dataclass(frozen=True)
class Timing:
    """Simulated time: fetch slots and how long each fetch takes."""

    latency_s: float = 0.003  # a loopback answer of the synthetic web takes about this long
    slow_s: float = 0.2  # added on the web's slow hosts (frontier/demo.py: DEMO_SLOW_DELAY_S)


@dataclass
class CrawlResult:
    """What the simulated crawl did."""

    order: list[str]  # URLs fetched (pages and redirects answered), in order, once each
    started: list[float] = field(default_factory=list)  # simulated start of each fetch
    requests: int = 0
    seconds: float = 0.0  # simulated time the crawl took
    reasons: dict[str, int] = field(default_factory=dict)  # URLs by outcome:reason


class Clock:
    """The injected clock."""

    def __init__(self) -> None:
        self.t = CLOCK_START

    def __call__(self) -> float:
        return self.t


class _Crawl:
    def __init__(self, web: SyntheticWeb, settings: JobSettings, job: Job, clock: Clock,
                 timing: Timing) -> None:
        self.web, self.settings, self.job, self.clock, self.timing = web, settings, job, clock, timing
        self.token = (settings.fetch.user_agent or "").split("/", 1)[0]
        self.order: list[str] = []
        self.started: list[float] = []
        self.lease_at: dict[str, float] = {}  # lease member -> simulated time it was taken
        self.fetched: set[str] = set()  # fetches whose completion was written back
        self.in_order: set[str] = set()
        self.requests = 0
        self.tries: dict[str, int] = {}

    def latency(self, lease: Lease) -> float:
        extra = self.timing.slow_s if lease.host in self.web.slow_hosts else 0.0
        return self.timing.latency_s + extra

    def answer(self, lease: Lease) -> tuple[Completion, list[Candidate], list[tuple[str, str]]]:
        """The completion, candidates and links to fetched pages of one simulated fetch."""
        s, web = self.settings, self.web
        pol = s.politeness
        delay = web.crawl_delays.get(lease.host)
        if pol.obey_robots and not web.allowed(lease.url, self.token):
            return Completion(lease, Outcome.EXCLUDED, "robots", crawl_delay_s=delay), [], []
        self.requests += 1
        page = web.resolve(lease.url)
        took = self.latency(lease)
        if page is None:
            return Completion(lease, Outcome.FAILED, "http_404", took, crawl_delay_s=delay), [], []
        if page.behaviour is Behaviour.FLAKY and self.tries.get(lease.url, 0) < page.fail_count:
            self.tries[lease.url] = self.tries.get(lease.url, 0) + 1
            wait = float(page.retry_after or 0)
            return Completion(lease, Outcome.RETRY, "http_503", took, min(wait, pol.max_delay_s),
                              delay), [], []
        if page.behaviour is Behaviour.ERROR:
            return Completion(lease, Outcome.FAILED, f"http_{page.status}", took,
                              crawl_delay_s=delay), [], []
        done = Completion(lease, Outcome.FETCHED, f"http_{page.status}", took, crawl_delay_s=delay)
        if page.location is not None:  # a redirect hands on all its cash, one hop more
            if lease.hops >= s.fetch.max_redirects:
                return Completion(lease, Outcome.FAILED, "redirect_limit", took,
                                  crawl_delay_s=delay), [], []
            self.note_fetch(lease)
            return done, [Candidate(page.location, depth=lease.depth + 1, cash=lease.cash,
                                    credit=lease.cash, source_host=lease.host,
                                    hops=lease.hops + 1)], []
        self.note_fetch(lease)
        if page.meta_nofollow and not s.fetch.follow_nofollow:
            follow: list[tuple[str, str]] = []
        else:
            follow = [(ln.url, ln.anchor) for ln in page.links
                      if s.fetch.follow_nofollow or not ln.nofollow]
        links = distribute(lease.url, lease.cash, lease.depth, follow, s.priority,
                           known=self.fetched)
        own = f"http://{lease.host}/"
        linked = [(lease.host, u) for u, _ in follow if u in self.fetched and not u.startswith(own)]
        return done, links, linked

    def note_fetch(self, lease: Lease) -> None:
        if lease.url not in self.in_order:
            self.in_order.add(lease.url)
            self.order.append(lease.url)
            self.started.append(self.lease_at[lease.member])

    async def write_back(self, leases: list[Lease]) -> None:
        """Admit the links first, then complete the leases (the worker's order)."""
        answers = [self.answer(lease) for lease in leases]
        links = [c for _, found, _ in answers for c in found]
        linked = [pair for _, _, pairs in answers for pair in pairs]
        if links or linked:
            await self.job.admission.admit(links, linked=linked)
        await self.job.store.complete_many([c for c, _, _ in answers])
        for c, _, _ in answers:
            if c.outcome is Outcome.FETCHED:
                self.fetched.add(c.lease.url)

    async def run(self, limit: int) -> None:
        s, clock = self.settings, self.clock
        slots = s.fetch.concurrency
        chunk = max(1, min(s.lease.batch, slots) // LEASE_CHUNK_DIVISOR)
        in_flight: list[tuple[float, int, Lease]] = []
        seq = 0
        idle = IDLE_MIN_S
        while len(self.order) < limit:
            free = slots - len(in_flight)
            room = limit - len(self.order) - len(in_flight)  # the page budget's reserve
            leases: list[Lease] = []
            if room > 0 and (free >= chunk or (free > 0 and not in_flight)):
                leases = await self.job.store.lease(min(free, s.lease.batch, room))
            for lease in leases:
                seq += 1
                self.lease_at[lease.member] = clock.t
                heapq.heappush(in_flight, (clock.t + self.latency(lease), seq, lease))
            if leases:
                idle = IDLE_MIN_S
                continue
            if not in_flight:
                counts = await self.job.store.counts()
                if counts.queued == 0 and counts.leased == 0:
                    return
                clock.t += idle  # nothing due yet: look again later, less and less often
                idle = min(IDLE_MAX_S, idle * 2)
                continue
            soonest = in_flight[0][0]
            if free >= chunk and soonest > clock.t + idle:
                clock.t += idle  # free slots: the worker looks again before the next answer
                idle = min(IDLE_MAX_S, idle * 2)
                continue
            clock.t = max(clock.t, soonest)
            done = []
            while in_flight and in_flight[0][0] <= clock.t:
                done.append(heapq.heappop(in_flight)[2])
            await self.write_back(done)


async def crawl(web: SyntheticWeb, settings: JobSettings, limit: int, tmp: Path,
                timing: Timing = Timing(), redis_url: str | None = None) -> CrawlResult:
    """Crawl ``web`` from its seeds with ``settings`` until ``limit`` pages are fetched
    or nothing is left: on a private redis-server living in ``tmp`` meanwhile, or on the
    server at ``redis_url`` (flushed first)."""
    result, _ = await simulate(web, settings, limit, tmp, timing, redis_url)
    return result


async def simulate(web: SyntheticWeb, settings: JobSettings, limit: int, tmp: Path,
                   timing: Timing = Timing(), redis_url: str | None = None,
                   make: Callable[..., _Crawl] = _Crawl) -> tuple[CrawlResult, _Crawl]:
    """:func:`crawl` with the simulation made by ``make(web, settings, job, clock,
    timing)`` (a subclass of the simulated crawl), returned beside the result."""
    settings = settings.laid_out(cluster=False)
    server = None
    if redis_url is None:
        server = RedisProcess(tmp / "redis", appendonly=False,
                              extra_config=redis_tuning(settings))
        server.start()
        redis_url = server.url
    client = connect(redis_url)
    clock = Clock()
    try:
        if server is None:
            await client.flushall()
        store = FrontierStore(client, settings, clock=clock)
        admission = Admission(store, scope_from_settings(settings, web.seeds))
        job = Job(settings, store, admission, None)
        await admit_seeds(job, web.seeds)
        sim = make(web, settings, job, clock, timing)
        await sim.run(limit)
        counts = await store.counts()
        result = CrawlResult(sim.order, [t - CLOCK_START for t in sim.started], sim.requests,
                             round(clock.t - CLOCK_START, 3), dict(counts.reasons))
        return result, sim
    finally:
        await client.aclose()
        if server is not None:
            server.stop()
