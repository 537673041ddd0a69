"""``sluice bench crawl``: one worker crawls >= 10,000 synthetic pages; the bare limit beside it.

The synthetic web runs in a child process (its own core); the crawl and the bare loop
run in this process, one after the other, over the same pages. The bare loop is the
limit of this machine for "fetch with aiohttp and extract links": no frontier, no
robots, no archive. Politeness delays are zero here: this measures throughput, and
the web is ours.

Each side runs at its own best number of requests in flight: the bare loop at several,
the fastest being the limit (it is CPU-bound, and more requests in flight only add
work: 16 to 64 were within 6 % here, 128 and 256 slower); the crawl at
``CRAWL_CONCURRENCY``, where it gained most (it waits on Redis and writes back in
batches, so it needs more in flight to stay busy).
"""

from __future__ import annotations

import asyncio
import cProfile
import io
import json
import os
import pstats
import resource
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import aiohttp
import aiohttp.abc

from frontier.settings import load_settings
from workers.parser import parse_html

BENCH_UA = "sluice-bench/0.1 (+http://operator.test/contact)"
CRAWL_CONCURRENCY = 128  # 64: about 7 % slower here; 192 and 256: no faster (2026-12-02)
BARE_CONCURRENCIES = (16, 32, 64)  # the fastest is the limit
PAGES_PER_HOST = 10  # many small sites: the crawl is bound by work, not by one host's queue
HOST_SIZE_EXPONENT = 0.5  # milder than the web's default 1.0 for the same reason


