"""What a robots.txt allows one crawler (RFC 9309): the policy of one host.

A fetch outcome stands for a policy (s.2.3.1: :func:`state_for_status`); of a 2xx body at
most ``max_bytes`` is parsed (s.2.5). Fetching the files and sharing them between workers
is :mod:`frontier.robots`.

Allow and disallow rules are grouped and matched here (RFC 9309 s.2.1, s.2.2); protego
reads only Crawl-delay, which is not part of the RFC. protego's own matching differs
from the RFC where the RFC must win:

* a group applies only if its name equals the product token, case-insensitively
  (s.2.2.1); protego would also apply a group named ``foo`` to ``foobot``;
* ``$`` ends a pattern (s.2.2.3); protego also reads a pattern ending in ``$`` as one
  holding a literal ``$`` (``Disallow: /a$`` would block ``/a$b``);
* protego adds rules a file never states: ``Allow: /a/index.html`` also allows ``/a/``;
* in the query, ``%2F`` and ``/`` are the same octet for matching (s.2.2.2 table:
  ``/foo/bar?baz=https://foo.bar`` matches ``...?baz=https%3A%2F%2Ffoo.bar``), so both
  rule values and URLs get ``%2F`` decoded after the ``?``.
"""

from __future__ import annotations

import itertools
import logging
import re
from typing import NamedTuple
from urllib.parse import quote

from protego import Protego

from frontier.exceptions import ConfigError

log = logging.getLogger("frontier.robots")  # the name robots.txt log lines have always had

STATE_RULES = "rules"
STATE_ALLOW_ALL = "allow_all"
STATE_DISALLOW_ALL = "disallow_all"

ROBOTS_PATH = "/robots.txt"
MAX_SITEMAP_LINES = 1000  # Sitemap: lines kept from one file (common practice, no source)
DEFAULT_CRAWL_DELAY_CAP_S = 30.0
DEFAULT_MAX_BYTES = 512 * 1024

HTTP_OK_MIN, HTTP_REDIRECT_MIN, HTTP_CLIENT_ERROR_MIN, HTTP_SERVER_ERROR_MIN = 200, 300, 400, 500
HTTP_STATUS_END = 600
HTTP_TOO_MANY_REQUESTS = 429  # common practice, no source: a rate limit is not "unavailable"

_PRODUCT_TOKEN = re.compile(r"[A-Za-z_-]+")  # RFC 9309 s.2.2.1: product-token characters
_USER_AGENT_LINE = re.compile(r"^\s*user[-\s]?agent\s*(?::|\s)(?P<value>[^#]*)", re.IGNORECASE)
_ENCODED_SLASH = re.compile("%2F", re.IGNORECASE)
_RULE_LINE = re.compile(  # RFC 9309 s.2.2: user-agent, allow and disallow lines
    r"\s*(?P<field>user-?agent|allow|disallow)\s*:\s*(?P<value>.*?)\s*\Z",
    re.IGNORECASE | re.ASCII)
_TRIPLET = re.compile(rb"%([0-9A-Fa-f]{2})")
_URL_KEPT_TRIPLETS = frozenset({b"2F", b"25"})  # "/" and "%" stay encoded when compared
_PATTERN_KEPT_TRIPLETS = _URL_KEPT_TRIPLETS | {b"2A", b"24"}  # a literal "*" or "$" (s.2.2.3)
_MATCH_SAFE = "/%"
_NOTHING_TO_ENCODE = re.compile(r"[A-Za-z0-9_.~/\-]*")


def product_token(user_agent: str) -> str:
    """The first product token of a User-Agent: ``"sluice/0.1 (+...)"`` -> ``"sluice"``."""
    match = _PRODUCT_TOKEN.match(user_agent.strip())
    if match is None:
        raise ConfigError(f"user_agent {user_agent!r}: does not start with a product token")
    return match.group(0)


def state_for_status(status: int | None) -> str:
    """RFC 9309 s.2.3.1: which policy a robots.txt fetch outcome stands for."""
    if status is None or status == HTTP_TOO_MANY_REQUESTS:
        return STATE_DISALLOW_ALL
    if HTTP_OK_MIN <= status < HTTP_REDIRECT_MIN:
        return STATE_RULES
    if HTTP_REDIRECT_MIN <= status < HTTP_SERVER_ERROR_MIN:
        return STATE_ALLOW_ALL
    return STATE_DISALLOW_ALL  # 5xx, and anything outside 2xx-5xx


