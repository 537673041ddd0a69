"""Tests for workers.parser: link extraction, decoding, robots flags, robustness, speed."""

from __future__ import annotations

import codecs
import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.exceptions import UrlError
from frontier.urls import canonicalize
import workers.parser as parser_module
from workers.parser import (
    MAX_ANCHOR_CHARS,
    MAX_TITLE_CHARS,
    Link,
    LinkResolver,
    ParsedPage,
    decode_body,
    looks_binary,
    parse_html,
)

RFC_BASE = "http://a/b/c/d;p?q"

# RFC 3986 s.5.4.1 "Normal Examples" and s.5.4.2 "Abnormal Examples", with the
# fragment removed from the expected result (RFC 3986 s.3.5: the fragment is not
# part of the resource identifier sent to a server) and "//g" given the path "/"
# (s.6.2.3). "g:h" is an absolute URI with an unknown scheme and stays as written.
# The empty reference is skipped.
RFC_3986_EXAMPLES = {
    "g:h": "g:h",
    "g": "http://a/b/c/g",
    "./g": "http://a/b/c/g",
    "g/": "http://a/b/c/g/",
    "/g": "http://a/g",
    "//g": "http://g/",
    "?y": "http://a/b/c/d;p?y",
    "g?y": "http://a/b/c/g?y",
    "#s": "http://a/b/c/d;p?q",
    "g#s": "http://a/b/c/g",
    "g?y#s": "http://a/b/c/g?y",
    ";x": "http://a/b/c/;x",
    "g;x": "http://a/b/c/g;x",
    "g;x?y#s": "http://a/b/c/g;x?y",
    ".": "http://a/b/c/",
    "./": "http://a/b/c/",
    "..": "http://a/b/",
    "../": "http://a/b/",
    "../g": "http://a/b/g",
    "../..": "http://a/",
    "../../": "http://a/",
    "../../g": "http://a/g",
    "../../../g": "http://a/g",
    "../../../../g": "http://a/g",
    "/./g": "http://a/g",
    "/../g": "http://a/g",
    "g.": "http://a/b/c/g.",
    ".g": "http://a/b/c/.g",
    "g..": "http://a/b/c/g..",
    "..g": "http://a/b/c/..g",
    "./../g": "http://a/b/g",
    "./g/.": "http://a/b/c/g/",
    "g/./h": "http://a/b/c/g/h",
    "g/../h": "http://a/b/c/h",
    "g;x=1/./y": "http://a/b/c/g;x=1/y",
    "g;x=1/../y": "http://a/b/c/y",
    "g?y/./x": "http://a/b/c/g?y/./x",
    "g?y/../x": "http://a/b/c/g?y/../x",
    "g#s/./x": "http://a/b/c/g",
    "g#s/../x": "http://a/b/c/g",
}


def page(body: str, head: str = "") -> bytes:
    return f"<!doctype html><html><head>{head}</head><body>{body}</body></html>".encode()


def urls(parsed: ParsedPage) -> list[str]:
    return [link.url for link in parsed.links]


# --- resolution -----------------------------------------------------------------


def test_rfc3986_reference_resolution_examples() -> None:
    # RFC 3986 s.5.4: every example resolves to the listed target URI.
    body = "".join(f'<a href="{ref}">x</a>' for ref in RFC_3986_EXAMPLES)
    parsed = parse_html(page(body), RFC_BASE)
    assert urls(parsed) == list(RFC_3986_EXAMPLES.values())


_HREF_ALPHABET = st.sampled_from(list("ab/.;?#:%=& \t\n\r~é") + ["..", "./", "//", "%2F"])
_BASES = st.sampled_from(
    [
        RFC_BASE,
        "https://shop.test/a/b/",
        "http://user:pw@docs.test:8080/x/y.html?q=1#frag",
        "HTTP://Mixed.Case.test/",
        "http://[::1]:8000/p",
        "http://weird.test",
        "ftp://files.test/pub/",
        "http:/no-netloc/path",
    ]
)


_HREF_STARTS = st.sampled_from(
    ["", "/", "//", "http://a.test", "http://a.test/", "https://b.test:8443/", "HTTP://a.test/",
     "http://[::1]/", "http:", "https://", "http://é.test/"]
)


class _FullResolution(LinkResolver):
    """The resolver with its concatenation shortcuts turned off."""

    __slots__ = ()

    def _join_plain(self, href: str) -> str | None:
        return None


