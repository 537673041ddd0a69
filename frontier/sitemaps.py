"""Sitemaps (sitemaps.org protocol 0.9): where they come from, how they are read, and
what their URLs are worth.

A sitemap travels through the frontier as a URL of its own kind: its canonical URL with
the fragment ``#sitemap`` (``#sitemap-N`` for one found N index files down). A canonical
page URL never has a fragment, so the two cannot meet; the fingerprint ignores N, so a
sitemap is fetched once whatever the path that led to it (an index listing itself ends
there). Leases, politeness, robots, the address guard, the fetch log and the counts
treat it as any URL; the worker hands its body to :class:`SitemapReader`.

Sources: robots.txt ``Sitemap:`` lines (one hop from the robots file, so the host is not
seeded by them), the job's ``sitemaps.urls`` and ``--sitemap`` (depth 0: the operator
vouches, as for a seed), and index files (the index's depth, one level further).

Hostile input ends as a failed outcome with a ``sitemap_*`` reason: bodies are capped
at ``sitemaps.max_bytes`` before and after gzip, XML with a document type declaration
(entity expansion, external entities) is refused by defusedxml, at most
``sitemaps.max_urls`` entries are read.
"""

from __future__ import annotations

import asyncio
import io
import re
from collections.abc import Awaitable, Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

from frontier.exceptions import UrlError
from frontier.model import Candidate, Lease, Outcome
from frontier.redis_boundary import redis_boundary
from frontier.settings import JobSettings
from frontier.urls import canonicalize, host_of

MARK = "#sitemap"
PROTOCOL_NS = "http://www.sitemaps.org/schemas/sitemap/0.9"
MAX_LOC_CHARS = 2048  # sitemaps.org 0.9: <loc> "must be less than 2,048 characters"
DEFAULT_PRIORITY = 0.5  # sitemaps.org 0.9: <priority> defaults to 0.5
GZIP_MAGIC = b"\x1f\x8b"
THREAD_PARSE_BYTES = 1 << 20  # bodies over this are parsed on a thread
MAX_FOREIGN_ORIGINS = 16  # other hosts' robots.txt consulted per sitemap (no source)

# reasons in the fetch log
READ_URLSET = "sitemap_urlset"
READ_INDEX = "sitemap_index"
TOO_LARGE = "sitemap_too_large"  # over max_bytes, raw or unzipped
BAD_GZIP = "sitemap_bad_gzip"
XML_REFUSED = "sitemap_xml_refused"  # DTD, entity, external reference
XML_MALFORMED = "sitemap_xml_malformed"
NOT_SITEMAP = "sitemap_not_sitemap"  # another root element, or text with no URL
CAPPED = "sitemap_capped"  # more than max_urls entries: the rest ignored
OFF_LOCATION = "sitemap_off_location"  # some URLs broke the location rule
TOO_DEEP = "sitemap_too_deep"  # an index below max_index_depth: children dropped
HOST_QUOTA = "sitemap_host_quota"  # a host's max_per_host sitemaps reached
BAD_ENTRIES = "sitemap_bad_entries"  # entries without a usable <loc>


# -- the kind marker ---------------------------------------------------------------------

def sitemap_url(url: str, level: int = 0) -> str:
    """The frontier URL of the sitemap at ``url`` (canonical), ``level`` indexes down."""
    return f"{url}{MARK}" if level <= 0 else f"{url}{MARK}-{level}"


def split_sitemap(url: str) -> tuple[str, int] | None:
    """(URL, level) of a sitemap's frontier URL; None for any other URL."""
    at = url.rfind(MARK)
    if at < 0:
        return None
    tail = url[at + len(MARK):]
    if tail == "":
        return url[:at], 0
    if tail[0] == "-" and tail[1:].isdigit() and len(tail) <= 3:
        return url[:at], int(tail[1:])
    return None


def fingerprint_form(url: str) -> str:
    """The text a sitemap's fingerprint is taken from: the level left out, so one
    sitemap reached at several levels is fetched once."""
    return url + MARK


# -- W3C Datetime (the form <lastmod> takes) ----------------------------------------------

