"""Link and text extraction from fetched HTML.

``parse_html`` turns response bytes into canonical outlinks, a title, the visible
text (input for SimHash) and the page-level robots flags. It never raises on any
input: undecodable bytes become U+FFFD, malformed markup is repaired by the
parser the way a browser would, and URLs that cannot be resolved are dropped.

Decoding order (WHATWG Encoding Standard / HTML Standard "determining the
character encoding"): byte-order mark, then the ``charset`` of the Content-Type
header, then a ``<meta>`` declaration within the first 1024 bytes, then UTF-8.
Only labels naming an encoding that web pages use are honoured; any other label
(unknown, or a Python pseudo-codec such as ``base64``) falls through to the
next source.

The tree is built with lexbor (``selectolax.lexbor``): selectolax 1.x no
longer ships its older Modest backend, and lexbor builds a 10 KB page's tree in
tens of microseconds; URL resolution dominates the rest.
"""

from __future__ import annotations

import codecs
import re
import threading
from dataclasses import dataclass, field
from typing import NamedTuple
from urllib.parse import urlsplit

from selectolax.lexbor import LexborCSSSelector, LexborHTMLParser, LexborNode

from frontier.exceptions import UrlError
from frontier.urls import canonicalize, resolve_reference

MAX_ANCHOR_CHARS = 256
"""Anchor text beyond this many characters is cut."""

MAX_TITLE_CHARS = 1024
"""Title text beyond this many characters is cut."""

DEFAULT_MAX_LINKS = 5000
DEFAULT_MAX_TEXT = 200_000

SNIFF_BYTES = 1024
"""How far ``<meta charset>`` is looked for, and how much ``looks_binary`` inspects
(HTML Standard prescan limit; WHATWG MIME Sniffing resource header size)."""

BINARY_SHARE = 0.10
"""A resource header with more than this share of binary data bytes is binary
(common practice, no source)."""

SKIPPED_SCHEMES = frozenset({"javascript", "mailto", "tel", "data"})
"""Link schemes that never name a fetchable document."""

INVISIBLE_TAGS = ["script", "style", "noscript", "template"]
"""Elements whose content is not visible page text."""

LINK_SELECTOR = "a[href], area[href]"

_WEB_PREFIXES = ("http://", "https://")
_C0_CONTROL_OR_SPACE = "".join(map(chr, range(0x21)))
"""Stripped from both ends of an href (WHATWG URL Standard, basic URL parser)."""
_URLSPLIT_REMOVES = frozenset("\t\r\n")
"""ASCII tab and newline, deleted anywhere in an href (WHATWG URL Standard, basic URL parser)."""
_TAB_AND_NEWLINE = str.maketrans("", "", "\t\r\n")

CANONICAL_MEMO_SIZE = 1 << 15
"""Joined hrefs whose canonical form is remembered (``LinkResolver.resolve``): a crawl
meets most URLs in many links (about ten times over in the benchmark crawl; 72 % of the
joined hrefs of its first 3,000 pages were met before), and a lookup costs less than the
canonicaliser's check. Cleared when full."""
_CANONICAL: dict[str, str] = {}

