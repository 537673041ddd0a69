"""Sitemaps checked against the sitemaps.org protocol 0.9.

Each rule below is quoted from memory of the protocol text (sitemaps.org, "Sitemaps XML
format"), as the test beside it says; robots.txt ``Sitemap:`` lines are checked against
protego, a reference parser.
"""

from __future__ import annotations

import gzip
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from protego import Protego

from frontier.keys import Keys
from frontier.model import Lease, Outcome
from frontier.robots_rules import RobotsRules
from frontier.settings import load_settings
from frontier.sitemaps import (
    BAD_ENTRIES, BAD_GZIP, CAPPED, HOST_QUOTA, NOT_SITEMAP, OFF_LOCATION, READ_INDEX,
    READ_URLSET, TOO_DEEP, TOO_LARGE, XML_MALFORMED, XML_REFUSED, SitemapReader,
    fingerprint_form, parse_sitemap, parse_w3c_datetime, sitemap_url, split_sitemap,
    unpack, url_cash, vouched, within_location,
)
from frontier.urls import fingerprint
from synthweb.sitemaps import ENTITY_BOMB, sitemap_index, urlset

NS = "http://www.sitemaps.org/schemas/sitemap/0.9"
MB = 1024 * 1024
UA = "sluice-test/0.1 (+http://operator.test/contact)"


def doc(body: str, root: str = "urlset") -> bytes:
    return f'<?xml version="1.0" encoding="UTF-8"?><{root} xmlns="{NS}">{body}</{root}>'.encode()


# -- the limits --------------------------------------------------------------------------

def test_at_most_50000_urls_per_file() -> None:
    """Protocol (from memory): "Sitemap files must have no more than 50,000 URLs"; the
    rest of a longer file is ignored and the outcome says so."""
    rows = "".join(f"<url><loc>http://a.test/{i}</loc></url>" for i in range(50_001))
    parsed = parse_sitemap(doc(rows), 50_000)
    assert parsed.kind == "urlset" and len(parsed.entries) == 50_000 and parsed.capped
    exact = parse_sitemap(doc("".join(f"<url><loc>http://a.test/{i}</loc></url>"
                                      for i in range(50_000))), 50_000)
    assert len(exact.entries) == 50_000 and not exact.capped


def test_50_mb_uncompressed_cap_before_and_after_gzip() -> None:
    """Protocol (from memory): a sitemap must be "no larger than 50MB (52,428,800 bytes)"
    uncompressed, and may be gzip-compressed. A gzip file that inflates past 50 MB stops
    at the cap (the fetcher's decompression guard) and ends as sitemap_too_large."""
    cap = 50 * MB
    inside = doc("<url><loc>http://a.test/</loc></url>") + b" " * (cap - 200)
    assert len(inside) <= cap
    assert unpack(gzip.compress(inside, 1), "http://a.test/s.xml.gz", cap) == inside
    bomb = gzip.compress(b"\0" * (cap + 1), 9)
    assert len(bomb) < MB  # a small download, a big body
    assert unpack(bomb, "http://a.test/s.xml.gz", cap) == TOO_LARGE
    assert unpack(b"x" * (cap + 1), "http://a.test/s.xml", cap) == TOO_LARGE
    assert unpack(b"\x1f\x8bnot gzip at all", "http://a.test/s.xml", cap) == BAD_GZIP


def test_loc_must_be_under_2048_characters_and_absolute() -> None:
    """Protocol (from memory): <loc> "must begin with the protocol (such as http) ... and
    be less than 2,048 characters"."""
    long = "http://a.test/" + "x" * (2048 - len("http://a.test/"))
    ok = "http://a.test/" + "x" * (2047 - len("http://a.test/"))
    parsed = parse_sitemap(doc(f"<url><loc>{long}</loc></url><url><loc>{ok}</loc></url>"
                               "<url><loc>/relative</loc></url><url></url>"), 10)
    assert [e.loc for e in parsed.entries] == [ok] and parsed.bad == 3


# -- index files -------------------------------------------------------------------------

