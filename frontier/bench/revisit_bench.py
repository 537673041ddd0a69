"""``sluice bench revisit``: average freshness of a collection of changing pages over a
simulated week, sluice's revisit policy against uniform and proportional revisiting at
the same fetch rate (Cho & Garcia-Molina, ACM TODS 2003 and SIGMOD 2000 predict
optimal >= uniform > proportional).

The frontier is real: ``FrontierStore`` and ``RevisitStore`` on a private redis-server,
the job's own scripts (admit, lease, complete, revisit), the pages admitted as seeds.
Time is simulated (the store's clock is injected; nothing waits) and so are the fetches:
each leased page is answered from the web's known change schedule (synthweb/changing.py)
as its server would answer a conditional GET: ``304`` when unchanged since the last
fetch, else ``200`` with the digest of its current version.

Freshness of a page over ``[a, b)`` is the share of that time its latest copy equals
the live page, computed exactly from the change times; the collection's is the mean over
pages. Uniform and proportional revisiting get the same number of fetches in the
measured window as sluice made, the same change times, and the true rates
(proportional needs them; sluice has only its estimates). The closed form of uniform
revisiting, ``(1 - e^(-lambda I)) / (lambda I)`` averaged over the pages, is printed
beside its simulation.
"""

from __future__ import annotations

import asyncio
import hashlib
import json
import math
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from frontier.admission import Admission, scope_from_settings
from frontier.embedded import RedisProcess
from frontier.job import Job, admit_seeds
from frontier.model import Completion, Outcome
from frontier.redis_client import connect
from frontier.revisit import freshness, optimal_allocation
from frontier.revisit_store import Observation, RevisitStore
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from synthweb.changing import DAY_S, START_EPOCH, ChangingPage, ChangingWeb

UA = "sluice-bench/0.1 (+http://operator.test/contact)"
LATENCY_S = 0.05  # a simulated fetch takes this long


@dataclass(frozen=True)
class BenchSpec:
    """The web and the crawl of one run."""

    hosts: int = 10
    pages_per_host: int = 50
    min_rate_per_day: float = 0.1
    max_rate_per_day: float = 20.0
    host_fetches_per_day: float = 100.0
    min_interval_s: float = 3600.0
    max_interval_s: float = 4 * DAY_S
    warmup_days: float = 7.0
    days: float = 7.0
    seed: int = 1


class FakeClock:
    def __init__(self) -> None:
        self.t = START_EPOCH

    def __call__(self) -> float:
        return self.t


def settings_for(spec: BenchSpec) -> JobSettings:
    return JobSettings.model_validate({
        "name": "revisit-bench",
        "store": {"partitions": 4},
        "fetch": {"user_agent": UA},
        "scope": {"allow_all_hosts": True},
        "budget": {"max_pages_per_host": None},
        "priority": {"host_budget_base": 0, "probation_s": 0},
        "politeness": {"min_delay_s": 1.0, "response_time_factor": 0.0},
        "revisit": {"enabled": True, "min_interval_s": spec.min_interval_s,
                    "max_interval_s": spec.max_interval_s,
                    "host_fetches_per_day": spec.host_fetches_per_day},
    })


def digest_of(page: ChangingPage, version: int) -> str:
    return "sha1:" + hashlib.sha1(ChangingWeb.body(page, version)).hexdigest().upper()


async def _next_events(store: FrontierStore) -> tuple[float, float]:
    """The earliest time (ms) a host is due, and a page comes due again (inf: none);
    one round trip."""
    async with store.redis.pipeline(transaction=False) as pipe:
        for pk in store.keys.parts:
            pipe.zrange(pk.due, 0, 0, withscores=True)
            pipe.zrange(pk.revisits, 0, 0, withscores=True)
        firsts = await pipe.execute()
    due = min((f[0][1] for f in firsts[0::2] if f), default=math.inf)
    again = min((f[0][1] for f in firsts[1::2] if f), default=math.inf)
    return due, again