@given(base=_BASES, tail=st.lists(_HREF_ALPHABET, max_size=12), start=_HREF_STARTS)
@settings(max_examples=3000, deadline=None)
def test_resolver_shortcuts_agree_with_full_resolution(base: str, tail: list[str],
                                                       start: str) -> None:
    # The resolver's concatenation shortcuts (absolute, root-relative and relative
    # hrefs) must give exactly what full RFC 3986 s.5.2 resolution and normalisation
    # give; the full path is checked against the RFC's examples above and against
    # urllib.parse.urljoin in tests/test_fuzz_parser.py.
    href = start + "".join(tail)
    got = LinkResolver(base).resolve(href)
    assert got == _FullResolution(base).resolve(href)
    if not href.strip("".join(map(chr, range(0x21)))):
        assert got is None


def test_remembered_canonical_forms_agree_and_stay_bounded(monkeypatch: pytest.MonkeyPatch) -> None:
    # The resolver remembers the canonical form of joined hrefs (a crawl meets a URL in
    # many links): an href met again must resolve exactly as full RFC 3986 resolution
    # does from each base, and the memo is cleared when full.
    monkeypatch.setattr(parser_module, "CANONICAL_MEMO_SIZE", 8)
    monkeypatch.setattr(parser_module, "_CANONICAL", {})
    bases = ["http://a.test/d/page.html", "http://b.test/d/other.html?q=1", "https://a.test/"]
    hrefs = [f"/p/{i % 12}.html?x=%7e{i % 3}" for i in range(40)] + ["../x/%41.html", "y.html"] * 5
    for href in hrefs:
        for base in bases:
            assert LinkResolver(base).resolve(href) == _FullResolution(base).resolve(href)
            assert len(parser_module._CANONICAL) <= 8
    assert LinkResolver(bases[0]).resolve("/p/1.html?x=%7e1") == "http://a.test/p/1.html?x=~1"


def test_shared_selector_engine_finds_what_each_tree_finds() -> None:
    # One CSS selector engine serves every page of a thread; run over documents in turn
    # it must find exactly what each tree's own engine (selectolax's tree.css) finds.
    from selectolax.lexbor import LexborHTMLParser

    documents = [
        '<base href="/b/"><a href="1">one</a><area href="2" alt="two"><a name="x">no</a>',
        "<title>T</title><meta name=robots content=nofollow><p><a href='/3'>three</a>",
        "", "plain text, no markup", "<a href=4><a href=5>nested</a></a><title>x</title>",
    ]
    queries = [parser_module.LINK_SELECTOR, "base[href]", "meta[name][content]", "title"]
    for _ in range(3):
        for document in documents:
            tree = LexborHTMLParser(document)
            for query in queries:
                ours = [n.html for n in parser_module._css(tree, query)]
                assert ours == [n.html for n in tree.css(query)]
                first = parser_module._css_first(tree, query)
                own = tree.css_first(query)
                assert (first and first.html) == (own and own.html)
    assert [ln.url for ln in parse_html(documents[0].encode(), "http://a.test/d/p").links] == [
        "http://a.test/b/1", "http://a.test/b/2"]


def test_fragment_is_removed_and_first_hash_starts_it() -> None:
    # RFC 3986 s.3.5: the fragment starts at the first "#".
    parsed = parse_html(page('<a href="/p?x=1#a#b">x</a>'), "http://site.test/")
    assert urls(parsed) == ["http://site.test/p?x=1"]


def test_first_base_href_wins_and_is_resolved_against_document_url() -> None:
    # HTML Standard s.4.2.3 (the base element): the frozen base URL comes from the
    # first base element with an href, parsed relative to the document URL.
    head = '<base href="../assets/"><base href="http://other.test/">'
    parsed = parse_html(page('<a href="img/p.html">x</a>', head), "http://site.test/a/b/c.html")
    assert parsed.base == "http://site.test/a/assets/"
    assert urls(parsed) == ["http://site.test/a/assets/img/p.html"]


def test_base_without_href_is_ignored() -> None:
    # HTML Standard s.4.2.3: only a base element *with an href attribute* counts.
    head = '<base target="_blank"><base href="/root/">'
    parsed = parse_html(page('<a href="x">x</a>', head), "http://site.test/a/b")
    assert urls(parsed) == ["http://site.test/root/x"]


@pytest.mark.parametrize(
    "href",
    ["javascript:void(0)", "JavaScript:go()", "  mailto:desk@site.test", "tel:+100",
     "data:text/html,hi", "", "   ", "java\tscript:alert(1)"],
)
def test_non_document_and_empty_hrefs_are_skipped(href: str) -> None:
    # Scheme names are case-insensitive (RFC 3986 s.3.1); leading C0/space is
    # stripped and tab/newline removed before parsing (WHATWG URL Standard).
    parsed = parse_html(page(f'<a href="{href}">x</a><a href="/ok">ok</a>'), "http://site.test/")
    assert urls(parsed) == ["http://site.test/ok"]