_ROBOTS_SEPARATORS = re.compile(r"[\s,]+")
_HEADER_CHARSET = re.compile(r"""charset\s*=\s*["']?\s*([^\s;"']+)""", re.IGNORECASE)
_META_CHARSET = re.compile(
    rb"""<meta[^>]*?charset\s*=\s*["']?\s*([A-Za-z0-9_:.+\-]+)""", re.IGNORECASE
)
_BOMS: tuple[tuple[bytes, str], ...] = (
    (codecs.BOM_UTF8, "utf-8"),
    (codecs.BOM_UTF16_BE, "utf-16-be"),
    (codecs.BOM_UTF16_LE, "utf-16-le"),
)
# Python codec names of the encodings in the WHATWG Encoding Standard, mapped to
# the decoder used. ASCII and ISO-8859-1 labels mean windows-1252 there.
_WEB_CODECS: dict[str, str] = {
    name: name
    for name in (
        "utf-8", "cp866", "iso8859-2", "iso8859-3", "iso8859-4", "iso8859-5",
        "iso8859-6", "iso8859-7", "iso8859-8", "iso8859-10", "iso8859-13",
        "iso8859-14", "iso8859-15", "iso8859-16", "koi8-r", "koi8-u", "mac-roman",
        "mac-cyrillic", "cp874", "cp1250", "cp1251", "cp1252", "cp1253", "cp1254",
        "cp1255", "cp1256", "cp1257", "cp1258", "gbk", "gb18030", "big5", "euc_jp",
        "iso2022_jp", "shift_jis", "euc_kr", "utf-16-be", "utf-16-le",
    )
} | {
    "ascii": "cp1252",
    "iso8859-1": "cp1252",
    "iso8859-9": "cp1254",
    "iso8859-11": "cp874",
    "tis-620": "cp874",
    "gb2312": "gbk",
    "utf-16": "utf-16-le",
}
_BINARY_BYTES = bytes([*range(0x00, 0x09), 0x0B, *range(0x0E, 0x1B), *range(0x1C, 0x20)])
"""WHATWG MIME Sniffing, "binary data byte"."""


class Link(NamedTuple):
    """One outlink: canonical absolute URL without fragment (as resolved, if the
    canonicaliser refuses it; see ``LinkResolver.resolve``)."""

    url: str
    anchor: str
    nofollow: bool


@dataclass
class ParsedPage:
    """What a page yields: outlinks, title, visible text and robots flags."""

    links: list[Link] = field(default_factory=list)
    title: str = ""
    text: str = ""
    base: str = ""
    meta_nofollow: bool = False
    meta_noindex: bool = False
    encoding: str = "utf-8"
    links_capped: bool = False  # the page has more links than were kept (``max_links``)


_BOM_PREFIXES = tuple(bom for bom, _ in _BOMS)


def looks_binary(body: bytes) -> bool:
    """True if the first 1 KB holds a NUL or a high share of control bytes.

    A UTF-16 or UTF-8 byte-order mark means text (WHATWG MIME Sniffing,
    "rules for distinguishing if a resource is text or binary").
    """
    head = body[:SNIFF_BYTES]
    if not head or head.startswith(_BOM_PREFIXES):
        return False
    if b"\x00" in head:
        return True
    binary = len(head) - len(head.translate(None, _BINARY_BYTES))
    return binary > BINARY_SHARE * len(head)


def web_codec(label: str | None) -> str | None:
    """The Python codec for an encoding label, or None if it is not a web encoding."""
    if not label:
        return None
    try:
        name = codecs.lookup(label.strip()).name
    except (LookupError, ValueError):
        return None
    return _WEB_CODECS.get(name)


def header_charset(content_type: str | None) -> str | None:
    """The ``charset`` parameter of a Content-Type value, if any."""
    if not content_type:
        return None
    match = _HEADER_CHARSET.search(content_type)
    return match.group(1) if match else None


def decode_body(body: bytes, content_type: str | None = None) -> tuple[str, str]:
    """Decode HTML bytes; return (text, codec name). Never raises."""
    for bom, name in _BOMS:
        if body.startswith(bom):
            return body[len(bom):].decode(name, errors="replace"), name
    codec = web_codec(header_charset(content_type))
    if codec is None:
        match = _META_CHARSET.search(body[:SNIFF_BYTES])
        if match:
            codec = web_codec(match.group(1).decode("ascii"))
            if codec in ("utf-16-be", "utf-16-le"):
                # A document that can declare itself in ASCII is not UTF-16.
                codec = "utf-8"
    codec = codec or "utf-8"
    return body.decode(codec, errors="replace"), codec


def collapse(text: str) -> str:
    """Collapse runs of whitespace to one space and trim."""
    return " ".join(text.split())


