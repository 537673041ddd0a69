"""Revisits end to end over loopback: a real crawl (sluice's runner, a real redis-server)
of the changing synthetic web (synthweb/changing.py) with ``revisit.enabled``.

- An unchanged page is fetched again with If-None-Match (RFC 9110 s.13.1.2), answered
  ``304``, and archived as a revisit record with the server-not-modified profile (ISO
  28500:2017 s.6.7.3, quoted from memory; WARC 1.1 profile URI).
- A page whose server sends odd bytes as ETag and Last-Modified is fetched again without
  them (they are not valid validators, RFC 9110 s.8.8.3 and s.5.6.7), answered ``200``
  with the same payload, and archived as an identical-payload-digest revisit (s.6.7.2).
- A page that changes between visits is archived in full each time it changed.
- ``warcio check`` (warcio's checker) accepts every WARC file; the frontier's counts add
  up and the fetch log has a line per fetch.
"""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from datetime import UTC, datetime
from typing import Any

import pytest
from aiohttp import web
from warcio.archiveiterator import ArchiveIterator

from frontier.redis_client import connect
from frontier.revisit_store import RevisitStore
from frontier.runner import crawl
from frontier.settings import load_settings
from frontier.store import FrontierStore
from synthweb.changing import START_EPOCH, ChangingPage, ChangingWeb
from tests.loopback import start_site
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
HOST = "news0.changing.test"
NOT_MODIFIED = "http://netpreserve.org/warc/1.1/revisit/server-not-modified"
IDENTICAL = "http://netpreserve.org/warc/1.1/revisit/identical-payload-digest"
FETCHES = 14


def changing_web() -> ChangingWeb:
    steady = ChangingPage(f"http://{HOST}/story/steady.html", 0.0)
    odd = ChangingPage(f"http://{HOST}/story/odd.html", 0.0)
    busy = ChangingPage(f"http://{HOST}/story/busy.html", 1.0,
                        changes=[0.5 + 0.7 * k for k in range(200)])
    web_ = ChangingWeb({HOST: [steady, odd, busy]}, horizon_s=200.0)
    web_.odd_validators[odd.url] = ('"caf\u00e9 \u00ff\t"', "\u00fe\u00ff 31 Feb 99 25:61")
    return web_


def records(folder: Path) -> list[dict[str, Any]]:
    out = []
    for path in sorted((folder / "warc").glob("*.warc.gz")):
        done = subprocess.run([str(Path(sys.executable).with_name("warcio")), "check",
                               "-v", str(path)], capture_output=True, text=True)
        assert done.returncode == 0, done.stdout + done.stderr
        with path.open("rb") as stream:
            for rec in ArchiveIterator(stream):
                out.append({"type": rec.rec_type, "headers": dict(rec.rec_headers.headers),
                            "status": rec.http_headers.get_statuscode() if rec.http_headers
                            else None})
    return out


async def test_conditional_gets_and_revisit_records(tmp_path: Path,
                                                    redis_server: RedisServer) -> None:
    web_ = changing_web()
    started = time.time()
    web_.clock = lambda: START_EPOCH + (time.time() - started)
    seen: list[tuple[str, str | None, str | None, int]] = []

    async def handle(request: web.Request) -> web.StreamResponse:
        resp = await web_.handle(request)
        seen.append((request.path, request.headers.get("If-None-Match"),
                     request.headers.get("If-Modified-Since"), resp.status))
        return resp

    client = connect(redis_server.url)
    await client.flushall()
    runner, port = await start_site(handle)
    try:
        settings = load_settings(None, {
            "name": "rv", "seeds": [f"http://{HOST}/"], "redis": {"url": redis_server.url},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
            "budget": {"max_pages": FETCHES},
            "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"]},
            "revisit": {"enabled": True, "min_interval_s": 1.0, "max_interval_s": 2.0,
                        "host_fetches_per_day": 1e6},
        })
        await crawl(settings, tmp_path, 1, quiet=True)
        store = FrontierStore(client, settings)
        counts = await store.counts()
        states = await RevisitStore(store).states(
            [(HOST, p.url) for p in web_.hosts[HOST]])
    finally:
        await runner.cleanup()
        await client.aclose()

    assert counts.balanced and counts.fetched == FETCHES
    steady, odd, busy = states
    assert steady and steady.visits >= 2 and steady.changes == 0 and steady.etag
    assert odd and odd.visits >= 2 and odd.etag is None and odd.last_modified is None
    assert busy and busy.visits >= 2 and busy.changes >= 1

    # the server saw conditional GETs for the steady page and answered 304
    steady_requests = [s for s in seen if s[0] == "/story/steady.html"]
    assert steady_requests[0][1:3] == (None, None)
    assert all(s[1] == steady.etag and s[2] and s[3] == 304 for s in steady_requests[1:])
    # odd validators are never sent back
    assert all(s[1] is None and s[2] is None for s in seen if s[0] == "/story/odd.html")

    recs = records(tmp_path)
    by_uri: dict[str, list[dict[str, Any]]] = {}
    for r in recs:
        if r["type"] in ("response", "revisit"):
            by_uri.setdefault(r["headers"]["WARC-Target-URI"], []).append(r)
    steady_recs = by_uri[steady_requests and f"http://{HOST}/story/steady.html"]
    assert steady_recs[0]["type"] == "response"
    for r in steady_recs[1:]:
        h = r["headers"]
        assert r["type"] == "revisit" and r["status"] == "304"
        assert h["WARC-Profile"] == NOT_MODIFIED and "WARC-Payload-Digest" not in h
        assert h["WARC-Refers-To-Target-URI"] == f"http://{HOST}/story/steady.html"
        assert h["WARC-Refers-To"] == steady_recs[0]["headers"]["WARC-Record-ID"]
        assert h["WARC-Refers-To-Date"] == steady_recs[0]["headers"]["WARC-Date"]
    odd_recs = by_uri[f"http://{HOST}/story/odd.html"]
    assert odd_recs[0]["type"] == "response"
    assert all(r["type"] == "revisit" and r["headers"]["WARC-Profile"] == IDENTICAL
               and r["headers"]["WARC-Payload-Digest"] == odd_recs[0]["headers"][
                   "WARC-Payload-Digest"] for r in odd_recs[1:])
    assert len(odd_recs) >= 2
    busy_recs = by_uri[f"http://{HOST}/story/busy.html"]
    assert sum(1 for r in busy_recs if r["type"] == "response") >= 2

    # one fetch-log line per fetch; their outcomes are the frontier's counts
    lines = [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]
    assert Counter(x["outcome"] for x in lines)["fetched"] == FETCHES
    assert sum(1 for x in lines if x["reason"] == "not_modified") == len(steady_recs) - 1
    odd_lines = [x for x in lines if x["url"] == f"http://{HOST}/story/odd.html"]
    assert "exact_duplicate" not in (odd_lines[0]["reason"] or "")
    assert all("exact_duplicate" in (x["reason"] or "") and x["duplicate_of"] == x["url"]
               for x in odd_lines[1:])


