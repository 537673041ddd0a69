"""URL canonicalisation (RFC 3986).

Expected values come from RFC 3986 (sections named beside each check; values read from
the RFC text), or are marked "common practice, no source".
"""

from __future__ import annotations

from unittest.mock import patch
from urllib.parse import urlsplit

import mmh3
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from publicsuffixlist import PublicSuffixList

from frontier import urls
from frontier.exceptions import ConfigError, UrlError
from frontier.urls import (
    Scope,
    canonicalize,
    fingerprint,
    host_of,
    politeness_key,
    registered_domain,
    remove_dot_segments,
)

FUZZ = settings(max_examples=400, deadline=None, database=None)

RFC_BASE = "http://a/b/c/d;p?q"  # RFC 3986 s.5.4

# RFC 3986 s.5.4.1 "Normal Examples": reference -> target URI.
RFC_NORMAL = [
    ("g:h", "g:h"),
    ("g", "http://a/b/c/g"),
    ("./g", "http://a/b/c/g"),
    ("g/", "http://a/b/c/g/"),
    ("/g", "http://a/g"),
    ("//g", "http://g"),
    ("?y", "http://a/b/c/d;p?y"),
    ("g?y", "http://a/b/c/g?y"),
    ("#s", "http://a/b/c/d;p?q#s"),
    ("g#s", "http://a/b/c/g#s"),
    ("g?y#s", "http://a/b/c/g?y#s"),
    (";x", "http://a/b/c/;x"),
    ("g;x", "http://a/b/c/g;x"),
    ("g;x?y#s", "http://a/b/c/g;x?y#s"),
    ("", "http://a/b/c/d;p?q"),
    (".", "http://a/b/c/"),
    ("./", "http://a/b/c/"),
    ("..", "http://a/b/"),
    ("../", "http://a/b/"),
    ("../g", "http://a/b/g"),
    ("../..", "http://a/"),
    ("../../", "http://a/"),
    ("../../g", "http://a/g"),
]

# RFC 3986 s.5.4.2 "Abnormal Examples" ("http:g" as for strict parsers).
RFC_ABNORMAL = [
    ("../../../g", "http://a/g"),
    ("../../../../g", "http://a/g"),
    ("/./g", "http://a/g"),
    ("/../g", "http://a/g"),
    ("g.", "http://a/b/c/g."),
    (".g", "http://a/b/c/.g"),
    ("g..", "http://a/b/c/g.."),
    ("..g", "http://a/b/c/..g"),
    ("./../g", "http://a/b/g"),
    ("./g/.", "http://a/b/c/g/"),
    ("g/./h", "http://a/b/c/g/h"),
    ("g/../h", "http://a/b/c/h"),
    ("g;x=1/./y", "http://a/b/c/g;x=1/y"),
    ("g;x=1/../y", "http://a/b/c/y"),
    ("g?y/./x", "http://a/b/c/g?y/./x"),
    ("g?y/../x", "http://a/b/c/g?y/../x"),
    ("g#s/./x", "http://a/b/c/g#s/./x"),
    ("g#s/../x", "http://a/b/c/g#s/../x"),
    ("http:g", "http:g"),
]


def _expected_canonical(target: str) -> str:
    """An RFC 3986 s.5.4 target after this module's normalisation: the fragment is
    dropped (common practice, no source) and an empty path becomes "/" (s.6.2.3)."""
    target = target.split("#", 1)[0]
    if target == "http://g":
        return "http://g/"
    return target


def _rfc_remove_dot_segments(path: str) -> str:
    """RFC 3986 s.5.2.4 copied step by step with two string buffers (test oracle)."""
    buf, out = path, ""
    while buf:
        if buf.startswith("../"):
            buf = buf[3:]
        elif buf.startswith("./"):
            buf = buf[2:]
        elif buf.startswith("/./"):
            buf = "/" + buf[3:]
        elif buf == "/.":
            buf = "/"
        elif buf.startswith("/../"):
            buf = "/" + buf[4:]
            out = out[: max(out.rfind("/"), 0)]
        elif buf == "/..":
            buf = "/"
            out = out[: max(out.rfind("/"), 0)]
        elif buf in (".", ".."):
            buf = ""
        else:
            end = buf.find("/", 1 if buf.startswith("/") else 0)
            end = len(buf) if end < 0 else end
            out, buf = out + buf[:end], buf[end:]
    return out


