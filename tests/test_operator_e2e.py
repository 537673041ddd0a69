"""Steering a running crawl through the admin API, judged from the web server's own
request log: a pause stops the host's fetches within a second, a resume brings them
back, and a seed added mid-crawl is fetched."""

from __future__ import annotations

import asyncio
import json
import socket
import time
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from aiohttp import web

from frontier.admin_auth import CSRF_HEADER, TOKEN_ENV
from frontier.runner import crawl as _crawl
from frontier.redis_client import connect
from frontier.settings import load_settings
from tests.loopback import start_site
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
TOKEN = "operator-e2e-token-0123456789abcdef"
CHAIN = 40  # pages in a row on each chained host: the crawl lasts a few seconds
PAUSE_WITHIN_S = 1.0


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


async def test_pause_resume_and_a_seed_added_mid_crawl(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(TOKEN_ENV, TOKEN)
    served: list[tuple[str, str, float]] = []  # (host, path, time.monotonic())

    async def handle(request: web.Request) -> web.StreamResponse:
        host = request.host.split(":")[0]
        served.append((host, request.path, time.monotonic()))
        if request.path == "/robots.txt":
            return web.Response(status=404)
        if host in ("a.test", "c.test"):
            n = int(request.path.strip("/") or 0)
            more = f'<a href="/{n + 1}">next</a>' if n + 1 < CHAIN else ""
            return web.Response(text=f"<html><body><p>page {n} of {host}</p>{more}</body></html>",
                                content_type="text/html")
        if host == "b.test":  # nothing links to /hidden: only a seed can reach it
            return web.Response(text=f"<html><body>{request.path}</body></html>",
                                content_type="text/html")
        return web.Response(status=404)

    runner, port = await start_site(handle)
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    admin = f"127.0.0.1:{free_port()}"
    settings = load_settings(None, {
        "name": "steer", "redis": {"url": redis_server.url},
        "seeds": ["http://a.test/0", "http://b.test/", "http://c.test/0"],
        "politeness": {"min_delay_s": 0.15, "response_time_factor": 0.0},
        "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"]},
    })
    crawl = asyncio.create_task(_crawl(settings, tmp_path / "out", 1, quiet=True, admin=admin))
    auth = {"Authorization": f"Bearer {TOKEN}", CSRF_HEADER: "1"}
    try:
        async with aiohttp.ClientSession() as http:
            while sum(1 for h, _, _ in served if h == "c.test") < 5:
                await asyncio.sleep(0.02)
            async with http.post(f"http://{admin}/hosts/c.test/pause", headers=auth) as r:
                assert r.status == 200, await r.text()
            paused_at = time.monotonic()
            async with http.post(f"http://{admin}/seeds", headers=auth,
                                 json={"urls": ["http://b.test/hidden"]}) as r:
                assert r.status == 200, await r.text()
            await asyncio.sleep(3.0)
            async with http.post(f"http://{admin}/hosts/c.test/resume", headers=auth) as r:
                assert r.status == 200, await r.text()
            resumed_at = time.monotonic()
        summary = await asyncio.wait_for(crawl, 120)
    finally:
        if not crawl.done():
            crawl.cancel()
        await runner.cleanup()
    c_times = [t for h, p, t in served if h == "c.test" and p != "/robots.txt"]
    during = [t - paused_at for t in c_times if paused_at + PAUSE_WITHIN_S < t < resumed_at]
    assert during == []  # nothing fetched from the paused host after the first second
    assert any(t > resumed_at for t in c_times)  # resumed: its chain went on
    assert len(c_times) == CHAIN  # every page of the paused host, once, in the end
    assert ("b.test", "/hidden") in {(h, p) for h, p, _ in served}  # the added seed
    assert summary["balanced"] and summary["queued"] == 0
    lines = [json.loads(x) for x in (tmp_path / "out" / "fetches.jsonl").read_text().splitlines()]
    assert any(ln["url"] == "http://b.test/hidden" and ln["outcome"] == "fetched" for ln in lines)