# sitemaps.org protocol 0.9, <lastmod> (quoted from memory): "The date of last
# modification of the file", in W3C Datetime. With revisits on, a sitemap read after a
# page's fetch that gives it a later lastmod makes its revisit due at once (the minimum
# interval here is 1 s, the page's own schedule 2 h); with revisits off nothing changes.
@pytest.mark.parametrize("revisit", [True, False])
async def test_a_newer_sitemap_lastmod_brings_a_page_back(tmp_path: Path,
                                                          redis_server: RedisServer,
                                                          revisit: bool) -> None:
    requests: list[str] = []

    def sitemap() -> str:
        now = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")  # after the first crawl
        return (f'<urlset xmlns="http://www.sitemaps.org/schemas/sitemap/0.9">'
                f"<url><loc>http://site.test/a.html</loc><lastmod>{now}</lastmod></url>"
                f"<url><loc>http://site.test/b.html</loc><lastmod>2020-01-01</lastmod></url>"
                f"</urlset>")

    async def handle(request: web.Request) -> web.StreamResponse:
        requests.append(request.path)
        n = requests.count(request.path)
        if request.path == "/":
            return web.Response(text='<p>home</p><a href="/a.html">a</a> '
                                '<a href="/b.html">b</a>', content_type="text/html")
        if request.path in ("/a.html", "/b.html"):
            return web.Response(text=f"<p>{request.path} edition {n}</p>",
                                content_type="text/html")
        if request.path == "/sitemap.xml":
            return web.Response(text=sitemap(), content_type="application/xml")
        return web.Response(status=404)

    client = connect(redis_server.url)
    await client.flushall()
    runner, port = await start_site(handle)
    try:
        def job(max_pages: int, **more: Any) -> Any:
            return load_settings(None, {
                "name": "lm", "seeds": ["http://site.test/"], "redis": {"url": redis_server.url},
                "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
                "budget": {"max_pages": max_pages},
                "fetch": {"user_agent": UA, "map_hosts": [f"site.test=127.0.0.1:{port}"]},
                "revisit": {"enabled": revisit, "min_interval_s": 1.0,
                            "max_interval_s": 86400.0, "host_fetches_per_day": 36.0},
                **more})

        await crawl(job(3), tmp_path / "one", 1, quiet=True)  # /, /a.html, /b.html
        await asyncio.sleep(1.1)  # the sitemap's lastmod (whole seconds) is later
        sitemaps = {"sitemaps": {"urls": ["http://site.test/sitemap.xml"]}}
        # the sitemap and, with revisits, /a.html again; a continuous crawl that never
        # brought it back would not end: the wait turns that into a failure
        await asyncio.wait_for(crawl(job(5, **sitemaps), tmp_path / "two", 1, quiet=True), 60)
        counts = await FrontierStore(client, job(5)).counts()
    finally:
        await runner.cleanup()
        await client.aclose()

    pages = [p for p in requests if p != "/robots.txt"]
    assert sorted(pages[:3]) == ["/", "/a.html", "/b.html"]
    assert "/sitemap.xml" in pages
    after = pages[pages.index("/sitemap.xml") + 1:]
    assert after == (["/a.html"] if revisit else [])  # /b.html's lastmod is older
    assert counts.balanced and counts.fetched == (5 if revisit else 4)
    lines = [json.loads(x) for x in (tmp_path / "two" / "fetches.jsonl").read_text()
             .splitlines()]
    assert [x["url"] for x in lines if x["outcome"] == "fetched"] == (
        ["http://site.test/sitemap.xml#sitemap", "http://site.test/a.html"] if revisit
        else ["http://site.test/sitemap.xml#sitemap"])