def test_index_file_lists_sitemaps() -> None:
    """Protocol (from memory): a sitemap index has a <sitemapindex> root and a <sitemap>
    entry with <loc> (and optional <lastmod>) per sitemap."""
    body = sitemap_index(["http://a.test/s1.xml", "http://a.test/s2.xml.gz"])
    parsed = parse_sitemap(body, 10)
    assert parsed.kind == "sitemapindex"
    assert [e.loc for e in parsed.entries] == ["http://a.test/s1.xml", "http://a.test/s2.xml.gz"]


def test_kind_mark_round_trips_and_levels_share_one_fingerprint() -> None:
    """A sitemap reached at several index levels (an index that lists itself) has one
    fingerprint, so URL-seen dedupe fetches it once (common practice, no source)."""
    url = "http://a.test/sitemap_index.xml"
    for level in (0, 1, 7):
        assert split_sitemap(sitemap_url(url, level)) == (url, level)
    assert split_sitemap(url) is None and split_sitemap(url + "#sitemapx") is None
    assert len({fingerprint(fingerprint_form(split_sitemap(sitemap_url(url, n))[0]))
                for n in range(4)}) == 1
    assert fingerprint(fingerprint_form(url)) != fingerprint(url)


# -- the location rule -------------------------------------------------------------------

@pytest.mark.parametrize("url, inside", [
    ("http://example.test/catalog/show?item=23", True),
    ("http://example.test/catalog/offers/show?item=23", True),
    ("http://example.test/catalog/", True),
    ("http://example.test/images/", False),
    ("http://example.test/", False),
    ("https://example.test/catalog/show", False),  # another protocol
    ("http://www.example.test/catalog/show", False),  # another host
    ("http://example.test:8080/catalog/show", False),  # another port
])
def test_location_rule(url: str, inside: bool) -> None:
    """Protocol (from memory), "Sitemap file location": a sitemap at
    http://example.com/catalog/sitemap.xml can include any URL starting with
    http://example.com/catalog/ but not http://example.com/images/; all its URLs must use
    the same protocol and host as the sitemap."""
    assert within_location("http://example.test/catalog/sitemap.xml", url) is inside


def test_cross_submit_through_robots() -> None:
    """Protocol (from memory), "Sitemaps & Cross Submits": when robots.txt of
    www.example.com names http://www.sitemaphost.com/sitemap-www.example.com.xml, that
    sitemap may list URLs of www.example.com. A robots.txt naming nothing there does not."""
    sm = "http://sitemaphost.test/sitemap-www.example.test.xml"
    assert vouched(["http://sitemaphost.test/sitemap-www.example.test.xml"], sm)
    assert vouched(["HTTP://SitemapHost.test/other.xml"], sm)  # same origin, canonical
    assert not vouched(["http://elsewhere.test/sitemap.xml"], sm)
    assert not vouched(["not a url", ""], sm)


def test_robots_sitemap_lines_match_protego() -> None:
    """robots.txt Sitemap: lines stand outside the user-agent groups; protego (a reference
    parser) reads the same list."""
    body = (b"User-agent: *\nDisallow: /private/\nSitemap: http://a.test/s.xml\n\n"
            b"User-agent: other\nSitemap: http://b.test/t.xml.gz\nDisallow: /\n")
    rules = RobotsRules.from_entry(200, body, user_agent=UA)
    assert list(rules.sitemaps) == list(Protego.parse(body.decode()).sitemaps)
    assert rules.sitemaps == ("http://a.test/s.xml", "http://b.test/t.xml.gz")
    assert RobotsRules.from_entry(404, b"", user_agent=UA).sitemaps == ()


# -- lastmod and escaping ----------------------------------------------------------------

