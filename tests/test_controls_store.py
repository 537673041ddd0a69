"""Operator host controls in the store: a control script that checks before it writes,
block/unblock that keeps a host's URLs, delay changes that take effect at once, the list
of hosts under control; on a real Redis server and a real 3-master Cluster.
"""

from __future__ import annotations

import math
from typing import Any

import pytest

from frontier.admission import Admission
from frontier.exceptions import StoreError
from frontier.model import Candidate, Completion, Outcome
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory
from tests.controlkit import FAST, frontier_faults

BAD_BOOSTS = [math.nan, math.inf, -math.inf, -1.0, 0.0, 1e9, 1e308]
BAD_DELAYS = [math.nan, math.inf, -math.inf, -1.0, 1e9, 121.0]  # max_delay_s is 120 by default


async def admit(store: FrontierStore, *urls: str) -> Any:
    scope = Scope(allow=[], include=[], exclude=[], max_depth=None)
    return await Admission(store, scope).admit([Candidate(u) for u in urls])


def done(lease: Any, outcome: Outcome = Outcome.FETCHED, **kw: Any) -> Completion:
    return Completion(lease, outcome, reason="r", **kw)


async def snapshot(store: FrontierStore, hosts: list[str]) -> dict[str, Any]:
    """Every key the controls may touch, dumped (equal dumps: nothing was written)."""
    r = store.redis
    keys: list[str] = []
    for pk in store.keys.parts:
        keys += [pk.counts, pk.reasons, pk.due, pk.ready, pk.prio, pk.claims, pk.touched, pk.hosts,
                 pk.leases,
                 pk.controlled]
        for h in hosts:
            keys += [pk.host(h), pk.hot(h), pk.cold(h), pk.held_hot(h), pk.held_cold(h)]
    return {k: await r.dump(k) for k in keys}


async def due_at(store: FrontierStore, host: str) -> float | None:
    return await store.redis.zscore(store.keys.part_for(host).due, host)


# -- the store: the control script checks before it writes ------------------------------------

@pytest.mark.parametrize("action,values", [("boost", BAD_BOOSTS), ("delay", BAD_DELAYS)])
async def test_bad_values_are_refused_before_any_write(
        make_store: StoreFactory, action: str, values: list[float]) -> None:
    store = make_store(politeness=FAST)
    hosts = [f"h{i}.test" for i in range(6)]
    await admit(store, *(f"http://{h}/{j}" for h in hosts for j in range(2)))
    before = await snapshot(store, hosts)
    for value in values:
        with pytest.raises(StoreError):
            await store.control("h0.test", action, value)
    assert await snapshot(store, hosts) == before
    # the bug this guards against: a NaN boost was stored, the next lease failed inside its
    # script after removing hosts from `due`, and those hosts were never scheduled again
    leases = await store.lease(10)
    assert sorted(x.host for x in leases) == hosts
    assert await frontier_faults(store) == []


async def test_script_refuses_odd_arguments_with_nothing_written(make_store: StoreFactory) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1")
    before = await snapshot(store, ["a.test"])
    for host, action, value in [
        ("a.test", "explode", None), ("a.test", "pause", 3.0), ("a.test", "boost", None),
        ("", "pause", None), ("a\nb.test", "pause", None), ("a b.test", "block", None),
        ("x" * 300, "pause", None), ("a.test", "", None), ("a.test", "delay", 0.5e-9 + 1e12),
    ]:
        with pytest.raises(StoreError):
            await store.control(host, action, value, create=False)
    assert await snapshot(store, ["a.test"]) == before


async def test_unknown_host_refused_unless_created(make_store: StoreFactory) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1")
    with pytest.raises(StoreError, match="unknown host"):
        await store.control("b.test", "pause", create=False)
    assert not await store.host_known("b.test")
    assert await store.control("b.test", "pause", create=True) == "paused"
    assert await store.host_known("b.test")
    await admit(store, "http://b.test/1")  # found later: it waits, paused as asked
    assert [x.host for x in await store.lease(5)] == ["a.test"]
    assert await store.control("b.test", "resume", create=False) == "active"
    assert [x.host for x in await store.lease(5)] == ["b.test"]


# -- delays ----------------------------------------------------------------------------------

