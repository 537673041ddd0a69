"""What the frontier stores about one host or one URL, read and never written.

:class:`FrontierFacts` is part of :class:`frontier.store.FrontierStore`
(``store.host_info`` for the admin API and ``sluice host``, ``store.url_facts`` for
``sluice explain``: frontier/explain.py).
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from typing import Any

from frontier.keys import Keys, PartitionKeys
from frontier.model import Lease
from frontier.redis_boundary import redis_boundary, reply_text

COLD_SCAN_CHUNK = 1000  # cold-list entries read per call when looking for one URL
COLD_SCAN_LIMIT = 200_000  # entries of one cold list searched before giving up


class FrontierFacts:
    """Read-only facts of a frontier store (a base of FrontierStore, which sets these)."""

    redis: Any
    keys: Keys
    bucket_of: Callable[[int], int]  # a fingerprint's URL-seen bucket
    set_size: Callable[[str], Awaitable[int]]  # a schedule set's size (ServerTuning)

    async def host_info(self, host: str) -> dict[str, Any]:
        """The stored fields of one politeness key plus its queue length and schedule."""
        pk = self.keys.part_for(host)
        async with redis_boundary("host info"):
            fields = await self.redis.hgetall(pk.host(host))
            hot = await self.redis.zcard(pk.hot(host))
            cold = await self.redis.llen(pk.cold(host))
            due = await self.redis.zscore(pk.due, host)
            ready = await self.redis.zscore(pk.ready, host)
        info: dict[str, Any] = {
            (k.decode() if isinstance(k, bytes) else k): (v.decode() if isinstance(v, bytes) else v)
            for k, v in fields.items()
        }
        info.update(queued=hot + cold, due_ms=due, ready_priority=ready)
        return info

    async def url_facts(self, url: str, fingerprint: int, host: str) -> dict[str, Any]:
        """Everything stored about one canonical URL and its politeness key (for explain).

        Reads only: URL-seen bucket, hot window (score and rank), cold list (position),
        leases, attempts, dead letters, the host hash, its linking-hosts count and the
        partition's schedule sets. Per-URL ended states are not stored.
        """
        pk = self.keys.part_for(host)
        r = self.redis
        out: dict[str, Any] = {"partition": pk.index}
        async with redis_boundary("explain"):
            out["seen"] = bool(await r.sismember(pk.seen(self.bucket_of(fingerprint)), fingerprint))
            out["hot_score"] = await r.zscore(pk.hot(host), url)
            out["hot_rank"] = await r.zrevrank(pk.hot(host), url)
            out["hot_size"] = await r.zcard(pk.hot(host))
            out["cold_size"] = await r.llen(pk.cold(host))
            out["cold_position"], out["cold_score"] = await self._find_cold(pk.cold(host), url)
            out["lease"] = None
            for member, expiry in await r.zrange(pk.leases, 0, -1, withscores=True):
                text = member.decode() if isinstance(member, bytes) else member
                if text.rsplit("\n", 1)[-1] == url:
                    out["lease"] = Lease.from_member(text, int(expiry))
            attempts = await r.hget(pk.attempts, url)
            out["attempts"] = int(attempts) if attempts is not None else 0
            dead = await r.hget(pk.dead, url)
            out["dead_reason"] = dead.decode() if isinstance(dead, bytes) else dead
            fields = await r.hgetall(pk.host(host))
            out["host"] = {reply_text(k): reply_text(v) for k, v in fields.items()}
            out["linking_hosts"] = int(await r.pfcount(pk.linking_hosts(host)))
            out["spam"] = await self._spam_counts(pk, host)
            out["due_ms"] = await r.zscore(pk.due, host)
            out["ready_priority"] = await r.zscore(pk.ready, host)
            out["ready_rank"] = await r.zrevrank(pk.ready, host)
            out["ready_size"] = await self.set_size(pk.ready)
            out["due_size"] = await self.set_size(pk.due)
            out["claimed_until_ms"] = await r.zscore(pk.claims, host)
            prio = await r.hget(pk.prio, host)
            out["priority"] = float(prio) if prio is not None else None
        return out

    async def _spam_counts(self, pk: PartitionKeys, host: str) -> dict[str, int]:
        """The link counts behind a host's link-spam signals (HyperLogLog estimates):
        trusted linking hosts, out-linked hosts, reciprocal hosts (linking and linked) and
        trusted one-way linking hosts (trusted, not linked back)."""
        r = self.redis
        linking, out, trusted = pk.linking_hosts(host), pk.out_hosts(host), pk.trusted_hosts(host)
        ins, outs, good = [int(await r.pfcount(k)) for k in (linking, out, trusted)]
        both = int(await r.pfcount(linking, out))
        return {"trusted_linking_hosts": good, "out_hosts": outs,
                "reciprocal_hosts": max(0, ins + outs - both),
                "trusted_one_way": max(0, int(await r.pfcount(trusted, out)) - outs)}

    async def _find_cold(self, key: str, url: str) -> tuple[int | None, int | None]:
        """(0-based position, score) of ``url`` in a cold list, or (None, None)."""
        suffix = " " + url
        for start in range(0, COLD_SCAN_LIMIT, COLD_SCAN_CHUNK):
            chunk = await self.redis.lrange(key, start, start + COLD_SCAN_CHUNK - 1)
            for i, raw in enumerate(chunk):
                entry = reply_text(raw)
                if entry.endswith(suffix) and " " not in entry[: len(entry) - len(suffix)]:
                    return start + i, int(float(entry[: len(entry) - len(suffix)]))
            if len(chunk) < COLD_SCAN_CHUNK:
                break
        return None, None