@pytest.mark.parametrize("text, moment", [
    ("1997", datetime(1997, 1, 1, tzinfo=UTC)),
    ("1997-07", datetime(1997, 7, 1, tzinfo=UTC)),
    ("1997-07-16", datetime(1997, 7, 16, tzinfo=UTC)),
    ("1997-07-16T19:20+01:00", datetime(1997, 7, 16, 18, 20, tzinfo=UTC)),
    ("1997-07-16T19:20:30+01:00", datetime(1997, 7, 16, 18, 20, 30, tzinfo=UTC)),
    ("1997-07-16T19:20:30.45+01:00", datetime(1997, 7, 16, 18, 20, 30, 450000, tzinfo=UTC)),
    ("2004-10-01T18:23:17+00:00", datetime(2004, 10, 1, 18, 23, 17, tzinfo=UTC)),
    ("2005-01-01T00:00:00Z", datetime(2005, 1, 1, tzinfo=UTC)),
    ("2005-01-01T00:00:00-05:30", datetime(2005, 1, 1, 5, 30, tzinfo=UTC)),
])
def test_lastmod_w3c_datetime(text: str, moment: datetime) -> None:
    """Protocol (from memory): <lastmod> is in W3C Datetime format, the time may be left
    out (YYYY-MM-DD). The forms and the 1997-07-16T19:20:30.45+01:00 example are those of
    the W3C Datetime note (from memory)."""
    assert parse_w3c_datetime(text) == moment


@pytest.mark.parametrize("text", [
    "", "97", "1997-7-16", "1997-13-01", "1997-02-30", "1997-07-16T19:20",  # no zone
    "1997-07-16T25:00Z", "1997-07-16 19:20Z", "1997-07-16T19:20+24:00", "yesterday",
])
def test_lastmod_refused_forms(text: str) -> None:
    """Forms the W3C Datetime profile does not have (or no real moment) give no lastmod;
    the URL is kept all the same."""
    assert parse_w3c_datetime(text) is None
    parsed = parse_sitemap(doc(f"<url><loc>http://a.test/</loc><lastmod>{text}</lastmod></url>"), 5)
    assert parsed.entries[0].lastmod is None


def test_entity_escaped_urls() -> None:
    """Protocol (from memory): data values must be entity-escaped: & as &amp;, ' as
    &apos;, " as &quot;, > as &gt;, < as &lt;. An unescaped & is not XML."""
    parsed = parse_sitemap(doc(
        "<url><loc>http://a.test/view?w=1&amp;h=2&amp;q=&apos;x&apos;&quot;&gt;&lt;</loc></url>"),
        5)
    assert parsed.entries[0].loc == "http://a.test/view?w=1&h=2&q='x'\"><"
    assert parse_sitemap(doc("<url><loc>http://a.test/?a=1&b=2</loc></url>"), 5).error == XML_MALFORMED
    built = urlset([("http://a.test/q?x=1&y=2", None)])
    assert b"&amp;" in built and parse_sitemap(built, 5).entries[0].loc == "http://a.test/q?x=1&y=2"


def test_text_sitemap() -> None:
    """Protocol (from memory): a text sitemap has one URL a line, UTF-8, at most 50,000."""
    parsed = parse_sitemap(b"http://a.test/1\n\nhttp://a.test/2\r\nnot a url\n", 10)
    assert parsed.kind == "text" and [e.loc for e in parsed.entries] == [
        "http://a.test/1", "http://a.test/2"] and parsed.bad == 1
    assert parse_sitemap(b"http://a.test/1\nhttp://a.test/2\n", 1).capped


# -- hostile bodies ----------------------------------------------------------------------

@pytest.mark.parametrize("body", [
    ENTITY_BOMB.replace("HOST", "a.test").encode(),  # exponential entity expansion
    ('<?xml version="1.0"?><!DOCTYPE u [<!ENTITY x SYSTEM "file:///etc/passwd">]>'
     f'<urlset xmlns="{NS}"><url><loc>http://a.test/&x;</loc></url></urlset>').encode(),
    ('<?xml version="1.0"?><!DOCTYPE u SYSTEM "http://127.0.0.1:9/evil.dtd">'
     f'<urlset xmlns="{NS}"><url><loc>http://a.test/</loc></url></urlset>').encode(),
    ('<?xml version="1.0"?><!DOCTYPE u [<!ENTITY big "' + "x" * 10_000 + '">]>'
     f'<urlset xmlns="{NS}"><url><loc>http://a.test/&big;</loc></url></urlset>').encode(),
])
def test_document_types_and_entities_refused(body: bytes) -> None:
    """Entity expansion, external entities and external DTDs are refused before anything
    is expanded or fetched (defusedxml, forbid_dtd): the outcome is sitemap_xml_refused."""
    parsed = parse_sitemap(body, 50_000)
    assert parsed.error == XML_REFUSED and parsed.entries == []