def truncate_body(body: bytes, max_bytes: int) -> bytes:
    """At most ``max_bytes``, cut after the last whole line so no rule is half read."""
    if len(body) <= max_bytes:
        return body
    head = body[:max_bytes]
    cut = max(head.rfind(b"\n"), head.rfind(b"\r"))
    return head[: cut + 1] if cut >= 0 else b""


def _decode_query_slashes(text: str) -> str:
    """``%2F`` -> ``/`` after the first ``?`` (RFC 9309 s.2.2.2 table, query rows)."""
    head, sep, query = text.partition("?")
    return head + sep + _ENCODED_SLASH.sub("/", query) if sep else text


def _group_names(text: str) -> set[str]:
    """Lower-cased user-agent values of every group, as protego records them."""
    names: set[str] = set()
    for line in text.splitlines():
        match = _USER_AGENT_LINE.match(line)
        if match:
            value = match.group("value").strip().lower()
            names.update(name for name in (value, value.replace("*", "")) if name)
    return names


def _match_form(text: str, kept: frozenset[bytes], safe: str) -> str:
    """``text`` percent-encoded for comparison (RFC 9309 s.2.2.2): triplets decoded except
    those in ``kept``, then every octet but the unreserved ones and ``safe`` encoded."""
    if _NOTHING_TO_ENCODE.fullmatch(text):
        return text
    data = text.encode("utf-8", "surrogatepass")
    if b"%" in data:
        data = _TRIPLET.sub(lambda m: b"%" + m.group(1).upper() if m.group(1).upper() in kept
                            else bytes.fromhex(m.group(1).decode("ascii")), data)
    return quote(data, safe=safe)


class _Rule(NamedTuple):
    """One allow or disallow rule; ``parts`` is the pattern split at each "*"."""

    length: int
    allow: bool
    parts: tuple[str, ...]
    anchored: bool


def _rule(allow: bool, value: str) -> _Rule:
    """A rule from its path pattern: "*" any characters, a final "$" the end (s.2.2.3)."""
    anchored = value.endswith("$")
    pattern = _match_form(value[:-1] if anchored else value, _PATTERN_KEPT_TRIPLETS,
                          _MATCH_SAFE + "*")
    return _Rule(len(pattern) + anchored, allow, tuple(pattern.split("*")), anchored)


def _matches(rule: _Rule, target: str) -> bool:
    """Does ``rule`` match ``target`` from its first octet? Leftmost matching of the parts
    between stars is exact for such patterns and never backtracks."""
    parts = rule.parts
    if not target.startswith(parts[0]):
        return False
    if len(parts) == 1:
        return not rule.anchored or len(target) == len(parts[0])
    pos = len(parts[0])
    for part in parts[1:-1]:
        found = target.find(part, pos)
        if found < 0:
            return False
        pos = found + len(part)
    last = parts[-1]
    if rule.anchored:
        return len(target) - len(last) >= pos and target.endswith(last)
    return target.find(last, pos) >= 0


def _rule_groups(text: str) -> dict[str, list[_Rule]]:
    """Rules by lower-cased group name (RFC 9309 s.2.1, s.2.2.1).

    A run of user-agent lines opens a group whose allow and disallow lines belong to each
    name of the run; groups of one name are combined. A name is the value's leading
    product token, or "*". Other lines, and rules before any user-agent line, are skipped.
    """
    groups: dict[str, list[_Rule]] = {}
    names: list[str] = []
    opening = False
    for line in text.splitlines():
        match = _RULE_LINE.match(line.partition("#")[0])
        if match is None:
            continue
        field, value = match.group("field").lower(), match.group("value")
        if field.startswith("user"):
            if not opening:
                names, opening = [], True
            token = _PRODUCT_TOKEN.match(value)
            name = "*" if value == "*" else token.group(0).lower() if token else ""
            if name:
                names.append(name)
                groups.setdefault(name, [])
            continue
        opening = False
        if value:  # an empty pattern matches nothing
            rule = _rule(field == "allow", value)
            for name in names:
                groups[name].append(rule)
    return groups


