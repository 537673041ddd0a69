"""The split deployment: `sluice daemon` and two `sluice worker --drain` processes share a
job through a real Redis, crawl the synthetic web on loopback, and are steered with
`sluice host` and the admin API."""

from __future__ import annotations

import asyncio
import os
import json
import sys
from pathlib import Path

import aiohttp
import pytest

from frontier.embedded import free_port
from frontier.redis_client import connect
from tests.servers import RedisServer
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import SyntheticServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
TOKEN = "admin-token-for-the-cli-test-0123456789"
PLAIN = dict(robots=False, slow_hosts=False, failing_hosts=False, redirects=False, trap=False,
             farm=False, near_duplicates=False, ssrf_bait=False, bad_inputs=False)


async def sluice(*args: str, timeout: float = 90.0) -> tuple[int, str]:
    proc = await asyncio.create_subprocess_exec(
        sys.executable, "-m", "frontier.cli", *args,
        stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
    out, _ = await asyncio.wait_for(proc.communicate(), timeout)
    return proc.returncode or 0, out.decode()


async def test_daemon_and_workers_across_processes(tmp_path: Path, redis_server: RedisServer,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    # this checks processes sharing a job; the link-spam slow lanes (tests/test_spam_signals.py)
    # would hold the non-seed hosts of this small web for minutes
    for name in ("UNTRUSTED_DELAY_S", "SUSPECT_DELAY_S", "PROBATION_S"):
        monkeypatch.setenv(f"SLUICE_PRIORITY__{name}", "0")
    client = connect(redis_server.url)
    await client.flushall()
    web = SyntheticWeb.generate(WebSpec(seed=9, hosts=8, pages=120, **PLAIN))
    seeds = tmp_path / "seeds.txt"
    seeds.write_text("\n".join(web.seeds) + "\n")
    admin = f"127.0.0.1:{free_port()}"
    async with SyntheticServer(web) as server:
        port = server.port
        daemon = await asyncio.create_subprocess_exec(
            sys.executable, "-m", "frontier.cli", "daemon", "--redis", redis_server.url,
            "--job", "split", "--seeds", str(seeds), "--user-agent", UA,
            "--map-hosts", f"*.test=127.0.0.1:{port}", "--allow-host", "*.test",
            "--min-delay", "0.02", "--admin", admin,
            env={**os.environ, "SLUICE_ADMIN_TOKEN": TOKEN},
            stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
        try:
            assert daemon.stdout is not None
            banner = await asyncio.wait_for(daemon.stdout.readline(), 30)
            assert b"sluice daemon: job split" in banner
            results = await asyncio.gather(*(
                sluice("worker", "--redis", redis_server.url, "--job", "split",
                       "--out", str(tmp_path / f"out{i}"), "--drain") for i in range(2)))
            assert all(code == 0 for code, _ in results), results
            pages = sum(json.loads(out.strip().splitlines()[-1])["pages"] for _, out in results)

            code, out = await sluice("status", "--redis", redis_server.url, "--job", "split")
            status = json.loads(out)
            assert code == 0 and status["balanced"] and status["queued"] == 0
            assert status["fetched"] == pages > 0
            # both workers share one politeness queue per host: never two requests at once
            assert max(server.max_concurrency_per_host().values()) == 1

            code, out = await sluice("host", "--redis", redis_server.url, "--job", "split",
                                     web.site_hosts[0], "block")
            assert code == 0 and json.loads(out)["state"] == "blocked"

            auth = {"Authorization": f"Bearer {TOKEN}", "X-Sluice-Admin": "1"}
            async with aiohttp.ClientSession() as http:
                async with http.post(f"http://{admin}/hosts/{web.site_hosts[1]}/boost?value=3",
                                     headers={"X-Sluice-Admin": "1"}) as r:
                    assert r.status == 401  # changes need the admin token
                async with http.post(f"http://{admin}/hosts/{web.site_hosts[1]}/boost?value=3",
                                     headers=auth) as r:
                    assert r.status == 200 and (await r.json())["state"] == "active"
                async with http.post(f"http://{admin}/hosts/x.test/explode", headers=auth) as r:
                    assert r.status == 400
                async with http.get(f"http://{admin}/metrics") as r:
                    text = await r.text()
                    assert 'sluice_frontier_urls{job="split",state="fetched"}' in text
        finally:
            daemon.terminate()
            assert await asyncio.wait_for(daemon.wait(), 30) == 0
    await client.aclose()


async def test_worker_refuses_to_start_without_a_job(redis_server: RedisServer, tmp_path: Path) -> None:
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    code, out = await sluice("worker", "--redis", redis_server.url, "--job", "nojob",
                             "--out", str(tmp_path))
    assert code == 2 and "no job named 'nojob'" in out


async def test_crawl_refuses_without_user_agent(tmp_path: Path, redis_server: RedisServer) -> None:
    seeds = tmp_path / "seeds.txt"
    seeds.write_text("http://a.test/\n")
    code, out = await sluice("crawl", "--seeds", str(seeds), "--out", str(tmp_path / "o"),
                             "--redis", redis_server.url, "--job", "noua", "--quiet")
    assert code == 2 and "user_agent is required" in out


def test_crawl_gc_is_restored_after_the_crawl() -> None:
    import gc

    from frontier.process import CRAWL_GC_THRESHOLDS, crawl_process, tune_malloc

    assert tune_malloc() is (sys.platform == "linux")  # glibc here; see frontier/process.py
    before = gc.get_threshold()
    with crawl_process():
        assert gc.get_threshold() == CRAWL_GC_THRESHOLDS
        assert gc.get_freeze_count() > 0
    assert gc.get_threshold() == before
    assert gc.get_freeze_count() == 0
