"""Random interleavings of admit / lease / complete / reap / host controls (hypothesis).

A model beside the store predicts every reply (new / excluded / duplicate counts of an
admit, a lease's URL state, attempts and expiry, completion statuses, what a reap does,
a control's resulting host state) and where each URL is. Invariants after every step,
on the standalone server and on the Cluster:
- the counts are the model's, and admitted == queued + leased + fetched + failed +
  excluded + dead;
- every URL the model holds queued, set aside (blocked host), leased or dead is exactly
  there in Redis, once; every other admitted URL has ended: none is lost;
- no two leases hold one politeness key.
"""

from __future__ import annotations

import asyncio
from collections import Counter
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
MAX_PER_HOST = 5  # budget.max_pages_per_host below
MAX_ATTEMPTS = 2  # lease.max_attempts below
TTL_MS = 30_000  # lease.ttl_s below


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
        self.state: dict[str, str] = {}  # url -> queued|leased|held|fetched|failed|excluded|dead
        self.hosts: dict[str, str] = {h: "active" for h in HOSTS}
        self.queued_on: Counter[str] = Counter()  # URLs a host queued at admission (budget)
        self.attempts: Counter[str] = Counter()
        self.leases: dict[str, Lease] = {}

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

    def _retry(self, url: str) -> str:
        """Where a URL goes after a failed attempt (a retry outcome or an expired lease):
        excluded on a blocked host, dead at the attempt limit, else queued again."""
        if self.hosts[url.split("/")[2]] == "blocked":
            del self.attempts[url]
            return "excluded"
        self.attempts[url] += 1
        if self.attempts[url] >= MAX_ATTEMPTS:
            del self.attempts[url]
            return "dead"
        return "queued"

    @rule(urls=st.lists(st.sampled_from(URLS), min_size=1, max_size=6),
          cash=st.floats(0.01, 10.0), credit=st.sampled_from([0.0, 0.5]))
    def admit(self, urls: list[str], cash: float, credit: float) -> None:
        # A URL seen before is a duplicate; a new one is excluded on a blocked host or a
        # host whose budget (max_pages_per_host) is spent, else queued.
        expected = Counter()
        for url in urls:
            host = url.split("/")[2]
            if url in self.state:
                expected["duplicates"] += 1
            elif self.hosts[host] == "blocked" or self.queued_on[host] >= MAX_PER_HOST:
                self.state[url] = "excluded"
                expected["excluded"] += 1
            else:
                self.state[url] = "queued"
                self.queued_on[host] += 1
                expected["new"] += 1
        res = self.run(self.admission.admit([Candidate(u, cash=cash, credit=credit) for u in urls]))
        assert (res.new, res.excluded, res.duplicates) == (
            expected["new"], expected["excluded"], expected["duplicates"])

    @rule(n=st.integers(1, 4))
    def lease(self, n: int) -> None:
        for lease in self.run(self.store.lease(n)):
            assert self.state.get(lease.url) == "queued", (lease.url, self.state.get(lease.url))
            assert self.hosts[lease.host] == "active"
            assert all(held.host != lease.host for held in self.leases.values())
            assert lease.attempts == self.attempts[lease.url]
            assert lease.expires_ms == self.clock.ms + TTL_MS
            self.state[lease.url] = "leased"
            self.leases[lease.url] = lease

    @precondition(lambda self: bool(self.leases))
    @rule(pick=st.integers(0, 100), outcome=st.sampled_from(list(Outcome)),
          response=st.floats(0.0, 3.0))
    def complete(self, pick: int, outcome: Outcome, response: float) -> None:
        url = sorted(self.leases)[pick % len(self.leases)]
        lease = self.leases[url]
        (status,) = self.run(self.store.complete_many(
            [Completion(lease, outcome, reason="r", response_s=response)]))
        if self.clock.ms > lease.expires_ms:  # held until the reaper returns it
            assert status == "expired"
            return
        assert status == "ok"
        del self.leases[url]
        if outcome is Outcome.RETRY:
            self.state[url] = self._retry(url)
        else:
            self.attempts.pop(url, None)
            self.state[url] = outcome.value

    @rule(seconds=st.sampled_from([0.5, 2.0, 10.0, 40.0]))
    def advance(self, seconds: float) -> None:
        self.clock.advance(seconds)

    @rule()
    def reap(self) -> None:
        expected: Counter[str] = Counter()
        for url, lease in list(self.leases.items()):
            if lease.expires_ms < self.clock.ms:
                del self.leases[url]
                self.state[url] = self._retry(url)
                expected[{"queued": "requeued"}.get(self.state[url], self.state[url])] += 1
        assert self.run(self.store.reap()) == dict(expected)

    @rule(host=st.sampled_from(HOSTS),
          action=st.sampled_from(["pause", "resume", "block", "unblock", "boost", "delay"]))
    def control(self, host: str, action: str) -> None:
        value = {"boost": 3.0, "delay": 5.0}.get(action)
        before = self.hosts[host]
        after = {("pause", "active"): "paused", ("resume", "paused"): "active",
                 ("unblock", "blocked"): "active"}.get((action, before), before)
        if action == "block":
            after = "blocked"
        moves = {("block", "queued"): "held", ("unblock", "held"): "queued"}
        if before != after:
            for url, where in self.state.items():
                if url.split("/")[2] == host and (action, where) in moves:
                    self.state[url] = moves[(action, where)]
        self.hosts[host] = after
        assert self.run(self.store.control(host, action, value)) == after

    async def _places(self) -> dict[str, list[str]]:
        """Where each URL is in Redis: its host's queue, set aside, leased, or dead."""
        places: dict[str, list[str]] = {}
        for pk in self.store.keys.parts:
            for host in HOSTS:
                for hot, cold, name in ((pk.hot(host), pk.cold(host), "queued"),
                                        (pk.held_hot(host), pk.held_cold(host), "held")):
                    for url in await self.client.zrange(hot, 0, -1):
                        places.setdefault(_text(url), []).append(name)
                    for item in await self.client.lrange(cold, 0, -1):
                        places.setdefault(_text(item).split(" ", 1)[1], []).append(name)
            for member in await self.client.zrangebyscore(pk.leases, "-inf", "(+inf"):  # (not the skiplist mark)
                places.setdefault(_text(member).rsplit("\n", 1)[1], []).append("leased")
            for url in await self.client.hkeys(pk.dead):
                places.setdefault(_text(url), []).append("dead")
        return places

    @invariant()
    def accounting_holds(self) -> None:
        # Every URL the model admitted is exactly where the model says, and the counts
        # are the model's: nothing lost, nothing counted twice.
        counts = self.run(self.store.counts())
        assert counts.balanced, counts
        by_state = Counter(self.state.values())
        assert (counts.admitted, counts.queued, counts.leased, counts.fetched, counts.failed,
                counts.excluded, counts.dead) == (
            len(self.state), by_state["queued"], by_state["leased"], by_state["fetched"],
            by_state["failed"], by_state["excluded"] + by_state["held"], by_state["dead"])
        expected = {url: [where] for url, where in self.state.items()
                    if where in ("queued", "held", "leased", "dead")}
        assert self.run(self._places()) == expected

    @invariant()
    def one_lease_per_host(self) -> None:
        hosts: list[str] = []
        for pk in self.store.keys.parts:
            for member in self.run(self.client.zrangebyscore(pk.leases, "-inf", "(+inf")):
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


