"""What the host-control tests share (tests/test_controls_store.py,
tests/test_controls_commands.py): fast politeness, and a check of the whole frontier."""

from __future__ import annotations

import math
from typing import Any

from frontier import controls
from frontier.store import FrontierStore

FAST = {"min_delay_s": 0.0, "response_time_factor": 0.0}  # a host is due again at once


def _text(x: Any) -> str:
    return x.decode() if isinstance(x, bytes) else str(x)


async def frontier_faults(store: FrontierStore) -> list[str]:
    """What is wrong with the frontier: hosts with queued URLs in no schedule, counts that
    do not balance or do not match the queues, priorities or boosts that are not finite."""
    r = store.redis
    faults: list[str] = []
    queued = leased = 0
    for pk in store.keys.parts:
        hosts = sorted(_text(h) for h in await r.smembers(pk.hosts))
        # (the skiplist mark sits at +inf in due and leases, -inf in ready)
        due = {_text(h) for h in await r.zrangebyscore(pk.due, "-inf", "(+inf")}
        ready = {_text(h) for h in await r.zrangebyscore(pk.ready, "(-inf", "+inf")}
        claims = {_text(h) for h in await r.zrange(pk.claims, 0, -1)}
        members = [_text(m) for m in await r.zrangebyscore(pk.leases, "-inf", "(+inf")]
        leased += len(members)
        for host, prio in (await r.hgetall(pk.prio)).items():
            if not math.isfinite(float(prio)):
                faults.append(f"{_text(host)}: priority {_text(prio)}")
        for host in hosts:
            state, lease, boost, delay = (
                None if v is None else _text(v)
                for v in await r.hmget(pk.host(host), "state", "lease", "boost", "delay_ms"))
            n = await r.zcard(pk.hot(host)) + await r.llen(pk.cold(host))
            queued += n
            if state not in ("active", "paused", "blocked"):
                faults.append(f"{host}: state {state}")
            if n and state == "active" and not lease and host not in due | ready | claims:
                faults.append(f"{host}: {n} queued URLs but in no schedule")
            if n and state == "blocked":
                faults.append(f"{host}: blocked but {n} URLs still queued")
            if not (controls.MIN_BOOST <= float(boost or 1) <= controls.MAX_BOOST):
                faults.append(f"{host}: boost {boost}")
            limit = store.settings.politeness.max_delay_s * 1000
            if not (0 <= float(delay or 0) <= limit):
                faults.append(f"{host}: delay {delay}")
    counts = await store.counts()
    if not counts.balanced:
        faults.append(f"counts do not balance: {counts}")
    if counts.queued != queued:
        faults.append(f"queued count {counts.queued} but {queued} URLs in the queues")
    if counts.leased != leased:
        faults.append(f"leased count {counts.leased} but {leased} leases")
    return faults
