"""Redirect chains on loopback: a hop limit per chain, one more depth per hop, and no
seed status for the hosts a seed's chain passes through.

RFC 9110 s.15.4 leaves the number of redirects to follow to the client, with a warning
about cycles; it names no number (earlier HTTP/1.1, RFC 2068 s.10.3, suggested five).
sluice follows at most ``fetch.max_redirects`` (default 10, common practice, no source).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from aiohttp import web

from frontier.runner import crawl as _crawl
from frontier.keys import Keys
from frontier.redis_client import connect
from frontier.settings import load_settings
from tests.loopback import start_site
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"


async def crawl_chain(tmp_path: Path, redis_url: str, seed: str,
                      **overrides: Any) -> tuple[list[str], list[dict[str, Any]], Any]:
    """Crawl from ``seed`` on a loopback server where every URL redirects onwards:
    ``/r/N`` on host ``hK.test`` points to ``/r/N+1`` on the same host, ``/x/N`` points
    to ``/x/N+1`` on host ``hN+1.test``. Returns (requests, fetch log, host hashes)."""
    requests: list[str] = []

    async def handle(request: web.Request) -> web.StreamResponse:
        host = request.host.split(":")[0]
        requests.append(f"{host}{request.path}")
        kind, _, n = request.path.strip("/").partition("/")
        if kind == "r":
            raise web.HTTPFound(f"/r/{int(n) + 1}")
        if kind == "x":
            nxt = int(n) + 1
            port = request.host.split(":")[1]
            raise web.HTTPMovedPermanently(f"http://h{nxt}.test:{port}/x/{nxt}")
        return web.Response(status=404)

    runner, port = await start_site(handle)
    client = connect(redis_url)
    try:
        await client.flushall()
        data: dict[str, Any] = {
            "name": "redir", "seeds": [seed.format(port=port)], "redis": {"url": redis_url},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0, "max_delay_s": 5.0,
                           "obey_robots": False},
            "scope": {"allow_hosts": ["*.test"]},
            "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"]},
            # a redirect into another domain hands on no trust: each hop's host would wait
            # out a link-spam probation (tests/test_spam_signals.py checks that)
            "priority": {"untrusted_delay_s": 0.0, "suspect_delay_s": 0.0, "probation_s": 0.0},
        }
        for key, value in overrides.items():
            data.setdefault(key, {}).update(value)
        await _crawl(load_settings(None, data), tmp_path, 1, quiet=True)
        keys = Keys("redir", 4)
        hosts = {}
        for n in range(40):
            fields = await client.hgetall(keys.part_for(f"h{n}.test").host(f"h{n}.test"))
            if fields:
                hosts[f"h{n}.test"] = {k.decode(): v.decode() for k, v in fields.items()}
    finally:
        await client.aclose()
        await runner.cleanup()
    log = [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]
    return requests, log, hosts


async def test_a_same_host_chain_stops_after_max_redirects(
        tmp_path: Path, redis_server: RedisServer) -> None:
    # before the limit, an endless chain of new URLs on one host was followed for as long
    # as the host's budget lasted (2,465 hops in one crawl)
    requests, log, _ = await crawl_chain(tmp_path, redis_server.url, "http://h0.test:{port}/r/0")
    assert requests == [f"h0.test/r/{n}" for n in range(11)]  # the seed and 10 hops
    last = [ln for ln in log if ln["url"].endswith("/r/10")]
    assert [(ln["outcome"], ln["reason"]) for ln in last] == [("failed", "redirect_limit")]
    depths = {ln["url"].rsplit("/", 1)[1]: ln["depth"] for ln in log}
    assert depths == {str(n): n for n in range(11)}  # each hop one more depth


async def test_the_hop_limit_is_a_setting(tmp_path: Path, redis_server: RedisServer) -> None:
    requests, _, _ = await crawl_chain(tmp_path, redis_server.url, "http://h0.test:{port}/r/0",
                                       fetch={"max_redirects": 3})
    assert requests == [f"h0.test/r/{n}" for n in range(4)]


async def test_hosts_of_a_cross_host_chain_are_not_seeded(
        tmp_path: Path, redis_server: RedisServer) -> None:
    # before, every hop stayed at depth 0, so each host of a 535-host chain counted as a
    # seed's host and got the full per-host budget
    requests, log, hosts = await crawl_chain(tmp_path, redis_server.url,
                                             "http://h0.test:{port}/x/0")
    assert requests == [f"h{n}.test/x/{n}" for n in range(11)]
    assert hosts["h0.test"].get("seeded") == "1"
    assert all("seeded" not in hosts[f"h{n}.test"] for n in range(1, 11))
    assert "h11.test" not in hosts  # the 11th hop is never admitted
    assert {ln["url"].rsplit("/x/", 1)[1]: ln["depth"] for ln in log} == {
        str(n): n for n in range(11)}


async def test_a_chain_stops_at_the_scope_depth(tmp_path: Path, redis_server: RedisServer) -> None:
    requests, _, _ = await crawl_chain(tmp_path, redis_server.url, "http://h0.test:{port}/r/0",
                                       scope={"max_depth": 2})
    assert requests == ["h0.test/r/0", "h0.test/r/1", "h0.test/r/2"]
