"""Resuming an embedded job after a crash: orphan leases return at once and every host
with queued URLs can be leased again at the real time (on a server and a Cluster)."""

from __future__ import annotations

from typing import Any

import pytest

import frontier.store
from frontier.exceptions import StoreUnavailable
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.redis_boundary import redis_boundary
from frontier.store import FrontierStore
from tests.conftest import Clock, StoreFactory
from tests.test_priority import admission

HOSTS = 12


async def leased_job(make_store: StoreFactory,
                     clock: Clock) -> tuple[FrontierStore, list[Lease]]:
    """A job whose every host holds a lease (as if the process holding them died)."""
    store = make_store(politeness={"min_delay_s": 1.0})
    adm = admission(store)
    await adm.admit([Candidate(f"http://h{h}.test/{p}", depth=0)
                     for h in range(HOSTS) for p in range(3)])
    leases = await store.lease(100)
    assert len(leases) == HOSTS
    return store, leases


async def test_orphan_leases_return_and_hosts_are_due_now(
        make_store: StoreFactory, clock: Clock) -> None:
    # Before: the resume path reaped with now = 2**62, and the reap script scheduled each
    # host at max(now, next), so every host waited until 2**62 ms and the crawl hung.
    store, held = await leased_job(make_store, clock)
    result = await store.recover()
    assert result == {"requeued": len(held)}
    counts = await store.counts()
    assert (counts.leased, counts.queued, counts.balanced) == (0, 3 * HOSTS, True)
    leases = await store.lease(100)  # same moment: nothing waits on a far-future time
    assert len(leases) == HOSTS


async def test_recover_pulls_in_hosts_scheduled_beyond_the_longest_gap(
        make_store: StoreFactory, clock: Clock) -> None:
    # A job left by the faulty resume (hosts due at 2**62) is made runnable again.
    store, _ = await leased_job(make_store, clock)
    await store.reap(now=2**62)  # what the old resume did: reap at the far future
    assert await store.lease(100, now=clock.ms + 10_000) == []  # the hang
    result = await store.recover()
    assert result["rescheduled"] == HOSTS
    assert len(await store.lease(100)) == HOSTS


async def test_recover_reaps_more_than_one_batch(make_store: StoreFactory, clock: Clock,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(frontier.store, "REAP_BATCH", 2)  # 12 leases over 4 partitions
    store, held = await leased_job(make_store, clock)
    assert await store.recover() == {"requeued": len(held)}
    assert (await store.counts()).leased == 0


async def test_reaper_leaves_unexpired_leases_alone(make_store: StoreFactory,
                                                    clock: Clock) -> None:
    store, held = await leased_job(make_store, clock)
    assert await store.reap() == {}
    clock.advance(store.settings.lease.ttl_s + 1)
    assert await store.reap() == {"requeued": len(held)}
    # hosts come back due at the reaper's now, not later
    assert len(await store.lease(100)) == HOSTS


async def test_an_orphan_lease_cannot_complete_after_recover(
        make_store: StoreFactory, clock: Clock) -> None:
    store, held = await leased_job(make_store, clock)
    await store.recover()
    statuses = await store.complete_many([Completion(x, Outcome.FETCHED) for x in held])
    assert statuses == ["not_held"] * HOSTS  # its URL is queued again, not fetched twice over
    counts = await store.counts()
    assert counts.balanced and (counts.fetched, counts.queued) == (0, 3 * HOSTS)


def _raiser(filename: str, error: str) -> Any:
    """A function whose code lives in ``filename``, raising ``error`` (as redis-py's
    asyncio Cluster client does when a failover tears a connection down mid-command:
    "'NoneType' object has no attribute 'writelines'", seen in the Cluster fault test)."""
    scope: dict[str, Any] = {}
    exec(compile(f"def boom():\n    raise {error}\n", filename, "exec"), scope)
    return scope["boom"]


@pytest.mark.parametrize("error", [
    "AttributeError(\"'NoneType' object has no attribute 'writelines'\")",
    "RuntimeError('unable to perform operation on <TCPTransport closed=True>')"])
async def test_a_connection_torn_down_inside_the_client_is_unavailability(error: str) -> None:
    boom = _raiser("/venv/lib/python3.11/site-packages/redis/asyncio/connection.py", error)
    with pytest.raises(StoreUnavailable, match="connection torn down"):
        async with redis_boundary("lease"):
            boom()


async def test_a_transport_closed_under_the_client_is_unavailability() -> None:
    # uvloop raises from its Cython handle, called by redis-py's connection code
    transport = _raiser("uvloop/handles/handle.pyx",
                        "RuntimeError('unable to perform operation on <TCPTransport closed=True>')")
    scope: dict[str, Any] = {"transport": transport}
    exec(compile("def write():\n    transport()\n",
                 "/venv/lib/python3.11/site-packages/redis/asyncio/connection.py", "exec"), scope)
    with pytest.raises(StoreUnavailable, match="connection torn down"):
        async with redis_boundary("lease"):
            scope["write"]()
    with pytest.raises(RuntimeError):  # the same error with no redis-py frame is a bug
        async with redis_boundary("lease"):
            transport()


async def test_a_bug_of_our_own_is_not_taken_for_unavailability() -> None:
    boom = _raiser(frontier.store.__file__, "AttributeError('a bug')")
    with pytest.raises(AttributeError, match="a bug"):
        async with redis_boundary("lease"):
            boom()
