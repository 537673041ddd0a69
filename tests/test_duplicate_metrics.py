"""The duplicate counters as an operator scrapes them from a running crawl.

A job over the web with print hosts (exact copies) and mirror hosts (near copies,
synthweb/copies.py) on loopback, a real redis-server, a ``sluice daemon`` with its admin
API and one ``sluice worker --metrics`` process: once the frontier holds nothing queued or
leased, the worker (which keeps running, as a worker without ``--drain`` does) is scraped
and its ``sluice_exact_duplicates_total`` must equal the revisit records of its WARC
files as warcio reads them (ISO 28500:2017 s.6.7.2: WARC-Type ``revisit`` with the
identical-payload-digest profile), and ``sluice_near_duplicates_total`` the fetch-log
lines marked ``near_duplicate``; the daemon's ``sluice_mirror_hosts`` must equal the
mirror hosts its ``/status`` lists (the four copy hosts). Scrapes are read with
prometheus_client's parser of the text exposition format (prometheus.io, "Exposition
formats", text format 0.0.4).
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from prometheus_client.parser import text_string_to_metric_families
from warcio.archiveiterator import ArchiveIterator

from frontier.daemon import STATS_EVERY_S
from frontier.embedded import free_port
from frontier.redis_client import connect
from synthweb.copies import CopyServer, CopySpec, CopyWeb, copy_web
from tests.servers import RedisServer
from tests.test_mirrors import REVISIT_PROFILE, job_file

JOB = "dupmetrics"
TOKEN = "duplicate-metrics-token-0123456789abcdef"
CRAWL_TIMEOUT_S = 300.0
SETTLED_POLLS = 3  # /status polls in a row with nothing queued or leased


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "frontier.cli", *args]


def samples(text: str, name: str) -> dict[str, float]:
    """The values of one metric's samples in a scrape, by their ``job`` label."""
    out: dict[str, float] = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == name:
                out[s.labels.get("job", "")] = s.value
    return out


async def scrape(http: aiohttp.ClientSession, address: str) -> str:
    async with http.get(f"http://{address}/metrics") as r:
        assert r.status == 200
        return await r.text()


async def stop(proc: asyncio.subprocess.Process) -> str:
    """SIGTERM (the operator's stop: in-flight work finishes), then its output."""
    if proc.returncode is None:
        proc.terminate()
    out, _ = await asyncio.wait_for(proc.communicate(), 60)
    return out.decode(errors="replace")


async def settled(http: aiohttp.ClientSession, admin: str,
                  procs: list[asyncio.subprocess.Process]) -> dict[str, Any]:
    """The daemon's /status once the frontier held nothing queued or leased
    ``SETTLED_POLLS`` times in a row (every lease ended, its log line written)."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + CRAWL_TIMEOUT_S
    calm = 0
    while loop.time() < deadline:
        for proc in procs:
            assert proc.returncode is None, await stop(proc)
        async with http.get(f"http://{admin}/status") as r:
            status = await r.json()
        calm = calm + 1 if status["fetched"] and not (status["queued"] or status["leased"]) else 0
        if calm >= SETTLED_POLLS:
            return status
        await asyncio.sleep(0.5)
    pytest.fail(f"the crawl did not settle in {CRAWL_TIMEOUT_S} s: {status}")


@pytest.fixture(scope="module")
async def run(redis_server: RedisServer,
              tmp_path_factory: pytest.TempPathFactory) -> AsyncIterator[dict[str, Any]]:
    copies = copy_web(CopySpec())
    folder = tmp_path_factory.mktemp("dupmetrics")
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    seeds = folder / "seeds.txt"
    seeds.write_text("\n".join(copies.web.seeds) + "\n")
    server = CopyServer(copies, latency=0.0)
    port = await server.start("127.0.0.1", 0)
    out = folder / "out"
    admin, metrics = f"127.0.0.1:{free_port()}", f"127.0.0.1:{free_port()}"
    env = {**os.environ, "SLUICE_ADMIN_TOKEN": TOKEN}
    job = job_file(folder, JOB, port)
    daemon = await asyncio.create_subprocess_exec(
        *cli("daemon", "--config", str(job), "--seeds", str(seeds), "--redis",
             redis_server.url, "--admin", admin),
        env=env, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
    worker = None
    try:
        assert daemon.stdout is not None
        first = await asyncio.wait_for(daemon.stdout.readline(), 60)
        assert b"sluice daemon" in first, first + await daemon.stdout.read()
        worker = await asyncio.create_subprocess_exec(
            *cli("worker", "--redis", redis_server.url, "--job", JOB, "--out", str(out),
                 "--processes", "1", "--metrics", metrics),
            env=env, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
        async with aiohttp.ClientSession() as http:
            status = await settled(http, admin, [daemon, worker])
            worker_scrape = await scrape(http, metrics)
            await asyncio.sleep(STATS_EVERY_S + 1.0)  # the daemon's gauges catch up
            daemon_scrape = await scrape(http, admin)
        yield {"web": copies, "out": out, "status": status, "worker": worker_scrape,
               "daemon": daemon_scrape}
    finally:
        if worker is not None:
            await stop(worker)
        await stop(daemon)
        await server.stop()


def warc_records(out: Path) -> list[dict[str, str]]:
    """Every record's headers, read by warcio after `warcio check` passed on each file."""
    files = sorted((out / "warc").glob("*.warc.gz"))
    assert files
    recs = []
    for path in files:
        done = subprocess.run([str(Path(sys.executable).with_name("warcio")), "check",
                               str(path)], capture_output=True, text=True)
        assert done.returncode == 0, done.stdout + done.stderr
        with path.open("rb") as stream:
            for rec in ArchiveIterator(stream):
                recs.append(dict(rec.rec_headers.headers))
    return recs