async def simulate_sluice(web: ChangingWeb, spec: BenchSpec, redis_url: str
                          ) -> tuple[dict[str, list[float]], dict[str, Any]]:
    """Crawl ``web`` with revisits for warm-up plus measured days; every page's fetch
    times (s after the web's start) and figures of the run."""
    settings = settings_for(spec).laid_out(cluster=False)
    clock = FakeClock()
    web.clock = clock
    client = connect(redis_url)
    await client.flushall()
    fetched: dict[str, list[float]] = {p.url: [] for p in web.pages}
    seen_version: dict[str, int] = {}
    by_url = {p.url: p for p in web.pages}
    calls = 0
    try:
        store = FrontierStore(client, settings, clock=clock)
        rv = RevisitStore(store)
        admission = Admission(store, scope_from_settings(settings, [p.url for p in web.pages]))
        job = Job(settings, store, admission, None)
        await admit_seeds(job, [p.url for p in web.pages])
        end = (spec.warmup_days + spec.days) * DAY_S
        while web.now() < end:
            calls += 1
            due, again = await _next_events(store)
            if again <= clock.t * 1000:
                await rv.release_due()
            leases = await store.lease(settings.lease.batch)
            if not leases:
                due, again = await _next_events(store)
                clock.t = max(clock.t + 0.001, min(due, again) / 1000)
                continue
            clock.t += LATENCY_S
            t = web.now()
            observations = []
            for lease in leases:
                page = by_url[lease.url]
                version = page.version(t)
                unchanged = seen_version.get(lease.url) == version
                seen_version[lease.url] = version
                fetched[lease.url].append(t)
                observations.append(Observation(
                    lease.host, lease.url, lease.score, unchanged,
                    None if unchanged else digest_of(page, version),
                    ChangingWeb.etag(page, version), web.last_modified(page, t)))
            await store.complete_many([Completion(lz, Outcome.FETCHED, "http_200",
                                                  LATENCY_S) for lz in leases],
                                      also=rv.record_calls(observations))
        figures = await rv.figures()
        memory = await rv.memory_bytes()
        counts = await store.counts()
    finally:
        await client.aclose()
    return fetched, {"loop_steps": calls, "tracked": figures.tracked,
                     "estimated_freshness_now": figures.freshness,
                     "revisit_bytes_per_page": round(memory / max(1, figures.tracked), 1),
                     "balanced": counts.balanced}


def window_freshness(page: ChangingPage, fetches: list[float], a: float, b: float) -> float:
    """Share of ``[a, b)`` the page's latest copy (fetched at ``fetches``, sorted) is fresh."""
    fresh = 0.0
    times = [t for t in fetches if t < b]
    for i, t in enumerate(times):
        nxt = times[i + 1] if i + 1 < len(times) else b
        lo, hi = max(t, a), min(nxt, b)
        if hi <= lo:
            continue
        stays = page.next_change(t)  # fresh from t until the first change after t
        fresh += max(0.0, min(hi, stays) - lo)
    return fresh / (b - a)


def periodic(first: float, interval: float, end: float) -> list[float]:
    """Fetch times ``first, first + interval, ...`` before ``end``."""
    if not math.isfinite(interval) or interval <= 0:
        return [first]
    n = int((end - first) / interval) + 1
    return [first + k * interval for k in range(n) if first + k * interval < end]


