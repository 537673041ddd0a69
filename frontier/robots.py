"""robots.txt policy (RFC 9309), parsed by protego and shared by all workers through Redis.

One fetch per host per TTL for the whole crawl: :class:`RobotsCache` reads the host's
entry from Redis, and only on a miss fetches ``/robots.txt`` under a short Redis lock
(``SET NX PX``) while other workers poll for the entry the lock holder writes. Parsed
rules are kept in a small in-process LRU until the entry expires.

Outcome of a fetch (RFC 9309 s.2.3.1):

* 2xx: the body's rules (``state == "rules"``), at most ``max_bytes`` parsed (s.2.5).
* 3xx left over after the fetcher followed its redirects (s.2.3.1.2), and 4xx:
  "unavailable", everything allowed (s.2.3.1.3). 429 is the exception, see below.
* 5xx, 429 or unreachable: "unreachable", everything disallowed (s.2.3.1.4); such
  entries expire after ``error_ttl_s`` so the host is tried again sooner.

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

import asyncio
import logging
import re
import secrets
import itertools
import time
import zlib
from collections import OrderedDict
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from typing import Any, NamedTuple
from urllib.parse import quote

from protego import Protego
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import RedisError
from redis.exceptions import TimeoutError as RedisTimeoutError

from frontier.exceptions import ConfigError, SluiceError, StoreError, StoreUnavailable
from frontier.scripts import CallBatcher

log = logging.getLogger(__name__)

STATE_RULES = "rules"
STATE_ALLOW_ALL = "allow_all"
STATE_DISALLOW_ALL = "disallow_all"

ROBOTS_PATH = "/robots.txt"
MAX_TTL_S = 86400.0  # RFC 9309 s.2.4: SHOULD NOT use a cached copy for more than 24 hours
DEFAULT_TTL_S = MAX_TTL_S
MAX_SITEMAP_LINES = 1000  # Sitemap: lines kept from one file (common practice, no source)
DEFAULT_ERROR_TTL_S = 600.0  # common practice, no source: retry an unreachable host sooner
DEFAULT_CRAWL_DELAY_CAP_S = 30.0
MIN_PARSE_BYTES = 500 * 1024  # RFC 9309 s.2.5: parse at least 500 KiB
DEFAULT_MAX_BYTES = 512 * 1024
DEFAULT_LRU_ENTRIES = 10_000
COMPRESS_MIN_BYTES = 2048  # bodies at least this long are stored zlib-compressed
ZLIB_LEVEL = 6
LOCK_TTL_S = 10.0  # the holder renews it every third of this while it fetches, so a
                  # dead holder's lock frees within this long
WRITE_LINGER_S = 0.02  # a fetched entry waits this long for others to share its round trip
LOCK_WAIT_S = 30.0  # then fetch anyway rather than stall behind a live but stuck holder
POLL_FIRST_S = 0.02
POLL_MAX_S = 0.5
MS_PER_S = 1000

HTTP_OK_MIN, HTTP_REDIRECT_MIN, HTTP_CLIENT_ERROR_MIN, HTTP_SERVER_ERROR_MIN = 200, 300, 400, 500
HTTP_STATUS_END = 600
HTTP_TOO_MANY_REQUESTS = 429  # common practice, no source: a rate limit is not "unavailable"

ENCODING_ZLIB = "zlib"
ENCODING_IDENTITY = "identity"
ENTRY_VERSION = "1"

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

# KEYS[1] lock key, ARGV[1] our token, ARGV[2] TTL in ms: renew the lock if still ours.
_RENEW_LOCK = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('PEXPIRE', KEYS[1], ARGV[2]) end
return 0
"""
# KEYS[1] lock key, ARGV[1] our token: delete the lock only if we still hold it.
_RELEASE_LOCK = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('DEL', KEYS[1]) end
return 0
"""
# KEYS[1] entry, KEYS[2] lock; ARGV[1] our token, ARGV[2] lock TTL in ms. The entry's
# fields if it exists, else the lock if it is free: one round trip for the common cases.
_READ_OR_LOCK = """
local entry = redis.call('HGETALL', KEYS[1])
if #entry > 0 then return {entry, 0} end
local got = redis.call('SET', KEYS[2], ARGV[1], 'NX', 'PX', ARGV[2])
return {entry, got and 1 or 0}
"""
# KEYS[1] entry, KEYS[2] lock; ARGV[1] our token, ARGV[2] entry TTL in ms, then field,
# value pairs. Writes the entry and releases the lock if it is still ours.
_STORE_AND_UNLOCK = """
redis.call('HSET', KEYS[1], unpack(ARGV, 3))
redis.call('PEXPIRE', KEYS[1], ARGV[2])
if redis.call('GET', KEYS[2]) == ARGV[1] then redis.call('DEL', KEYS[2]) end
return 1
"""


def product_token(user_agent: str) -> str:
    """The first product token of a User-Agent: ``"sluice/0.1 (+...)"`` -> ``"sluice"``."""
    match = _PRODUCT_TOKEN.match(user_agent.strip())
    if match is None:
        raise ConfigError(f"user_agent {user_agent!r}: does not start with a product token")
    return match.group(0)


def robots_url(scheme_host_port: str) -> str:
    """``http://site.test:8401`` -> ``http://site.test:8401/robots.txt``."""
    return scheme_host_port.rstrip("/") + ROBOTS_PATH


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