def start_web(pages: int, seed: int) -> tuple[subprocess.Popen[str], int, list[str]]:
    """Serve a plain synthetic web (no traps, farms or bad inputs) in a child process.

    Every page is rendered before the first request, so the crawl (first to ask for each
    page) and the bare loop (asking again) cost the server the same per response.
    """
    hosts = max(1, pages // PAGES_PER_HOST)
    proc = subprocess.Popen(
        [sys.executable, "-m", "synthweb", "--plain", "--prerender", "--seed", str(seed),
         "--hosts", str(hosts), "--pages", str(pages), "--zipf", str(HOST_SIZE_EXPONENT)],
        stdout=subprocess.PIPE, text=True)
    assert proc.stdout is not None
    port = int(proc.stdout.readline().split()[1])
    seeds = []
    for _ in range(5):
        seeds.append(proc.stdout.readline().strip())
    return proc, port, seeds


class LoopbackResolver(aiohttp.abc.AbstractResolver):
    """Every host name resolves to the synthetic web's loopback socket."""

    def __init__(self, port: int) -> None:
        self.port = port

    async def resolve(self, host: str, port: int = 0,
                      family: socket.AddressFamily = socket.AF_INET) -> list[Any]:
        return [{"hostname": host, "host": "127.0.0.1", "port": self.port,
                 "family": socket.AF_INET, "proto": 0, "flags": socket.AI_NUMERICHOST}]

    async def close(self) -> None:
        return None


async def bare_loop(urls: list[str], port: int, concurrency: int) -> float:
    """Pages/s of a plain aiohttp fetch + link extraction over ``urls``, ``concurrency`` at once.

    The same URLs as the crawl, so connections are pooled per host as the crawler's
    are (a crawler cannot send every host's requests down one keep-alive connection).
    """
    connector = aiohttp.TCPConnector(limit=concurrency * 2, resolver=LoopbackResolver(port))
    queue: asyncio.Queue[str] = asyncio.Queue()
    for u in urls:
        queue.put_nowait(u)

    async def one(session: aiohttp.ClientSession) -> None:
        while not queue.empty():
            url = queue.get_nowait()
            async with session.get(url, headers={"User-Agent": BENCH_UA}) as r:
                body = await r.read()
            parse_html(body, url, content_type=r.headers.get("Content-Type"))

    started = time.perf_counter()
    async with aiohttp.ClientSession(connector=connector) as session:
        await asyncio.gather(*(one(session) for _ in range(concurrency)))
    return len(urls) / (time.perf_counter() - started)


async def crawl(pages: int, port: int, seeds: list[str], out: Path, redis_url: str,
                profile: bool, processes: int = 1) -> tuple[float, list[str], str, float]:
    """(pages/s, fetched URLs, profile text, CPU seconds of the crawl itself: this process
    and its ended worker children, from the crawl's start to its end; reading the fetch
    log back afterwards is the bench's own work, not the crawl's)."""
    from frontier.runner import crawl as run_crawl
    # the modules a crawl imports on its way in (~0.25 s here) are start-up, not throughput
    import frontier.daemon, frontier.job, frontier.progress, workers.loop  # noqa: F401, E401

    settings = load_settings(None, {
        "name": "crawlbench", "seeds": seeds, "redis": {"url": redis_url},
        "scope": {"allow_hosts": ["*.test"]},
        "budget": {"max_pages": pages, "max_pages_per_host": None},
        "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
        "fetch": {"user_agent": BENCH_UA, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                  "concurrency": CRAWL_CONCURRENCY},
        "lease": {"batch": 64},
    })
    prof = cProfile.Profile(time.process_time) if profile else None
    cpu_before = time.process_time() + _children_cpu_s()
    started = time.perf_counter()
    if prof:
        prof.enable()
    summary = await run_crawl(settings, out, processes=processes, quiet=True)
    if prof:
        prof.disable()
    elapsed = time.perf_counter() - started
    cpu = time.process_time() + _children_cpu_s() - cpu_before
    entries = [json.loads(line) for line in (out / "fetches.jsonl").read_text().splitlines()]
    fetched_urls = [e["url"] for e in entries if e["outcome"] == "fetched"]
    top = ""
    if prof:
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(45)
        top = buf.getvalue()
    return summary["fetched"] / elapsed, fetched_urls, top, cpu


RUNS = 3  # crawl and bare loops alternate; medians are reported (the machine is noisy)


def _same_loop_run(main: Any) -> float:
    """The bare loop on the crawler's event loop (uvloop where installed)."""
    from frontier.process import run

    return run(main)


def _redis_cpu_s(url: str) -> float:
    """CPU seconds the Redis server at ``url`` has used (INFO cpu, user + system)."""
    import redis

    with redis.Redis.from_url(url) as client:
        info = client.info("cpu")
    return float(info["used_cpu_user"]) + float(info["used_cpu_sys"])


def _children_cpu_s() -> float:
    """CPU seconds of this process's ended and reaped children (the worker processes)."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def main(pages: int = 10_000, seed: int = 5, profile: bool = False,
         processes: tuple[int, ...] = (1,)) -> int:
    """Crawl rate and bare rate, alternating, in one run; ``profile`` adds a profiled crawl.

    ``ratio`` compares the crawl with the plain loop the goal names (aiohttp on asyncio's
    own event loop); ``ratio_same_loop`` with that loop run on the crawler's event loop,
    which is the stricter limit when uvloop is installed. Each count in ``processes`` gets
    its crawls (one process: the worker runs in the crawl's process; more: ``sluice
    worker`` children, their CPU counted when they end); the top-level figures are those
    of the first count.
    """
    from frontier.embedded import RedisProcess
    from frontier.process import run
    from frontier.settings import JobSettings
    from frontier.store_tuning import redis_tuning

    proc, port, seeds = start_web(int(pages * 1.2), seed)
    by_count: dict[int, tuple[list[float], list[float]]] = {n: ([], []) for n in processes}
    redis_us: dict[int, list[float]] = {n: [] for n in processes}
    crawl_rates, cpu_us = by_count[processes[0]]
    bare_rates: dict[int, list[float]] = {c: [] for c in BARE_CONCURRENCIES}
    same_loop_rates: dict[int, list[float]] = {c: [] for c in BARE_CONCURRENCIES}
    top = ""
    try:
        with tempfile.TemporaryDirectory(prefix="sluice-crawlbench-") as tmp:
            for i in range(RUNS + (1 if profile else 0)):
                profiled = i == RUNS  # cProfile roughly halves the rate: its own crawl
                for n in processes[:1] if profiled else processes:
                    server = RedisProcess(Path(tmp) / f"redis{i}-{n}",
                                          extra_config=redis_tuning(JobSettings()))
                    server.start()
                    try:
                        redis_before = _redis_cpu_s(server.url)
                        rate, urls, top, cpu = run(crawl(
                            pages, port, seeds, Path(tmp) / f"out{i}-{n}", server.url, profiled,
                            n))
                        redis_cpu = _redis_cpu_s(server.url) - redis_before
                    finally:
                        server.stop()
                    if not profiled:
                        by_count[n][0].append(rate)
                        by_count[n][1].append(cpu / max(1, len(urls)) * 1e6)
                        redis_us[n].append(redis_cpu / max(1, len(urls)) * 1e6)
                if profiled:
                    break
                for c in BARE_CONCURRENCIES:
                    bare_rates[c].append(asyncio.run(bare_loop(urls, port, c)))
                    same_loop_rates[c].append(_same_loop_run(bare_loop(urls, port, c)))
    finally:
        proc.terminate()
        proc.wait()
    crawl_rate = statistics.median(crawl_rates)
    bare_by = {c: statistics.median(r) for c, r in bare_rates.items()}
    same_by = {c: statistics.median(r) for c, r in same_loop_rates.items()}
    bare_c, same_c = max(bare_by, key=bare_by.__getitem__), max(same_by, key=same_by.__getitem__)
    result: dict[str, Any] = {
        "pages": len(urls), "runs": RUNS, "crawl_concurrency": CRAWL_CONCURRENCY,
        "crawl_pages_per_s": round(crawl_rate, 1),
        "bare_pages_per_s": round(bare_by[bare_c], 1),
        "bare_concurrency": bare_c,
        "ratio": round(crawl_rate / bare_by[bare_c], 3),
        "bare_same_loop_pages_per_s": round(same_by[same_c], 1),
        "ratio_same_loop": round(crawl_rate / same_by[same_c], 3),
        "crawl_cpu_us_per_page": round(statistics.median(cpu_us)),
        "crawl_runs": [round(r, 1) for r in crawl_rates],
        "bare_by_concurrency": {c: round(r, 1) for c, r in bare_by.items()},
        "bare_same_loop_by_concurrency": {c: round(r, 1) for c, r in same_by.items()},
        "by_processes": {n: {
            "crawl_pages_per_s": round(statistics.median(rates), 1),
            "ratio": round(statistics.median(rates) / bare_by[bare_c], 3),
            "cpu_us_per_page": round(statistics.median(cpus)),
            "redis_cpu_us_per_page": round(statistics.median(redis_us[n])),
            "crawl_runs": [round(r, 1) for r in rates]} for n, (rates, cpus) in by_count.items()},
        "cores": os.cpu_count(),
        "shares_the_cores": "the synthetic web's server process and Redis run on the same "
                            "cores as the crawl and the bare loop",
        "priority_settings": {k: v for k, v in JobSettings().priority.model_dump().items()
                              if k in ("probation_s", "untrusted_delay_s", "suspect_delay_s")},
    }
    print(json.dumps(result, indent=2))
    if top:
        print("\nwhere the crawl's time goes (cProfile, by own time):\n" + top, file=sys.stderr)
    return 0