async def test_shorter_delay_pulls_the_next_fetch_in(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1", "http://a.test/2")
    (a1,) = await store.lease(5)
    await store.control("a.test", "delay", 100.0)  # leased: it applies when the lease ends
    await store.complete(done(a1))
    assert await due_at(store, "a.test") == clock.ms + 100_000
    await store.control("a.test", "delay", 1.0)
    assert await due_at(store, "a.test") == clock.ms + 1_000  # at once, not after a fetch
    assert await store.lease(5) == []
    clock.advance(1.0)
    assert [x.host for x in await store.lease(5)] == ["a.test"]


async def test_longer_delay_takes_effect_at_once(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1", "http://b.test/1")
    await store.lease(0)  # both hosts due now
    await store.control("a.test", "delay", 30.0)
    assert [x.host for x in await store.lease(5)] == ["b.test"]
    clock.advance(30.0)
    assert [x.host for x in await store.lease(5)] == ["a.test"]


async def test_delay_is_capped_by_max_delay(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness={**FAST, "max_delay_s": 20.0})
    await admit(store, "http://a.test/1", "http://a.test/2")
    with pytest.raises(StoreError):
        await store.control("a.test", "delay", 20.5)
    (a1,) = await store.lease(5)
    assert await store.control("a.test", "delay", 20.0) == "active"
    await store.complete(done(a1))
    assert await due_at(store, "a.test") == clock.ms + 20_000


@pytest.mark.parametrize("repair", [["delay 1"], ["resume"], ["pause", "resume"], ["boost 2"]])
async def test_a_schedule_past_max_delay_is_pulled_in(
        make_store: StoreFactory, clock: Clock, redis_client: Any, repair: list[str]) -> None:
    """A job written before the cap (operator delay 1e9 s: next fetch decades away) recovers
    with any control of the host: the next fetch is never past now + max_delay."""
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1", "http://a.test/2")
    pk = store.keys.part_for("a.test")
    await redis_client.hset(pk.host("a.test"), "delay_ms", str(10**12))  # as the old code wrote it
    (a1,) = await store.lease(5)
    await store.complete(done(a1))
    assert await due_at(store, "a.test") == clock.ms + 10**12
    for step in repair:
        action, _, value = step.partition(" ")
        await store.control("a.test", action, float(value) if value else None)
    latest = clock.ms + int(store.settings.politeness.max_delay_s * 1000)
    assert (await due_at(store, "a.test") or 0) <= latest
    clock.advance(store.settings.politeness.max_delay_s)
    assert [x.host for x in await store.lease(5)] == ["a.test"]


async def test_clear_resets_delay_boost_and_schedule(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1", "http://a.test/2", "http://a.test/3")
    await store.control("a.test", "boost", 5.0)
    (a1,) = await store.lease(5)
    await store.control("a.test", "delay", 90.0)
    await store.complete(done(a1))
    assert await store.lease(5) == []
    assert await store.control("a.test", "clear") == "active"
    info = await store.host_info("a.test")
    assert float(info["boost"]) == 1.0 and float(info.get("delay_ms") or 0) == 0
    assert info["due_ms"] == clock.ms  # due now
    (a2,) = await store.lease(5)
    await store.complete(done(a2))
    assert await due_at(store, "a.test") == clock.ms  # min delay 0: no operator delay left
    assert await store.controlled_hosts() == []


# -- block and unblock ------------------------------------------------------------------------

async def test_block_keeps_the_queue_and_unblock_restores_it(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=FAST)
    await admit(store, *(f"http://a.test/{i}" for i in range(4)), "http://b.test/1")
    (a1,) = [x for x in await store.lease(5) if x.host == "a.test"]
    before = await store.counts()
    assert before.queued == 3 and before.leased == 2

    assert await store.control("a.test", "block") == "blocked"
    blocked = await store.counts()
    assert blocked.queued == 0 and blocked.excluded == 3 and blocked.balanced
    assert blocked.reasons["excluded:host_blocked"] == 3
    await store.complete(done(a1))  # the lease out when the block came ends as usual
    clock.advance(10)
    assert await store.lease(5) == []
    assert await frontier_faults(store) == []

    assert await store.control("a.test", "unblock") == "active"
    restored = await store.counts()
    assert restored.queued == 3 and restored.excluded == 0 and restored.balanced
    assert restored.reasons.get("excluded:host_blocked", 0) == 0
    fetched = []
    for _ in range(3):
        (lease,) = await store.lease(5)
        assert lease.host == "a.test"
        fetched.append(lease.url)
        await store.complete(done(lease))
    assert sorted(fetched + [a1.url]) == [f"http://a.test/{i}" for i in range(4)]
    final = await store.counts()
    assert final.fetched == 4 and final.queued == 0 and final.balanced
    assert await frontier_faults(store) == []


async def test_block_twice_and_urls_found_while_blocked(make_store: StoreFactory) -> None:
    store = make_store(politeness=FAST)
    await admit(store, "http://a.test/1", "http://a.test/2")
    await store.control("a.test", "block")
    await store.control("a.test", "block")  # a second block moves nothing twice
    res = await admit(store, "http://a.test/3")  # found while blocked: excluded for good
    assert res.excluded == 1
    await store.control("a.test", "unblock")
    await store.control("a.test", "unblock")
    counts = await store.counts()
    assert counts.queued == 2 and counts.excluded == 1 and counts.balanced
    assert counts.reasons["excluded:host_blocked"] == 1
    assert await frontier_faults(store) == []


# -- hosts under control ----------------------------------------------------------------------

async def test_hosts_under_control_are_listed(make_store: StoreFactory) -> None:
    store = make_store(politeness=FAST)
    await admit(store, *(f"http://{h}.test/1" for h in "abcde"))
    await store.control("a.test", "pause")
    await store.control("b.test", "block")
    await store.control("c.test", "boost", 4.0)
    await store.control("d.test", "delay", 7.5)
    rows = await store.controlled_hosts()
    assert [r["host"] for r in rows] == ["a.test", "b.test", "c.test", "d.test"]
    by = {r["host"]: r for r in rows}
    assert by["a.test"]["state"] == "paused" and by["b.test"]["state"] == "blocked"
    assert by["b.test"]["held"] == 1 and by["b.test"]["queued"] == 0
    assert by["c.test"]["boost"] == 4.0 and by["d.test"]["delay_s"] == 7.5
    for which, expected in [("paused", ["a.test"]), ("blocked", ["b.test"]),
                            ("boosted", ["c.test"]), ("delayed", ["d.test"])]:
        assert [r["host"] for r in await store.controlled_hosts(which)] == expected
    await store.control("a.test", "resume")
    await store.control("b.test", "unblock")
    await store.control("c.test", "clear")
    await store.control("d.test", "delay", 0.0)
    assert await store.controlled_hosts() == []