@dataclass(frozen=True)
class RobotsFetchResult:
    """What the fetcher got for ``/robots.txt`` after redirects; ``status=None``: unreachable."""

    status: int | None
    body: bytes = b""
    error: str | None = None


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


@dataclass(frozen=True)
class _Entry:
    status: int | None
    body: bytes
    error: str
    fetched_at: float
    expires_at: float


def _as_text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _translate(exc: RedisError) -> SluiceError:
    if isinstance(exc, (RedisConnectionError, RedisTimeoutError)):
        return StoreUnavailable(f"robots cache: {exc}")
    return StoreError(f"robots cache: {exc}")


class RobotsCache:
    """robots.txt rules per ``scheme://host:port``, fetched once per TTL for all workers.

    ``redis`` is a ``redis.asyncio`` client (standalone or Cluster) returning bytes
    (``decode_responses=False``). ``fetch(robots_url)`` follows up to 5 redirects
    (RFC 9309 s.2.3.1.2) and returns a :class:`RobotsFetchResult`; a ``SluiceError`` it
    raises counts as unreachable.
    """

    def __init__(
        self,
        redis: Any,
        key_for_host: Callable[[str], str],
        fetch: Callable[[str], Awaitable[RobotsFetchResult]],
        *,
        user_agent: str,
        ttl_s: float = DEFAULT_TTL_S,
        error_ttl_s: float = DEFAULT_ERROR_TTL_S,
        crawl_delay_cap_s: float = DEFAULT_CRAWL_DELAY_CAP_S,
        max_bytes: int = DEFAULT_MAX_BYTES,
        clock: Callable[[], float] = time.time,
        lock_key_for_host: Callable[[str], str] | None = None,
        lru_entries: int = DEFAULT_LRU_ENTRIES,
        lock_ttl_s: float = LOCK_TTL_S,
        lock_wait_s: float = LOCK_WAIT_S,
        sleep: Callable[[float], Awaitable[None]] = asyncio.sleep,
    ) -> None:
        if not 0 < ttl_s <= MAX_TTL_S:
            raise ConfigError(f"ttl_s {ttl_s}: must be in (0, {MAX_TTL_S}] (RFC 9309 s.2.4)")
        if error_ttl_s <= 0:
            raise ConfigError(f"error_ttl_s {error_ttl_s}: must be positive")
        if max_bytes < MIN_PARSE_BYTES:
            raise ConfigError(
                f"max_bytes {max_bytes}: RFC 9309 s.2.5 asks for >= {MIN_PARSE_BYTES}"
            )
        encoder = getattr(redis, "get_encoder", None)
        if encoder is not None and getattr(encoder(), "decode_responses", False):
            raise ConfigError("robots cache: the Redis client must use decode_responses=False")
        self._redis = redis
        self._key = key_for_host
        self._lock_key = lock_key_for_host or (lambda host: key_for_host(host) + ":lock")
        self._fetch = fetch
        self._user_agent = user_agent
        product_token(user_agent)  # fail early on a User-Agent without a product token
        self._ttl_s = ttl_s
        self._error_ttl_s = error_ttl_s
        self._delay_cap_s = crawl_delay_cap_s
        self._max_bytes = max_bytes
        self._clock = clock
        self._lru_entries = lru_entries
        self._lock_ttl_ms = int(lock_ttl_s * MS_PER_S)
        self._lock_wait_s = lock_wait_s
        self._sleep = sleep
        self._read_or_lock = redis.register_script(_READ_OR_LOCK)
        self._store_and_unlock = redis.register_script(_STORE_AND_UNLOCK)
        self._renew_lock = redis.register_script(_RENEW_LOCK)
        # hosts met together (a lease brings several new ones) share a round trip; an
        # entry waits a little for company on its way out: only its own host waits on it
        self._reads = CallBatcher(redis)
        self._writes = CallBatcher(redis, linger_s=WRITE_LINGER_S)
        self._lru: OrderedDict[str, tuple[RobotsRules, float]] = OrderedDict()
        self._inflight: dict[str, asyncio.Future[RobotsRules]] = {}

    async def rules_for(self, scheme_host_port: str) -> RobotsRules:
        """The rules of ``scheme://host[:port]``; fetches only if no live entry exists."""
        origin = scheme_host_port.rstrip("/")
        cached = self._lru.get(origin)
        if cached is not None and cached[1] > self._clock():
            self._lru.move_to_end(origin)
            return cached[0]
        pending = self._inflight.get(origin)
        if pending is None:
            pending = asyncio.ensure_future(self._load(origin))
            self._inflight[origin] = pending
            pending.add_done_callback(lambda done: self._forget(origin, done))
        return await asyncio.shield(pending)

    def _forget(self, origin: str, done: asyncio.Future[RobotsRules]) -> None:
        if self._inflight.get(origin) is done:
            del self._inflight[origin]
        if not done.cancelled():
            done.exception()  # mark retrieved; the awaiting callers re-raise it

    async def _load(self, origin: str) -> RobotsRules:
        key, lock_key = self._key(origin), self._lock_key(origin)
        token = secrets.token_hex(16)
        try:
            raw, locked = await self._reads.run(
                self._read_or_lock, [key, lock_key], [token, self._lock_ttl_ms])
        except RedisError as exc:
            raise _translate(exc) from exc
        entry = self._parse(key, raw)
        if entry is None and locked:
            try:
                entry = await self._fetch_and_store(origin, key, lock_key, token)
            except BaseException:
                await self._release(lock_key, token)
                raise
        elif entry is None:
            entry = await self._fetch_shared(origin, key)
        rules = RobotsRules.from_entry(
            entry.status,
            entry.body,
            user_agent=self._user_agent,
            crawl_delay_cap_s=self._delay_cap_s,
            max_bytes=self._max_bytes,
        )
        self._lru[origin] = (rules, entry.expires_at)
        self._lru.move_to_end(origin)
        while len(self._lru) > self._lru_entries:
            self._lru.popitem(last=False)
        return rules

    async def _fetch_shared(self, origin: str, key: str) -> _Entry:
        """Fetch under the host's lock, or wait for the worker that holds it."""
        lock_key = self._lock_key(origin)
        token = secrets.token_hex(16)
        deadline = time.monotonic() + self._lock_wait_s
        pause = POLL_FIRST_S
        while True:
            try:
                acquired = await self._redis.set(lock_key, token, nx=True, px=self._lock_ttl_ms)
            except RedisError as exc:
                raise _translate(exc) from exc
            if acquired:
                try:
                    entry = await self._read(key)  # written between our miss and the lock?
                    return entry if entry is not None else await self._fetch_and_store(
                        origin, key, lock_key, token)
                finally:
                    await self._release(lock_key, token)
            await self._sleep(pause)
            entry = await self._read(key)
            if entry is not None:
                return entry
            if time.monotonic() >= deadline:
                log.warning("robots lock for %s held too long; fetching without it", origin)
                return await self._fetch_and_store(origin, key, lock_key, token="")
            pause = min(pause * 2, POLL_MAX_S)

    async def _fetch_and_store(self, origin: str, key: str, lock_key: str, token: str) -> _Entry:
        """Fetch, write the entry, and release the lock if ``token`` still holds it. The
        lock is renewed while the fetch runs: a worker killed mid-fetch holds it no longer
        than the lock's TTL, however long fetches may take."""
        renew = asyncio.create_task(self._renew(lock_key, token)) if token else None
        try:
            result = await self._fetch(robots_url(origin))
        except SluiceError as exc:
            result = RobotsFetchResult(status=None, error=f"{type(exc).__name__}: {exc}")
        finally:
            if renew is not None:
                renew.cancel()
        state = state_for_status(result.status)
        now = self._clock()
        ttl = self._error_ttl_s if state == STATE_DISALLOW_ALL else self._ttl_s
        body = truncate_body(result.body, self._max_bytes) if state == STATE_RULES else b""
        entry = _Entry(result.status, body, result.error or "", now, now + ttl)
        await self._write(key, entry, ttl, lock_key, token)
        return entry

    async def _renew(self, lock_key: str, token: str) -> None:
        """Keep our lock alive while we fetch (until cancelled)."""
        while True:
            await asyncio.sleep(self._lock_ttl_ms / MS_PER_S / 3)
            try:
                await self._renew_lock([lock_key], [token, self._lock_ttl_ms])
            except (RedisError, OSError):
                return  # Redis away: the lock lapses, another worker may fetch

    async def _write(self, key: str, entry: _Entry, ttl_s: float, lock_key: str,
                     token: str) -> None:
        compress = len(entry.body) >= COMPRESS_MIN_BYTES
        mapping = {
            "v": ENTRY_VERSION,
            "status": "" if entry.status is None else str(entry.status),
            "fetched_at": repr(entry.fetched_at),
            "expires_at": repr(entry.expires_at),
            "error": entry.error,
            "encoding": ENCODING_ZLIB if compress else ENCODING_IDENTITY,
            "body": zlib.compress(entry.body, ZLIB_LEVEL) if compress else entry.body,
        }
        pairs = [item for field_value in mapping.items() for item in field_value]
        try:
            await self._writes.run(
                self._store_and_unlock, [key, lock_key], [token, int(ttl_s * MS_PER_S), *pairs])
        except RedisError as exc:
            raise _translate(exc) from exc

    async def _read(self, key: str) -> _Entry | None:
        try:
            raw = await self._redis.hgetall(key)
        except RedisError as exc:
            raise _translate(exc) from exc
        return self._parse(key, raw)

    def _parse(self, key: str, raw: dict[Any, Any] | list[Any]) -> _Entry | None:
        """An entry from HGETALL's reply (a dict, or a flat list from a script), if live."""
        if isinstance(raw, list):
            raw = dict(zip(raw[::2], raw[1::2]))
        fields = {_as_text(k): v for k, v in raw.items()}
        if not fields or _as_text(fields.get("v", b"")) != ENTRY_VERSION:
            return None
        try:
            expires_at = float(_as_text(fields["expires_at"]))
            if expires_at <= self._clock():
                return None
            status_text = _as_text(fields["status"])
            body = fields.get("body", b"")
            if _as_text(fields.get("encoding", b"")) == ENCODING_ZLIB:
                body = zlib.decompress(body)
            return _Entry(
                status=int(status_text) if status_text else None,
                body=body,
                error=_as_text(fields.get("error", b"")),
                fetched_at=float(_as_text(fields["fetched_at"])),
                expires_at=expires_at,
            )
        except (KeyError, ValueError, zlib.error):
            log.warning("robots cache entry %s is malformed; refetching", key)
            return None

    async def _release(self, lock_key: str, token: str) -> None:
        try:
            await self._redis.eval(_RELEASE_LOCK, 1, lock_key, token)
        except RedisError:
            log.warning("could not release robots lock %s; it expires by itself", lock_key)
