"""Random interleavings of admit / lease / complete / reap / host controls (hypothesis).

Invariants after every step, on the standalone server and on the Cluster:
- admitted == queued + leased + fetched + failed + excluded + dead;
- every admitted URL is in exactly one place (queued, leased, or ended), none is lost;
- no two leases hold one politeness key.
"""

from __future__ import annotations

import asyncio
from typing import Any

import pytest
import redis.asyncio as aioredis
from hypothesis import HealthCheck, settings, strategies as st
from hypothesis.stateful import (
    RuleBasedStateMachine,
    invariant,
    precondition,
    rule,
    run_state_machine_as_test,
)
from redis.asyncio.cluster import ClusterNode, RedisCluster as AsyncRedisCluster

from frontier.admission import Admission
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock

HOSTS = ("a.test", "b.test", "c.test")
URLS = tuple(f"http://{h}/{i}" for h in HOSTS for i in range(6))


def _text(x: Any) -> str:
    return x.decode() if isinstance(x, bytes) else str(x)


class FrontierMachine(RuleBasedStateMachine):
    client_factory: Any = None

    def __init__(self) -> None:
        super().__init__()
        self.loop = asyncio.new_event_loop()
        self.clock = Clock()
        self.client = self.client_factory()
        self.run(self._flush())
        js = JobSettings.model_validate({
            "name": "sm", "store": {"partitions": 2, "hot_capacity": 8},
            "lease": {"ttl_s": 30.0, "max_attempts": 2},
            "budget": {"max_pages_per_host": 5},
            "politeness": {"min_delay_s": 1.0, "response_time_factor": 2.0},
        })
        self.store = FrontierStore(self.client, js, clock=self.clock)
        self.admission = Admission(self.store, Scope(allow=[], include=[], exclude=[], max_depth=None))
        self.admitted: set[str] = set()
        self.ended: set[str] = set()
        self.held: dict[str, Lease] = {}

    def run(self, coro: Any) -> Any:
        return self.loop.run_until_complete(coro)

    async def _flush(self) -> None:
        if isinstance(self.client, AsyncRedisCluster):
            await self.client.flushall(target_nodes=AsyncRedisCluster.PRIMARIES)
        else:
            await self.client.flushall()

    def teardown(self) -> None:
        self.run(self.client.aclose())
        self.loop.close()

    @rule(urls=st.lists(st.sampled_from(URLS), min_size=1, max_size=6),
          cash=st.floats(0.01, 10.0), credit=st.sampled_from([0.0, 0.5]))
    def admit(self, urls: list[str], cash: float, credit: float) -> None:
        res = self.run(self.admission.admit([Candidate(u, cash=cash, credit=credit) for u in urls]))
        self.admitted.update(urls)
        assert res.new + res.excluded + res.duplicates == len(urls)

    @rule(n=st.integers(1, 4))
    def lease(self, n: int) -> None:
        for lease in self.run(self.store.lease(n)):
            assert lease.url not in self.held
            self.held[lease.url] = lease

    @precondition(lambda self: bool(self.held))
    @rule(pick=st.integers(0, 100), outcome=st.sampled_from(list(Outcome)),
          response=st.floats(0.0, 3.0))
    def complete(self, pick: int, outcome: Outcome, response: float) -> None:
        url = sorted(self.held)[pick % len(self.held)]
        lease = self.held.pop(url)
        (status,) = self.run(self.store.complete_many(
            [Completion(lease, outcome, reason="r", response_s=response)]))
        if status == "ok" and outcome is not Outcome.RETRY:
            self.ended.add(url)

    @rule(seconds=st.sampled_from([0.5, 2.0, 10.0, 40.0]))
    def advance(self, seconds: float) -> None:
        self.clock.advance(seconds)

    @rule()
    def reap(self) -> None:
        self.run(self.store.reap())
        leased = self.run(self._leased_urls())
        for url in list(self.held):
            if url not in leased:
                del self.held[url]

    @rule(host=st.sampled_from(HOSTS),
          action=st.sampled_from(["pause", "resume", "block", "unblock", "boost", "delay"]))
    def control(self, host: str, action: str) -> None:
        value = {"boost": 3.0, "delay": 5.0}.get(action)
        self.run(self.store.control(host, action, value))

    async def _leased_urls(self) -> set[str]:
        urls: set[str] = set()
        for pk in self.store.keys.parts:
            for member in await self.client.zrange(pk.leases, 0, -1):
                urls.add(_text(member).split("\n", 4)[4])
        return urls

    async def _places(self) -> dict[str, list[str]]:
        places: dict[str, list[str]] = {}
        for pk in self.store.keys.parts:
            for host in HOSTS:
                for url in await self.client.zrange(pk.hot(host), 0, -1):
                    places.setdefault(_text(url), []).append("hot")
                for item in await self.client.lrange(pk.cold(host), 0, -1):
                    places.setdefault(_text(item).split(" ", 1)[1], []).append("cold")
            for member in await self.client.zrange(pk.leases, 0, -1):
                places.setdefault(_text(member).split("\n", 4)[4], []).append("leased")
            for url in await self.client.hkeys(pk.dead):
                places.setdefault(_text(url), []).append("dead")
        return places

    @invariant()
    def accounting_holds(self) -> None:
        counts = self.run(self.store.counts())
        assert counts.balanced, counts
        assert counts.admitted == len(self.admitted)
        places = self.run(self._places())
        assert all(len(p) == 1 for p in places.values()), places
        in_queue = sum(1 for p in places.values() if p[0] in ("hot", "cold"))
        assert in_queue == counts.queued
        assert sum(1 for p in places.values() if p[0] == "leased") == counts.leased
        # nothing lost: a URL admitted is in a place, or ended with a counted outcome
        missing = self.admitted - set(places) - self.ended
        assert len(missing) <= counts.fetched + counts.failed + counts.excluded

    @invariant()
    def one_lease_per_host(self) -> None:
        hosts: list[str] = []
        for pk in self.store.keys.parts:
            for member in self.run(self.client.zrange(pk.leases, 0, -1)):
                hosts.append(_text(member).split("\n", 2)[1])
        assert len(hosts) == len(set(hosts))


@pytest.mark.parametrize("kind", ["single", "cluster"])
def test_stateful_frontier(kind: str, request: pytest.FixtureRequest) -> None:
    if kind == "single":
        url = request.getfixturevalue("redis_server").url
        FrontierMachine.client_factory = staticmethod(lambda: aioredis.Redis.from_url(url))
        examples = 60
    else:
        nodes = request.getfixturevalue("redis_cluster").startup_nodes
        FrontierMachine.client_factory = staticmethod(
            lambda: AsyncRedisCluster(startup_nodes=[ClusterNode(h, p) for h, p in nodes]))
        examples = 15
    run_state_machine_as_test(FrontierMachine, settings=settings(
        max_examples=examples, stateful_step_count=30, deadline=None,
        suppress_health_check=list(HealthCheck)))
