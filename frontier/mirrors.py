"""Mirror hosts: hosts whose fetched pages are mostly copies of another host's pages.

Bharat, Broder, Dean & Henzinger, "A comparison of techniques to find mirrored hosts on
the WWW" (JASIS 51(12), 2000; first at the WWW 1999 workshop on web data mining) find
mirrors offline, by comparing what two hosts serve. Here the same evidence is gathered
online, from what the crawl fetches: a fetched page that is an exact copy (same payload
digest) or a near copy (SimHash, confirmed by resemblance) of a page of *another* host
shares a page of each host with the other. Per politeness key, in the key's own
partition (one Cluster slot per script call), a hash keeps the pages compared, those
shared with other hosts (each once) and the shared pages per other host; once a host has ``dedupe.mirror_min_pages`` pages and at least
``dedupe.mirror_share`` of them are copies, it is a mirror of the host it copies most,
and it may hold no more URLs than the new pages it has shown plus ``dedupe.mirror_slack``
(``frontier/scripts/mirror.lua``; ``admit.lua`` excludes the rest as ``mirror_host``).
"""

from __future__ import annotations

import asyncio
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from frontier.exceptions import ConfigError
from frontier.redis_boundary import redis_boundary
from frontier.scripts import ScriptCall, run_many, script_source
from frontier.store import FrontierStore
from frontier.urls import fingerprint, host_of, politeness_key

MIRROR_REASON = "mirror_host"
MIRRORS_SHOWN = 100  # mirror hosts listed by status (the count covers them all)


@dataclass
class HostCopies:
    """One batch's figures for one politeness key."""

    pages: int = 0  # its pages compared in this batch
    shared: list[tuple[int, str]] = field(default_factory=list)  # (page mark, other key)


def _text(value: Any) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


class MirrorHosts:
    """Counts copies per host after each write-back batch and cuts mirrors' budgets."""

    def __init__(self, store: FrontierStore) -> None:
        self.store = store
        self.settings = store.settings.dedupe
        self.mode = store.settings.politeness.key
        self._script = store.redis.register_script(script_source("mirror"))
        self.cut = 0  # URLs this counter cut from mirrors' queues

    def key_of(self, url: str) -> str:
        """The politeness key a copied page's URL belongs to (its host with the 'ip'
        key, whose addresses are not known here)."""
        host = host_of(url)
        if self.mode == "ip":
            return host
        try:
            return politeness_key(host, self.mode)
        except ConfigError:
            return host

    def tally(self, pages: Iterable[tuple[str, str, str | None]]) -> dict[str, HostCopies]:
        """Per politeness key: ``pages`` are (the page's key, its URL, the URL of the
        page of another host it copies, or None). A copy shares a page of each host with
        the other (whichever was fetched first: hosts crawled side by side meet their
        copies in either order); a copy of a page of the same key is no evidence of a
        mirror. A page is marked by its URL's fingerprint (counted once per host)."""
        out: dict[str, HostCopies] = {}

        def row(key: str) -> HostCopies:
            found = out.get(key)
            if found is None:
                found = out[key] = HostCopies()
            return found

        for key, url, copied in pages:
            here = row(key)
            here.pages += 1
            if copied is None:
                continue
            other = self.key_of(copied)
            if other != key:
                here.shared.append((fingerprint(url), other))
                row(other).shared.append((fingerprint(copied), key))
        return out

    async def record(self, pages: Iterable[tuple[str, str, str | None]],
                     now: int | None = None) -> set[str]:
        """Count a batch of compared pages (see :meth:`tally`): one script call per
        partition, all in one go. Returns the keys that are mirrors now."""
        rows = self.tally(pages)
        if not rows:
            return set()
        by_part: dict[int, list[str]] = {}
        for key in rows:
            by_part.setdefault(self.store.keys.part_for(key).index, []).append(key)
        t = self.store._now(now)
        calls = [self._call(p, keys, rows, t) for p, keys in by_part.items()]
        async with redis_boundary("mirror hosts"):
            results = await run_many(self.store.redis, calls)
        mirrors: set[str] = set()
        for keys, flags in zip(by_part.values(), results):
            self.cut += int(flags[-1])
            mirrors.update(k for k, flag in zip(keys, flags) if int(flag))
        return mirrors

    def _call(self, partition: int, keys: list[str], rows: dict[str, HostCopies],
              now: int) -> ScriptCall:
        pk = self.store.keys.part(partition)
        s = self.settings
        redis_keys = [pk.counts, pk.reasons, pk.mirrors, pk.ended, pk.due, pk.ready, pk.prio,
                      pk.touched]
        args: list[Any] = [now, self.store.settings.store.hot_capacity, s.mirror_min_pages,
                           repr(s.mirror_share), s.mirror_slack, len(keys)]
        for key in keys:
            row = rows[key]
            redis_keys += (pk.host(key), pk.copies(key), pk.hot(key), pk.cold(key))
            args += (key, row.pages, len(row.shared))
            for mark, other in row.shared:
                args += (mark, other)
        return (self._script, redis_keys, args)


