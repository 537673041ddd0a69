"""Worker behaviour on a tiny hand-made site served on loopback: near-duplicates are
archived and followed, nofollow is honoured, Retry-After slows the host down."""

from __future__ import annotations

import inspect
import json
import time
from pathlib import Path
from typing import Any

from aiohttp import web

from frontier.runner import crawl as _crawl
from frontier.settings import load_settings
from tests.loopback import start_site
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


async def run_site(tmp_path: Path, redis_url: str, pages: dict[str, Any], *,
                   fresh: bool = True, summaries: list[dict[str, Any]] | None = None,
                   **extra: dict[str, Any]) -> tuple[list[str], list[dict[str, Any]]]:
    """Crawl ``pages`` (path -> HTML, or a function of the request count giving a
    response, or an awaitable one) from http://site.test/; ``extra`` settings by part,
    ``fresh=False`` resumes the job in Redis, ``summaries`` collects the crawl's summary."""
    requests: list[str] = []

    async def handle(request: web.Request) -> web.StreamResponse:
        requests.append(request.path)
        times.append(time.monotonic())
        item = pages.get(request.path)
        if item is None:
            return web.Response(status=404)
        if callable(item):
            answer = item(len([p for p in requests if p == request.path]))
            return await answer if inspect.isawaitable(answer) else answer
        return web.Response(text=item, content_type="text/html")

    runner, port = await start_site(handle)
    try:
        from frontier.redis_client import connect
        if fresh:
            client = connect(redis_url)
            await client.flushall()
            await client.aclose()
        data: dict[str, Any] = {
            "name": "w", "seeds": ["http://site.test/"], "redis": {"url": redis_url},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0, "max_delay_s": 5.0},
            "fetch": {"user_agent": UA, "map_hosts": [f"site.test=127.0.0.1:{port}"]},
        }
        for part, values in extra.items():
            data.setdefault(part, {}).update(values)
        summary = await _crawl(load_settings(None, data), tmp_path, 1, quiet=True)
        if summaries is not None:
            summaries.append(summary)
    finally:
        await runner.cleanup()
    log = [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]
    return requests, log


async def test_near_duplicate_archived_and_followed(tmp_path: Path, redis_server: RedisServer) -> None:
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
    # Manku et al. 2007), naming the other; both twins' links are followed (a near copy
    # may be the only way to a page)
    dups = [e for e in log if e["reason"] == "near_duplicate"]
    assert len(dups) == 1
    twins = {"http://site.test/a.html", "http://site.test/b.html"}
    assert {dups[0]["url"], dups[0]["near_duplicate_of"]} == twins
    assert 0 <= dups[0]["hamming"] <= 3
    assert {"/from-a.html", "/from-b.html"} <= set(requests)


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
    # The first attempt to archive /b.html fails with an unexpected error (a bug, not a
    # disk fault). Its lease ends as a retry, the other pages of the batch go on, and the
    # next attempt archives it.
    from workers.archive import WarcArchive

    write = WarcArchive.write_exchange
    failed: list[str] = []

    def flaky(self: WarcArchive, url: str, *args: Any, **kw: Any) -> Any:
        if url.endswith("/b.html") and not failed:
            failed.append(url)
            raise RuntimeError("a bug while building a record")
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

    monkeypatch.setattr(Worker, "_mark_near_duplicates", broken)
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
    # c0 and c1 are byte-for-byte twins: one is the other's exact duplicate (the payload
    # digest index on the Cluster), the other captured in full
    copies = [e for e in log if e["reason"] == "exact_duplicate"]
    assert len(copies) == 1
    assert {copies[0]["url"], copies[0]["duplicate_of"]} == {
        "http://site.test/c0.html", "http://site.test/c1.html"}


