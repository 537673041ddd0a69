"""The hosts an operator watches: those under control, the busiest and the slowest.

Read from the host records the frontier keeps (the ``host:<key>`` hashes, listed in each
partition's ``hosts`` set). A crawl may know millions of hosts, so one read looks at no
more than ``HOST_SCAN_LIMIT`` of them, spread over the partitions, and keeps the top
``TOP_HOSTS`` of each list; the table says how many it looked at. Hosts in a partition's
set of controlled hosts, where the control script keeps the hosts an operator changed,
are always read (see :func:`controlled_set`).
"""

from __future__ import annotations

import heapq
import math
from dataclasses import asdict, dataclass, field
from typing import Any

from frontier.keys import PartitionKeys
from frontier.redis_boundary import redis_boundary
from frontier.store import FrontierStore

HOST_SCAN_LIMIT = 5000  # host records read per refresh
SCAN_CHUNK = 500
TOP_HOSTS = 10  # rows of the busiest and the slowest hosts
CONTROLLED_SHOWN = 100  # rows of hosts under control
FIELDS = ("state", "boost", "delay_ms", "crawl_ms", "rt_ms", "fetched", "admitted")
CONTROLS = ("paused", "blocked", "boosted", "delayed")


@dataclass(frozen=True)
class HostRow:
    """One host record as the status page shows it."""

    host: str
    state: str
    boost: float = 1.0
    delay_ms: int = 0  # the operator's delay
    crawl_ms: int = 0  # robots.txt crawl-delay
    rt_ms: int = 0  # the last response time
    fetched: int = 0
    admitted: int = 0

    @property
    def controls(self) -> list[str]:
        """What an operator changed: paused or blocked, boosted, delayed."""
        out = [self.state] if self.state in ("paused", "blocked") else []
        if self.boost != 1.0:
            out.append("boosted")
        if self.delay_ms > 0:
            out.append("delayed")
        return out

    def as_dict(self) -> dict[str, Any]:
        return {**asdict(self), "controls": self.controls}


@dataclass
class HostTable:
    known: int = 0  # host records in the frontier
    scanned: int = 0  # host records read for this table
    controlled: list[HostRow] = field(default_factory=list)
    control_counts: dict[str, int] = field(default_factory=dict)
    busiest: list[HostRow] = field(default_factory=list)
    slowest: list[HostRow] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"known": self.known, "scanned": self.scanned,
                "control_counts": self.control_counts,
                "controlled": [r.as_dict() for r in self.controlled],
                "busiest": [r.as_dict() for r in self.busiest],
                "slowest": [r.as_dict() for r in self.slowest]}


def controlled_set(pk: PartitionKeys) -> str | None:
    """The partition's set of hosts under control, once the key layout has one."""
    key = getattr(pk, "controlled", None)
    return key if isinstance(key, str) else None


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _number(value: Any, default: float = 0.0) -> float:
    try:
        return float(_text(value)) if value is not None else default
    except ValueError:
        return default


def host_row(host: str, values: list[Any]) -> HostRow | None:
    """A row from the HMGET of ``FIELDS``; None for a host with no record."""
    state, boost, delay, crawl, rt, fetched, admitted = values
    if state is None:
        return None
    return HostRow(host, _text(state), _number(boost, 1.0), int(_number(delay)),
                   int(_number(crawl)), int(_number(rt)), int(_number(fetched)),
                   int(_number(admitted)))


async def _scan_part(redis: Any, pk: PartitionKeys, limit: int) -> set[str]:
    """Up to ``limit`` of the partition's hosts, and every host in its controlled set."""
    hosts: set[str] = set()
    cursor = 0
    while len(hosts) < limit:
        cursor, chunk = await redis.sscan(pk.hosts, cursor, count=min(limit, SCAN_CHUNK))
        hosts.update(_text(h) for h in chunk)
        if int(cursor) == 0:
            break
    if len(hosts) > limit:  # a small set comes whole, whatever the count asked for
        hosts = set(sorted(hosts)[:limit])
    controlled = controlled_set(pk)
    if controlled is not None:
        hosts.update(_text(h) for h in await redis.smembers(controlled))
    return hosts


async def read_hosts(store: FrontierStore, *, limit: int = HOST_SCAN_LIMIT,
                     top: int = TOP_HOSTS, shown: int = CONTROLLED_SHOWN) -> HostTable:
    """Read at most about ``limit`` host records, and those of every host under control,
    and rank them. ``limit`` 0 reads only the hosts under control (what the metrics
    need: the known hosts are counted, not read)."""
    redis, parts = store.redis, store.keys.parts
    per_part = math.ceil(limit / len(parts))
    rows: list[HostRow] = []
    known = 0
    async with redis_boundary("hosts"):
        for pk in parts:
            known += int(await redis.scard(pk.hosts))
            hosts = sorted(await _scan_part(redis, pk, per_part))
            if not hosts:
                continue
            pipe = redis.pipeline(transaction=False)
            for h in hosts:
                pipe.hmget(pk.host(h), *FIELDS)
            for h, values in zip(hosts, await pipe.execute()):
                row = host_row(h, values)
                if row is not None:
                    rows.append(row)
    controlled = [r for r in rows if r.controls]
    counts = {c: sum(1 for r in controlled if c in r.controls) for c in CONTROLS}
    controlled.sort(key=lambda r: (r.state == "active", r.host))  # paused, blocked first
    return HostTable(
        known=known, scanned=len(rows), controlled=controlled[:shown], control_counts=counts,
        busiest=heapq.nlargest(top, (r for r in rows if r.fetched > 0),
                               key=lambda r: (r.fetched, r.host)),
        slowest=heapq.nlargest(top, (r for r in rows if r.rt_ms > 0),
                               key=lambda r: (r.rt_ms, r.host)))
