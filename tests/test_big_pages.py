"""Big pages do not stall the worker: pages over fetch.offload_bytes are parsed and
fingerprinted in child processes and archived in a thread, at most
fetch.max_links_per_page links are kept, and a page past fetch.parse_timeout_s ends as
failed. Real loopback HTTP, a real Redis, WARC files read back with warcio."""

from __future__ import annotations

import asyncio
import functools
import json
import random
from collections import Counter
from pathlib import Path
from typing import Any

from aiohttp import web
from warcio.archiveiterator import ArchiveIterator

from frontier.runner import crawl as _crawl
from frontier.settings import load_settings
from frontier.store import FrontierStore
from tests.loopback import start_site
from tests.servers import RedisServer
from workers.offload import PagePool

UA = "sluice-test/0.1 (+http://operator.test/contact)"
BIG_BYTES = 20 * 1024 * 1024
MAX_LINKS = 1000


@functools.cache
def link_page(size: int, prefix: str = "/deep/l", word: str = "x") -> bytes:
    """An HTML page of about ``size`` bytes that is nothing but links, in order; anchor
    texts ``word`` + a number (pages with other words are not near-duplicates)."""
    head = b"<!DOCTYPE html><html><head><title>links</title></head><body><p>many links</p>\n"
    line = len(f'<a href="{prefix}0000000">{word}000</a>\n')
    count = (size - len(head)) // line
    body = "".join(f'<a href="{prefix}{i:07d}">{word}{i % 1000:03d}</a>\n'
                   for i in range(count)).encode()
    return head + body + b"</body></html>"


def small_page(n: int) -> bytes:
    rng = random.Random(n)
    words = " ".join(f"w{rng.randrange(10**6)}" for _ in range(200))
    return f"<html><head><title>p{n}</title></head><body><p>{words}</p></body></html>".encode()


async def serve(pages: dict[tuple[str, str], bytes],
                requests: Counter[tuple[str, str]]) -> tuple[web.AppRunner, int]:
    async def handle(request: web.Request) -> web.StreamResponse:
        host = request.headers.get("Host", "").split(":")[0]
        requests[(host, request.path)] += 1
        body = pages.get((host, request.path))
        if body is None:
            return web.Response(status=404)
        return web.Response(body=body, content_type="text/html")

    return await start_site(handle)


async def crawl(tmp_path: Path, redis_url: str, pages: dict[tuple[str, str], bytes],
                monkeypatch: Any, **settings: Any) -> dict[str, Any]:
    """Crawl ``pages`` from http://hub.test/; what the server saw, the completion
    statuses the frontier gave, the fetch log and the summary."""
    from frontier.redis_client import connect

    client = connect(redis_url)
    await client.flushall()
    await client.aclose()
    statuses: list[str] = []
    complete_many = FrontierStore.complete_many

    async def spy(self: FrontierStore, completions: Any, now: Any = None,
                  **more: Any) -> list[str]:
        got = await complete_many(self, completions, now, **more)
        statuses.extend(got)
        return got

    monkeypatch.setattr(FrontierStore, "complete_many", spy)
    requests: Counter[tuple[str, str]] = Counter()
    runner, port = await serve(pages, requests)
    try:
        data: dict[str, Any] = {
            "name": "big", "seeds": ["http://hub.test/"], "redis": {"url": redis_url},
            "scope": {"allow_hosts": ["*.test"], "max_depth": 1},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
            "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                      "max_body_bytes": BIG_BYTES + 1024 * 1024,
                      "max_decompressed_bytes": BIG_BYTES + 1024 * 1024,
                      "max_links_per_page": MAX_LINKS, "total_timeout_s": 60.0},
        }
        for part, values in settings.items():
            data.setdefault(part, {}).update(values)
        summary = await _crawl(load_settings(None, data), tmp_path, 1, quiet=True)
    finally:
        await runner.cleanup()
    lines = [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]
    return {"requests": requests, "statuses": statuses, "log": lines, "summary": summary}


def hub(urls: list[str]) -> bytes:
    links = "".join(f'<a href="{u}">{u}</a>\n' for u in urls)
    return f"<html><head><title>hub</title></head><body>{links}</body></html>".encode()


