"""URL canonicalisation, fingerprints, politeness keys and crawl scope.

``canonicalize`` resolves a reference against a base (RFC 3986 s.5.2) and applies
the syntax- and scheme-based normalisations of RFC 3986 s.6.2.2 and s.6.2.3, plus a
few rules of common practice: the fragment, userinfo and a trailing host dot are
dropped, non-ASCII hosts are IDNA-encoded, and characters the RFC grammar does not
allow in a path or query are percent-encoded as UTF-8.

URLs that are already canonical take a fast path: one precompiled regular expression
recognises them and they are returned unchanged. Everything else takes the slow path,
which is the reference implementation; both must agree on every input.
"""

from __future__ import annotations

import functools
import ipaddress
import re
from collections.abc import Iterable, Sequence
from typing import NamedTuple

import mmh3
from publicsuffixlist import PublicSuffixList

from frontier.exceptions import ConfigError, UrlError

# --- settings-like constants -------------------------------------------------------

MAX_URL_LENGTH = 2048
"""Default upper bound on the length of a canonical URL."""

RAW_LENGTH_FACTOR = 4
"""Raw input longer than this multiple of ``max_length`` is refused before parsing.
Dot segments, fragments and percent-decoding shrink a URL, but not by this much in
practice; the check keeps huge input from costing parse time."""

DEFAULT_SCHEMES: frozenset[str] = frozenset({"http", "https"})
"""Schemes admitted unless the caller passes others."""

DEFAULT_PORTS: dict[str, int] = {"http": 80, "https": 443}
"""Default ports (RFC 9110 s.4.2.1, s.4.2.2); an explicit default port is dropped."""

MAX_PORT = 65535
"""Largest TCP port number."""

MAX_PORT_DIGITS = 5
"""Digits in ``MAX_PORT``; longer port strings (after leading zeros) are refused."""

MAX_HOST_LENGTH = 253
"""Longest DNS name in text form without the trailing dot (RFC 1035 s.2.3.4)."""

MAX_LABEL_LENGTH = 63
"""Longest DNS label (RFC 1035 s.2.3.4)."""

RESERVED_TLDS: frozenset[str] = frozenset({"test", "example", "invalid", "localhost"})
"""Reserved top-level names (RFC 2606 s.2, RFC 6761 s.6); treated as public suffixes."""

REGISTERED_DOMAIN_CACHE_SIZE = 65536
"""Hosts whose registrable domain is memoised."""

POLITENESS_MODES: tuple[str, ...] = ("host", "domain", "ip")
"""Ways of grouping URLs for politeness: by host, registrable domain, or IP address
(the address needs a resolver; see ``frontier.admission.Admission``)."""

# --- reason words --------------------------------------------------------------------

MALFORMED = "malformed"
BAD_SCHEME = "scheme"
TOO_LONG = "too_long"

HOST_OUT_OF_SCOPE = "host_out_of_scope"
EXCLUDED_PATTERN = "excluded_pattern"
NOT_INCLUDED = "not_included"
TOO_DEEP = "too_deep"

# --- character classes (RFC 3986 s.2.2, s.2.3, s.3.3, s.3.4) ------------------------------

_UNRESERVED = frozenset("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-._~")
_PCHAR = r"A-Za-z0-9\-._~!$&'()*+,;=:@"
# A percent-triplet that stays encoded in canonical form: uppercase hex, not unreserved.
_KEPT_TRIPLET = r"%(?!2[DE]|3[0-9]|4[1-9A-F]|5[0-9AF]|6[1-9A-F]|7[0-9AE])[0-9A-F]{2}"

# --- fast path -------------------------------------------------------------------------

# Conservative: a URL matching this (and containing no "/.", which rules out dot
# segments) is canonical. Whatever it misses still comes out right via the slow path.
_LABEL = rf"[a-z0-9_-]{{1,{MAX_LABEL_LENGTH}}}"
_FAST_HOST = rf"(?![a-z0-9._-]{{{MAX_HOST_LENGTH + 1}}})(?:{_LABEL}\.)*{_LABEL}"
_FAST_PORT = (
    r"(?:[1-9][0-9]{0,3}|[1-5][0-9]{4}|6[0-4][0-9]{3}|65[0-4][0-9]{2}|655[0-2][0-9]|6553[0-5])"
)
_FAST_PATH = rf"/[{_PCHAR}/]*(?:{_KEPT_TRIPLET}[{_PCHAR}/]*)*"
_FAST_QUERY = rf"(?:\?[{_PCHAR}/?]*(?:{_KEPT_TRIPLET}[{_PCHAR}/?]*)*)?"
_CANONICAL_RE = re.compile(
    rf"(https?)://{_FAST_HOST}(?::({_FAST_PORT}))?{_FAST_PATH}{_FAST_QUERY}"
)
_DOT_SEGMENT_HINT = "/."
_DEFAULT_PORT_TEXT = {scheme: str(port) for scheme, port in DEFAULT_PORTS.items()}

