"""Fuzzing the URL canonicaliser (frontier/urls.py) with hypothesis.

Example counts come from the hypothesis profile (tests/conftest.py): "ci" by default,
HYPOTHESIS_PROFILE=fuzz for 10,000 a test.

What a canonical URL must be is stated here by hand from RFC 3986: the grammar of
Appendix A (sections 3.1-3.4), percent-encoding with uppercase hex and no unreserved
octet encoded (s.2.1, s.2.3, s.6.2.2.1, s.6.2.2.2), lowercase scheme and host
(s.6.2.2.1), no dot segments (s.5.2.4, s.6.2.2.3) and no default port (s.6.2.3).
Where the standard library has an independent implementation (``urllib.parse.urljoin``
for dot-segment removal, ``urllib.parse.quote`` for UTF-8 percent-encoding) the
canonicaliser is compared with it.
"""

from __future__ import annotations

import re
import string
from urllib.parse import quote, urljoin, urlsplit

import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from frontier import urls
from frontier.exceptions import UrlError
from frontier.urls import canonicalize

pytestmark = pytest.mark.fuzz

# --- RFC 3986 Appendix A, written out by hand for the canonical form ----------------------

UNRESERVED = string.ascii_letters + string.digits + "-._~"  # s.2.3
SUB_DELIMS = "!$&'()*+,;="  # s.2.2
_PCT = r"%[0-9A-F]{2}"  # s.2.1 pct-encoded; uppercase hex (s.6.2.2.1)
_PCHAR = rf"(?:[A-Za-z0-9\-._~!$&'()*+,;=:@]|{_PCT})"  # s.3.3 pchar
_REG_NAME = r"(?:[a-z0-9\-._~!$&'()*+,;=]|%[0-9A-F]{2})+"  # s.3.2.2, lowercase (s.6.2.2.1)
_IP_LITERAL = r"\[[0-9a-f:.]+\]"  # s.3.2.2 IPv6address, lowercase hex
CANONICAL_GRAMMAR = re.compile(
    rf"(?P<scheme>https?)://(?P<host>{_REG_NAME}|{_IP_LITERAL})(?::(?P<port>[0-9]+))?"
    rf"(?P<path>(?:/{_PCHAR}*)+)(?:\?(?P<query>(?:{_PCHAR}|[/?])*))?"
)
DEFAULT_PORTS = {"http": 80, "https": 443}  # RFC 9110 s.4.2.1, s.4.2.2
TRIPLET = re.compile(r"%(..)")


def assert_canonical(url: str) -> None:
    """Every property RFC 3986 asks of a normal form, checked on one result."""
    assert url.isascii(), url  # RFC 3986 s.2: a URI is ASCII; RFC 3987 s.3.1 maps the rest
    match = CANONICAL_GRAMMAR.fullmatch(url)
    assert match is not None, url  # Appendix A grammar, no fragment (dropped, common practice)
    # s.6.2.2.2: an octet of the unreserved set is never left percent-encoded
    for hexpair in TRIPLET.findall(url):
        assert chr(int(hexpair, 16)) not in UNRESERVED, url
    # s.6.2.3: no default port (and, common practice, no leading zeros)
    port = match.group("port")
    if port is not None:
        assert int(port) != DEFAULT_PORTS[match.group("scheme")], url
        assert port == str(int(port)) and 0 < int(port) <= 65535, url
    # s.5.2.4 / s.6.2.2.3: no "." or ".." segment is left in the path
    assert not {".", ".."} & set(match.group("path").split("/")[1:]), url
    # the standard library's parser reads the same components
    parts = urlsplit(url)
    assert parts.scheme == match.group("scheme")
    assert parts.path == match.group("path")
    assert parts.query == (match.group("query") or "")
    assert parts.fragment == ""
    assert parts.port == (int(port) if port is not None else None)
    if not match.group("host").startswith("["):
        assert parts.hostname == match.group("host")
    # a normal form is a fixed point (s.6.2), whatever base it is read against
    assert canonicalize(url) == url
    assert canonicalize(url, "http://other.test/x/y?z") == url
    assert urls._canonicalize_slow(url) == url  # the fast path's reference agrees