def test_anchor_without_href_and_area_links() -> None:
    # HTML Standard s.4.6.1: an <a> without href is a placeholder, not a link;
    # <area href> is a hyperlink too (s.4.8.14), its text is the alt attribute.
    body = '<a name="top">no</a><map><area href="/zone" alt=" North   Zone "></map>'
    parsed = parse_html(page(body), "http://site.test/")
    assert parsed.links == [Link("http://site.test/zone", "North Zone", False)]


# --- anchors, rel, meta robots ------------------------------------------------------


def test_anchor_text_is_collapsed_and_capped() -> None:
    # Rule of thumb: bounded anchor text (common practice, no source).
    long_text = "word " * 200
    body = f'<a href="/a">  Hello\n\t<b>bold</b>   world </a><a href="/b">{long_text}</a>'
    parsed = parse_html(page(body), "http://site.test/")
    assert parsed.links[0].anchor == "Hello bold world"
    assert len(parsed.links[1].anchor) == MAX_ANCHOR_CHARS
    assert parsed.links[1].anchor == " ".join(long_text.split())[:MAX_ANCHOR_CHARS]


def test_rel_nofollow_is_a_case_insensitive_token() -> None:
    # HTML Standard s.4.6.6: rel is a set of space-separated tokens, ASCII
    # case-insensitive; "nofollow" is a registered link type (s.4.6.7).
    body = ('<a href="/a" rel="external NoFollow">a</a><a href="/b" rel="nofollowme">b</a>'
            '<a href="/c">c</a>')
    parsed = parse_html(page(body), "http://site.test/")
    assert [link.nofollow for link in parsed.links] == [True, False, False]


@pytest.mark.parametrize(
    ("meta", "nofollow", "noindex"),
    [
        ('<meta name="robots" content="nofollow, noindex">', True, True),
        ('<meta name="ROBOTS" content="NOFOLLOW">', True, False),
        ('<meta name="Robots" content="noindex,follow">', False, True),
        ('<meta name="robots" content="NONE">', True, True),
        ('<meta name="robots" content="index, follow">', False, False),
        ('<meta name="description" content="nofollow noindex">', False, False),
        ('<meta name="robots" content="noindex"><meta name="robots" content="nofollow">',
         True, True),
    ],
)
def test_meta_robots(meta: str, nofollow: bool, noindex: bool) -> None:
    # The Web Robots Pages, "HTML Author's Guide to the Robots META tag": name and
    # content are case-insensitive, directives comma-separated, NONE means
    # NOINDEX,NOFOLLOW.
    parsed = parse_html(page('<a href="/a">a</a>', meta), "http://site.test/")
    assert (parsed.meta_nofollow, parsed.meta_noindex) == (nofollow, noindex)
    assert urls(parsed) == ["http://site.test/a"]


# --- text and title ----------------------------------------------------------------


def test_title_and_visible_text_exclude_scripts_and_styles() -> None:
    # HTML Standard: script, style, template and (scripting-disabled irrelevant
    # here) noscript content is not rendered text.
    head = "<title>  Harbor\n news </title><style>.x{color:red}</style>"
    body = ("<p>Tide   tables</p><script>var secret = 1;</script>"
            "<template><p>hidden</p></template><p>for today</p>")
    parsed = parse_html(page(body, head), "http://harbor.test/")
    assert parsed.title == "Harbor news"
    assert parsed.text == "Tide tables for today"


def test_limits_on_links_and_text() -> None:
    # Rule of thumb: bounded output per page (common practice, no source).
    body = "".join(f'<a href="/p{i}">p{i}</a>' for i in range(50)) + "<p>" + "x" * 5000 + "</p>"
    parsed = parse_html(page(body), "http://site.test/", max_links=7, max_text=100)
    assert urls(parsed) == [f"http://site.test/p{i}" for i in range(7)]
    assert len(parsed.text) == 100


# --- decoding ---------------------------------------------------------------------

CYRILLIC = "Привет мир"


def test_charset_from_content_type_header() -> None:
    # HTML Standard s.13.2.3.1: the transport-layer charset is used when present.
    body = page(f'<a href="/a">{CYRILLIC}</a>').replace(b"/a", b"/a")
    raw = body.decode().encode("windows-1251")
    content_type = 'text/html; Charset="windows-1251"'
    parsed = parse_html(raw, "http://site.test/", content_type=content_type)
    assert parsed.links[0].anchor == CYRILLIC
    assert parsed.encoding == "cp1251"