# --- slow path -------------------------------------------------------------------------

# RFC 3986 Appendix B.
_REFERENCE_RE = re.compile(
    r"(?:([^:/?#]+):)?(?://([^/?#]*))?([^?#]*)(?:\?([^#]*))?(?:#(.*))?", re.S
)
_SCHEME_RE = re.compile(r"[a-z][a-z0-9+.-]*")  # RFC 3986 s.3.1, after lowercasing
_CONTROL_RE = re.compile(r"[\x00-\x1f\x7f]")
_C0_OR_SPACE = "".join(chr(code) for code in range(0x21))
_HOST_RE = re.compile(rf"{_LABEL}(?:\.{_LABEL})*")
_PATH_FIX_RE = re.compile(rf"%[0-9A-Fa-f]{{2}}|[^{_PCHAR}/]")
_QUERY_FIX_RE = re.compile(rf"%[0-9A-Fa-f]{{2}}|[^{_PCHAR}/?]")
_TRIPLET_RUN_RE = re.compile(r"(?:%[0-9A-Fa-f]{2})+")


class _Parts(NamedTuple):
    """The five components of a URI reference; ``None`` means undefined."""

    scheme: str | None
    authority: str | None
    path: str
    query: str | None
    fragment: str | None


def canonicalize(
    raw: str | bytes,
    base: str | bytes | None = None,
    *,
    max_length: int = MAX_URL_LENGTH,
    schemes: frozenset[str] = DEFAULT_SCHEMES,
) -> str:
    """Return the canonical absolute form of ``raw`` resolved against ``base``.

    ``schemes`` holds lowercase scheme names. Bytes are read as UTF-8 (RFC 3987 s.3.1).
    Raises ``UrlError`` with reason ``malformed``, ``scheme`` or ``too_long``, and never
    any other exception.
    """
    if type(raw) is not str or (base is not None and type(base) is not str):
        raw, base = _as_text(raw), None if base is None else _as_text(base)
    if len(raw) <= max_length and _DOT_SEGMENT_HINT not in raw:
        match = _CANONICAL_RE.fullmatch(raw)
        if match is not None:
            scheme, port = match.group(1, 2)
            if scheme in schemes and port != _DEFAULT_PORT_TEXT[scheme]:
                return raw
    return _canonicalize_slow(raw, base, max_length, schemes)


def _as_text(value: object) -> str:
    """A URL given as bytes, decoded as UTF-8; text as it is; anything else refused."""
    if isinstance(value, str):
        return value
    if isinstance(value, (bytes, bytearray, memoryview)):
        try:
            return bytes(value).decode("utf-8")
        except UnicodeDecodeError as exc:
            raise UrlError(MALFORMED, "bytes are not UTF-8") from exc
    raise UrlError(MALFORMED, f"not text: {type(value).__name__}")


def _canonicalize_slow(
    raw: str,
    base: str | None = None,
    max_length: int = MAX_URL_LENGTH,
    schemes: frozenset[str] = DEFAULT_SCHEMES,
) -> str:
    """Reference implementation of ``canonicalize`` without the fast path."""
    raw_limit = max_length * RAW_LENGTH_FACTOR
    if len(raw) > raw_limit or (base is not None and len(base) > raw_limit):
        raise UrlError(TOO_LONG, f"input longer than {raw_limit} characters")
    reference = _parse(raw)
    if reference.scheme is None:
        if base is None:
            raise UrlError(MALFORMED, "relative reference without a base")
        base_parts = _parse(base)
        if base_parts.scheme is None:
            raise UrlError(MALFORMED, "base is not an absolute URL")
        target = _transform(reference, base_parts)
    else:
        target = _transform(reference, None)
    scheme = (target.scheme or "").lower()
    if not _SCHEME_RE.fullmatch(scheme):
        raise UrlError(MALFORMED, "invalid scheme")
    if scheme not in schemes:
        raise UrlError(BAD_SCHEME, scheme)
    if target.authority is None:
        raise UrlError(MALFORMED, "no authority")
    host, port = _split_authority(target.authority)
    try:
        authority = _normalise_host(host) + _port_suffix(port, scheme)
        path = remove_dot_segments(_fix_percent(target.path, _PATH_FIX_RE)) or "/"
        query = None if target.query is None else _fix_percent(target.query, _QUERY_FIX_RE)
    except UnicodeError as exc:  # lone surrogates in the path or query
        raise UrlError(MALFORMED, "unencodable characters") from exc
    result = f"{scheme}://{authority}{path}"
    if query is not None:
        result = f"{result}?{query}"
    if len(result) > max_length:
        raise UrlError(TOO_LONG, f"canonical URL longer than {max_length} characters")
    return result


