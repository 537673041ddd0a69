"""A lease carries its host's facts to its completion; what changes meanwhile is honoured.

lease_take puts in each lease what completing it needs to place the host again (the best
score left after the leased URL, delays, boost, trust factor, pages fetched), so the
completion of an untouched host reads nothing of it. Every change to a leased host
(URLs admitted, controls, standing) marks it touched, and its completion reads it afresh.
The oracle here is the plain definition of the schedule (docs/priority.md): a host's
priority is the best score it still queues times its boost and trust factor, and its next
fetch is the completion time plus the largest of the delays that apply. Time is injected.
"""

from __future__ import annotations

import random
from typing import Any

import pytest

from frontier.admission import Admission
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.redis_boundary import reply_text
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory

QUICK = {"min_delay_s": 0.0, "response_time_factor": 0.0}


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


async def admit(store: FrontierStore, *urls: str, cash: float = 1.0) -> None:
    await admission(store).admit([Candidate(u, cash=cash) for u in urls])


async def placed(store: FrontierStore, host: str) -> dict[str, Any]:
    """Where the host stands: its priority, due time, whether ready, and touched."""
    pk = store.keys.part_for(host)
    prio = await store.redis.hget(pk.prio, host)
    return {"prio": None if prio is None else float(prio),
            "due": await store.redis.zscore(pk.due, host),
            "ready": await store.redis.zscore(pk.ready, host),
            "touched": bool(await store.redis.sismember(pk.touched, host))}


async def best_queued(store: FrontierStore, host: str) -> float | None:
    """The best score the host queues, read from its queue (hot window and cold list)."""
    pk = store.keys.part_for(host)
    scores = [s for _, s in await store.redis.zrange(pk.hot(host), 0, -1, withscores=True)]
    scores += [float(reply_text(item).split(" ", 1)[0])
               for item in await store.redis.lrange(pk.cold(host), 0, -1)]
    return max(scores) if scores else None


async def test_an_untouched_host_is_placed_from_what_its_lease_carried(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness={"min_delay_s": 3.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/1", cash=4.0)
    await admit(store, "http://a.test/2", cash=2.0)
    await admit(store, "http://a.test/3", cash=1.0)
    (lease,) = await store.lease(1)
    assert lease.url == "http://a.test/1"
    assert not (await placed(store, "a.test"))["touched"]
    await store.complete_many([Completion(lease, Outcome.FETCHED)])
    where = await placed(store, "a.test")
    assert where["prio"] == await best_queued(store, "a.test")  # the score of /2
    assert where["due"] == clock.ms + 3000  # min delay
    assert where["ready"] is None


async def test_urls_admitted_while_leased_are_not_lost_when_the_queue_ran_empty(
        make_store: StoreFactory, clock: Clock) -> None:
    # the lease carried "nothing left"; the host must still be scheduled for the new URLs
    store = make_store(politeness=QUICK)
    await admit(store, "http://a.test/only")
    (lease,) = await store.lease(1)
    await admit(store, "http://a.test/found-meanwhile", cash=0.5)
    assert (await placed(store, "a.test"))["touched"]
    await store.complete_many([Completion(lease, Outcome.FETCHED)])
    assert (await placed(store, "a.test"))["prio"] == await best_queued(store, "a.test")
    (again,) = await store.lease(1)
    assert again.url == "http://a.test/found-meanwhile"
    assert not (await placed(store, "a.test"))["touched"]  # read afresh, mark cleared


async def test_a_better_url_admitted_while_leased_sets_the_priority(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=QUICK)
    await admit(store, "http://a.test/1", "http://a.test/2", cash=1.0)
    (lease,) = await store.lease(1)
    await admit(store, "http://a.test/better", cash=50.0)
    await store.complete_many([Completion(lease, Outcome.FETCHED)])
    best = await best_queued(store, "a.test")
    assert (await placed(store, "a.test"))["prio"] == best
    (again,) = await store.lease(1)
    assert again.url == "http://a.test/better"


async def test_controls_while_leased_apply_when_the_lease_ends(
        make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=QUICK)
    await admit(store, *(f"http://{h}.test/{i}" for h in ("boost", "slow", "stop") for i in range(3)))
    leases = {x.host: x for x in await store.lease(3)}
    await store.control("boost.test", "boost", 4.0)
    await store.control("slow.test", "delay", 7.0)
    await store.control("stop.test", "pause")
    await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases.values()])
    boosted = await placed(store, "boost.test")
    assert boosted["prio"] == 4.0 * (await best_queued(store, "boost.test") or 0)
    assert (await placed(store, "slow.test"))["due"] == clock.ms + 7000
    paused = await placed(store, "stop.test")
    assert paused["due"] is None and paused["ready"] is None
    assert [x.host for x in await store.lease(3)] == ["boost.test"]


