"""A Redis that goes away: one clear error type, and nothing acknowledged is lost.

The server keeps an append-only file with ``appendfsync always``: Redis writes and
fsyncs the file before it replies (redis.io, "Redis persistence", AOF fsync policies),
so every admit it acknowledged must be there after a SIGKILL and a restart. The kill
comes at several points of a stream of admits: before any was acknowledged, after the
first, and after many; an admit in flight at the kill may land in part (one script call
per partition), and is checked URL by URL.
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
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from frontier.urls import Scope
from tests.servers import RedisServer


BATCH = 200
HOSTS = 7


def restart_settings() -> JobSettings:
    return JobSettings.model_validate({
        "name": "r", "store": {"partitions": 4},
        "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
        "redis": {"socket_timeout_s": 2.0}, "priority": {"host_budget_base": 0}})


def batch(n: int) -> list[Candidate]:
    return [Candidate(f"http://h{i % HOSTS}.test/b{n}/{i}") for i in range(BATCH)]


@pytest.mark.faults
@pytest.mark.parametrize("kill_after", [0, 1, 12])
async def test_restart_loses_nothing_acknowledged(tmp_path: Path, kill_after: int) -> None:
    settings = restart_settings()
    config = {**redis_tuning(settings), "appendfsync": "always"}
    server = RedisServer(tmp_path / "redis", config=config).start()
    client = connect(server.url, timeout_s=2.0)
    try:
        assert (await client.config_get("appendfsync")) in (
            {"appendfsync": "always"}, {b"appendfsync": b"always"})
        store = FrontierStore(client, settings)
        admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
        first = [Candidate(f"http://h{i % HOSTS}.test/{i}") for i in range(500)]
        assert (await admission.admit(first)).new == 500
        leases = await store.lease(3)
        assert len(leases) == 3
        statuses = await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases])
        assert statuses == ["ok"] * 3

        # a stream of admits; the server is killed once `kill_after` of them were acknowledged
        acknowledged: list[list[Candidate]] = []
        in_flight: list[Candidate] = []
        reached = asyncio.Event()

        async def admit_stream() -> None:
            n = 0
            while True:
                in_flight[:] = batch(n)
                if kill_after == 0:
                    reached.set()  # kill while the very first admit is on its way
                result = await admission.admit(list(in_flight))
                assert result.new == BATCH
                acknowledged.append(list(in_flight))
                in_flight.clear()
                n += 1
                if len(acknowledged) >= kill_after:
                    reached.set()

        stream = asyncio.create_task(admit_stream())
        await asyncio.wait_for(reached.wait(), 60)
        if kill_after == 0:
            await asyncio.sleep(0)  # let the first admit start
        server.kill()
        with pytest.raises(StoreUnavailable):
            await asyncio.wait_for(stream, 30)
        assert len(acknowledged) >= kill_after
        with pytest.raises(StoreUnavailable):
            await store.counts()

        server.restart()
        after = await store.counts()
        assert after.fetched == 3 and after.balanced
        # every acknowledged URL was kept: offered again, each one is already seen
        for done in acknowledged:
            again = await admission.admit(done)
            assert (again.new, again.duplicates) == (0, BATCH)
        # the admit in flight landed in part at most; nothing else appeared
        landed = (await admission.admit(in_flight)).duplicates if in_flight else 0
        assert after.admitted == 500 + BATCH * len(acknowledged) + landed
        # everything queued can still be leased and completed after the restart
        done_count = 0
        while True:
            leased = await store.lease(50)
            if not leased:
                break
            statuses = await store.complete_many([Completion(x, Outcome.FETCHED) for x in leased])
            done_count += statuses.count("ok")
        final = await store.counts()
        assert final.queued == 0 and final.leased == 0 and final.balanced
        assert final.fetched == 3 + done_count == final.admitted
    finally:
        await client.aclose()
        server.close()