class LinkResolver:
    """Resolves hrefs against one base URL (RFC 3986 s.5.2) to canonical URLs (s.6).

    The common shapes of href are joined by string concatenation: absolute ``http(s)``
    URLs, root-relative paths (joined to the base's ``scheme://netloc``) and plain
    relative paths (joined to the base's directory), in each case only when the href
    holds nothing resolution rewrites (dot segments, empty segments, path parameters,
    an empty query); the canonicaliser's fast path then passes most of them unchanged.
    Every other href is resolved and canonicalised by ``frontier.urls.canonicalize``
    (``urllib.parse.urljoin`` is not used: it drops empty path segments and empty
    queries, which RFC 3986 keeps).
    """

    __slots__ = ("base", "_origin", "_directory")

    def __init__(self, base: str) -> None:
        self.base = base
        self._origin = ""
        self._directory = ""
        try:
            parts = urlsplit(base)
        except ValueError:
            return
        if parts.scheme in ("http", "https") and parts.netloc:
            self._origin = f"{parts.scheme}://{parts.netloc}"
            path = parts.path or "/"
            if "/." not in path and "//" not in path and ";" not in path:
                self._directory = self._origin + path[: path.rfind("/") + 1]

    def resolve(self, href: str) -> str | None:
        """Canonical absolute URL of ``href`` (no fragment), or None if it is skipped.

        An href the canonicaliser refuses (another scheme, a malformed host, longer than
        its default limit) comes back resolved as written, for admission to judge by the
        job's settings and to record why.
        """
        href = href.strip(_C0_CONTROL_OR_SPACE)
        if not _URLSPLIT_REMOVES.isdisjoint(href):  # WHATWG URL Standard, basic URL parser
            href = href.translate(_TAB_AND_NEWLINE)
        if not href:
            return None
        if self._origin:
            joined = self._join_plain(href)
            if joined is not None:
                canonical = _CANONICAL.get(joined)
                if canonical is not None:
                    return canonical
                try:
                    canonical = canonicalize(joined)
                except UrlError:
                    pass  # the slow path says what to keep
                else:
                    if len(_CANONICAL) >= CANONICAL_MEMO_SIZE:
                        _CANONICAL.clear()
                    _CANONICAL[joined] = canonical
                    return canonical
        try:
            return canonicalize(href, self.base)
        except UrlError:
            pass
        try:
            absolute = resolve_reference(href, self.base)
            if not absolute.startswith(_WEB_PREFIXES) and (
                urlsplit(absolute).scheme.lower() in SKIPPED_SCHEMES
            ):
                return None
        except (UrlError, ValueError):
            return None
        return absolute.split("#", 1)[0]

    def _join_plain(self, href: str) -> str | None:
        """The RFC 3986 s.5.2 resolution of an href that holds nothing resolution rewrites,
        by concatenation; None for any other href."""
        if not _URLSPLIT_REMOVES.isdisjoint(href) or ";" in href:
            return None
        href = href.split("#", 1)[0]
        if href and href[-1] <= " ":  # a space or control before "#" is inside the href
            return None
        path, mark, query = href.partition("?")
        if mark and not query:
            return None  # an empty query: kept, by the slow path (RFC 3986 s.6.2.3)
        first = href[:1]
        if not first:
            return None  # a bare fragment: the base itself, as urljoin spells it
        if first == "/":
            if href[1:2] == "/":  # scheme-relative: //host/path
                return self._origin[: self._origin.find(":") + 1] + href if _plain_authority(
                    href[2:]) else None
            return None if "/." in path else self._origin + href
        if href.startswith(_WEB_PREFIXES):
            return href if _plain_authority(href[href.find("//") + 2:]) else None
        if not self._directory:
            return None
        directory = self._directory
        while href.startswith("../"):  # up one directory each, never above the root
            href = href[3:]
            cut = directory.rstrip("/").rfind("/") + 1
            if cut > len(self._origin):
                directory = directory[:cut]
        path = href.partition("?")[0]
        if href[:1] in (".", "?", "#", "/") or ":" in path or "//" in path or "/." in path:
            return None
        return directory + href


def _plain_authority(rest: str) -> bool:
    """True if ``rest`` (what follows ``//``) starts with a host ``urlsplit`` takes as is."""
    return bool(rest) and rest[0] not in "/?" and "[" not in rest and rest.isascii()


