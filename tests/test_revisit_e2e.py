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

import json
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

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