def outcome(raw: object, base: object = None) -> str | None:
    """The canonical form, or None when canonicalize refuses with UrlError (the only error)."""
    try:
        return canonicalize(raw, base)  # type: ignore[arg-type]
    except UrlError:
        return None


# --- strategies --------------------------------------------------------------------------

# Every code point, lone surrogates included (st.characters leaves them out by default).
ANY_TEXT = st.text(st.characters(exclude_categories=()), max_size=80)
# Text made of URL delimiters and the characters that trouble parsers.
URLISH_TEXT = st.lists(
    st.sampled_from(list(":/?#[]@!$&'()*+,;=%.-_~ \t\n\x00\x7f\\\"<>^`{|}")
                    + ["%2e", "%2E", "%2F", "%zz", "%C3%A9", "%c3", "..", "é", "\u0130",
                       "\ud800", "\ufffd", "xn--", "a", "B", "0", "9", "[::1]", ":80",
                       "http", "https:", "//"]),
    max_size=40).map("".join)
BYTES = st.binary(max_size=80)

SCHEMES = st.sampled_from(["http", "https", "HTTP", "hTtPs", "ftp", "h+t", "1http", ""])
HOST_LABEL = st.text(alphabet="abcXYZ09-_é\u00df\u0130%2E", min_size=0, max_size=8)
HOSTS = st.one_of(
    st.lists(HOST_LABEL, min_size=1, max_size=4).map(".".join),
    st.sampled_from(["[::1]", "[2001:DB8::A]", "[::ffff:127.0.0.1]", "[fe80::1%25eth0]",
                     "127.0.0.1", "Site.Test.", "[", "[::1", "a..b", "-a.test",
                     "xn--caf-dma.test", "ex%41mple.test", "%zz.test"]))
PORTS = st.sampled_from(["", ":", ":80", ":443", ":0080", ":8080", ":0", ":65535", ":65536",
                         ":99999999999", ":8a", ":-1", ":\u0661"])
USERINFO = st.sampled_from(["", "user@", "u:p@", "@", "a@b@"])
SEGMENT = st.one_of(
    st.text(alphabet=UNRESERVED + SUB_DELIMS + ":@%é\u4e2d []{}|\\^`\"<>", max_size=6),
    st.sampled_from([".", "..", "%2e", "%2E%2e", "%7e", "%41", "%2F", "%c3%a9", "%", "%f", ""]),
)
PATHS = st.lists(SEGMENT, max_size=6).map(lambda segs: "".join("/" + s for s in segs))
QUERIES = st.none() | st.text(alphabet="aZ09=&/?%7eE2F. é[]#", max_size=10)
FRAGMENTS = st.none() | st.text(alphabet="ab/#?%é ", max_size=5)


@st.composite
def absolute_urls(draw: st.DrawFn) -> str:
    """Absolute URLs in every spelling RFC 3986 permits and many it does not."""
    url = f"{draw(SCHEMES)}://{draw(USERINFO)}{draw(HOSTS)}{draw(PORTS)}{draw(PATHS)}"
    query, fragment = draw(QUERIES), draw(FRAGMENTS)
    if query is not None:
        url += "?" + query
    if fragment is not None:
        url += "#" + fragment
    return url


REFERENCES = st.one_of(
    absolute_urls(),
    st.tuples(st.sampled_from(["", "/", "//", "./", "../", "?", "#", "g:", "//x.test"]),
              PATHS, QUERIES).map(lambda t: t[0] + t[1].lstrip("/") + (
                  "" if t[2] is None else "?" + t[2])),
    URLISH_TEXT,
)


# --- no exception but UrlError; every result canonical -------------------------------------


@given(raw=st.one_of(ANY_TEXT, URLISH_TEXT, REFERENCES, BYTES),
       base=st.one_of(st.none(), ANY_TEXT, absolute_urls(), BYTES))
@example(raw=b"http://a.test/x", base=None)
@example(raw="x", base=b"http://a.test/dir/")
@example(raw=b"\xff/", base=b"http://a.test/")
def test_any_input_fails_only_with_url_error_and_succeeds_canonically(
        raw: str | bytes, base: str | bytes | None) -> None:
    # The function's contract (frontier/urls.py): UrlError is the only failure, for text
    # and bytes alike; whatever it returns is a normal form.
    result = outcome(raw, base)
    if result is not None:
        assert_canonical(result)