async def test_a_lease_of_the_older_form_completes_and_places_its_host(
        make_store: StoreFactory, clock: Clock) -> None:
    # a lease written before the carry field ('id\nhost\nscore\nattempts\ntrust\nurl')
    store = make_store(store={"partitions": 1}, politeness=QUICK)
    await admit(store, "http://a.test/1", "http://a.test/2")
    (lease,) = await store.lease(1)
    parts = lease.member.split("\n")
    assert len(parts) == 7
    old = "\n".join(parts[:5] + parts[6:])
    pk = store.keys.part(0)
    expiry = await store.redis.zscore(pk.leases, lease.member)
    await store.redis.zrem(pk.leases, lease.member)
    await store.redis.zadd(pk.leases, {old: expiry})
    old_lease = Lease.from_member(old, int(expiry))
    assert old_lease.url == lease.url
    assert await store.complete_many([Completion(old_lease, Outcome.FETCHED)]) == ["ok"]
    assert (await placed(store, "a.test"))["prio"] == await best_queued(store, "a.test")
    assert (await store.counts()).fetched == 1


# -- random admissions during leases: the schedule matches its definition ------------------

@pytest.mark.parametrize("seed", range(4))
async def test_priority_after_each_completion_is_the_best_score_left(
        make_store: StoreFactory, clock: Clock, seed: int) -> None:
    # each round: lease one URL of the host, admit a few URLs (random cash) while it is
    # leased, complete; the host's priority must then be the best score it queues, and
    # every URL admitted is leased once in the end. A hot window of 8 makes refills happen.
    rng = random.Random(seed)
    store = make_store(store={"partitions": 1, "hot_capacity": 8}, politeness=QUICK)
    urls: set[str] = set()

    async def add(k: int) -> None:
        for _ in range(k):
            url = f"http://a.test/{len(urls)}"
            await admit(store, url, cash=rng.choice([0.07, 0.25, 0.5, 1.0, rng.uniform(0.01, 4)]))
            urls.add(url)

    await add(12)
    leased: list[str] = []
    for _ in range(15):
        (lease,) = await store.lease(1)
        await add(rng.choice([0, 0, 1, 3]))
        await store.complete_many([Completion(lease, Outcome.FETCHED)])
        leased.append(lease.url)
        assert (await placed(store, "a.test"))["prio"] == await best_queued(store, "a.test")
    while got := await store.lease(1):
        leased.append(got[0].url)
        await store.complete_many([Completion(got[0], Outcome.FETCHED)])
    assert sorted(leased) == sorted(urls)
    assert (await store.counts()).balanced


async def test_a_reaped_lease_leaves_no_touched_mark(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=QUICK, lease={"ttl_s": 5.0})
    await admit(store, "http://a.test/1")
    (lease,) = await store.lease(1)
    await admit(store, "http://a.test/2", cash=9.0)
    assert (await placed(store, "a.test"))["touched"]
    clock.advance(6)
    assert (await store.reap())["requeued"] == 1
    where = await placed(store, "a.test")
    assert not where["touched"]
    assert where["prio"] == await best_queued(store, "a.test")
