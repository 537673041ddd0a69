"""The job's page budget, shared by every worker: pages fetched + pages in flight <= max.

A worker reserves slots before leasing and returns the ones it did not use, and one for
every lease that ends without a fetched page. The daemon reconciles the counter with
the partitions' counts (``fetched + leased``), so a worker that died holding slots
costs nothing for long.
"""

from __future__ import annotations

from typing import Any

from frontier.keys import Keys
from frontier.redis_boundary import redis_boundary

_RESERVE = """
-- KEYS[1] budget hash  ARGV[1] wanted  ARGV[2] max pages
-- Returns the number of slots granted (0 .. wanted).
local used = tonumber(redis.call('HGET', KEYS[1], 'used') or '0')
local grant = math.max(0, math.min(tonumber(ARGV[1]), tonumber(ARGV[2]) - used))
if grant > 0 then
  redis.call('HINCRBY', KEYS[1], 'used', grant)
end
return grant
"""


class PageBudget:
    """Reserve and release page slots; unlimited when ``max_pages`` is None."""

    def __init__(self, redis: Any, keys: Keys, max_pages: int | None) -> None:
        self.redis = redis
        self.key = keys.budget
        self.max_pages = max_pages
        self._reserve = redis.register_script(_RESERVE)

    async def reserve(self, wanted: int) -> int:
        if self.max_pages is None or wanted <= 0:
            return wanted
        async with redis_boundary("budget"):
            return int(await self._reserve([self.key], [wanted, self.max_pages]))

    async def release(self, slots: int) -> None:
        if self.max_pages is None or slots <= 0:
            return
        async with redis_boundary("budget"):
            await self.redis.hincrby(self.key, "used", -slots)

    async def used(self) -> int | None:
        """Slots taken now (None when unlimited)."""
        if self.max_pages is None:
            return None
        async with redis_boundary("budget"):
            return int(await self.redis.hget(self.key, "used") or 0)

    async def reconcile(self, used: int) -> None:
        """Set the counter (the daemon passes fetched + leased)."""
        if self.max_pages is None:
            return
        async with redis_boundary("budget"):
            await self.redis.hset(self.key, "used", used)

    async def spent(self, fetched: int) -> bool:
        return self.max_pages is not None and fetched >= self.max_pages