def test_model_walks_through_block_budget_and_expiry(redis_server: Any) -> None:
    """One fixed walk through the paths random runs reach seldom: a host's budget filling,
    a block setting queued URLs aside and an unblock returning them, and an expired lease
    reaped to dead at the attempt limit; the invariants are checked after every step."""
    FrontierMachine.client_factory = staticmethod(
        lambda: aioredis.Redis.from_url(redis_server.url))
    machine = FrontierMachine()
    try:
        steps = [
            lambda: machine.admit(list(URLS[:6]), 1.0, 0.0),  # a.test: 5 queued, 1 excluded
            lambda: machine.control("a.test", "block"),
            lambda: machine.admit([URLS[6]], 1.0, 0.0),  # b.test, still active
            lambda: machine.control("a.test", "unblock"),
            lambda: machine.lease(4),
            lambda: machine.advance(40.0),
            lambda: machine.complete(0, Outcome.FETCHED, 0.1),  # expired: still held
            lambda: machine.reap(),
            lambda: machine.advance(40.0),
            lambda: machine.lease(4),
            lambda: machine.advance(40.0),
            lambda: machine.reap(),  # second expiry: dead at max_attempts
        ]
        for step in steps:
            step()
            machine.accounting_holds()
            machine.one_lease_per_host()
        assert "dead" in machine.state.values() and "excluded" in machine.state.values()
    finally:
        machine.teardown()