_W3C = re.compile(
    r"(\d{4})(?:-(\d{2})(?:-(\d{2})(?:T(\d{2}):(\d{2})(?::(\d{2})(?:\.(\d+))?)?"
    r"(Z|[+-]\d{2}:\d{2}))?)?)?\Z")


def parse_w3c_datetime(text: str) -> datetime | None:
    """A W3C Datetime (YYYY, YYYY-MM, YYYY-MM-DD, YYYY-MM-DDThh:mmTZD,
    YYYY-MM-DDThh:mm:ssTZD, YYYY-MM-DDThh:mm:ss.sTZD) as an aware UTC datetime; None if
    ``text`` is none of them or names no real moment."""
    m = _W3C.match(text.strip())
    if m is None:
        return None
    year, month, day, hour, minute, second, frac, tzd = m.groups()
    try:
        zone = UTC
        if tzd and tzd != "Z":
            sign = 1 if tzd[0] == "+" else -1
            hh, mm = int(tzd[1:3]), int(tzd[4:6])
            if hh > 23 or mm > 59:
                return None
            zone = timezone(sign * timedelta(hours=hh, minutes=mm))
        micro = int((frac or "0")[:6].ljust(6, "0"))
        moment = datetime(int(year), int(month or 1), int(day or 1), int(hour or 0),
                          int(minute or 0), int(second or 0), micro, tzinfo=zone)
        return moment.astimezone(UTC)
    except (ValueError, OverflowError):
        return None


# -- reading a body ------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class SitemapEntry:
    """One <url> or <sitemap> entry (or one line of a text sitemap)."""

    loc: str
    lastmod: datetime | None = None
    priority: float = DEFAULT_PRIORITY


@dataclass
class ParsedSitemap:
    """What a body holds: ``kind`` is 'urlset', 'sitemapindex', 'text', or None with
    ``error`` (a reason) when it is not a usable sitemap."""

    kind: str | None
    entries: list[SitemapEntry] = field(default_factory=list)
    error: str | None = None
    capped: bool = False  # entries beyond max_urls were ignored
    bad: int = 0  # entries without a usable <loc>


def unpack(body: bytes, url: str, max_bytes: int) -> bytes | str:
    """The sitemap's bytes: gunzipped when it is a gzip file (``.gz`` or the gzip
    magic), the decoded size capped by the fetcher's guard; or a reason."""
    if len(body) > max_bytes:
        return TOO_LARGE
    if not (body.startswith(GZIP_MAGIC) or url.split("?", 1)[0].endswith(".gz")):
        return body
    from frontier.exceptions import FetchError
    from workers.fetcher import Decoder  # the same decompression-bomb guard as pages

    decoder = Decoder("gzip", max_bytes)
    try:
        within = decoder.feed(body)
    except FetchError:
        return BAD_GZIP
    return decoder.body() if within else TOO_LARGE


def _local(tag: Any) -> str:
    """An element's name without its namespace."""
    return tag.rpartition("}")[2] if isinstance(tag, str) else ""


def _priority(text: str | None) -> float:
    try:
        value = float(text) if text else DEFAULT_PRIORITY
    except ValueError:
        return DEFAULT_PRIORITY
    return min(1.0, max(0.0, value)) if value == value else DEFAULT_PRIORITY


def _good_loc(loc: str) -> bool:
    return 0 < len(loc) < MAX_LOC_CHARS and loc.lower().startswith(("http://", "https://"))


def parse_sitemap(data: bytes, max_urls: int) -> ParsedSitemap:
    """Parse an XML sitemap or sitemap index, or a text sitemap (one URL a line, UTF-8);
    never raises on the content."""
    head = data[:256].lstrip(b"\xef\xbb\xbf \t\r\n")
    if not head.startswith(b"<"):
        return _parse_text(data, max_urls)
    return _parse_xml(data, max_urls)


def _parse_text(data: bytes, max_urls: int) -> ParsedSitemap:
    try:
        text = data.decode("utf-8-sig")  # sitemaps.org 0.9: text sitemaps are UTF-8
    except UnicodeDecodeError:
        return ParsedSitemap(None, error=NOT_SITEMAP)
    out = ParsedSitemap("text")
    for line in text.splitlines():
        loc = line.strip()
        if not loc:
            continue
        if not _good_loc(loc):
            out.bad += 1
            continue
        if len(out.entries) >= max_urls:
            out.capped = True
            break
        out.entries.append(SitemapEntry(loc))
    if not out.entries:
        return ParsedSitemap(None, error=NOT_SITEMAP, bad=out.bad)
    return out