_selectors = threading.local()


def _css(tree: LexborHTMLParser, query: str) -> list[LexborNode]:
    """``tree.css(query)`` through one selector engine per thread: a tree's own is made
    (CSS parser, selector lists, matcher) for each page, which cost about as much as
    the page's four queries themselves; the engine keeps no document state between
    queries, and the nodes found belong to ``tree``."""
    root = tree.root
    if root is None:
        return []
    selector = getattr(_selectors, "engine", None)
    if selector is None:
        selector = _selectors.engine = LexborCSSSelector()
    return selector.find(query, root)


def _css_first(tree: LexborHTMLParser, query: str) -> LexborNode | None:
    """``tree.css_first(query)`` through the thread's selector engine (see ``_css``)."""
    root = tree.root
    if root is None:
        return None
    selector = getattr(_selectors, "engine", None)
    if selector is None:
        selector = _selectors.engine = LexborCSSSelector()
    found = selector.find_first(query, root)
    return found[0] if found else None


def _document_base(tree: LexborHTMLParser, url: str) -> str:
    """The first ``<base href>`` resolved against the page URL, else the page URL."""
    node = _css_first(tree, "base[href]")
    href = (node.attributes.get("href") or "").strip() if node is not None else ""
    if not href:
        return url
    return LinkResolver(url).resolve(href) or url


def _meta_robots(tree: LexborHTMLParser) -> tuple[bool, bool]:
    """(nofollow, noindex) from every ``<meta name="robots">``."""
    nofollow = noindex = False
    for node in _css(tree, "meta[name][content]"):
        attrs = node.attributes
        if (attrs.get("name") or "").strip().lower() != "robots":
            continue
        tokens = {t for t in _ROBOTS_SEPARATORS.split((attrs.get("content") or "").lower()) if t}
        if "none" in tokens:
            nofollow = noindex = True
        nofollow = nofollow or "nofollow" in tokens
        noindex = noindex or "noindex" in tokens
    return nofollow, noindex


def _anchor(node: LexborNode) -> str:
    if node.tag == "area":
        raw = node.attributes.get("alt") or ""
    else:
        raw = node.text(deep=True, separator=" ")
    return collapse(raw)[:MAX_ANCHOR_CHARS]


def _links(tree: LexborHTMLParser, base: str, max_links: int) -> tuple[list[Link], bool]:
    """The first ``max_links`` links in document order, and whether more followed."""
    links: list[Link] = []
    resolver = LinkResolver(base)
    for node in _css(tree, LINK_SELECTOR):
        attrs = node.attributes
        absolute = resolver.resolve(attrs.get("href") or "")
        if absolute is None:
            continue
        if len(links) >= max_links:  # one more link than kept: the page was capped
            return links, True
        rel = (attrs.get("rel") or "").lower().split()
        links.append(Link(absolute, _anchor(node), "nofollow" in rel))
    return links, False


def parse_html(
    body: bytes,
    url: str,
    *,
    content_type: str | None = None,
    max_links: int = DEFAULT_MAX_LINKS,
    max_text: int = DEFAULT_MAX_TEXT,
) -> ParsedPage:
    """Parse an HTML response body fetched from ``url``. Never raises."""
    html, codec = decode_body(body, content_type)
    tree = LexborHTMLParser(html)
    base = _document_base(tree, url)
    meta_nofollow, meta_noindex = _meta_robots(tree)
    links, links_capped = _links(tree, base, max_links)
    title_node = _css_first(tree, "title")
    title = collapse(title_node.text(deep=True)) if title_node is not None else ""
    tree.strip_tags(INVISIBLE_TAGS)
    text_root = tree.body or tree.root
    text = collapse(text_root.text(deep=True, separator=" ")) if text_root is not None else ""
    return ParsedPage(
        links=links,
        title=title[:MAX_TITLE_CHARS],
        text=text[:max_text],
        base=base,
        meta_nofollow=meta_nofollow,
        meta_noindex=meta_noindex,
        encoding=codec,
        links_capped=links_capped,
    )