def _parse(text: str) -> _Parts:
    """Split a URI reference into components (RFC 3986 Appendix B).

    Leading and trailing C0 controls and spaces are stripped first (WHATWG URL
    Standard, basic URL parser); any control character left inside is refused.
    """
    text = text.strip(_C0_OR_SPACE)
    if _CONTROL_RE.search(text):
        raise UrlError(MALFORMED, "control character")
    match = _REFERENCE_RE.fullmatch(text)
    if match is None:  # every part of the expression is optional; kept for safety
        raise UrlError(MALFORMED, "unparseable")
    scheme, authority, path, query, fragment = match.groups()
    return _Parts(scheme, authority, path, query, fragment)


def _transform(reference: _Parts, base: _Parts | None) -> _Parts:
    """Resolve ``reference`` against ``base`` (RFC 3986 s.5.2.2, strict parser)."""
    if reference.scheme is not None or base is None:
        return reference._replace(path=remove_dot_segments(reference.path))
    if reference.authority is not None:
        return reference._replace(scheme=base.scheme, path=remove_dot_segments(reference.path))
    if reference.path == "":
        query = reference.query if reference.query is not None else base.query
        return _Parts(base.scheme, base.authority, base.path, query, reference.fragment)
    if reference.path.startswith("/"):
        path = remove_dot_segments(reference.path)
    else:
        path = remove_dot_segments(_merge(base, reference.path))
    return _Parts(base.scheme, base.authority, path, reference.query, reference.fragment)


def _merge(base: _Parts, path: str) -> str:
    """Merge a relative path with the base path (RFC 3986 s.5.2.3)."""
    if base.authority is not None and base.path == "":
        return "/" + path
    return base.path[: base.path.rfind("/") + 1] + path


def _recompose(parts: _Parts) -> str:
    """Recompose components into a URI reference (RFC 3986 s.5.3)."""
    out = []
    if parts.scheme is not None:
        out.append(parts.scheme + ":")
    if parts.authority is not None:
        out.append("//" + parts.authority)
    out.append(parts.path)
    if parts.query is not None:
        out.append("?" + parts.query)
    if parts.fragment is not None:
        out.append("#" + parts.fragment)
    return "".join(out)


def _resolve(reference: str, base: str) -> str:
    """Resolve without normalising (RFC 3986 s.5.2 then s.5.3)."""
    return _recompose(_transform(_parse(reference), _parse(base)))


def resolve_reference(reference: str, base: str) -> str:
    """``reference`` resolved against ``base`` as written, without normalising
    (RFC 3986 s.5.2, s.5.3); UrlError for control characters inside either."""
    return _resolve(reference, base)


def remove_dot_segments(path: str) -> str:
    """Remove "." and ".." segments (RFC 3986 s.5.2.4), in linear time.

    Each output entry is one segment with its leading "/" (if any), so step C's
    "remove the last segment and its preceding '/'" is a list pop.
    """
    if "." not in path:
        return path
    out: list[str] = []
    i, n = 0, len(path)
    while i < n:
        if path.startswith("../", i):  # step A
            i += 3
        elif path.startswith("./", i):  # step A
            i += 2
        elif path.startswith("/./", i):  # step B
            i += 2
        elif i == n - 2 and path.endswith("/."):  # step B, whole remainder is "/."
            out.append("/")
            break
        elif path.startswith("/../", i):  # step C
            i += 3
            if out:
                out.pop()
        elif i == n - 3 and path.endswith("/.."):  # step C, whole remainder is "/.."
            if out:
                out.pop()
            out.append("/")
            break
        elif i >= n - 2 and path[i:] in (".", ".."):  # step D
            break
        else:  # step E
            end = path.find("/", i + 1)
            if end < 0:
                end = n
            out.append(path[i:end])
            i = end
    return "".join(out)


