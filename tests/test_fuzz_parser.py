"""Fuzzing link extraction (workers/parser.py ``parse_html``) with hypothesis.

Example counts come from the hypothesis profile (tests/conftest.py): "ci" by default,
HYPOTHESIS_PROFILE=fuzz for 10,000 a test.

Link URLs are checked against RFC 3986: reference resolution (s.5.2) compared with
``urllib.parse.urljoin`` where urljoin follows the RFC (paths without empty segments:
urljoin drops those), the normal form (s.6.2.2, s.6.2.3), and non-ASCII characters
as percent-encoded UTF-8 (RFC 3987 s.3.1, RFC 3986 s.2.1) compared with
``urllib.parse.quote``.
"""

from __future__ import annotations

import html
from urllib.parse import quote, urljoin, urlsplit

import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from frontier.exceptions import UrlError
from frontier.urls import canonicalize
from workers.parser import MAX_ANCHOR_CHARS, ParsedPage, parse_html

pytestmark = pytest.mark.fuzz

SUB_DELIMS = "!$&'()*+,;="  # RFC 3986 s.2.2
PAGE = "http://site.test/dir/page.html"


def canonical_or_refused(url: str) -> bool:
    """True if ``url`` is in normal form, or the canonicaliser refuses it with UrlError
    (then admission records why; see workers/parser.py ``LinkResolver.resolve``)."""
    try:
        return canonicalize(url) == url
    except UrlError:
        return True


def check_page(parsed: ParsedPage) -> None:
    assert isinstance(parsed.text, str) and isinstance(parsed.title, str)
    for link in parsed.links:
        assert link.url and "#" not in link.url  # RFC 3986 s.3.5: no fragment
        assert canonical_or_refused(link.url), link.url
        assert len(link.anchor) <= MAX_ANCHOR_CHARS


# --- any bytes, any Content-Type: never raises -------------------------------------------

CONTENT_TYPES = st.one_of(
    st.none(),
    st.text(max_size=60),
    st.sampled_from(["text/html", "text/html; charset=utf-8", "text/html; charset=utf-16",
                     "text/html; charset=base64", "text/html; charset=rot13",
                     "text/html; charset=\"shift_jis\"", "text/html;charset=", "charset=\x00",
                     "text/html; charset=x-user-defined", "text/html; charset=idna",
                     "text/html; charset=unicode_escape", "text/html; charset=utf-7"]),
)
MARKUP = st.lists(
    st.sampled_from(
        ["<a href='", "'>", "<a href=", ">", "</a>", "<base href='", "<meta charset=",
         "<meta http-equiv=content-type content='text/html; charset=", "utf-16", "shift_jis",
         "<meta name=robots content='", "none", "<!--", "-->", "<script>", "</script>",
         "<p>", "<table><tr><td>", "&amp;", "&#0;", "&#xD800;", "&#x10FFFF;", "\x00", "é",
         "javascript:", "//", "../", "./", "#", "?", "http://[", "]", "nofollow", "rel=",
         "\"", "<svg><a href=x>", "<template>", "<title>", "<area href=/a>", "\xa0", " ",
         "x", "%", "%zz", "%c3", "\\", "\t", "\n", "HTTP://Site.TEST:80/", "//other.test",
         "https://é.test/", "\ufeff", "<frameset>", "<math><a href=/m>"]),
    max_size=80,
).map("".join)


@given(body=st.binary(max_size=4000), content_type=CONTENT_TYPES)
@example(body=b"\xef\xbb\xbf<a href='/x'>x</a>", content_type="text/html; charset=utf-16")
@example(body=b"<a href=/a\x00b>x</a>", content_type=None)
def test_any_bytes_and_content_type_parse_without_raising(body: bytes,
                                                          content_type: str | None) -> None:
    # parse_html's contract (workers/parser.py): any input parses, never raises.
    check_page(parse_html(body, PAGE, content_type=content_type))


@given(markup=MARKUP, encoding=st.sampled_from(["utf-8", "utf-16-le", "cp1252", "shift_jis"]),
       content_type=CONTENT_TYPES)
def test_tag_soup_parses_without_raising(markup: str, encoding: str,
                                         content_type: str | None) -> None:
    body = markup.encode(encoding, errors="replace")
    check_page(parse_html(body, PAGE, content_type=content_type))


# --- resolution: RFC 3986 s.5.2 against urljoin, where urljoin follows the RFC -----------------

SEGMENTS = st.sampled_from(["a", "b", "C", ".", "..", "x.html", "%41", "%7e", "%2F", "é",
                            "a%20b", "~u", "p;q", "k=v"])
