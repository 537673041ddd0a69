"""Exact duplicates: the job's index of payload digests and their first captures.

Every worker of a job asks the same index, kept in the frontier's Redis (one of 256
HASH shards per digest, each its own Cluster slot), before it archives a batch of pages:
a page whose payload digest was first captured under another URL is archived as a
revisit record pointing at that capture (ISO 28500:2017 s.6.7.2), not as a second copy.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from redis.asyncio import Redis
from redis.asyncio.cluster import RedisCluster

from frontier.redis_boundary import redis_boundary

DigestKey = Callable[[str], str]
"""payload digest -> the Redis HASH holding it."""

CLAIM_ALL = """
-- claim payload digests for a batch of pages, on one server
-- KEYS[i]: the HASH of digest i;  ARGV[2i - 1]: digest i;  ARGV[2i]: its capture
-- Returns per digest the capture stored for it (this one when it was the first).
local out = {}
for i, key in ipairs(KEYS) do
  redis.call('HSETNX', key, ARGV[2 * i - 1], ARGV[2 * i])
  out[i] = redis.call('HGET', key, ARGV[2 * i - 1])
end
return out
"""


@dataclass(frozen=True, slots=True)
class Capture:
    """Where a payload was captured: the URL, its WARC-Date and the record's ID."""

    url: str
    date: str
    record_id: str

    def encode(self) -> str:
        """'date record-id url': the date and the ID hold no space, the URL goes last."""
        return f"{self.date} {self.record_id} {self.url}"

    @classmethod
    def decode(cls, raw: bytes | str) -> Capture:
        text = raw.decode("utf-8", "surrogateescape") if isinstance(raw, bytes) else raw
        date, record_id, url = text.split(" ", 2)
        return cls(url, date, record_id)


class PayloadDigestIndex:
    """Payload digest -> the first capture of that payload, shared by a job's workers."""

    def __init__(self, redis: Any, key: DigestKey) -> None:
        self.redis = redis
        self.key = key
        self._claim_script: Any = None

    async def claim(self, digests: list[str], captures: list[Capture]) -> list[Capture | None]:
        """For each page about to be archived (its payload digest and the capture it will
        be): the earlier capture of the same payload under another URL, or None when
        this one is the first and is now stored as such.

        One round trip for the batch (HSETNX then HGET per page, in order, so a later page
        of the batch sees an earlier one). A stored capture of the *same* URL is no
        match: a page fetched again after a crash is not a revisit of itself; its new
        record takes the old one's place (one more round trip, only then), since the old
        record may never have reached the disk.
        """
        if not digests:
            return []

        replies = await self._claim_all(digests, captures)
        out: list[Capture | None] = []
        renewed: list[tuple[str, Capture]] = []
        for i, (digest, capture) in enumerate(zip(digests, captures)):
            stored_raw = replies[i]
            stored = Capture.decode(stored_raw) if stored_raw is not None else capture
            if stored.url != capture.url:
                out.append(stored)
                continue
            out.append(None)
            if stored != capture:
                renewed.append((digest, capture))
        if renewed:
            await self._pipelined("renew", lambda pipe: [
                pipe.hset(self.key(d), d, c.encode()) for d, c in renewed])
        return out

    async def _claim_all(self, digests: list[str], captures: list[Capture]) -> list[Any]:
        """HSETNX then HGET per page, in order: the stored capture of each digest. One
        script call on one server (a pipeline of the two commands cost this process
        23-28 us of CPU a page here, the script 3-4); on a Cluster, whose shards span
        slots, one pipeline."""
        keys = [self.key(digest) for digest in digests]
        if isinstance(self.redis, Redis) and not isinstance(self.redis, RedisCluster):
            if self._claim_script is None:
                self._claim_script = self.redis.register_script(CLAIM_ALL)
            args: list[str] = []
            for digest, capture in zip(digests, captures):
                args += (digest, capture.encode())
            async with redis_boundary("payload digest claim"):
                return list(await self._claim_script(keys, args))

        def claim_all(pipe: Any) -> None:
            for key, digest, capture in zip(keys, digests, captures):
                pipe.hsetnx(key, digest, capture.encode())
                pipe.hget(key, digest)

        return (await self._pipelined("claim", claim_all))[1::2]

    async def first(self, digest: str) -> Capture | None:
        """The stored first capture of ``digest``, or None."""
        raw = (await self._pipelined("lookup", lambda pipe: pipe.hget(self.key(digest),
                                                                       digest)))[0]
        return None if raw is None else Capture.decode(raw)

    async def _pipelined(self, what: str, queue: Callable[[Any], Any]) -> list[Any]:
        """One round trip of the commands ``queue`` adds; Redis errors (a connection torn
        down in a failover included) raised as StoreUnavailable or StoreError."""
        async with redis_boundary(f"payload digest {what}"):
            async with self.redis.pipeline(transaction=False) as pipe:
                queue(pipe)
                return list(await pipe.execute())