def _fix_percent(text: str, pattern: re.Pattern[str]) -> str:
    """Normalise percent-encoding (RFC 3986 s.6.2.2.1, s.6.2.2.2) and encode the rest.

    Triplets get uppercase hex, triplets of unreserved characters are decoded, and
    every character outside the component's grammar (including a bare "%") is
    percent-encoded as UTF-8.
    """
    if pattern.search(text) is None:
        return text
    return pattern.sub(_fix_match, text)


def _fix_match(match: re.Match[str]) -> str:
    """Replacement for one triplet or one character needing encoding."""
    found = match.group()
    if len(found) == 3:
        char = chr(int(found[1:], 16))
        return char if char in _UNRESERVED else found.upper()
    return "".join(f"%{octet:02X}" for octet in found.encode("utf-8"))


def _split_authority(authority: str) -> tuple[str, str]:
    """Return (host, port text) of an authority, dropping any userinfo."""
    hostport = authority.rpartition("@")[2]
    if hostport.startswith("["):
        end = hostport.find("]")
        if end < 0:
            raise UrlError(MALFORMED, "unterminated IP literal")
        rest = hostport[end + 1 :]
        if rest and not rest.startswith(":"):
            raise UrlError(MALFORMED, "text after IP literal")
        return hostport[: end + 1], rest[1:]
    host, _, port = hostport.partition(":")
    return host, port


def _port_suffix(port: str, scheme: str) -> str:
    """":port" for a non-default port, "" for an empty or default one (RFC 3986 s.6.2.3)."""
    if not port:
        return ""
    if not (port.isascii() and port.isdigit()):
        raise UrlError(MALFORMED, "port is not a number")
    digits = port.lstrip("0")
    if not digits or len(digits) > MAX_PORT_DIGITS or int(digits) > MAX_PORT:
        raise UrlError(MALFORMED, "port out of range")
    if int(digits) == DEFAULT_PORTS.get(scheme):
        return ""
    return ":" + digits


def _normalise_host(host: str) -> str:
    """Lowercase, percent-decode, IDNA-encode and validate a host (no port).

    IP literals keep their brackets (RFC 3986 s.3.2.2) in RFC 5952 s.4 text form.
    A trailing dot is dropped (common practice, no source).
    """
    if host.startswith("["):
        return _normalise_ip_literal(host)
    if "%" in host:
        host = _percent_decode(host)
    if not host.isascii():
        try:
            host = host.encode("idna").decode("ascii")
        except UnicodeError as exc:
            raise UrlError(MALFORMED, "invalid IDNA host") from exc
    host = host.lower()
    if host.endswith("."):
        host = host[:-1]
    if not host:
        raise UrlError(MALFORMED, "empty host")
    if len(host) > MAX_HOST_LENGTH or _HOST_RE.fullmatch(host) is None:
        raise UrlError(MALFORMED, "invalid host")
    return host


def _normalise_ip_literal(host: str) -> str:
    """Validate "[IPv6]" and return it in RFC 5952 compressed lowercase form."""
    inner = host[1:-1] if host.endswith("]") else ""
    if not inner or "%" in inner:  # zone identifiers (RFC 6874) are not crawlable
        raise UrlError(MALFORMED, "invalid IP literal")
    try:
        address = ipaddress.IPv6Address(inner)
    except ValueError as exc:
        raise UrlError(MALFORMED, "invalid IP literal") from exc
    return f"[{address.compressed}]"


def _percent_decode(text: str) -> str:
    """Decode runs of percent-triplets as UTF-8 (strict); bare "%" signs are left alone."""
    try:
        return _TRIPLET_RUN_RE.sub(_decode_run, text)
    except UnicodeDecodeError as exc:
        raise UrlError(MALFORMED, "host is not UTF-8") from exc


def _decode_run(match: re.Match[str]) -> str:
    """Decode one run of percent-triplets."""
    return bytes.fromhex(match.group().replace("%", "")).decode("utf-8")


def fingerprint(canonical: str) -> int:
    """Signed 64-bit MurmurHash3 (x64, first half) of the canonical URL's UTF-8 bytes.

    Collision odds follow the birthday bound: n distinct URLs give about
    n**2 / 2**65 expected colliding pairs, e.g. 1e8 URLs -> ~2.7e-4.
    """
    return mmh3.hash64(canonical, signed=True)[0]


def host_of(canonical: str) -> str:
    """The host (without port) of a canonical URL; IPv6 literals keep brackets."""
    start = canonical.find("://")
    if start < 0:
        raise UrlError(MALFORMED, "not an absolute URL")
    start += 3
    end = canonical.find("/", start)
    if end < 0:
        end = len(canonical)
    if canonical.startswith("[", start):
        close = canonical.find("]", start, end)
        if close < 0:
            raise UrlError(MALFORMED, "unterminated IP literal")
        return canonical[start : close + 1]
    colon = canonical.find(":", start, end)
    return canonical[start : colon if colon >= 0 else end]


