"""A full output disk under ``sluice crawl``, with real processes: the output folder is a
small tmpfs of its own (needs root; ENOSPC from the kernel, not a stand-in), the job's
Redis is elsewhere. The crawl stops leasing, hands back what it holds, says so in one
line and exits 3; with room again the same command resumes and nothing is lost
(checked against the web's own graph and the WARC files read back with warcio,
ISO 28500)."""

from __future__ import annotations

import json
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

from frontier.cli import EXIT_DISK_FAULT
from frontier.redis_client import connect
from tests.faultkit import (
    Proc, WebThread, make_web, reachable, run_json, sluice, tmpfs_at, torn_member,
    warc_responses, write_job)
from tests.servers import RedisServer

SMALL_DISK = "256k"  # a fraction of what this crawl writes (WARC files and fetch log)
ROOMY_DISK = "64m"


@pytest.fixture
def small_disk(tmp_path: Path) -> Iterator[Path]:
    with tmpfs_at(tmp_path / "disk", SMALL_DISK) as where:
        yield where


async def test_crawl_on_a_full_disk_exits_3_and_resumes(
        tmp_path: Path, small_disk: Path, redis_server: RedisServer) -> None:
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    out = small_disk / "crawl"
    with WebThread(make_web(seed=23, hosts=12, pages=500)) as web:
        job = write_job(tmp_path / "job.toml", {
            "name": "full", "seeds": list(web.web.seeds), "redis": {"url": redis_server.url},
            "scope": {"allow_hosts": ["*.test"]},
            "budget": {"max_pages_per_host": 1_000_000},
            "priority": {"host_budget_base": 0},
            "politeness": {"min_delay_s": 0.05, "response_time_factor": 0.0,
                           "retry_backoff_s": 0.2, "crawl_delay_cap_s": 0.2},
            "fetch": {"user_agent": "sluice-disk/0.1 (+http://operator.test/contact)",
                      "map_hosts": [web.host_map], "concurrency": 16},
            "lease": {"max_attempts": 2},
        })
        args = sluice("crawl", "--config", str(job), "--out", str(out), "--quiet")
        full = Proc(args, tmp_path / "logs", "full")
        code = full.wait()
        lines = [ln for ln in full.stderr().splitlines() if ln.strip()]
        midway = run_json(sluice("status", "--redis", redis_server.url, "--job", "full"))
        subprocess.run(["mount", "-o", f"remount,size={ROOMY_DISK}", str(small_disk)],
                       check=True)
        again = Proc(args, tmp_path / "logs", "again")
        assert again.wait() == 0, again.stderr()[-3000:]
        summary = json.loads(again.stdout())
        expected = reachable(web.web)
    print(f"DISK-FIGURES exit {code}, fetched when full {midway['fetched']} of "
          f"{len(expected)} reachable, {len(lines)} stderr lines, last: {lines[-1][:300]!r}")
    assert code == EXIT_DISK_FAULT, (code, lines[-5:])
    # one line, no traceback: what happened (the folder, the cause), what to do
    assert len(lines) == 1 and lines[0].startswith("sluice: "), lines[-10:]
    assert str(out) in lines[0] and "resume" in lines[0], lines[0]
    assert 0 < midway["fetched"] < len(expected)  # it stopped midway
    # what it held went back to the queue at once (not left to expire) and nothing died:
    # a page whose archive write failed is fetched again, its attempts untouched
    assert midway["leased"] == 0 and midway["dead"] == 0 and midway["balanced"], midway
    assert summary["balanced"] and summary["queued"] == summary["leased"] == 0
    assert summary["dead"] == 0
    responses, unreadable = warc_responses(sorted(out.rglob("*.warc.gz")))
    assert not unreadable
    assert [t for t in map(torn_member, sorted(out.rglob("*.warc.gz"))) if t] == []
    assert expected <= set(responses), sorted(expected - set(responses))[:5]
