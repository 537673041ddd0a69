"""How the frontier keeps Redis's encodings compact and fast.

The server tuning (:func:`redis_tuning`, applied by ``FrontierStore.tune_server``) keeps
hot windows listpacks, URL-seen buckets intsets (:func:`seen_buckets` sizes them) and the
partitions' host priorities hash tables. The skiplist mark (``FrontierStore.skiplist_mark``)
keeps each partition's due, ready and leases sets skiplists; read their sizes with
``FrontierStore.set_size``. :class:`ServerTuning` is that part of
:class:`frontier.store.FrontierStore`.
"""

from __future__ import annotations

import asyncio
import logging
import math
from typing import Any

from redis import exceptions as redis_errors

from frontier.keys import Keys
from frontier.redis_boundary import redis_boundary
from frontier.settings import JobSettings

log = logging.getLogger("frontier.store")  # the name its log line has always had

SKIPLIST_MARK_HEAD = "~sluice keeps this sorted set a skiplist~"
# above a host hash's fields (about 30 at most), below a partition's hosts
HASH_LISTPACK_ENTRIES = 64
PARTITION_SKEW = 4.0  # room for partitions that hold big hosts (Zipf-sized sites)
BUCKET_FILL = 0.75  # target fill of a seen bucket at the expected crawl size


def seen_buckets(settings: JobSettings) -> int:
    """URL-seen buckets per partition, sized so each stays a compact intset.

    A bucket past ``seen_bucket_entries`` members turns into a hash table: still exact,
    only bigger (about 50 bytes a URL instead of 8).
    """
    s = settings.store
    assert s.partitions is not None, "decide the layout first (JobSettings.laid_out)"
    per_partition = min(s.expected_urls, s.expected_urls / s.partitions * PARTITION_SKEW)
    return max(1, math.ceil(per_partition / (s.seen_bucket_entries * BUCKET_FILL)))


def redis_tuning(settings: JobSettings) -> dict[str, str]:
    """Server settings that keep the frontier compact (listpack hot windows, intset buckets)
    and its per-partition hashes fast: a listpack hash is searched field by field, so the
    partitions' host priorities ('prio', read for every lease) turn into hash tables past
    ``HASH_LISTPACK_ENTRIES`` hosts, while a host's own hash (a few dozen fields at most)
    stays a compact listpack."""
    return {
        "zset-max-listpack-entries": str(settings.store.hot_capacity),
        "zset-max-listpack-value": str(settings.scope.max_url_length + 16),
        "set-max-intset-entries": str(settings.store.seen_bucket_entries),
        "hash-max-listpack-entries": str(HASH_LISTPACK_ENTRIES),
    }


class ServerTuning:
    """The store's side of the tuning and the skiplist marks (a base of FrontierStore,
    which sets these)."""

    redis: Any
    settings: JobSettings
    keys: Keys

    async def tune_server(self) -> bool:
        """Apply :func:`redis_tuning` with CONFIG SET; False if the server refuses."""
        try:
            for name, value in redis_tuning(self.settings).items():
                await self.redis.config_set(name, value)
        except redis_errors.RedisError as exc:
            log.warning("could not tune Redis (%s): memory per URL will be higher", exc)
            return False
        return True

    def skiplist_mark(self) -> str:
        """The member that keeps a partition's due, ready and leases sets skiplists: longer
        than any member a listpack may hold (``zset-max-listpack-value``, tuned to the
        longest URL), so Redis converts the set at once and, the mark never leaving, keeps
        it so. A listpack set is searched member by member (scores read back as text):
        at the hundred-odd hosts or leases of a busy partition each insert or lookup cost
        more than the whole rest of a lease (docs/benchmarks.md). Hosts and leases never
        look like it (no URL is this long); scripts pass over it by its score (+inf in due
        and leases, -inf in ready) or its missing priority."""
        return SKIPLIST_MARK_HEAD + "~" * (self.settings.scope.max_url_length + 17)

    async def mark_sets(self) -> None:
        """Put the skiplist mark in every partition's due, ready and leases sets (a store
        does at its first lease; idempotent)."""
        mark = self.skiplist_mark()
        async with redis_boundary("mark sets"):
            await asyncio.gather(*(
                self.redis.zadd(key, {mark: score}, nx=True)
                for pk in self.keys.parts
                for key, score in ((pk.due, math.inf), (pk.leases, math.inf),
                                   (pk.ready, -math.inf))))

    async def set_size(self, key: str) -> int:
        """Members of a due, ready or leases set, the skiplist mark not counted."""
        size = int(await self.redis.zcard(key))
        if size and await self.redis.zscore(key, self.skiplist_mark()) is not None:
            size -= 1
        return size