def test_meta_charset_used_without_header_and_header_beats_meta() -> None:
    # HTML Standard s.13.2.3.1 encoding sniffing: transport layer first, then the
    # <meta> prescan of the first 1024 bytes.
    raw = page(f"<p>{CYRILLIC}</p>", '<meta charset="koi8-r">').decode().encode("koi8-r")
    assert parse_html(raw, "http://site.test/").text == CYRILLIC
    raw2 = page(f"<p>{CYRILLIC}</p>", '<meta charset="koi8-r">').decode().encode("windows-1251")
    got = parse_html(raw2, "http://site.test/", content_type="text/html;charset=windows-1251")
    assert got.text == CYRILLIC


def test_http_equiv_content_type_meta() -> None:
    # HTML Standard s.13.2.3.2 prescan: <meta http-equiv content="...charset=...">.
    head = '<meta http-equiv="Content-Type" content="text/html; charset=ISO-8859-5">'
    raw = page(f"<p>{CYRILLIC}</p>", head).decode().encode("iso8859-5")
    assert parse_html(raw, "http://site.test/").text == CYRILLIC


def test_latin1_label_means_windows_1252() -> None:
    # WHATWG Encoding Standard s.4.2: the label "iso-8859-1" names windows-1252,
    # so 0x93/0x94 are curly quotes, not C1 controls.
    raw = b"<p>\x93quoted\x94</p>"
    assert parse_html(raw, "http://site.test/", content_type="text/html; charset=iso-8859-1").text \
        == "\u201cquoted\u201d"


@pytest.mark.parametrize("label", ["x-bogus", "base64", "rot13", "unicode_escape", "zlib", "utf-7"])
def test_wrong_or_non_web_charset_label_falls_back_to_utf8(label: str) -> None:
    # WHATWG Encoding Standard s.4.2 "get an encoding": an unknown label is
    # failure, and the next source (finally UTF-8) decides.
    raw = page("<p>caf\u00e9 \\ud800</p>", f'<meta charset="{label}">')
    for content_type in (f"text/html; charset={label}", None):
        parsed = parse_html(raw, "http://site.test/", content_type=content_type)
        assert parsed.text == "caf\u00e9 \\ud800"
        assert parsed.encoding == "utf-8"


def test_bom_beats_header() -> None:
    # WHATWG Encoding Standard s.6 "decode": a byte order mark wins over any label.
    raw = codecs.BOM_UTF16_LE + "<p>tide</p>".encode("utf-16-le")
    parsed = parse_html(raw, "http://site.test/", content_type="text/html; charset=windows-1252")
    assert parsed.text == "tide"


def test_meta_claiming_utf16_means_utf8() -> None:
    # HTML Standard s.13.2.3.2 prescan: a <meta> naming UTF-16 yields UTF-8.
    text, codec = decode_body(b'<meta charset="utf-16"><p>caf\xc3\xa9</p>')
    assert codec == "utf-8"
    assert "caf\u00e9" in text


def test_invalid_utf8_is_replaced_not_raised() -> None:
    # WHATWG Encoding Standard: UTF-8 decode with error mode "replacement".
    parsed = parse_html(b"<p>ok \xff\xfe\xc3 end</p>", "http://site.test/")
    assert parsed.text == "ok \ufffd\ufffd\ufffd end"


# --- robustness ----------------------------------------------------------------------


@given(body=st.binary(max_size=3000), ctype=st.one_of(st.none(), st.text(max_size=40)))
@settings(max_examples=400, deadline=None)
def test_never_raises_on_arbitrary_bytes(body: bytes, ctype: str | None) -> None:
    # Robustness requirement (common practice, no source): any bytes parse, and what
    # comes out keeps parse_html's promises: links canonical (RFC 3986 s.6) or left for
    # admission to refuse, no fragment (s.3.5), text and title collapsed and capped.
    parsed = parse_html(body, "http://site.test/dir/page", content_type=ctype, max_text=500)
    for link in parsed.links:
        assert "#" not in link.url
        try:
            assert canonicalize(link.url) == link.url
        except UrlError:
            pass
    for text, cap in ((parsed.text, 500), (parsed.title, MAX_TITLE_CHARS)):
        assert len(text) <= cap
        assert text == text.strip() and "  " not in text and "\n" not in text


_TAG_SOUP = st.lists(
    st.sampled_from(
        ["<a href='", "'>", "<a href=", ">", "</a>", "<base href='", "<meta charset=",
         "<meta name=robots content='", "none", "<!--", "-->", "<script>", "</script>",
         "<p>", "<table><tr><td>", "&amp;", "&#0;", "&#xD800;", "\x00", "\ud800", "é",
         "javascript:", "//", "../", "#", "?", "http://[", "]", "nofollow", "rel=", "\"",
         "<svg><a href=x>", "<template>", "<title>", "<area href=/a>", "\xa0", " ", "x"]
    ),
    max_size=60,
)