class RuleGroup:
    """The rules that apply to one crawler (RFC 9309 s.2.2.2): the longest matching
    pattern decides, an allow rule wins a tie, and no match means allowed."""

    __slots__ = ("_rules", "_plain", "_special")

    def __init__(self, rules: list[_Rule]) -> None:
        self._rules = sorted(rules, key=lambda r: (r.length, r.allow), reverse=True)
        plain = [r for r in self._rules if len(r.parts) == 1 and not r.anchored]
        self._plain = tuple(r.parts[0] for r in plain)  # prefixes: one test rules all out
        self._special = [r for r in self._rules if len(r.parts) > 1 or r.anchored]

    def allows(self, target: str) -> bool:
        """May the path and query ``target`` (already in match form) be fetched?"""
        rules = self._rules if target.startswith(self._plain) else self._special
        for rule in rules:
            if _matches(rule, target):
                return rule.allow
        return True


def _target(url: str) -> str:
    """The path and query of an absolute URL, "/" for an empty path; no fragment."""
    url = url.partition("#")[0]
    start = url.find("://")
    if start >= 0:
        rest = url[start + 3 :]
        ends = [i for i in (rest.find("/"), rest.find("?")) if i >= 0]
        url = rest[min(ends) :] if ends else ""
    return url if url.startswith("/") else "/" + url


class RobotsRules:
    """The robots.txt policy of one host for one product token."""

    def __init__(
        self,
        state: str,
        *,
        group: RuleGroup | None = None,
        crawl_delay_s: float | None = None,
        sitemaps: tuple[str, ...] = (),
    ) -> None:
        if state not in (STATE_RULES, STATE_ALLOW_ALL, STATE_DISALLOW_ALL):
            raise ValueError(f"unknown robots state {state!r}")
        self.state = state
        self._group = group
        self._crawl_delay_s = crawl_delay_s
        self.sitemaps = sitemaps  # the file's Sitemap: lines, as written (any group)

    @classmethod
    def from_entry(
        cls,
        status: int | None,
        body: bytes,
        *,
        user_agent: str,
        crawl_delay_cap_s: float = DEFAULT_CRAWL_DELAY_CAP_S,
        max_bytes: int = DEFAULT_MAX_BYTES,
    ) -> RobotsRules:
        """Parse a fetch outcome; never raises on the body's content."""
        state = state_for_status(status)
        if state != STATE_RULES:
            return cls(state)
        text = truncate_body(body, max_bytes).decode("utf-8-sig", errors="replace")
        lines = [_decode_query_slashes(line) if "?" in line else line for line in text.splitlines()]
        text = "\n".join(lines)
        token = product_token(user_agent)
        groups = _rule_groups(text)
        group = RuleGroup(groups.get(token.lower(), groups.get("*", [])))
        try:
            parser = Protego.parse(text)  # for Crawl-delay only
        except Exception:  # noqa: BLE001 - a hostile body must not stop the crawl
            log.warning("robots.txt could not be parsed; treating it as empty", exc_info=True)
            parser = Protego.parse("")
        agent = token if token.lower() in _group_names(text) else "*"
        delay = parser.crawl_delay(agent)
        capped = None if delay is None else min(delay, crawl_delay_cap_s)
        try:  # Sitemap: lines stand outside the groups (sitemaps.org protocol 0.9)
            sitemaps = tuple(itertools.islice(parser.sitemaps, MAX_SITEMAP_LINES))
        except Exception:  # noqa: BLE001 - a hostile body must not stop the crawl
            sitemaps = ()
        return cls(STATE_RULES, group=group, crawl_delay_s=capped, sitemaps=sitemaps)

    def allowed(self, url: str) -> bool:
        """May ``url`` (absolute, on this host) be fetched? ``/robots.txt`` always may."""
        if self.state == STATE_ALLOW_ALL:
            return True
        target = _target(url)
        if target.partition("?")[0] == ROBOTS_PATH:  # RFC 9309 s.2.2.2: implicitly allowed
            return True
        if self.state == STATE_DISALLOW_ALL or self._group is None:
            return False
        return self._group.allows(
            _match_form(_decode_query_slashes(target), _URL_KEPT_TRIPLETS, _MATCH_SAFE))

    def crawl_delay(self) -> float | None:
        """Seconds between fetches asked by Crawl-delay (not in RFC 9309), capped; or None."""
        return self._crawl_delay_s