@functools.cache
def _public_suffix_list() -> PublicSuffixList:
    """The bundled public suffix list, loaded once on first use."""
    return PublicSuffixList()


@functools.lru_cache(maxsize=REGISTERED_DOMAIN_CACHE_SIZE)
def registered_domain(host: str) -> str:
    """The registrable domain of a canonical host, or the host itself.

    IP addresses, single labels and bare public suffixes map to themselves; names
    under a reserved TLD (RFC 2606, RFC 6761, e.g. ``.test``) map to their last two labels.
    """
    if host.startswith("[") or "." not in host:
        return host
    head, _, tld = host.rpartition(".")
    if tld.isdigit():  # an IPv4 address; no TLD is numeric
        return host
    if tld in RESERVED_TLDS:
        return head.rpartition(".")[2] + "." + tld
    found = _public_suffix_list().privatesuffix(host)
    return found if found is not None else host


def politeness_key(host: str, mode: str) -> str:
    """The key URLs are grouped by for politeness: the host or its registrable domain."""
    if mode == "host":
        return host
    if mode == "domain":
        return registered_domain(host)
    if mode == "ip":
        raise ConfigError("politeness mode 'ip' needs a resolver (frontier.admission.Admission)")
    raise ConfigError(f"politeness mode: {mode!r} is not one of {', '.join(POLITENESS_MODES)}")


class Scope:
    """Decides whether a discovered URL belongs to the crawl.

    Checks run cheapest first: host, depth, exclude patterns, include patterns.
    """

    __slots__ = ("_allow_all", "_exact", "_suffixes", "_include", "_exclude", "_max_depth")

    def __init__(
        self,
        allow: Sequence[str] = (),
        include: Sequence[str] = (),
        exclude: Sequence[str] = (),
        max_depth: int | None = None,
    ) -> None:
        """``allow``: "site.test" or "*.site.test" (the site and its subdomains);
        empty allows every host. ``include``/``exclude``: regexes searched in the URL."""
        exact: set[str] = set()
        suffixes: list[str] = []
        for pattern in allow:
            if pattern.startswith("*."):
                name = _scope_host(pattern[2:])
                exact.add(name)
                suffixes.append("." + name)
            else:
                exact.add(_scope_host(pattern))
        if max_depth is not None and max_depth < 0:
            raise ConfigError(f"max_depth: must be >= 0, got {max_depth}")
        self._allow_all = not exact
        self._exact = frozenset(exact)
        self._suffixes = tuple(suffixes)
        self._include = tuple(_compile_pattern("include", p) for p in include)
        self._exclude = tuple(_compile_pattern("exclude", p) for p in exclude)
        self._max_depth = max_depth

    @classmethod
    def from_seeds(
        cls,
        seeds: Iterable[str],
        *,
        include: Sequence[str] = (),
        exclude: Sequence[str] = (),
        max_depth: int | None = None,
    ) -> Scope:
        """A scope that allows exactly the hosts of ``seeds``."""
        hosts = [host_of(canonicalize(seed)) for seed in seeds]
        if not hosts:
            raise ConfigError("seeds: at least one seed is needed to derive a scope")
        return cls(hosts, include, exclude, max_depth)

    def check(self, url: str, host: str, depth: int) -> str | None:
        """None when ``url`` (canonical, on ``host``, ``depth`` links from a seed) is in scope,
        else a reason word."""
        if not (self._allow_all or host in self._exact or host.endswith(self._suffixes)):
            return HOST_OUT_OF_SCOPE
        if self._max_depth is not None and depth > self._max_depth:
            return TOO_DEEP
        for pattern in self._exclude:
            if pattern.search(url):
                return EXCLUDED_PATTERN
        if self._include and not any(pattern.search(url) for pattern in self._include):
            return NOT_INCLUDED
        return None


def _scope_host(pattern: str) -> str:
    """Canonical host of an allow pattern, or ConfigError."""
    try:
        return _normalise_host(pattern)
    except UrlError as exc:
        raise ConfigError(f"allow: invalid host pattern {pattern!r}") from exc


def _compile_pattern(key: str, pattern: str) -> re.Pattern[str]:
    """Compile a scope regex, or ConfigError naming the key."""
    try:
        return re.compile(pattern)
    except re.error as exc:
        raise ConfigError(f"{key}: invalid regular expression {pattern!r}: {exc}") from exc