async def mirror_state(store: FrontierStore, key: str) -> dict[str, Any]:
    """A politeness key's copy counters and mirror state (JSON-ready)."""
    pk = store.keys.part_for(key)
    async with redis_boundary("mirror state"):
        counters = await store.redis.hgetall(pk.copies(key))
        mirror, limit, admitted = await store.redis.hmget(pk.host(key), "mirror", "mlim",
                                                          "admitted")
    fields = {_text(k): _text(v) for k, v in counters.items()}
    pages, dups = int(fields.get("pages", 0)), int(fields.get("dups", 0))
    copied = sorted(((int(v), k[1:]) for k, v in fields.items() if k.startswith(">")),
                    reverse=True)
    s = store.settings.dedupe
    return {
        "host": key,
        "pages": pages,
        "copies": dups,
        "new_pages": pages - dups,
        "share": dups / pages if pages else None,
        "copies_most_of": copied[0][1] if copied else None,
        "copies_of_that_host": copied[0][0] if copied else 0,
        "mirror": limit is not None,
        "mirror_of": _text(mirror) if mirror is not None else None,
        "limit": int(limit) if limit is not None else None,
        "admitted": int(admitted or 0),
        "rule": {"min_pages": s.mirror_min_pages, "share": s.mirror_share,
                 "slack": s.mirror_slack},
    }


async def read_mirrors(store: FrontierStore, shown: int = MIRRORS_SHOWN) -> dict[str, Any]:
    """Every partition's mirror hosts: how many, and the first ``shown`` by name with
    their figures (JSON-ready)."""
    async with redis_boundary("mirror hosts"):
        members = await asyncio.gather(
            *(store.redis.smembers(pk.mirrors) for pk in store.keys.parts))
    hosts = sorted(_text(h) for row in members for h in row)
    rows = [await mirror_state(store, h) for h in hosts[:shown]]
    return {"count": len(hosts),
            "hosts": [{k: r[k] for k in ("host", "mirror_of", "pages", "copies", "new_pages",
                                         "share", "limit", "admitted")} for r in rows]}


def format_mirror(state: dict[str, Any]) -> str:
    """One line for ``sluice explain``."""
    rule = state["rule"]
    if not state["pages"]:
        return "no page of this host compared yet"
    share = f"{state['share']:.0%}"
    head = (f"{state['copies']} of {state['pages']} pages compared copy other hosts' pages "
            f"({share}")
    if state["copies_most_of"]:
        head += f", {state['copies_of_that_host']} of them {state['copies_most_of']}'s"
    head += ")"
    if state["mirror"]:
        return (f"{head}: a mirror of {state['mirror_of']}; may hold {state['limit']} URLs "
                f"({state['new_pages']} new pages + {rule['slack']} slack), has "
                f"{state['admitted']}")
    if rule["min_pages"] == 0:
        return f"{head}; mirror hosts are off (dedupe.mirror_min_pages = 0)"
    return (f"{head}; not a mirror (one needs >= {rule['min_pages']} pages and >= "
            f"{rule['share']:.0%} copies)")