def evaluate(web: ChangingWeb, fetched: dict[str, list[float]], spec: BenchSpec
             ) -> dict[str, Any]:
    """Freshness of the measured window for sluice, uniform, proportional and the
    optimal allocation with the true rates, all with sluice's number of fetches."""
    a, b = spec.warmup_days * DAY_S, (spec.warmup_days + spec.days) * DAY_S
    pages = web.pages
    span = b - a
    fetches = sum(1 for p in pages for t in fetched[p.url] if a <= t < b)
    rate = fetches / span  # fetches per second in the window
    # every policy starts the window with a copy fetched at its last fetch before it
    first = {p.url: max([t for t in fetched[p.url] if t < a], default=0.0) for p in pages}

    def mean_fresh(intervals: dict[str, float]) -> float:
        total = 0.0
        for p in pages:
            iv, last = intervals[p.url], first[p.url]
            times = [last]
            if math.isfinite(iv) and iv > 0:  # on from the copy held when the window opens
                k = max(1, math.ceil((a - last) / iv))
                times += periodic(last + k * iv, iv, b)
            total += window_freshness(p, times, a, b)
        return total / len(pages)

    n = len(pages)
    uniform_iv = n / rate
    lam_sum = sum(p.rate for p in pages)
    proportional = {p.url: lam_sum / (rate * p.rate) for p in pages}
    optimal_list = optimal_allocation([p.rate for p in pages], rate, 1e-3, 1e12)
    sluice = sum(window_freshness(p, fetched[p.url], a, b) for p in pages) / n
    uniform = mean_fresh({p.url: uniform_iv for p in pages})
    return {
        "pages": n, "fetches_in_window": fetches,
        "fetches_per_page_per_day": round(fetches / n / spec.days, 3),
        "freshness": {
            "sluice": round(sluice, 4),
            "uniform": round(uniform, 4),
            "proportional": round(mean_fresh(proportional), 4),
            "optimal_true_rates": round(mean_fresh(
                {p.url: iv for p, iv in zip(pages, optimal_list)}), 4),
            "uniform_closed_form": round(sum(freshness(p.rate, uniform_iv) for p in pages) / n, 4),
        },
    }


async def run_once(spec: BenchSpec, redis_url: str) -> dict[str, Any]:
    web = ChangingWeb.generate(spec.hosts, spec.pages_per_host, seed=spec.seed,
                               min_rate_per_day=spec.min_rate_per_day,
                               max_rate_per_day=spec.max_rate_per_day,
                               horizon_s=(spec.warmup_days + spec.days + 1) * DAY_S)
    started = time.perf_counter()
    fetched, figures = await simulate_sluice(web, spec, redis_url)
    out = evaluate(web, fetched, spec)
    out.update(figures)
    out["seed"] = spec.seed
    out["wall_s"] = round(time.perf_counter() - started, 2)
    return out


async def run(spec: BenchSpec, seeds: list[int]) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="sluice-revisit-bench-") as tmp:
        server = RedisProcess(Path(tmp) / "redis", appendonly=False,
                              extra_config=redis_tuning(settings_for(spec)))
        server.start()
        try:
            runs = [await run_once(BenchSpec(**{**spec.__dict__, "seed": s}), server.url)
                    for s in seeds]
        finally:
            server.stop()
    names = runs[0]["freshness"].keys()
    median = {k: round(statistics.median(r["freshness"][k] for r in runs), 4) for k in names}
    return {
        "bench": "revisit", "spec": spec.__dict__ | {"seeds": seeds},
        "median_freshness": median,
        "ratios": {
            "sluice_over_uniform": round(median["sluice"] / median["uniform"], 4),
            "sluice_over_proportional": round(median["sluice"] / median["proportional"], 4),
            "sluice_over_optimal_true_rates": round(
                median["sluice"] / median["optimal_true_rates"], 4),
        },
        "runs": runs,
    }


def main(seeds: list[int] | None = None, days: float = 7.0, warmup_days: float = 7.0,
         hosts: int = 10, pages_per_host: int = 50) -> int:
    spec = BenchSpec(days=days, warmup_days=warmup_days, hosts=hosts,
                     pages_per_host=pages_per_host)
    result = asyncio.run(run(spec, seeds or [1, 2, 3]))
    json.dump(result, sys.stdout, indent=2)
    print()
    return 0