@given(url=absolute_urls())
def test_generated_urls_are_canonical_or_refused(url: str) -> None:
    result = outcome(url)
    if result is not None:
        assert_canonical(result)


@given(url=absolute_urls())
def test_bytes_read_as_utf8_text(url: str) -> None:
    # RFC 3987 s.3.1: an IRI's characters are UTF-8 octets; bytes mean the same URL.
    assert outcome(url.encode("utf-8")) == outcome(url)


# --- RFC 3986 s.6.2.2.1: case of scheme and host, case of percent-encoding ---------------------


def flip_case(text: str, flips: list[bool]) -> str:
    """``text`` with the ASCII letters whose flag is set in the other case."""
    out = []
    for i, char in enumerate(text):
        flip = flips[i % len(flips)] if flips else False
        out.append(char.swapcase() if flip and char.isascii() else char)
    return "".join(out)


@given(url=absolute_urls(), flips=st.lists(st.booleans(), min_size=1, max_size=16))
def test_case_of_scheme_and_host_does_not_matter(url: str, flips: list[bool]) -> None:
    # RFC 3986 s.6.2.2.1: scheme and host are case-insensitive, normalised to lowercase.
    scheme, sep, rest = url.partition("://")
    authority_end = min([i for i in (rest.find(c) for c in "/?#") if i >= 0] or [len(rest)])
    authority = rest[:authority_end]
    userinfo, at, hostport = authority.rpartition("@")
    changed = (flip_case(scheme, flips) + sep + userinfo + at + flip_case(hostport, flips)
               + rest[authority_end:])
    assert outcome(changed) == outcome(url)


@given(url=absolute_urls(), flips=st.lists(st.booleans(), min_size=1, max_size=16))
def test_case_of_percent_encoding_hex_does_not_matter(url: str, flips: list[bool]) -> None:
    # RFC 3986 s.6.2.2.1: "%3a" and "%3A" are equivalent; uppercase is the normal form.
    counter = iter(range(1 << 30))

    def flip(match: re.Match[str]) -> str:
        i = next(counter)
        return "%" + (match.group(1).swapcase() if flips[i % len(flips)] else match.group(1))

    changed = re.sub(r"%([0-9A-Fa-f]{2})", flip, url)
    assert outcome(changed) == outcome(url)


@given(path=st.text(alphabet=UNRESERVED + "/", max_size=30),
       query=st.text(alphabet=UNRESERVED + "/?=&", max_size=20),
       encode=st.lists(st.booleans(), min_size=1, max_size=16))
def test_encoded_unreserved_octets_equal_the_octets(path: str, query: str,
                                                    encode: list[bool]) -> None:
    # RFC 3986 s.6.2.2.2 and s.2.3: percent-encoded unreserved octets are equivalent to
    # the octets themselves (each spelled "%XX" by hand here).
    def spell(text: str) -> str:
        return "".join(f"%{ord(c):02X}" if encode[i % len(encode)] and c in UNRESERVED else c
                       for i, c in enumerate(text))

    plain = f"http://site.test/{path}?{query}"
    assert outcome(f"http://site.test/{spell(path)}?{spell(query)}") == outcome(plain)


# --- RFC 3986 s.5.2.4 dot segments against urllib.parse.urljoin -------------------------------

DOT_SEGMENTS = st.lists(st.sampled_from(["a", "b", "cd", ".", "..", "e.f", "..g", ".h"]),
                        min_size=1, max_size=10)


@given(base_segments=st.lists(st.sampled_from(["x", "y", "z.html"]), max_size=4),
       segments=DOT_SEGMENTS, absolute=st.booleans())
