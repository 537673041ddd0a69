"""Held leases against a real redis-server and a real Cluster: a worker's heartbeat
(extend) and handing leases back unfinished (release). Time is injected."""

from __future__ import annotations

from typing import Any

from frontier.model import Completion, Outcome
from frontier.store import FrontierStore
from tests.conftest import Clock, StoreFactory
from tests.test_store import admit


async def lease_expiry(store: FrontierStore, member: str) -> float | None:
    pk = store.keys.part(int(member.split("-", 1)[0]))
    return await store.redis.zscore(pk.leases, member)


async def attempts_of(store: FrontierStore, lease: Any) -> int:
    raw = await store.redis.hget(store.keys.part(lease.partition).attempts, lease.url)
    return int(raw) if raw is not None else 0


async def test_extend_pushes_expiry_of_held_leases_only(make_store: StoreFactory,
                                                         clock: Clock) -> None:
    store = make_store(lease={"ttl_s": 10.0})
    await admit(store, *(f"http://h{i}.test/x" for i in range(3)))
    held = await store.lease(3)
    assert len(held) == 3
    first, second, third = held
    await store.complete_many([Completion(third, Outcome.FETCHED)])
    clock.advance(6)
    assert await store.extend(held) == ["ok", "ok", "not_held"]
    # the member (what the worker holds) is the same; only the score moved: now + ttl
    assert await lease_expiry(store, first.member) == clock.ms + 10_000
    clock.advance(8)  # 14 s after leasing: past the first expiry, within the new one
    assert await store.extend([first]) == ["ok"]
    assert await store.reap() == {}
    (status,) = await store.complete_many([Completion(first, Outcome.FETCHED)])
    assert status == "ok"
    # a lease past its expiry is the reaper's, reaped or not: it is not revived
    clock.advance(10.001)
    assert await store.extend([second]) == ["expired"]
    assert await store.reap() == {"requeued": 1}
    assert await store.extend([second]) == ["not_held"]
    counts = await store.counts()
    assert counts.balanced and counts.leased == 0 and counts.fetched == 2


async def test_extend_never_moves_an_expiry_earlier(make_store: StoreFactory,
                                                    clock: Clock) -> None:
    store = make_store(lease={"ttl_s": 10.0})
    await admit(store, "http://a.test/x")
    (lease,) = await store.lease(1)
    before = await lease_expiry(store, lease.member)
    assert await store.extend([lease], now=clock.ms - 5000) == ["ok"]
    assert await lease_expiry(store, lease.member) == before


async def test_release_requeues_without_an_attempt(make_store: StoreFactory,
                                                   clock: Clock) -> None:
    store = make_store(lease={"max_attempts": 2},
                       politeness={"min_delay_s": 1.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/1", "http://b.test/1")
    a, b = sorted(await store.lease(2), key=lambda x: x.host)
    # one failed attempt first, so the attempts count is not zero
    assert await store.complete_many([Completion(a, Outcome.RETRY, "timeout")]) == ["ok"]
    clock.advance(1.0)
    (a,) = await store.lease(1)
    assert a.attempts == 1
    assert await store.release([a, b]) == ["ok", "ok"]
    counts = await store.counts()
    # no ended state counted: the invariant holds with both back in the queue
    assert counts.balanced and (counts.queued, counts.leased) == (2, 0)
    assert counts.dead == counts.failed == counts.excluded == counts.fetched == 0
    assert await attempts_of(store, a) == 1 and await attempts_of(store, b) == 0
    # released twice, or completed after release: not held any more
    assert await store.release([a]) == ["not_held"]
    assert await store.complete_many([Completion(b, Outcome.FETCHED)]) == ["not_held"]
    # the host waits its politeness gap, then the same URLs lease again, attempts as before
    assert await store.lease(2) == []
    clock.advance(1.0)
    again = sorted(await store.lease(2), key=lambda x: x.host)
    assert [(x.url, x.attempts) for x in again] == [("http://a.test/1", 1), ("http://b.test/1", 0)]
    # releasing many times never buries a URL (max_attempts is 2)
    for _ in range(3):
        assert await store.release(again) == ["ok", "ok"]
        clock.advance(1.0)
        again = await store.lease(2)
    assert len(again) == 2 and (await store.counts()).dead == 0


async def test_release_on_a_blocked_host_ends_as_excluded(make_store: StoreFactory) -> None:
    # A block drops the host's queued URLs as excluded (host_blocked); a URL handed back
    # to a host blocked meanwhile ends the same way instead of waiting in a dropped queue.
    store = make_store()
    await admit(store, "http://a.test/1", "http://a.test/2")
    (lease,) = await store.lease(1)
    assert await store.control("a.test", "block") == "blocked"
    assert await store.release([lease]) == ["ok"]
    counts = await store.counts()
    assert counts.balanced and counts.queued == 0 and counts.excluded == 2
    assert counts.reasons == {"excluded:host_blocked": 2}
    assert ("excluded", "host_blocked", lease.url) in await store.take_ended()


async def test_release_after_expiry_is_left_to_the_reaper(make_store: StoreFactory,
                                                          clock: Clock) -> None:
    store = make_store(lease={"ttl_s": 5.0})
    await admit(store, "http://a.test/1")
    (lease,) = await store.lease(1)
    clock.advance(5.001)
    assert await store.release([lease]) == ["expired"]
    assert await store.reap() == {"requeued": 1}
    counts = await store.counts()
    assert counts.balanced and counts.queued == 1