async def test_big_pages_do_not_stall_the_other_leases(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # Three 20 MB pages of links among 24 small pages on six other hosts, all leased
    # together. With a 2 s lease, parsing the big pages on the event loop (about 2 s each
    # here) left other leases' completions to come back expired and their pages fetched
    # again; off the loop, every completion is accepted and every page is fetched once.
    big = [f"http://big{k}.test/" for k in range(3)]
    small = [f"http://h{i}.test/p{j}" for i in range(6) for j in range(4)]
    pages = {("hub.test", "/"): hub(big + small)}
    for k, url in enumerate(big):
        pages[(url.split("/")[2], "/")] = link_page(BIG_BYTES, word=f"big{k}n")
    for n, url in enumerate(small):
        pages[(url.split("/")[2], "/" + url.split("/", 3)[3])] = small_page(n)
    got = await crawl(tmp_path, redis_server.url, pages, monkeypatch,
                      lease={"ttl_s": 2.0}, fetch={"concurrency": 32})
    requests, log, summary = got["requests"], got["log"], got["summary"]

    assert got["statuses"] and set(got["statuses"]) == {"ok"}, Counter(got["statuses"])
    page_requests = {k: n for k, n in requests.items() if k[1] != "/robots.txt"}
    assert len(page_requests) == 1 + len(big) + len(small)
    assert set(page_requests.values()) == {1}  # each page fetched once
    by_url = {e["url"]: e for e in log if e["outcome"] == "fetched"}
    for url in small:
        assert by_url[url]["reason"] is None
    for url in big:
        assert by_url[url]["reason"] == "links_capped"
    # the cap: exactly MAX_LINKS links of each big page offered, all one depth too deep
    assert summary["balanced"] and summary["queued"] == 0 and summary["leased"] == 0
    assert summary["reasons"].get("excluded:too_deep") == len(big) * MAX_LINKS
    assert summary["fetched"] == 1 + len(big) + len(small)


async def test_kept_links_are_the_first_in_document_order(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # One big page: its WARC metadata record (ISO 28500 s.6.6, read back with warcio)
    # lists the first MAX_LINKS links of the page, in document order, and no more.
    pages = {("hub.test", "/"): hub(["http://big0.test/"]),
             ("big0.test", "/"): link_page(2 * 1024 * 1024)}
    got = await crawl(tmp_path, redis_server.url, pages, monkeypatch,
                      fetch={"offload_bytes": 64 * 1024})
    outlinks: list[str] = []
    for path in sorted((tmp_path / "warc").glob("*.warc.gz")):
        with path.open("rb") as fh:
            for record in ArchiveIterator(fh):
                if (record.rec_type == "metadata"
                        and record.rec_headers.get_header("WARC-Target-URI") == "http://big0.test/"):
                    document = json.loads(record.content_stream().read())
                    outlinks = [ln["url"] for ln in document["links"]]
    assert outlinks == [f"http://big0.test/deep/l{i:07d}" for i in range(MAX_LINKS)]
    assert got["requests"][("big0.test", "/")] == 1


async def test_a_page_past_the_parse_time_limit_ends_as_failed(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # A 20 MB page of links takes seconds to parse here; with a 0.3 s limit it ends as
    # failed (parse_timeout), fetched once. Pages just over offload_bytes (tens of
    # milliseconds) still go through the child processes and end fetched.
    medium = [f"http://m{i}.test/" for i in range(4)]
    pages = {("hub.test", "/"): hub(["http://big0.test/", *medium]),
             ("big0.test", "/"): link_page(BIG_BYTES)}
    for url in medium:
        pages[(url.split("/")[2], "/")] = link_page(24 * 1024, word=url[7:9])
    got = await crawl(tmp_path, redis_server.url, pages, monkeypatch,
                      fetch={"offload_bytes": 16 * 1024, "parse_timeout_s": 0.3})
    outcomes = {e["url"]: (e["outcome"], e["reason"]) for e in got["log"]
                if e["url"] in ("http://big0.test/", *medium)}
    assert outcomes["http://big0.test/"] == ("failed", "parse_timeout")
    assert all(outcomes[url] == ("fetched", None) for url in medium), outcomes
    assert got["requests"][("big0.test", "/")] == 1
    summary = got["summary"]
    assert summary["balanced"] and summary["reasons"].get("failed:parse_timeout") == 1


async def test_page_pool_replaces_a_child_past_its_time() -> None:
    pool = PagePool(1, timeout_s=0.3)
    try:
        small = link_page(16 * 1024)
        page, fingerprint = await pool.digest(small, "http://a.test/", None, 10)
        assert len(page.links) == 10 and page.links_capped and fingerprint is not None
        try:
            await pool.digest(link_page(BIG_BYTES), "http://a.test/", None, 10)
            raise AssertionError("a 20 MB page of links parsed within 0.3 s")
        except TimeoutError:
            pass
        again, _ = await pool.digest(small, "http://a.test/", None, 10)
        assert again.links == page.links
        assert (pool.started, pool.killed) == (2, 1)  # the slow child's replacement
    finally:
        pool.close()


async def test_links_capped_only_when_more_links_follow() -> None:
    # at the cap exactly, nothing was dropped; an href that resolves to nothing
    # (javascript:, WHATWG URL Standard: not a fetchable scheme) is no link
    from workers.parser import parse_html

    def links(n: int, tail: str = "") -> bytes:
        return ("<html><body>" + "".join(f'<a href="/p{i}">p</a>' for i in range(n))
                + tail + "</body></html>").encode()

    assert not parse_html(links(5), "http://a.test/", max_links=5).links_capped
    assert not parse_html(links(5, '<a href="javascript:void(0)">j</a>'), "http://a.test/",
                          max_links=5).links_capped
    capped = parse_html(links(6), "http://a.test/", max_links=5)
    assert capped.links_capped and [ln.url for ln in capped.links] == [
        f"http://a.test/p{i}" for i in range(5)]
    await asyncio.sleep(0)