REFERENCE_STARTS = st.sampled_from(["", "/", "./", "../", "//other.test/",
                                    "HTTP://Site.TEST:80/", "https://h.test:443/"])
BASES = st.sampled_from([PAGE, "http://site.test/", "https://Shop.test:8443/a/b/",
                         "http://site.test/a/b?q=1", "http://[::1]:8000/p/q"])


@given(start=REFERENCE_STARTS, segments=st.lists(SEGMENTS, max_size=6),
       query=st.none() | st.sampled_from(["x=1", "a=/b/../c", "q=é&r=%2f"]),
       fragment=st.none() | st.sampled_from(["", "top", "a#b"]), base=BASES)
@example(start="", segments=["caf\u00e9"], query=None, fragment=None, base=PAGE)
def test_links_resolve_like_rfc3986(start: str, segments: list[str], query: str | None,
                                    fragment: str | None, base: str) -> None:
    href = start + "/".join(segments)
    if query is not None:
        href += "?" + query
    if fragment is not None:
        href += "#" + fragment
    if not href:
        return  # an empty href is the document itself (HTML Standard), tested elsewhere
    body = f'<base href="{html.escape(base)}"><a href="{html.escape(href)}">x</a>'.encode()
    parsed = parse_html(body, PAGE)
    expected = canonicalize(urljoin(base, href))
    assert [link.url for link in parsed.links] == [expected]


@pytest.mark.parametrize(
    ("href", "expected"),
    [
        # RFC 3986 s.5.2.3 merge keeps empty segments; urljoin would drop them.
        ("c//d", "http://site.test/dir/c//d"),
        ("..//x", "http://site.test//x"),
        ("/a//b/../c", "http://site.test/a//c"),
        # RFC 3986 s.5.2.2 and s.6.2.3: an empty query is defined and kept (urljoin drops it).
        ("a?", "http://site.test/dir/a?"),
        ("?", "http://site.test/dir/page.html?"),
        # RFC 3987 s.3.1 / RFC 3986 s.2.1: UTF-8, percent-encoded.
        ("/caf\u00e9", "http://site.test/caf%C3%A9"),
        # RFC 3986 s.6.2.2.1, s.6.2.3: case of scheme and host, default port.
        ("HTTP://Site.TEST:80/x", "http://site.test/x"),
    ],
)
def test_link_regressions(href: str, expected: str) -> None:
    parsed = parse_html(f'<a href="{html.escape(href)}">x</a>'.encode(), PAGE)
    assert [link.url for link in parsed.links] == [expected]


# --- non-ASCII and other characters: percent-encoded UTF-8 (RFC 3987 s.3.1) ------------------

# Text an href may hold as written: no "%" (encoded data), no delimiters of later
# components, no "." (dot segments are checked above), no control characters (the HTML
# parser rewrites some: NUL, CR) and no surrogates (not encodable).
PLAIN = st.characters(exclude_categories=("Cs", "Cc"), exclude_characters="%?#.")


@given(path=st.text(PLAIN, max_size=25), query=st.text(PLAIN, max_size=15),
       encoding=st.sampled_from(["utf-8", "utf-16-le", "gb18030"]))
@example(path="caf\u00e9", query="q=\u00e9", encoding="utf-8")
def test_non_ascii_hrefs_become_percent_encoded_utf8(path: str, query: str,
                                                    encoding: str) -> None:
    # RFC 3987 s.3.1: characters (whatever the page's own encoding) map to UTF-8 octets,
    # percent-encoded (RFC 3986 s.2.1); quote() keeps the unreserved set and the "safe"
    # characters: sub-delims, ":" and "@" (pchar, s.3.3), "/" and in a query "?" (s.3.4).
    path = path.lstrip("/")  # "//..." would start an authority (RFC 3986 s.4.2)
    query = query.rstrip(" ")  # the href's trailing spaces are stripped (WHATWG URL)
    href = f"/{path}?{query}"
    markup = f'<meta charset="{encoding}"><a href="{html.escape(href)}">x</a>'
    bom = "\ufeff" if encoding.startswith("utf-16") else ""
    body = (bom + markup).encode(encoding)
    parsed = parse_html(body, PAGE)
    safe = SUB_DELIMS + ":@/"
    expected = f"http://site.test{quote('/' + path, safe=safe)}?{quote(query, safe=safe + '?')}"
    assert [link.url for link in parsed.links] == [expected]
    assert urlsplit(expected).hostname == "site.test"