async def test_a_slow_page_keeps_its_lease(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # A 1.5 s lease and a page that takes 4 s to answer: the worker extends the leases it
    # holds every ttl/3, so the reaper (every second) leaves this one alone. Without the
    # heartbeat it was reaped mid-fetch, leased and fetched a second time meanwhile, and
    # the first completion came back expired.
    import asyncio

    from frontier.store import FrontierStore

    statuses: list[str] = []
    complete_many = FrontierStore.complete_many

    async def spy(self: FrontierStore, completions: Any, now: Any = None,
                  **more: Any) -> list[str]:
        got = await complete_many(self, completions, now, **more)
        statuses.extend(got)
        return got

    async def slow(n: int) -> web.Response:
        await asyncio.sleep(4.0)
        return web.Response(text=page("slow " * 40, []), content_type="text/html")

    monkeypatch.setattr(FrontierStore, "complete_many", spy)
    pages = {"/": page("home " * 50, ["/slow.html"]), "/slow.html": slow}
    summaries: list[dict[str, Any]] = []
    requests, log = await run_site(tmp_path, redis_server.url, pages, summaries=summaries,
                                   lease={"ttl_s": 1.5},
                                   fetch={"read_timeout_s": 10.0, "total_timeout_s": 20.0})
    assert requests.count("/slow.html") == 1
    assert statuses and set(statuses) == {"ok"}
    assert [e["outcome"] for e in log if e["url"].endswith("/slow.html")] == ["fetched"]
    assert summaries[0]["balanced"] and summaries[0]["fetched"] == 2


async def test_a_full_disk_stops_the_worker_and_hands_back_its_leases(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # Archiving /b.html meets a disk fault: the worker leases no more, hands back what it
    # holds (queued again, no attempt counted: not dead however often it happens) and the
    # crawl ends with DiskFault. Resumed with room on the disk, the job completes: /b.html
    # is fetched again and every page has one fetch-log line.
    import pytest

    from frontier.exceptions import DiskFault
    from frontier.redis_client import connect
    from frontier.settings import JobSettings
    from frontier.store import FrontierStore
    from workers.archive import WarcArchive

    write = WarcArchive.write_exchange
    faults: list[str] = []

    def full(self: WarcArchive, url: str, *args: Any, **kw: Any) -> Any:
        if url.endswith("/b.html") and len(faults) < 2:
            faults.append(url)
            raise DiskFault(f"{self.directory}: No space left on device")
        return write(self, url, *args, **kw)

    monkeypatch.setattr(WarcArchive, "write_exchange", full)
    pages = {"/": page("home " * 50, ["/a.html", "/b.html", "/c.html"]),
             "/a.html": page("alpha " * 40, []), "/b.html": page("bravo " * 40, []),
             "/c.html": page("charlie " * 40, [])}
    settings = {"lease": {"max_attempts": 2}}
    for run in range(2):  # twice: a handed-back page is not an attempt (max_attempts 2)
        with pytest.raises(DiskFault, match="handed back [1-9][0-9]* unfinished lease"):
            await run_site(tmp_path, redis_server.url, pages, fresh=run == 0, **settings)
        client = connect(redis_server.url)
        store = FrontierStore(client, JobSettings.model_validate({"name": "w"}))
        counts = await store.counts()
        attempts = [await client.hgetall(pk.attempts) for pk in store.keys.parts]
        await client.aclose()
        assert counts.balanced and counts.leased == 0 and counts.dead == 0
        assert counts.queued >= 1 and not any(attempts)
    assert faults == ["http://site.test/b.html"] * 2
    summaries: list[dict[str, Any]] = []
    requests, log = await run_site(tmp_path, redis_server.url, pages, fresh=False,
                                   summaries=summaries, **settings)
    assert requests.count("/b.html") == 1  # this run's server saw it once more
    fetched = sorted(e["url"] for e in log if e["outcome"] == "fetched")
    assert fetched == [f"http://site.test/{p}" for p in ("", "a.html", "b.html", "c.html")]
    s = summaries[0]
    assert s["balanced"] and (s["queued"], s["leased"], s["dead"], s["fetched"]) == (0, 0, 0, 4)