# --- RFC 3986 s.6.2.2 / s.5.2.4 ---------------------------------------------------------


def test_syntax_based_normalisation_example() -> None:
    # RFC 3986 s.6.2.2: these two URIs are equivalent.
    schemes = frozenset({"example"})
    assert canonicalize("eXAMPLE://a/./b/../b/%63/%7bfoo%7d", schemes=schemes) == (
        "example://a/b/c/%7Bfoo%7D"
    )
    assert canonicalize("example://a/b/c/%7Bfoo%7D", schemes=schemes) == (
        "example://a/b/c/%7Bfoo%7D"
    )


@pytest.mark.parametrize(
    ("path", "expected"),
    [
        ("/a/b/c/./../../g", "/a/g"),  # RFC 3986 s.5.2.4, first worked example
        ("mid/content=5/../6", "mid/6"),  # RFC 3986 s.5.2.4, second worked example
    ],
)
def test_remove_dot_segments_rfc_examples(path: str, expected: str) -> None:
    assert remove_dot_segments(path) == expected


@FUZZ
@given(st.text(alphabet="./ab", max_size=24))
def test_remove_dot_segments_matches_rfc_algorithm(path: str) -> None:
    # RFC 3986 s.5.2.4: the linear version equals the two-buffer algorithm.
    assert remove_dot_segments(path) == _rfc_remove_dot_segments(path)


# --- RFC 3986 s.5.4 ---------------------------------------------------------------------


@pytest.mark.parametrize(("reference", "target"), RFC_NORMAL + RFC_ABNORMAL)
def test_reference_resolution_rfc_examples(reference: str, target: str) -> None:
    # RFC 3986 s.5.4.1 and s.5.4.2: resolution alone, before normalisation.
    assert urls._resolve(reference, RFC_BASE) == target


@pytest.mark.parametrize(
    ("reference", "target"),
    [pair for pair in RFC_NORMAL + RFC_ABNORMAL if pair[0] not in ("g:h", "http:g")],
)
def test_canonicalize_resolves_rfc_examples(reference: str, target: str) -> None:
    # RFC 3986 s.5.4.1/s.5.4.2 targets, with the fragment dropped and "//g" given path "/"
    # (s.6.2.3).
    assert canonicalize(reference, RFC_BASE) == _expected_canonical(target)


def test_rfc_targets_without_authority_are_refused() -> None:
    # RFC 3986 s.5.4.1 "g:h" has scheme "g" (not crawlable); s.5.4.2 "http:g" (strict
    # parser) has no authority, so it has no host to fetch from.
    with pytest.raises(UrlError) as scheme_error:
        canonicalize("g:h", RFC_BASE)
    assert scheme_error.value.reason == "scheme"
    with pytest.raises(UrlError) as host_error:
        canonicalize("http:g", RFC_BASE)
    assert host_error.value.reason == "malformed"


# --- RFC 3986 s.6.2.3 -------------------------------------------------------------------


@pytest.mark.parametrize(
    "variant",
    [
        "http://example.test",
        "http://example.test/",
        "http://example.test:/",
        "http://example.test:80/",
    ],
)
def test_scheme_based_normalisation(variant: str) -> None:
    # RFC 3986 s.6.2.3: four equivalent forms, "http://example.com/" the normal one
    # (host changed to a .test name).
    assert canonicalize(variant) == "http://example.test/"


def test_default_https_port_dropped_other_ports_kept() -> None:
    # RFC 3986 s.6.2.3 with https's default port 443 (RFC 9110 s.4.2.2).
    assert canonicalize("https://example.test:443/x") == "https://example.test/x"
    assert canonicalize("https://example.test:80/x") == "https://example.test:80/x"
    assert canonicalize("http://example.test:8080/x") == "http://example.test:8080/x"


def test_empty_query_is_kept() -> None:
    # RFC 3986 s.6.2.3: "http://example.com/?" cannot be assumed equivalent.
    assert canonicalize("http://example.test/?") == "http://example.test/?"
    assert canonicalize("http://example.test?") == "http://example.test/?"
    assert canonicalize("http://example.test/?") != canonicalize("http://example.test/")


