"""robots.txt fetched once per host and shared by all workers through Redis (RFC 9309).

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

What a file allows (groups, rules and their matching) is :mod:`frontier.robots_rules`.
"""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
import zlib
from collections import OrderedDict
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from typing import Any

from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import RedisError
from redis.exceptions import TimeoutError as RedisTimeoutError

from frontier.exceptions import ConfigError, SluiceError, StoreError, StoreUnavailable
from frontier.robots_rules import (
    DEFAULT_CRAWL_DELAY_CAP_S,
    DEFAULT_MAX_BYTES,
    ROBOTS_PATH,
    STATE_DISALLOW_ALL,
    STATE_RULES,
    RobotsRules,
    product_token,
    state_for_status,
    truncate_body,
)
from frontier.scripts import CallBatcher

log = logging.getLogger(__name__)

MAX_TTL_S = 86400.0  # RFC 9309 s.2.4: SHOULD NOT use a cached copy for more than 24 hours
DEFAULT_TTL_S = MAX_TTL_S
DEFAULT_ERROR_TTL_S = 600.0  # common practice, no source: retry an unreachable host sooner
MIN_PARSE_BYTES = 500 * 1024  # RFC 9309 s.2.5: parse at least 500 KiB
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

ENCODING_ZLIB = "zlib"
ENCODING_IDENTITY = "identity"
ENTRY_VERSION = "1"

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


def robots_url(scheme_host_port: str) -> str:
    """``http://site.test:8401`` -> ``http://site.test:8401/robots.txt``."""
    return scheme_host_port.rstrip("/") + ROBOTS_PATH


@dataclass(frozen=True)
class RobotsFetchResult:
    """What the fetcher got for ``/robots.txt`` after redirects; ``status=None``: unreachable."""

    status: int | None
    body: bytes = b""
    error: str | None = None


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