def fetch_log(out: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in (out / "fetches.jsonl").read_text().splitlines()]


def reasons(entry: dict[str, Any]) -> list[str]:
    return (entry.get("reason") or "").split(",")


async def test_exact_duplicates_counter_equals_the_revisit_records(run: dict[str, Any]) -> None:
    copies: CopyWeb = run["web"]
    counted = samples(run["worker"], "sluice_exact_duplicates_total")
    assert set(counted) == {JOB}
    revisits = [h for h in warc_records(run["out"])
                if h["WARC-Type"] == "revisit" and h.get("WARC-Profile") == REVISIT_PROFILE]
    print(f"\nsluice_exact_duplicates_total {counted[JOB]:.0f}, identical-payload-digest "
          f"revisit records {len(revisits)}")
    assert counted[JOB] == len(revisits) > 0
    # each of them an exact copy of the web (a print host's page), each once
    revisited = [h["WARC-Target-URI"] for h in revisits]
    assert len(set(revisited)) == len(revisited) and set(revisited) <= copies.exact
    # the fetch log says the same, line by line
    log = fetch_log(run["out"])
    logged = {e["url"] for e in log if "exact_duplicate" in reasons(e)}
    assert logged == set(revisited)


async def test_near_duplicates_counter_equals_the_flagged_log_lines(run: dict[str, Any]) -> None:
    counted = samples(run["worker"], "sluice_near_duplicates_total")
    flagged = [e for e in fetch_log(run["out"]) if "near_duplicate" in reasons(e)]
    print(f"\nsluice_near_duplicates_total {counted[JOB]:.0f}, log lines {len(flagged)}")
    assert counted[JOB] == len(flagged) > 0
    assert all(e.get("near_duplicate_of") for e in flagged)


async def test_mirror_hosts_gauge_equals_the_hosts_reported(run: dict[str, Any]) -> None:
    copies: CopyWeb = run["web"]
    status = run["status"]
    reported = {row["host"]: row["mirror_of"] for row in status["mirrors"]["hosts"]}
    assert reported == copies.copied_host  # the four copy hosts, each of the site it copies
    gauge = samples(run["daemon"], "sluice_mirror_hosts")
    assert gauge == {JOB: float(status["mirrors"]["count"])} == {JOB: 4.0}
    cut = samples(run["daemon"], "sluice_mirror_excluded_urls")
    assert cut == {JOB: float(status["reasons"].get("excluded:mirror_host", 0))}