@pytest.mark.parametrize("body, reason", [
    (b"\x00\x01\x02\xff\xfe binary", NOT_SITEMAP),
    (b"<html><body>a page</body></html>", NOT_SITEMAP),
    (b"<urlset><url><loc>http://a.test/</loc>", XML_MALFORMED),
    (b"<" + b"<a>" * 100_000, XML_MALFORMED),
    (b"<urlset>" + b"<a>" * 50_000 + b"</urlset>", XML_MALFORMED),
])
def test_broken_bodies_give_a_reason(body: bytes, reason: str) -> None:
    assert parse_sitemap(body, 50_000).error == reason


@given(st.binary(max_size=4096))
def test_fuzz_odd_bytes_never_raise(data: bytes) -> None:
    parsed = parse_sitemap(data, 20)
    assert (parsed.kind is None) == (parsed.error is not None)
    assert len(parsed.entries) <= 20
    assert all(e.loc.lower().startswith(("http://", "https://")) and len(e.loc) < 2048
               for e in parsed.entries)


_piece = st.sampled_from([
    "<url>", "</url>", "<loc>", "</loc>", "<lastmod>", "</lastmod>", "<priority>",
    "</priority>", "<sitemap>", "</sitemap>", "http://a.test/", "&amp;", "&lt;", "&x;",
    "<!DOCTYPE x>", "<![CDATA[", "]]>", "\x00", "é", "2004-10-01", "0.8", "NaN", "-1",
    "<?xml version='1.0'?>", " ", "\n"])


@given(st.lists(_piece, max_size=60), st.sampled_from(["urlset", "sitemapindex", "x"]))
def test_fuzz_xml_shaped_input(pieces: list[str], root: str) -> None:
    """XML-shaped garbage: never raises, entries are absolute URLs, priorities in [0, 1]."""
    body = f'<{root} xmlns="{NS}">{"".join(pieces)}</{root}>'.encode("utf-8", "replace")
    parsed = parse_sitemap(body, 50)
    assert len(parsed.entries) <= 50
    assert all(0.0 <= e.priority <= 1.0 for e in parsed.entries)
    assert all(e.lastmod is None or e.lastmod.tzinfo is not None for e in parsed.entries)


@given(st.text(max_size=40))
def test_fuzz_lastmod_text(text: str) -> None:
    moment = parse_w3c_datetime(text)
    assert moment is None or moment.utcoffset() == timedelta(0)


# -- what listed URLs are worth ----------------------------------------------------------

def test_url_cash_formula() -> None:
    """docs/priority.md, Sitemaps: share_i = (1 - jump_share) * cash * w_i / sum(w),
    w_i = priority_i / 0.5, cash_i = share_i + url_cash * w_i."""
    from frontier.sitemaps import SitemapEntry
    s = load_settings(None, {"sitemaps": {"url_cash": 0.01}, "priority": {"jump_share": 0.2}})
    entries = [SitemapEntry("http://a.test/1", priority=1.0), SitemapEntry("http://a.test/2")]
    (c1, k1), (c2, k2) = url_cash(0.3, entries, s)
    assert k1 == pytest.approx(0.8 * 0.3 * 2 / 3) and k2 == pytest.approx(0.8 * 0.3 / 3)
    assert c1 == pytest.approx(k1 + 0.02) and c2 == pytest.approx(k2 + 0.01)
    assert url_cash(0.0, entries, s)[1][0] > 0  # worth something without any in-link


# -- the reader, on a real Redis -----------------------------------------------------------

def lease_for(url: str, cash: float = 0.1, depth: int = 1) -> Lease:
    from frontier.model import encode_score
    host = url.split("/")[2]
    return Lease("0-1", host, url, encode_score(cash, depth), 0, 0, "member")


class _Rules:
    def __init__(self, sitemaps: tuple[str, ...]) -> None:
        self.sitemaps = sitemaps