@given(parts=_TAG_SOUP, encoding=st.sampled_from(["utf-8", "utf-16-le", "latin-1"]))
@settings(max_examples=400, deadline=None)
def test_never_raises_on_tag_soup(parts: list[str], encoding: str) -> None:
    # Robustness requirement (common practice, no source): malformed markup parses.
    errors = "surrogatepass" if encoding.startswith("utf") else "replace"
    body = "".join(parts).encode(encoding, errors=errors)
    parsed = parse_html(body, "http://site.test/dir/page")
    for link in parsed.links:
        assert "#" not in link.url
        assert len(link.anchor) <= MAX_ANCHOR_CHARS


def test_binary_labelled_as_html_parses_without_error() -> None:
    # WHATWG Encoding Standard: the Content-Type charset is honoured and byte sequences
    # that are not Shift_JIS decode to U+FFFD (error mode "replacement"), never an error.
    rng = random.Random(42)
    blob = bytes(rng.randrange(256) for _ in range(20_000))
    parsed = parse_html(blob, "http://site.test/", content_type="text/html; charset=shift_jis")
    assert parsed.encoding == "shift_jis"
    assert "\ufffd" in parsed.text


# --- looks_binary ------------------------------------------------------------------


PNG_HEAD = b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x00\x00\x10"


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        # PNG signature + IHDR chunk (RFC 2083 s.3.1, s.4.1.1) holds NUL bytes.
        (PNG_HEAD + b"\x00" * 100, True),
        # gzip member header (RFC 1952 s.2.3.1): flags/mtime bytes are NUL.
        (b"\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\x03" + b"abc", True),
        # WHATWG MIME Sniffing s.7.2: binary data bytes without NUL, dense.
        (bytes([1, 2, 3, 4, 5, 6, 7, 8, 0x0E, 0x1F]) * 30, True),
        (page("<p>plain text</p>"), False),
        # WHATWG MIME Sniffing: a UTF-16 BOM means text even though NULs follow.
        (codecs.BOM_UTF16_LE + "<p>hi</p>".encode("utf-16-le"), False),
        (b"", False),
        # Tab, LF, FF, CR and ESC are not binary data bytes (WHATWG MIME Sniffing).
        (b"\t\n\x0c\r\x1b[0m text " * 50, False),
    ],
)
def test_looks_binary(body: bytes, expected: bool) -> None:
    assert looks_binary(body) is expected


def test_looks_binary_inspects_only_the_first_kilobyte() -> None:
    # WHATWG MIME Sniffing s.7.2: the resource header is at most 1024 bytes.
    assert looks_binary(b"a" * 1024 + b"\x00" * 100) is False
    assert looks_binary(b"a" * 1023 + b"\x00") is True


# --- speed ------------------------------------------------------------------------


def typical_page(rng: random.Random, n_links: int = 50, size: int = 10_000) -> bytes:
    words = [f"w{i}" for i in range(2000)]
    parts = ["<!doctype html><html><head><meta charset='utf-8'><title>Harbor news</title>",
             "<style>p{color:red}</style><script>var x=1;</script></head><body>"]
    for i in range(n_links):
        parts.append(f"<a href='/s/{i}/item-{rng.randrange(10**6)}.html'>"
                     f"{' '.join(rng.choices(words, k=3))}</a> ")
        if i % 5 == 0:
            parts.append("<p>" + " ".join(rng.choices(words, k=40)) + "</p>")
    html = "".join(parts)
    while len(html) < size:
        html += "<p>" + " ".join(rng.choices(words, k=20)) + "</p>"
    return (html + "</body></html>").encode()


def test_typical_page_yields_its_links_title_and_text() -> None:
    # The page the parse speed is measured on (`sluice bench crawl` times parse_html on
    # every page, in the crawl and in the bare loop beside it; no timing here): its 50
    # links resolve against the page URL (RFC 3986 s.5.2), script and style are not text.
    body = typical_page(random.Random(3))
    assert 9_000 < len(body) < 12_000
    parsed = parse_html(body, "http://harbor.test/news/")
    assert len(parsed.links) == 50
    assert all(link.url.startswith("http://harbor.test/s/") for link in parsed.links)
    assert parsed.title == "Harbor news"
    assert "color:red" not in parsed.text and "var x" not in parsed.text
    assert parsed.text.startswith("w")
