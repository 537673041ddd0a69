"""Duplicates end to end on a loopback web: exact copies become WARC revisit records
(ISO 28500:2017 s.6.7.2), near copies (SimHash) are archived and followed and say what
they matched, fetch-log reasons are kept together, and the JSON link record reads back.

The web: site.test holds pages p0..p3 (400 words each); print.test serves byte-identical
copies of them, mirror.test near copies (two words of 400 changed) each linking to a page
found nowhere else. The originals link to their copies, so an original is always
captured first. Real Redis (tests/servers.py), real HTTP on loopback, warcio to read.
"""

from __future__ import annotations

import base64
import hashlib
import json
import random
import subprocess
import sys
from collections import Counter
from pathlib import Path
from typing import Any

from aiohttp import web
from warcio.archiveiterator import ArchiveIterator

from frontier.runner import crawl as _crawl
from frontier.digests import Capture, PayloadDigestIndex
from frontier.keys import Keys
from frontier.settings import load_settings
from tests.loopback import start_site
from tests.servers import RedisServer
from workers.archive import WarcArchive
from workers.warc_records import payload_digest

UA = "sluice-test/0.1 (+http://operator.test/contact)"
PAGES = 4
WORDS = 400
REVISIT_PROFILE = "http://netpreserve.org/warc/1.1/revisit/identical-payload-digest"
"""ISO 28500:2017 s.6.7.2, the WARC 1.1 profile URI."""
MAX_BODY = 8 * 1024  # the long page is cut here (WARC-Truncated: length)


SEEDS = (1000, 1002, 1003, 1009)
"""Word lists whose near copies lie within k = 3 bits. SimHash is probabilistic: two words
changed of 400 (6 of 398 shingles) move the fingerprint by 64 * theta / pi ~ 3.5 bits on
average (Charikar 2002), so some near copies of that size lie farther (measured: 60% of
500 word lists within 3 bits)."""


def words(i: int) -> list[str]:
    rng = random.Random(SEEDS[i])
    return [f"w{rng.randrange(10**6)}" for _ in range(WORDS)]


def near(text: list[str]) -> list[str]:
    """Two words of 400 changed."""
    changed = list(text)
    changed[100], changed[300] = "changedone", "changedtwo"
    return changed


def html(text: list[str], links: list[str]) -> bytes:
    anchors = " ".join(f'<a href="{u}">copy</a>' for u in links)
    return (f"<html><head><title>t</title></head><body><p>{' '.join(text)}</p>{anchors}"
            f"</body></html>").encode()


def build_web() -> dict[tuple[str, str], bytes]:
    pages: dict[tuple[str, str], bytes] = {
        ("site.test", "/"): html(["home"] * 30, [f"/p{i}.html" for i in range(PAGES)])}
    for i in range(PAGES):
        text = words(i)
        # relative /extra{i}.html: on print.test it names a page only the exact copy links to
        original = html(text, [f"/extra{i}.html", f"http://print.test/p{i}.html",
                               f"http://mirror.test/p{i}.html"])
        pages[("site.test", f"/p{i}.html")] = original
        pages[("print.test", f"/p{i}.html")] = original  # byte for byte
        pages[("mirror.test", f"/p{i}.html")] = html(
            near(text), [f"/extra{i}.html", f"http://print.test/p{i}.html", f"/only{i}.html"])
        pages[("site.test", f"/extra{i}.html")] = html([f"extra{i}"] * 50, [])
        pages[("print.test", f"/extra{i}.html")] = html([f"printextra{i}"] * 50, [])
        pages[("mirror.test", f"/only{i}.html")] = html(
            [f"only{i}"] * 50, ["/long.html"] if i == 0 else [])
    # near p0 as well, and longer than MAX_BODY: cut inside a comment after the text
    pages[("mirror.test", "/long.html")] = html(near(words(0)), [
        "/extra0.html", "http://print.test/p0.html", "/only0.html"]).replace(
        b"</body>", b"<!-- " + b"pad " * 5000 + b" --></body>")
    return pages