@pytest.fixture
async def reader(redis_server: Any) -> Any:
    from frontier.redis_client import connect
    client = connect(redis_server.url)
    await client.flushall()
    robots = {"http://b.test": ("http://a.test/cross.xml",), "http://c.test": ()}

    async def rules_for(origin: str) -> _Rules:
        return _Rules(robots.get(origin, ()))

    settings = load_settings(None, {"sitemaps": {"max_index_depth": 2, "max_per_host": 3}})
    yield SitemapReader(settings, client, Keys("sm", 4), rules_for)
    await client.aclose()


async def test_reader_index_depth_bounded_and_loop(reader: Any) -> None:
    """An index at the deepest level admits no children (sitemap_too_deep); an index that
    lists itself offers itself one level down, where dedupe stops it (see the fingerprint
    test); children on another host are refused (protocol, from memory: an index may
    only name sitemaps on the same site)."""
    url = "http://a.test/index.xml"
    body = sitemap_index([url, "http://a.test/s1.xml", "http://x.test/s.xml"])
    deep = await reader.read(lease_for(sitemap_url(url, 2)), url, 2, body, None)
    assert deep.outcome is Outcome.FETCHED and deep.reason == f"{READ_INDEX},{TOO_DEEP}"
    assert deep.candidates == []
    top = await reader.read(lease_for(sitemap_url(url)), url, 0, body, None)
    assert top.reason == f"{READ_INDEX},{OFF_LOCATION}"
    assert [c.url for c in top.candidates] == [sitemap_url(url, 1),
                                              sitemap_url("http://a.test/s1.xml", 1)]


async def test_reader_host_quota(reader: Any) -> None:
    """At most sitemaps.max_per_host sitemaps per host (here 3); known ones pass again."""
    url = "http://a.test/index.xml"
    body = sitemap_index([f"http://a.test/s{i}.xml" for i in range(5)])
    read = await reader.read(lease_for(sitemap_url(url)), url, 0, body, None)
    assert len(read.candidates) == 3 and HOST_QUOTA in read.reason
    again = await reader.read(lease_for(sitemap_url(url)), url, 0, body, None)
    assert [c.url for c in again.candidates] == [c.url for c in read.candidates]


async def test_reader_urlset_location_cross_submit_and_lastmod(reader: Any) -> None:
    """Own directory: kept; another host whose robots.txt names a sitemap here: kept (a
    cross submit); another host naming none: refused. The lastmod rides on the candidate."""
    url = "http://a.test/cross.xml"
    body = urlset([("http://a.test/p", "2004-10-01"), ("http://b.test/q", None),
                   ("http://c.test/r", None), ("http://a.test/s?x=1&y=2", None)])
    read = await reader.read(lease_for(sitemap_url(url), depth=3), url, 0, body, None)
    assert read.reason == f"{READ_URLSET},{OFF_LOCATION}"
    assert [c.url for c in read.candidates] == [
        "http://a.test/p", "http://b.test/q", "http://a.test/s?x=1&y=2"]
    assert read.candidates[0].lastmod == datetime(2004, 10, 1, tzinfo=UTC)
    assert all(c.depth == 4 and c.source_host == "a.test" for c in read.candidates)


async def test_reader_hostile_bodies_end_failed(reader: Any) -> None:
    url = "http://a.test/s.xml"
    lease = lease_for(sitemap_url(url))
    bomb = await reader.read(lease, url, 0, ENTITY_BOMB.replace("HOST", "a.test").encode(), None)
    assert (bomb.outcome, bomb.reason, bomb.candidates) == (Outcome.FAILED, XML_REFUSED, [])
    cut = await reader.read(lease, url, 0, b"<urlset>", "length")
    assert (cut.outcome, cut.reason) == (Outcome.FAILED, TOO_LARGE)
    junk = await reader.read(lease, url, 0, b"\xff\xfe\x00garbage", None)
    assert (junk.outcome, junk.reason) == (Outcome.FAILED, NOT_SITEMAP)
    capped = await reader.read(lease, url, 0, b"http://a.test/1\nbad\n" * 3, None)
    assert capped.outcome is Outcome.FETCHED and BAD_ENTRIES in capped.reason
    assert CAPPED not in capped.reason