@example(base_segments=["x"], segments=["..", "..", "a"], absolute=False)
def test_dot_segment_removal_agrees_with_urljoin(base_segments: list[str], segments: list[str],
                                                 absolute: bool) -> None:
    # RFC 3986 s.5.2 (merge, remove_dot_segments). urljoin implements the same
    # algorithm as long as no path holds an empty segment (it drops those), so the
    # generated paths have none; its result is then normalised the same way.
    base = "http://site.test/" + "/".join(base_segments)
    reference = ("/" if absolute else "") + "/".join(segments)
    expected = urlsplit(urljoin(base, reference)).path or "/"
    result = outcome(reference, base)
    assert result is not None
    assert urlsplit(result).path == expected
    assert outcome(urljoin(base, reference)) == result


@given(segments=st.lists(st.sampled_from(["a", "", ".", "..", "%2e", "%2E%2E", ".%2e"]),
                         max_size=10))
def test_no_dot_segment_survives(segments: list[str]) -> None:
    # RFC 3986 s.6.2.2.3 after s.6.2.2.2: "%2E" is "." and so can form a dot segment.
    result = outcome("http://site.test/" + "/".join(segments))
    assert result is not None
    assert not {".", ".."} & set(urlsplit(result).path.split("/"))


# --- RFC 3986 s.2.1 / RFC 3987 s.3.1: UTF-8 percent-encoding against urllib.parse.quote -------

# Characters a path or query may hold as written: no "%" (already encoded data), no
# delimiters of later components, no control characters (refused) nor surrogates
# (not encodable), no "." (dot segments are tested above).
PLAIN_CHARS = st.characters(exclude_categories=("Cs", "Cc"), exclude_characters="%?#.")


@given(path=st.text(PLAIN_CHARS, max_size=30), query=st.text(PLAIN_CHARS, max_size=20))
@example(path="caf\u00e9", query="q=\u00e9")
@example(path="\u4e2d/ /\U0001f600", query="a b")
def test_non_ascii_and_other_characters_are_utf8_percent_encoded(path: str, query: str) -> None:
    # RFC 3987 s.3.1 step 2: non-ASCII characters become their UTF-8 octets,
    # percent-encoded (RFC 3986 s.2.1); characters outside the path/query grammar
    # (s.3.3, s.3.4) likewise. quote() keeps RFC 3986's unreserved set and what ``safe``
    # names: here the sub-delims, ":" and "@" (pchar), plus "/" and, in a query, "?".
    path = path.rstrip(" ")  # trailing spaces of the whole input are stripped (WHATWG URL)
    query = query.rstrip(" ")
    pchar_safe = SUB_DELIMS + ":@"
    expected_path = quote("/" + path, safe=pchar_safe + "/")
    expected_query = quote(query, safe=pchar_safe + "/?")
    assert outcome(f"http://site.test/{path}") == f"http://site.test{expected_path}"
    assert outcome(f"http://site.test/?{query}") == f"http://site.test/?{expected_query}"


# --- RFC 3986 s.3.5 / s.6.2.3 ----------------------------------------------------------------


@given(url=absolute_urls(), fragment=st.text(PLAIN_CHARS, max_size=20))
def test_fragment_never_changes_the_result(url: str, fragment: str) -> None:
    # RFC 3986 s.3.5: the fragment is not part of what is retrieved; it is dropped.
    # (Trailing C0 controls and spaces of the whole input are stripped, WHATWG URL
    # Standard; before a "#" they are inside it, so they are left out here.)
    without = url.partition("#")[0].rstrip("".join(map(chr, range(0x21))))
    assert outcome(without + "#" + fragment) == outcome(without)


@given(scheme=st.sampled_from(["http", "https"]), host=st.sampled_from(["a.test", "[::1]"]),
       path=PATHS, zeros=st.integers(0, 3))
def test_default_port_and_empty_path(scheme: str, host: str, path: str, zeros: int) -> None:
    # RFC 3986 s.6.2.3: an empty or default port is omitted and an empty path is "/";
    # leading zeros of a port do not change the number (s.3.2.3: port = *DIGIT).
    port = "0" * zeros + str(DEFAULT_PORTS[scheme])
    expected = outcome(f"{scheme}://{host}{path or '/'}")
    for spelling in (f"{host}:{port}{path}", f"{host}:{path}", f"{host}{path}"):
        assert outcome(f"{scheme}://{spelling}") == expected