def _parse_xml(data: bytes, max_urls: int) -> ParsedSitemap:
    from xml.etree.ElementTree import ParseError

    from defusedxml import DefusedXmlException
    from defusedxml.ElementTree import iterparse

    out = ParsedSitemap(None)
    item = ""
    root = None
    try:
        for event, elem in iterparse(io.BytesIO(data), events=("start", "end"),
                                     forbid_dtd=True, forbid_entities=True,
                                     forbid_external=True):
            if root is None:
                root = elem
                name = _local(elem.tag)
                if name not in ("urlset", "sitemapindex"):
                    return ParsedSitemap(None, error=NOT_SITEMAP)
                out.kind, item = name, ("url" if name == "urlset" else "sitemap")
                continue
            if event != "end" or _local(elem.tag) != item:
                continue
            fields = {_local(child.tag): (child.text or "").strip() for child in elem}
            elem.clear()
            loc = fields.get("loc", "")
            if not _good_loc(loc):
                out.bad += 1
                continue
            if len(out.entries) >= max_urls:
                out.capped = True
                break
            lastmod = fields.get("lastmod")
            out.entries.append(SitemapEntry(
                loc, parse_w3c_datetime(lastmod) if lastmod else None,
                _priority(fields.get("priority"))))
    except DefusedXmlException:
        return ParsedSitemap(None, error=XML_REFUSED)
    except (ParseError, ValueError, UnicodeError, RecursionError):
        return ParsedSitemap(None, error=XML_MALFORMED)
    if out.kind is None:
        return ParsedSitemap(None, error=NOT_SITEMAP)
    return out


# -- the location rule ----------------------------------------------------------------------

def _origin_and_path(url: str) -> tuple[str, str]:
    start = url.find("://") + 3
    slash = url.find("/", start)
    if slash < 0:
        return url, "/"
    return url[:slash], url[slash:].split("?", 1)[0]


def within_location(sitemap: str, url: str) -> bool:
    """sitemaps.org 0.9, "Sitemap file location": a sitemap may list only URLs of its own
    scheme, host and port whose path lies in the sitemap's directory or below. Both URLs
    canonical."""
    origin, path = _origin_and_path(sitemap)
    directory = path[: path.rfind("/") + 1]
    url_origin, url_path = _origin_and_path(url)
    return url_origin == origin and url_path.startswith(directory)


def vouched(robots_sitemaps: Iterable[str], sitemap: str) -> bool:
    """sitemaps.org 0.9, "Sitemaps & Cross Submits": a host whose robots.txt names a
    sitemap elsewhere lets that sitemap list its URLs. Here a robots.txt naming any
    sitemap on ``sitemap``'s scheme, host and port vouches for it (so the files an index
    named there lists share its permission)."""
    origin = _origin_and_path(sitemap)[0]
    for named in robots_sitemaps:
        try:
            if _origin_and_path(canonicalize(named))[0] == origin:
                return True
        except UrlError:
            continue
    return False


# -- what a sitemap's URLs are worth ---------------------------------------------------------

class SitemapCandidate(Candidate):
    """A candidate listed in a sitemap; ``lastmod`` (an aware UTC datetime or None)
    rides along for whoever wants to compare it with an earlier fetch."""

    lastmod: datetime | None = None


def listed(url: str, depth: int, cash: float, credit: float, source_host: str | None,
           lastmod: datetime | None) -> SitemapCandidate:
    c = SitemapCandidate(url, depth, cash, credit, source_host)
    c.lastmod = lastmod  # tuple subclass without __slots__: the attribute lives in __dict__
    return c