def test_scheme_and_host_case() -> None:
    # RFC 3986 s.6.2.2.1: <HTTP://www.EXAMPLE.com/> is equivalent to
    # <http://www.example.com/> (host changed to a .test name); the path keeps its case.
    assert canonicalize("HTTP://www.EXAMPLE.test/Path") == "http://www.example.test/Path"


# --- percent-encoding (RFC 3986 s.2.1, s.2.3, s.6.2.2.1, s.6.2.2.2) ---------------------


@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        ("http://a.test/%3a%2f%c3%a9", "http://a.test/%3A%2F%C3%A9"),  # s.6.2.2.1 uppercase
        ("http://a.test/%7E%7euser", "http://a.test/~~user"),  # s.2.3 unreserved "~"
        ("http://a.test/%41%62%2D%2E%5F%31", "http://a.test/Ab-._1"),  # s.2.3 ALPHA DIGIT - . _
        ("http://a.test/caf\u00e9", "http://a.test/caf%C3%A9"),  # s.2.1 + UTF-8 (RFC 3629)
        ("http://a.test/a b?c d", "http://a.test/a%20b?c%20d"),  # space not in grammar
        ("http://a.test/100%", "http://a.test/100%25"),  # bare "%" is not pct-encoded (s.2.1)
        ("http://a.test/?q=\u00e9&x=[1]", "http://a.test/?q=%C3%A9&x=%5B1%5D"),  # s.3.4 query
        ("http://a.test/%2e%2E/b", "http://a.test/b"),  # s.6.2.2.2 then s.6.2.2.3
        ("http://a.test/a?b=/./c", "http://a.test/a?b=/./c"),  # s.5.2.4 applies to path only
    ],
)
def test_percent_encoding(raw: str, expected: str) -> None:
    assert canonicalize(raw) == expected


def test_percent_encoded_reserved_characters_stay_encoded() -> None:
    # RFC 3986 s.2.2: decoding a reserved delimiter changes the URI's meaning.
    assert canonicalize("http://a.test/a%2Fb%3Fc%23d") == "http://a.test/a%2Fb%3Fc%23d"


# --- hosts ------------------------------------------------------------------------------


def test_idna_host_becomes_punycode() -> None:
    # RFC 3490 ToASCII; punycode of "bücher" is "bcher-kva" (RFC 3492) [memory].
    assert canonicalize("http://B\u00fccher.test/") == "http://xn--bcher-kva.test/"
    # RFC 3986 s.3.2.2: a reg-name may carry percent-encoded UTF-8 octets.
    assert canonicalize("http://b%C3%BCcher.test/") == "http://xn--bcher-kva.test/"


def test_userinfo_and_trailing_dot_dropped() -> None:
    # Common practice, no source: credentials are not part of a crawl key; "a.test." and
    # "a.test" name the same DNS node (RFC 1034 s.3.1 absolute vs relative names).
    assert canonicalize("http://user:pw@A.test.:80/x") == "http://a.test/x"


def test_longest_host_accepted() -> None:
    # RFC 1035 s.2.3.4: 63-octet labels, 253 characters in text form (255 octets on the wire).
    host = ".".join(["a" * 63] * 3 + ["a" * 61])
    assert len(host) == 253
    assert canonicalize(f"http://{host}/") == f"http://{host}/"
    assert canonicalize(f"http://{host.upper()}/") == f"http://{host}/"


def test_ipv6_literal_normalised() -> None:
    # RFC 3986 s.3.2.2 keeps brackets; RFC 5952 s.4 lowercase compressed text form.
    assert canonicalize("http://[2001:DB8:0:0:0:0:0:1]:8080/") == "http://[2001:db8::1]:8080/"