async def crawl(tmp_path: Path, redis_url: str, pages: dict[tuple[str, str], bytes],
                requests: Counter[tuple[str, str]]) -> list[dict[str, Any]]:
    """Crawl ``pages`` from http://site.test/; the fetch log's lines."""
    from frontier.redis_client import connect

    async def handle(request: web.Request) -> web.StreamResponse:
        host = request.headers.get("Host", "").split(":")[0]
        requests[(host, request.path)] += 1
        body = pages.get((host, request.path))
        if body is None:
            return web.Response(status=404)
        return web.Response(body=body, content_type="text/html")

    client = connect(redis_url)
    await client.flushall()
    await client.aclose()
    runner, port = await start_site(handle)
    try:
        data: dict[str, Any] = {
            "name": "dups", "seeds": ["http://site.test/"], "redis": {"url": redis_url},
            "scope": {"allow_hosts": ["*.test"]},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
            # no slow lane for hosts the link-spam defence does not trust (print, mirror)
            "priority": {"untrusted_delay_s": 0.0, "suspect_delay_s": 0.0},
            "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                      "max_body_bytes": MAX_BODY},
        }
        await _crawl(load_settings(None, data), tmp_path, 1, quiet=True)
    finally:
        await runner.cleanup()
    return [json.loads(x) for x in (tmp_path / "fetches.jsonl").read_text().splitlines()]


def records(folder: Path) -> list[dict[str, Any]]:
    """Every record of the crawl's WARC files, read by warcio (the reference reader)."""
    out = []
    for path in sorted((folder / "warc").glob("*.warc.gz")):
        with path.open("rb") as stream:
            for rec in ArchiveIterator(stream):
                out.append({"type": rec.rec_type, "headers": dict(rec.rec_headers.headers),
                            "http": rec.http_headers, "content": rec.content_stream().read()})
    return out


