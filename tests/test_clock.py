"""Leases on one clock: a daemon and a worker whose machine clocks differ by more than
the lease TTL still agree on which leases are held (on a server and a Cluster)."""

from __future__ import annotations

import time
from typing import Any

from frontier.model import Candidate, Completion, Outcome
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from tests.test_priority import admission

SKEW_S = 200.0  # the daemon's clock runs this far ahead of the worker's
TTL_S = 120.0


def store_with_clock(client: Any, offset_s: float) -> FrontierStore:
    settings = JobSettings.model_validate(
        {"name": "clock", "store": {"partitions": 4}, "lease": {"ttl_s": TTL_S},
         "politeness": {"min_delay_s": 0.0}})
    return FrontierStore(client, settings, clock=lambda: time.time() + offset_s)


async def lease_reap_complete(client: Any, *, synced: bool) -> tuple[dict[str, int], list[str]]:
    worker = store_with_clock(client, 0.0)
    daemon = store_with_clock(client, SKEW_S)
    if synced:
        await worker.sync_clock()
        await daemon.sync_clock()
    await admission(worker).admit([Candidate(f"http://h{i}.test/", depth=0) for i in range(8)])
    leases = await worker.lease(8)
    assert len(leases) == 8
    reaped = await daemon.reap()
    statuses = await worker.complete_many([Completion(x, Outcome.FETCHED) for x in leases])
    return reaped, statuses


async def test_unsynced_clocks_lose_every_completion(redis_client: Any) -> None:
    # the failure seen on a real crawl: the daemon, 200 s ahead, reaps every fresh
    # lease, and all completions of the worker come back refused
    reaped, statuses = await lease_reap_complete(redis_client, synced=False)
    assert reaped == {"requeued": 8}
    assert set(statuses) == {"not_held"}


async def test_clocks_synced_with_the_server_agree(redis_client: Any) -> None:
    reaped, statuses = await lease_reap_complete(redis_client, synced=True)
    assert reaped == {}
    assert statuses == ["ok"] * 8


async def test_sync_measures_the_offset(redis_client: Any) -> None:
    ahead = store_with_clock(redis_client, SKEW_S)
    offset_ms = await ahead.sync_clock()
    # the test's Redis runs on this machine: its clock is the local one
    assert abs(offset_ms + SKEW_S * 1000) < 1000
    assert abs(ahead._now(None) - time.time() * 1000) < 1000
