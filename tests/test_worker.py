"""Worker behaviour on a tiny hand-made site served on loopback: near-duplicates are
archived but not followed, nofollow is honoured, Retry-After slows the host down."""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

from aiohttp import web

from frontier.cli import _crawl
from frontier.settings import load_settings
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
WORDS = ("river stone cloud lantern meadow copper whistle orchard velvet harbor "
         "thistle ember quarry saddle juniper beacon").split()
TEXT = " ".join(WORDS[(i * 7) % len(WORDS)] + str(i % 13) for i in range(300))


def page(body: str, links: list[str], nofollow: list[str] | None = None) -> str:
    anchors = "".join(f'<a href="{u}">{u}</a> ' for u in links)
    anchors += "".join(f'<a rel="nofollow" href="{u}">{u}</a> ' for u in nofollow or [])
    return f"<html><head><title>t</title></head><body><p>{body}</p>{anchors}</body></html>"


times: list[float] = []


async def run_site(tmp_path: Path, redis_url: str, pages: dict[str, Any]) -> tuple[list[str], list[dict[str, Any]]]:
    requests: list[str] = []

    async def handle(request: web.Request) -> web.StreamResponse:
        requests.append(request.path)
        times.append(time.monotonic())
        item = pages.get(request.path)
        if item is None:
            return web.Response(status=404)
        if callable(item):
            return item(len([p for p in requests if p == request.path]))
        return web.Response(text=item, content_type="text/html")

    app = web.Application()
    app.router.add_get("/{tail:.*}", handle)
    runner = web.AppRunner(app)
    await runner.setup()
    site = web.TCPSite(runner, "127.0.0.1", 0)
    await site.start()
    port = site._server.sockets[0].getsockname()[1]  # type: ignore[union-attr]
    try:
        from frontier.redis_client import connect
        client = connect(redis_url)
        await client.flushall()
        await client.aclose()
        settings = load_settings(None, {
            "name": "w", "seeds": ["http://site.test/"], "redis": {"url": redis_url},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0, "max_delay_s": 5.0},
            "fetch": {"user_agent": UA, "map_hosts": [f"site.test=127.0.0.1:{port}"]},
        })
        await _crawl(settings, tmp_path, 1, quiet=True)
    finally:
        await runner.cleanup()
    log = [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]
    return requests, log


async def test_near_duplicate_archived_not_followed(tmp_path: Path, redis_server: RedisServer) -> None:
    pages = {
        "/": page("home " * 50, ["/a.html", "/b.html"]),
        "/a.html": page(TEXT, ["/from-a.html"]),
        "/b.html": page(TEXT, ["/from-b.html"]),  # the same text: SimHash distance 0
        "/from-a.html": page("leaf a " * 40, []),
        "/from-b.html": page("leaf b " * 40, []),
    }
    requests, log = await run_site(tmp_path, redis_server.url, pages)
    assert {"/a.html", "/b.html"} <= set(requests)
    # exactly one of the twins is the near-duplicate (Charikar 2002 SimHash, Hamming <= 3,
    # Manku et al. 2007); its link is not followed, the other twin's is
    dups = [e["url"] for e in log if e["reason"] == "near_duplicate"]
    assert len(dups) == 1
    followed = {"/from-a.html", "/from-b.html"} & set(requests)
    assert len(followed) == 1
    assert ("/from-a.html" in followed) == dups[0].endswith("/b.html")


async def test_nofollow_not_followed(tmp_path: Path, redis_server: RedisServer) -> None:
    pages = {"/": page("home " * 50, ["/kept.html"], nofollow=["/skipped.html"]),
             "/kept.html": page("kept " * 40, []), "/skipped.html": page("x " * 40, [])}
    requests, _ = await run_site(tmp_path, redis_server.url, pages)
    assert "/kept.html" in requests and "/skipped.html" not in requests


async def test_retry_after_then_success(tmp_path: Path, redis_server: RedisServer) -> None:
    def busy(n: int) -> web.Response:
        if n == 1:  # RFC 9110 s.10.2.3: Retry-After in delta-seconds
            return web.Response(status=503, headers={"Retry-After": "1"})
        return web.Response(text=page("finally " * 40, []), content_type="text/html")

    times.clear()
    requests, log = await run_site(tmp_path, redis_server.url, {"/": busy})
    assert requests.count("/") == 2
    first, second = [t for p, t in zip(requests, times) if p == "/"]
    assert second - first >= 1.0  # the host waited as long as Retry-After asked
    assert [e["outcome"] for e in log if e["url"] == "http://site.test/"] == ["fetched"]