# --- errors -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "raw",
    [
        "http://",  # RFC 3986 s.6.2.3: empty host is an error for http
        "http:///path",
        "http://:80/",
        "http://a.test:99999/",  # port beyond 65535 (RFC 793 16-bit port)
        "http://a.test:8o/",  # RFC 3986 s.3.2.3 port = *DIGIT
        "http://a b.test/",  # RFC 3986 s.3.2.2 reg-name has no space
        "http://a..test/",  # RFC 1035 s.2.3.1 labels are non-empty
        "http://b\u00fc..test/",  # invalid IDNA (empty label, RFC 3490 s.4.1)
        "http://[::1/",  # RFC 3986 s.3.2.2 IP-literal needs "]"
        "http://[not-an-ip]/",  # RFC 3986 s.3.2.2 IPv6address
        "http://a.test/\x00x",  # control character (RFC 3986 s.2; none allowed)
        "http://a\nb.test/",
        "relative/path",  # RFC 3986 s.5.1: a relative reference needs a base
        "1http://a.test/",  # RFC 3986 s.3.1 scheme starts with a letter
        "http://" + "a" * 64 + ".test/",  # RFC 1035 s.2.3.4 label <= 63 octets
        "http://" + ".".join(["a" * 63] * 4) + "/",  # RFC 1035 s.2.3.4 name <= 255 octets
    ],
)
def test_malformed(raw: str) -> None:
    with pytest.raises(UrlError) as error:
        canonicalize(raw)
    assert error.value.reason == "malformed"


@pytest.mark.parametrize(
    "raw", ["ftp://a.test/f", "javascript:alert(1)", "mailto:me@a.test", "data:,x"]
)
def test_bad_scheme(raw: str) -> None:
    # RFC 3986 s.3.1: the scheme is what precedes the first ":".
    with pytest.raises(UrlError) as error:
        canonicalize(raw)
    assert error.value.reason == "scheme"


def test_schemes_are_configurable() -> None:
    # Common practice, no source: an https-only crawl refuses http, on both paths.
    https_only = frozenset({"https"})
    with pytest.raises(UrlError) as error:
        canonicalize("http://a.test/", schemes=https_only)
    assert error.value.reason == "scheme"
    assert canonicalize("https://a.test/", schemes=https_only) == "https://a.test/"


def test_too_long() -> None:
    # Common practice, no source: a configurable bound on canonical length.
    url = "http://a.test/" + "x" * 40
    assert canonicalize(url, max_length=len(url)) == url
    for candidate in (url, url.upper().replace("HTTP", "http", 1)):
        with pytest.raises(UrlError) as error:
            canonicalize(candidate, max_length=len(url) - 1)
        assert error.value.reason == "too_long"
    with pytest.raises(UrlError) as huge:
        canonicalize("http://a.test/" + "../" * 1_000_000)
    assert huge.value.reason == "too_long"


def test_leading_and_trailing_whitespace_stripped() -> None:
    # WHATWG URL Standard, basic URL parser: strip leading/trailing C0 control or space.
    assert canonicalize("  http://a.test/x \n") == "http://a.test/x"


# --- generated URLs ---------------------------------------------------------------------

_LABELS = st.text(alphabet="abcXYZ019-_\u00e9", min_size=1, max_size=6)
_HOSTS = st.one_of(
    st.lists(_LABELS, min_size=1, max_size=3).map(".".join),
    st.sampled_from(["[::1]", "[2001:DB8::A]", "127.0.0.1", "Site.Test."]),
)
_SEGMENTS = st.one_of(
    st.text(alphabet="aZ09-._~!$&'()*+,;=:@%7eEf2F \u00e9[]\"<>^`{|}\\", max_size=6),
    st.sampled_from([".", "..", "%2e", "%2E%2E", "%7e", "%41", "%2F", "%c3%a9"]),
)
_QUERIES = st.none() | st.text(alphabet="aZ09=&/?%7eE2F. \u00e9[]", max_size=8)


@st.composite
def _generated_urls(draw: st.DrawFn) -> str:
    """Absolute URLs in assorted non-canonical spellings."""
    scheme = draw(st.sampled_from(["http", "https", "HTTP", "HtTpS"]))
    userinfo = draw(st.sampled_from(["", "user@", "u:p@"]))
    port = draw(st.sampled_from(["", ":", ":80", ":443", ":8080", ":0080", ":65535"]))
    path = "".join("/" + s for s in draw(st.lists(_SEGMENTS, max_size=5)))
    query = draw(_QUERIES)
    fragment = draw(st.none() | st.text(alphabet="ab/#", max_size=3))
    url = f"{scheme}://{userinfo}{draw(_HOSTS)}{port}{path}"
    if query is not None:
        url += "?" + query
    if fragment is not None:
        url += "#" + fragment
    return url


