"""Fingerprints, hosts, registrable domains, politeness keys and crawl scope.

Expected values come from reference libraries (mmh3, urllib.parse, the Public Suffix
List) or RFC 2606 / RFC 6761, or are marked "common practice, no source".
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
from tests.test_urls import _generated_urls, _outcome
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


# --- fingerprint ------------------------------------------------------------------------


def test_fingerprint_matches_mmh3() -> None:
    # Reference library: MurmurHash3 x64 128, first 64 bits, signed (mmh3).
    url = "http://a.test/page?id=7"
    expected = mmh3.hash64(url.encode("utf-8"), signed=True)[0]
    assert fingerprint(url) == expected
    assert fingerprint(url) == fingerprint(canonicalize(url))
    assert fingerprint(url) != fingerprint(url + "8")


@FUZZ
@given(st.text(max_size=40))
def test_fingerprint_is_signed_64_bit(text: str) -> None:
    # Signed int64 range (two's complement, 64 bits).
    assert -(2**63) <= fingerprint(text) < 2**63


# --- host_of, registered_domain, politeness_key -----------------------------------------


@FUZZ
@given(_generated_urls())
def test_host_of_matches_urlsplit(raw: str) -> None:
    # Reference library: urllib.parse.urlsplit(...).hostname (brackets stripped there).
    kind, value = _outcome(canonicalize, raw)
    if kind == "ok":
        assert host_of(value).strip("[]") == urlsplit(value).hostname


def test_host_of_examples() -> None:
    # RFC 3986 s.3.2.2: host excludes the port; an IP-literal includes its brackets.
    assert host_of("http://a.test:8080/x") == "a.test"
    assert host_of("https://[::1]:8443/") == "[::1]"
    assert host_of("http://a.test/x:y") == "a.test"


@pytest.mark.parametrize(
    ("host", "expected"),
    [
        ("a.b.example.test", "example.test"),  # RFC 6761 s.6.2: ".test" is reserved
        ("example.test", "example.test"),
        ("www.invented-shop.co.uk", "invented-shop.co.uk"),  # Public Suffix List: co.uk
        ("co.uk", "co.uk"),  # a bare public suffix has no registrable domain
        ("localhost", "localhost"),  # RFC 6761 s.6.3
        ("intranet", "intranet"),  # single label (common practice, no source)
        ("127.0.0.1", "127.0.0.1"),  # IP addresses have no registrable domain
        ("[::1]", "[::1]"),
    ],
)
def test_registered_domain(host: str, expected: str) -> None:
    assert registered_domain(host) == expected


def test_registered_domain_reserved_tld_without_default_rule(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # RFC 6761 s.6.2: ".test" names keep their last two labels even with a suffix list
    # that knows nothing of ".test" (publicsuffixlist with accept_unknown=False -> None).
    strict = PublicSuffixList(accept_unknown=False)
    assert strict.privatesuffix("a.b.example.test") is None
    monkeypatch.setattr(urls, "_public_suffix_list", lambda: strict)
    registered_domain.cache_clear()
    try:
        assert registered_domain("a.b.example.test") == "example.test"
        assert registered_domain("www.invented-shop.co.uk") == "invented-shop.co.uk"
    finally:
        registered_domain.cache_clear()


def test_politeness_key() -> None:
    # Common practice, no source: group by host, or by registrable domain.
    assert politeness_key("a.b.example.test", "host") == "a.b.example.test"
    assert politeness_key("a.b.example.test", "domain") == "example.test"
    with pytest.raises(ConfigError):
        politeness_key("a.test", "ip")


# --- Scope (common practice, no source) -------------------------------------------------


def _check(scope: Scope, url: str, depth: int = 0) -> str | None:
    canonical = canonicalize(url)
    return scope.check(canonical, host_of(canonical), depth)


def test_scope_wildcard_and_exact_hosts() -> None:
    scope = Scope(allow=["*.site.test", "Other.Test"])
    assert _check(scope, "http://site.test/") is None
    assert _check(scope, "http://a.b.site.test/") is None
    assert _check(scope, "http://other.test/") is None
    assert _check(scope, "http://www.other.test/") == "host_out_of_scope"
    assert _check(scope, "http://evilsite.test/") == "host_out_of_scope"
    assert _check(scope, "http://site.test.evil.test/") == "host_out_of_scope"


def test_scope_empty_allow_admits_every_host() -> None:
    assert _check(Scope(), "http://anything.test/") is None


def test_scope_include_exclude() -> None:
    scope = Scope(include=[r"^https?://site\.test/docs/"], exclude=[r"[?&]sort="])
    assert _check(scope, "http://site.test/docs/a") is None
    assert _check(scope, "http://site.test/blog/a") == "not_included"
    assert _check(scope, "http://site.test/docs/a?sort=asc") == "excluded_pattern"


def test_scope_depth() -> None:
    scope = Scope(max_depth=2)
    assert _check(scope, "http://site.test/", depth=2) is None
    assert _check(scope, "http://site.test/", depth=3) == "too_deep"


def test_scope_from_seeds() -> None:
    scope = Scope.from_seeds(["HTTP://Site.Test:80/start", "https://b\u00fccher.test/"])
    assert _check(scope, "http://site.test/other") is None
    assert _check(scope, "https://xn--bcher-kva.test/x") is None
    assert _check(scope, "http://www.site.test/") == "host_out_of_scope"


@pytest.mark.parametrize(
    "kwargs",
    [{"allow": ["bad host.test"]}, {"include": ["("]}, {"exclude": ["[z-a]"]}, {"max_depth": -1}],
)
def test_scope_rejects_bad_settings(kwargs: dict[str, object]) -> None:
    with pytest.raises(ConfigError):
        Scope(**kwargs)  # type: ignore[arg-type]