async def test_links_back_to_fetched_pages_are_not_sent(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # Every child links back home. Home was fetched (and its completion accepted) before
    # any child was leased, so those links could change nothing in the frontier (no
    # credit for a URL no longer queued, no new linking host): the worker drops them.
    from frontier.admission import Admission

    offered: list[str] = []
    prepare = Admission.prepare

    def spy(self: Admission, candidates: Any, linked: Any = ()) -> Any:
        candidates, linked = list(candidates), list(linked)
        offered.extend(c.url for c in candidates)
        offered.extend(url for _, url in linked)  # links between hosts: none on one site
        return prepare(self, candidates, linked)

    monkeypatch.setattr(Admission, "prepare", spy)
    children = [f"/c{i}.html" for i in range(8)]
    pages: dict[str, Any] = {"/": page("home " * 50, children)}
    for i, child in enumerate(children):
        pages[child] = page(f"child {i} " * 40, ["/", "/leaf.html"])
    pages["/leaf.html"] = page("leaf " * 40, ["/"])
    requests, log = await run_site(tmp_path, redis_server.url, pages)
    assert sorted(requests) == sorted(["/robots.txt", "/", *children, "/leaf.html"])  # once
    assert offered.count("http://site.test/") == 1  # the seed itself, nothing after
    assert offered.count("http://site.test/leaf.html") >= 1  # links to unfetched pages go
    assert sum(e["outcome"] == "fetched" for e in log) == len(children) + 2


async def test_a_page_whose_archive_write_fails_is_fetched_again(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # The first attempt to archive /b.html fails (a full disk, say). Its lease ends as a
    # retry, the other pages of the batch go on, and the next attempt archives it.
    from workers.archive import WarcArchive

    write = WarcArchive.write_exchange
    failed: list[str] = []

    def flaky(self: WarcArchive, url: str, *args: Any, **kw: Any) -> Any:
        if url.endswith("/b.html") and not failed:
            failed.append(url)
            raise OSError(28, "No space left on device")
        return write(self, url, *args, **kw)

    monkeypatch.setattr(WarcArchive, "write_exchange", flaky)
    pages = {"/": page("home " * 50, ["/a.html", "/b.html", "/c.html"]),
             "/a.html": page("alpha " * 40, []), "/b.html": page("bravo " * 40, []),
             "/c.html": page("charlie " * 40, [])}
    requests, log = await run_site(tmp_path, redis_server.url, pages)
    assert failed == ["http://site.test/b.html"]
    assert requests.count("/b.html") == 2 and requests.count("/a.html") == 1
    outcomes = {e["url"].rsplit("/", 1)[1]: e["outcome"] for e in log}
    assert outcomes == {"": "fetched", "a.html": "fetched", "b.html": "fetched",
                        "c.html": "fetched"}


async def test_a_broken_write_back_stops_the_worker_loudly(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # A bug in the write-back must end the crawl with the error, not leave the worker
    # leasing pages that are never written back (the leases expire and are fetched again).
    import asyncio

    import pytest

    from workers.loop import Worker

    async def broken(self: Worker, batch: Any) -> None:
        raise RuntimeError("a bug in the write-back")

    monkeypatch.setattr(Worker, "_drop_near_duplicates", broken)
    pages = {"/": page("home " * 50, ["/a.html"]), "/a.html": page("alpha " * 40, [])}
    started = time.monotonic()
    with pytest.raises(RuntimeError, match="a bug in the write-back"):
        await asyncio.wait_for(run_site(tmp_path, redis_server.url, pages), 20)
    assert time.monotonic() - started < 10  # it stopped at once, not at the time-out


async def test_a_crawl_on_the_cluster(tmp_path: Path, redis_cluster: Any) -> None:
    # The whole worker (robots cache, budget, near-duplicate index, admit, lease,
    # complete) on a 3-master Redis Cluster: every page once, twins caught.
    url = redis_cluster.url.replace("redis://", "redis+cluster://")
    children = [f"/c{i}.html" for i in range(12)]
    pages: dict[str, Any] = {"/": page("home " * 50, children)}
    for i, child in enumerate(children):
        pages[child] = page(TEXT if i < 2 else f"child {i} " * 40, ["/"])
    requests, log = await run_site(tmp_path, url, pages)
    assert sorted(requests) == sorted(["/robots.txt", "/", *children])
    assert sum(e["outcome"] == "fetched" for e in log) == len(children) + 1
    assert [e["reason"] for e in log].count("near_duplicate") == 1  # c0 and c1 are twins