def warcio_check(path: Path) -> None:
    """`warcio check` verifies every record's digests (the reference checker)."""
    done = subprocess.run([str(Path(sys.executable).with_name("warcio")), "check", str(path)],
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr


def sha1_base32(body: bytes) -> str:
    """ISO 28500 s.5.8/5.9: 'algorithm:value'; SHA-1 in Base32 (RFC 4648 s.6)."""
    return "sha1:" + base64.b32encode(hashlib.sha1(body).digest()).decode()


async def test_exact_and_near_copies_end_to_end(tmp_path: Path,
                                                redis_server: RedisServer) -> None:
    pages = build_web()
    requests: Counter[tuple[str, str]] = Counter()
    log = await crawl(tmp_path, redis_server.url, pages, requests)
    lines = {e["url"]: e for e in log}
    recs = records(tmp_path)
    by_id = {r["headers"]["WARC-Record-ID"]: r for r in recs}
    captures = {(r["type"], r["headers"]["WARC-Target-URI"]): r for r in recs
                if r["type"] in ("response", "revisit")}
    for path in (tmp_path / "warc").glob("*.warc.gz"):
        warcio_check(path)

    for i in range(PAGES):
        body = pages[("site.test", f"/p{i}.html")]
        original_url, copy_url = f"http://site.test/p{i}.html", f"http://print.test/p{i}.html"
        original = captures[("response", original_url)]
        # the exact copy: a revisit record, never a second response (ISO 28500 s.6.7.2)
        assert ("response", copy_url) not in captures
        revisit = captures[("revisit", copy_url)]["headers"]
        assert revisit["WARC-Profile"] == REVISIT_PROFILE
        assert revisit["WARC-Refers-To"] == original["headers"]["WARC-Record-ID"]
        assert revisit["WARC-Refers-To-Target-URI"] == original_url
        assert revisit["WARC-Refers-To-Date"] == original["headers"]["WARC-Date"]
        assert revisit["WARC-Payload-Digest"] == sha1_base32(body)
        assert original["headers"]["WARC-Payload-Digest"] == sha1_base32(body)
        # the block is the HTTP head alone: warcio parses it, no payload follows
        assert captures[("revisit", copy_url)]["http"].get_statuscode() == "200"
        assert captures[("revisit", copy_url)]["content"] == b""
        assert original["content"] == body
        # one copy of the body in the archive
        assert sum(r["content"] == body for r in recs) == 1
        assert lines[copy_url]["duplicate_of"] == original_url
        assert "exact_duplicate" in lines[copy_url]["reason"].split(",")
        assert lines[copy_url]["outcome"] == "fetched"
        # the exact copy's links are not followed: a relative link on print.test names a
        # page nothing else links to, and it is never asked for
        assert requests[("site.test", f"/extra{i}.html")] == 1
        assert requests[("print.test", f"/extra{i}.html")] == 0

        # the near copy: archived in full, logged with what it matched and how far
        near_url = f"http://mirror.test/p{i}.html"
        assert captures[("response", near_url)]["content"] == pages[("mirror.test",
                                                                      f"/p{i}.html")]
        assert lines[near_url]["reason"] == "near_duplicate"
        assert lines[near_url]["near_duplicate_of"] == original_url
        # within k = 3 bits (Manku, Jain & Das Sarma, WWW 2007)
        assert 0 <= lines[near_url]["hamming"] <= 3
        # its links go on: the page only it links to is fetched
        assert requests[("mirror.test", f"/only{i}.html")] == 1
        assert lines[f"http://mirror.test/only{i}.html"]["outcome"] == "fetched"

        # the JSON link records (ISO 28500 s.6.6 metadata, WARC-Refers-To s.5.11)
        meta = {by_id[r["headers"]["WARC-Refers-To"]]["headers"]["WARC-Target-URI"]: r
                for r in recs if r["type"] == "metadata"}
        assert meta[original_url]["headers"]["Content-Type"] == "application/json"
        assert json.loads(meta[original_url]["content"]) == {"url": original_url, "links": [
            {"url": f"http://site.test/extra{i}.html", "anchor": "copy", "followed": True,
             "why": None},
            {"url": copy_url, "anchor": "copy", "followed": True, "why": None},
            {"url": near_url, "anchor": "copy", "followed": True, "why": None}]}
        copy_links = json.loads(meta[copy_url]["content"])
        assert by_id[meta[copy_url]["headers"]["WARC-Refers-To"]]["type"] == "revisit"
        assert copy_links["url"] == copy_url
        assert [(ln["url"], ln["followed"], ln["why"]) for ln in copy_links["links"]] == [
            (f"http://print.test/extra{i}.html", False, "exact_duplicate"),
            (copy_url, False, "exact_duplicate"), (near_url, False, "exact_duplicate")]

    # a page that is cut and also a near copy keeps both reasons, in that order
    long_url = "http://mirror.test/long.html"
    assert lines[long_url]["reason"] == "truncated_length,near_duplicate"
    # its text is the near copy p0's: the closest stored fingerprint, 0 bits apart
    assert lines[long_url]["near_duplicate_of"] == "http://mirror.test/p0.html"
    assert lines[long_url]["hamming"] == 0
    assert captures[("response", long_url)]["headers"]["WARC-Truncated"] == "length"
    # every URL fetched once, each with one fetch-log line
    assert all(n == 1 for key, n in requests.items() if key[1] != "/robots.txt")
    assert len(log) == len(lines)


async def test_digest_index_names_the_first_capture_of_another_url(redis_client: Any) -> None:
    # On a server and on a Cluster (256 shards, each its own slot): one claim call a batch.
    keys = Keys("j", 4)
    index = PayloadDigestIndex(redis_client, keys.payload_digests)
    digest = payload_digest(b"same body")
    first = Capture("http://a.test/", "2031-01-01T00:00:00Z", "<urn:uuid:1>")
    again = Capture("http://b.test/", "2031-01-01T00:00:01Z", "<urn:uuid:2>")
    other = Capture("http://c.test/", "2031-01-01T00:00:02Z", "<urn:uuid:3>")
    # two pages of one batch with one payload: the later one refers to the earlier
    assert await index.claim([digest, digest], [first, again]) == [None, first]
    assert await index.claim([payload_digest(b"other")], [other]) == [None]
    assert await index.first(digest) == first


async def test_a_page_fetched_again_is_not_a_revisit_of_itself(redis_client: Any) -> None:
    # A worker died after archiving a page but before completing its lease; the page is
    # fetched again: a full response again (the old record may not be on disk), and the
    # index then names the new record.
    keys = Keys("j", 4)
    index = PayloadDigestIndex(redis_client, keys.payload_digests)
    digest = payload_digest(b"body")
    before = Capture("http://a.test/", "2031-01-01T00:00:00Z", "<urn:uuid:1>")
    after = Capture("http://a.test/", "2031-01-01T00:05:00Z", "<urn:uuid:9>")
    assert await index.claim([digest], [before]) == [None]
    assert await index.claim([digest], [after]) == [None]
    assert await index.first(digest) == after
    copy = Capture("http://b.test/", "2031-01-01T00:06:00Z", "<urn:uuid:10>")
    assert await index.claim([digest], [copy]) == [after]


def test_revisit_record_reads_back_and_checks(tmp_path: Path) -> None:
    # ISO 28500:2017 s.6.7.2 identical-payload-digest: the profile, WARC-Refers-To,
    # WARC-Refers-To-Target-URI and -Date, WARC-Payload-Digest of the original payload,
    # and the HTTP head without its body; warcio reads it and `warcio check` passes.
    body = b"<html><body>the same payload</body></html>"
    from datetime import UTC, datetime
    at = datetime(2031, 5, 6, 7, 8, 9, tzinfo=UTC)
    archive = WarcArchive(tmp_path, software="sluice/0.1", operator=None, job="j")
    head = [("Content-Type", "text/html"), ("Content-Length", str(len(body)))]
    ref = archive.write_exchange("http://a.test/", ("GET", "/", []), 200, "OK", head, body, at)
    first = Capture("http://a.test/", "2031-05-06T07:08:09Z", ref.record_id)
    copy = archive.write_exchange("http://b.test/", ("GET", "/", []), 200, "OK", head, body,
                                  at, revisit_of=first)
    archive.close()
    path = archive.files[0]
    warcio_check(path)
    recs = records(tmp_path)
    revisit = next(r for r in recs if r["type"] == "revisit")
    assert revisit["headers"]["WARC-Record-ID"] == copy.record_id
    assert revisit["headers"]["WARC-Profile"] == REVISIT_PROFILE
    assert revisit["headers"]["WARC-Refers-To"] == ref.record_id
    assert revisit["headers"]["WARC-Refers-To-Target-URI"] == "http://a.test/"
    assert revisit["headers"]["WARC-Refers-To-Date"] == "2031-05-06T07:08:09Z"
    assert revisit["headers"]["WARC-Payload-Digest"] == sha1_base32(body)
    assert revisit["headers"]["Content-Type"] == "application/http; msgtype=response"
    assert revisit["http"].get_statuscode() == "200" and revisit["content"] == b""
    # the revisit's request record points at it (ISO 28500 s.5.7 WARC-Concurrent-To)
    request = next(r for r in recs if r["type"] == "request"
                   and r["headers"]["WARC-Target-URI"] == "http://b.test/")
    assert request["headers"]["WARC-Concurrent-To"] == copy.record_id


async def test_copies_are_archived_in_full_while_the_digest_index_is_unreachable(
        tmp_path: Path, redis_server: RedisServer, monkeypatch: Any) -> None:
    # A Redis failure on the digest claim costs a second full copy, never a page: both
    # captures are whole response records (ISO 28500 s.6.4), none a revisit.
    from frontier.exceptions import StoreUnavailable

    async def unreachable(self: PayloadDigestIndex, digests: Any, captures: Any) -> Any:
        raise StoreUnavailable("payload digest claim failed: connection refused")

    monkeypatch.setattr(PayloadDigestIndex, "claim", unreachable)
    body = html(words(0), [])
    pages = {("site.test", "/"): html(["home"] * 30, ["/p0.html", "http://print.test/p0.html"]),
             ("site.test", "/p0.html"): body, ("print.test", "/p0.html"): body}
    requests: Counter[tuple[str, str]] = Counter()
    log = await crawl(tmp_path, redis_server.url, pages, requests)
    recs = records(tmp_path)
    assert not [r for r in recs if r["type"] == "revisit"]
    assert sum(r["type"] == "response" and r["content"] == body for r in recs) == 2
    copies = [e for e in log if e["url"].endswith("/p0.html")]
    assert [e["outcome"] for e in copies] == ["fetched", "fetched"]
    assert all(e["duplicate_of"] is None for e in copies)