def url_cash(sitemap_cash: float, entries: list[SitemapEntry], settings: JobSettings,
             ) -> list[tuple[float, float]]:
    """(cash, credit) of each entry: docs/priority.md, "Sitemaps".

    share_i = (1 - jump_share) * sitemap_cash * w_i / sum(w), w_i = priority_i / 0.5;
    cash_i = share_i + url_cash * w_i. A listed URL is worth ``url_cash`` even if no page
    links to it; the site's own <priority> only ranks its URLs among themselves."""
    weights = [e.priority / DEFAULT_PRIORITY for e in entries]
    total = sum(weights)
    spend = (1.0 - settings.priority.jump_share) * sitemap_cash / total if total else 0.0
    floor = settings.sitemaps.url_cash
    return [(spend * w + floor * w, spend * w) for w in weights]


# -- the worker's side --------------------------------------------------------------------------

@dataclass
class SitemapRead:
    """How a sitemap's lease ends: outcome, fetch-log reason, candidates to admit."""

    outcome: Outcome
    reason: str
    candidates: list[Candidate] = field(default_factory=list)


RulesFor = Callable[[str], Awaitable[Any]]  # origin -> RobotsRules (has .sitemaps)


class SitemapReader:
    """Turns sitemap bodies and robots.txt ``Sitemap:`` lines into candidates."""

    def __init__(self, settings: JobSettings, redis: Any, keys: Any,
                 rules_for: RulesFor) -> None:
        self.settings = settings
        self.redis = redis
        self.keys = keys
        self.rules_for = rules_for

    # sources
    def operator_candidates(self) -> list[Candidate]:
        """The job's own sitemaps (``sitemaps.urls``), at depth 0 with the seed cash."""
        cash = self.settings.priority.seed_cash
        out = []
        for raw in self.settings.sitemaps.urls:
            plain = split_sitemap(raw)
            out.append(Candidate(sitemap_url(plain[0] if plain else raw), 0, cash))
        return out

    def robots_candidates(self, origin: str, sitemaps: Iterable[str]) -> list[Candidate]:
        """Sitemaps named in ``origin``'s robots.txt: one hop from it (depth 1)."""
        if not self.settings.sitemaps.enabled:
            return []
        cash = self.settings.sitemaps.robots_cash
        source = host_of(origin + "/")
        out = []
        for raw in sitemaps:
            try:
                url = canonicalize(raw, max_length=self.settings.scope.max_url_length)
            except UrlError:
                continue
            out.append(Candidate(sitemap_url(url), 1, cash, 0.0, source))
        return out

    async def within_quota(self, candidates: list[Candidate]) -> tuple[list[Candidate], int]:
        """Keep the sitemap candidates their hosts still have room for (at most
        ``sitemaps.max_per_host`` sitemaps per host, a host's known ones always pass);
        returns them and how many were dropped."""
        by_host: dict[str, list[tuple[Candidate, str]]] = {}
        for c in candidates:
            plain = split_sitemap(c.url)
            if plain is None:
                continue
            try:
                host = host_of(plain[0])
            except UrlError:
                continue
            by_host.setdefault(host, []).append((c, plain[0]))
        if not by_host:
            return [], 0
        limit = self.settings.sitemaps.max_per_host
        hosts = list(by_host)
        async with redis_boundary("sitemap quota"), \
                self.redis.pipeline(transaction=False) as pipe:
            for host in hosts:
                key = self.keys.sitemaps_of(host)
                pipe.scard(key)
                pipe.smismember(key, [u for _, u in by_host[host]])
            replies = await pipe.execute()
        kept: list[Candidate] = []
        adds: dict[str, list[str]] = {}
        for i, host in enumerate(hosts):
            room = limit - int(replies[2 * i])
            for (c, url), known in zip(by_host[host], replies[2 * i + 1]):
                if int(known):
                    kept.append(c)
                elif room > 0 and url not in adds.get(host, ()):
                    room -= 1
                    kept.append(c)
                    adds.setdefault(host, []).append(url)
        if adds:
            async with redis_boundary("sitemap quota"), \
                    self.redis.pipeline(transaction=False) as pipe:
                for host, urls in adds.items():
                    pipe.sadd(self.keys.sitemaps_of(host), *urls)
                await pipe.execute()
        return kept, len(candidates) - len(kept)

    # reading one
    async def read(self, lease: Lease, url: str, level: int, body: bytes,
                   truncated: str | None) -> SitemapRead:
        """Read the fetched sitemap at ``url`` (canonical, ``level`` indexes down)."""
        s = self.settings.sitemaps
        if truncated == "length":
            return SitemapRead(Outcome.FAILED, TOO_LARGE)
        data = unpack(body, url, s.max_bytes)
        if isinstance(data, str):
            return SitemapRead(Outcome.FAILED, data)
        if len(data) > THREAD_PARSE_BYTES:
            parsed = await asyncio.to_thread(parse_sitemap, data, s.max_urls)
        else:
            parsed = parse_sitemap(data, s.max_urls)
        if parsed.error is not None:
            return SitemapRead(Outcome.FAILED, parsed.error)
        reasons = [READ_INDEX if parsed.kind == "sitemapindex" else READ_URLSET]
        if parsed.capped:
            reasons.append(CAPPED)
        if parsed.bad:
            reasons.append(BAD_ENTRIES)
        if parsed.kind == "sitemapindex":
            candidates = await self._children(lease, url, level, parsed.entries, reasons)
        else:
            candidates = await self._pages(lease, url, parsed.entries, reasons)
        return SitemapRead(Outcome.FETCHED, ",".join(reasons), candidates)

    async def _children(self, lease: Lease, url: str, level: int,
                        entries: list[SitemapEntry], reasons: list[str]) -> list[Candidate]:
        """An index's sitemaps: same host as the index (sitemaps.org 0.9: an index may
        only name sitemaps on its own site), at most ``max_index_depth`` levels down."""
        if level >= self.settings.sitemaps.max_index_depth:
            reasons.append(TOO_DEEP)
            return []
        origin = _origin_and_path(url)[0]
        found: list[Candidate] = []
        off = 0
        shares = url_cash(lease.cash, entries, self.settings)
        for entry, (cash, _credit) in zip(entries, shares):
            try:
                child = canonicalize(entry.loc, max_length=self.settings.scope.max_url_length)
            except UrlError:
                off += 1
                continue
            if _origin_and_path(child)[0] != origin:
                off += 1
                continue
            found.append(Candidate(sitemap_url(child, level + 1), lease.depth, cash, 0.0,
                                   lease.host))
        if off:
            reasons.append(OFF_LOCATION)
        kept, dropped = await self.within_quota(found)
        if dropped:
            reasons.append(HOST_QUOTA)
        return kept

    async def _pages(self, lease: Lease, url: str, entries: list[SitemapEntry],
                     reasons: list[str]) -> list[Candidate]:
        """A urlset's URLs that pass the location rule (its own host, in its directory or
        below), or, on another host, whose robots.txt vouches for this sitemap (a cross
        submit); one link deeper than the sitemap."""
        max_length = self.settings.scope.max_url_length
        resolved: list[tuple[str, SitemapEntry]] = []
        foreign: dict[str, bool | None] = {}
        home = _origin_and_path(url)[0]
        unusable = 0
        for entry in entries:
            try:
                loc = canonicalize(entry.loc, max_length=max_length)
            except UrlError:
                unusable += 1
                continue
            resolved.append((loc, entry))
            origin = _origin_and_path(loc)[0]
            if origin != home:  # another host: only its robots.txt can allow it
                foreign.setdefault(origin, None)
        for origin in list(foreign)[:MAX_FOREIGN_ORIGINS]:
            try:
                rules = await self.rules_for(origin)
            except Exception:  # noqa: BLE001 - an unreachable host vouches for nothing
                foreign[origin] = False
                continue
            foreign[origin] = vouched(getattr(rules, "sitemaps", ()), url)
        kept = [(loc, e) for loc, e in resolved
                if within_location(url, loc) or foreign.get(_origin_and_path(loc)[0])]
        if unusable and BAD_ENTRIES not in reasons:
            reasons.append(BAD_ENTRIES)
        if len(kept) < len(resolved):
            reasons.append(OFF_LOCATION)
        shares = url_cash(lease.cash, [e for _, e in kept], self.settings)
        depth = lease.depth + 1
        return [listed(loc, depth, cash, credit, lease.host, e.lastmod)
                for (loc, e), (cash, credit) in zip(kept, shares)]