_FAST_LOOKING = st.builds(
    lambda scheme, host, port, path, query: f"{scheme}://{host}{port}{path}{query}",
    st.sampled_from(["http", "https"]),
    st.lists(st.text(alphabet="ab9-_", min_size=1, max_size=5), min_size=1, max_size=3).map(
        ".".join
    ),
    st.sampled_from(["", ":80", ":443", ":8080", ":65535", ":65536", ":080"]),
    st.lists(
        st.one_of(
            st.text(alphabet="aZ9-._~!$&'()*+,;=:@", max_size=5),
            st.integers(0, 255).map("%{:02X}".format),  # every triplet, uppercase
            st.sampled_from(["%c3%a9", "%3a", "%7e", "%", ".", "..", "a%2Eb"]),
        ),
        min_size=1,
        max_size=4,
    ).map(lambda segs: "".join("/" + s for s in segs)),
    st.sampled_from(["", "?", "?a=1&b=/x?", "?q=%2F", "?q=%7E", "?q=%zz", "?q=a b"]),
)


def _outcome(function: object, *args: object) -> tuple[str, str]:
    """("ok", result) or ("error", reason) of a canonicalisation call."""
    try:
        return ("ok", function(*args))  # type: ignore[operator]
    except UrlError as error:
        return ("error", error.reason)


@FUZZ
@given(st.text(max_size=64), st.none() | st.text(max_size=32))
def test_arbitrary_text_raises_only_url_error(raw: str, base: str | None) -> None:
    # The function's contract: UrlError is the only failure; any result is ASCII.
    kind, value = _outcome(canonicalize, raw, base)
    assert kind == "error" or value.isascii()


@FUZZ
@given(_generated_urls())
def test_canonicalize_is_idempotent(raw: str) -> None:
    # RFC 3986 s.6.2: a normal form is a fixed point of normalisation.
    kind, value = _outcome(canonicalize, raw)
    if kind == "ok":
        assert canonicalize(value) == value
        assert urlsplit(value).fragment == ""  # fragment dropped (common practice)


@FUZZ
@given(st.one_of(_generated_urls(), _FAST_LOOKING))
def test_fast_path_agrees_with_slow_path(raw: str) -> None:
    # The fast path must return exactly what the reference (slow) path returns.
    assert _outcome(canonicalize, raw) == _outcome(urls._canonicalize_slow, raw)


class _SlowPathUsed(Exception):
    """Raised by a stand-in for the slow path to reveal that the fast path declined."""


def _refuse_slow_path(*_args: object) -> str:
    raise _SlowPathUsed


@FUZZ
@given(_FAST_LOOKING)
def test_fast_path_accepts_only_canonical_urls(raw: str) -> None:
    # Whatever the fast path returns, normalisation by the slow path leaves unchanged.
    reference = urls._canonicalize_slow
    with patch.object(urls, "_canonicalize_slow", _refuse_slow_path):
        try:
            fast = canonicalize(raw)
        except _SlowPathUsed:
            return
    assert fast == raw
    assert reference(raw) == raw


def test_fast_path_agrees_on_every_triplet() -> None:
    # RFC 3986 s.2.3 / s.6.2.2.2: exactly the unreserved octets are decoded, in path and
    # query alike; both paths must agree on all 256 uppercase triplets.
    unreserved = set(b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-._~")
    for octet in range(256):
        triplet = f"%{octet:02X}"
        raw = f"http://a.test/x{triplet}y?q={triplet}"
        expected = chr(octet) if octet in unreserved else triplet
        assert canonicalize(raw) == urls._canonicalize_slow(raw) == (
            f"http://a.test/x{expected}y?q={expected}"
        )


def test_fast_path_is_taken(monkeypatch: pytest.MonkeyPatch) -> None:
    # A typical canonical URL must not reach the slow path.
    monkeypatch.setattr(urls, "_canonicalize_slow", _refuse_slow_path)
    typical = "http://host-123.test/a/b/page-45.html?x=1"
    assert canonicalize(typical) == typical
    encoded = "https://h.test:8443/%C3%A9/x?y=%2F"
    assert canonicalize(encoded) == encoded


@FUZZ
@given(_generated_urls(), st.sampled_from(["g", "../x/./y", "?q", "//Other.Test/p", "#f", ""]))
def test_relative_resolution_is_idempotent(base: str, reference: str) -> None:
    # RFC 3986 s.5.2 then s.6.2: resolving against any base yields a normal form.
    kind, value = _outcome(canonicalize, reference, base)
    if kind == "ok":
        assert canonicalize(value) == value
