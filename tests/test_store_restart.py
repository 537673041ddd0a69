"""A Redis that goes away: one clear error type, and nothing acknowledged is lost.

The server keeps an append-only file (appendfsync everysec). A killed *process* loses
nothing the server acknowledged: Redis writes the AOF buffer to the kernel before it
replies (only a machine crash can lose up to a second, which this test does not cover).
"""

from __future__ import annotations

import asyncio
from pathlib import Path

import pytest

from frontier.admission import Admission
from frontier.exceptions import StoreUnavailable
from frontier.model import Candidate, Completion, Outcome
from frontier.redis_client import connect
from frontier.settings import JobSettings
from frontier.store import FrontierStore, redis_tuning
from frontier.urls import Scope
from tests.servers import RedisServer


async def test_restart_loses_nothing_acknowledged(tmp_path: Path) -> None:
    settings = JobSettings.model_validate({
        "name": "r", "store": {"partitions": 4},
        "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
        "redis": {"socket_timeout_s": 2.0}, "priority": {"host_budget_base": 0}})
    server = RedisServer(tmp_path / "redis", config=redis_tuning(settings)).start()
    client = connect(server.url, timeout_s=2.0)
    try:
        store = FrontierStore(client, settings)
        admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
        first = [Candidate(f"http://h{i % 7}.test/{i}") for i in range(500)]
        assert (await admission.admit(first)).new == 500
        leases = await store.lease(3)
        await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases])

        # kill the server while a large admission is in flight
        second = [Candidate(f"http://h{i % 7}.test/second/{i}") for i in range(20_000)]
        call = asyncio.create_task(admission.admit(second))
        await asyncio.sleep(0.01)
        server.kill()
        try:
            result = await call
            acknowledged = result.new
        except StoreUnavailable:
            acknowledged = 0
        with pytest.raises(StoreUnavailable):
            await store.counts()

        server.restart()
        counts = await store.counts()
        assert counts.fetched == 3
        assert counts.admitted >= 500 + acknowledged
        assert counts.balanced
        # everything queued can still be leased and completed after the restart
        done = 0
        while True:
            batch = await store.lease(50)
            if not batch:
                break
            statuses = await store.complete_many([Completion(x, Outcome.FETCHED) for x in batch])
            done += statuses.count("ok")
        final = await store.counts()
        assert final.queued == 0 and final.fetched == 3 + done and final.balanced
    finally:
        await client.aclose()
        server.close()
