"""Operator host controls through `sluice host` and the admin API, and random operator
input through every path (the store, controls.apply, HTTP, the host list) while a store
leases and completes; on a real Redis server and a real 3-master Cluster.
"""

from __future__ import annotations

import asyncio
import contextlib
import io
import json
import math
import urllib.parse
from collections.abc import AsyncIterator
from typing import Any

import aiohttp
import pytest
import redis.asyncio as aioredis
from hypothesis import given
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from redis.asyncio.cluster import ClusterNode
from redis.asyncio.cluster import RedisCluster as AsyncRedisCluster

from frontier import cli, controls
from frontier.admission import Admission
from frontier.daemon import Daemon, serve
from frontier.embedded import free_port
from frontier.exceptions import ConfigError, StoreError
from frontier.job import Job, open_job
from frontier.model import Candidate, Completion, Outcome
from frontier.settings import JobSettings, load_settings
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock
from tests.controlkit import FAST, frontier_faults
from tests.servers import RedisServer


# -- the CLI ----------------------------------------------------------------------------------

def run_cli(*args: str) -> tuple[int, str, str]:
    """`sluice ...` in this process (its own event loop): exit code, stdout, stderr."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = cli.main(list(args))
        except SystemExit as exc:  # argparse's own refusals
            code = int(exc.code or 0)
    return code, out.getvalue(), err.getvalue()


async def sluice(*args: str) -> tuple[int, str, str]:
    return await asyncio.to_thread(run_cli, *args)


@contextlib.asynccontextmanager
async def job_on(server: RedisServer, name: str, **over: Any) -> AsyncIterator[Job]:
    """A stored job on the test server, its settings as a daemon would store them."""
    client = aioredis.Redis.from_url(server.url)
    await client.flushall()
    await client.aclose()
    data = {"name": name, "redis": {"url": server.url},
            "fetch": {"user_agent": "sluice-test/0.1 (+http://operator.test/)"},
            "politeness": FAST, **over}
    async with open_job(load_settings(None, data)) as job:
        yield job


async def whole_db(server: RedisServer) -> dict[bytes, bytes]:
    client = aioredis.Redis.from_url(server.url)
    try:
        return {k: await client.dump(k) for k in sorted(await client.keys("*"))}
    finally:
        await client.aclose()


@pytest.mark.parametrize("args", [
    ["a.test", "boost", "nan"], ["a.test", "boost", "inf"], ["a.test", "boost", "-1"],
    ["a.test", "boost", "1e9"], ["a.test", "boost", ""], ["a.test", "boost", "9" * 100_000],
    ["a.test", "boost"], ["a.test", "delay", "nan"], ["a.test", "delay", "1e9"],
    ["a.test", "delay", "-1"], ["a.test", "delay", "inf"], ["a.test", "delay", ""],
    ["a.test", "pause", "3"], ["a.test", "explode"], ["a.test"],
    ["nosuch.test", "pause"], ["http://nosuch.test/", "block"], ["", "pause"],
    ["a b.test", "pause"], ["a.te\nst", "pause"], ["x" * 100_000, "pause"],
    ["ftp://a.test/", "pause"],
    ["list", "--only", "active"], ["list", "--only", ""],
])
async def test_cli_refuses_bad_input_with_exit_2_and_changes_nothing(
        redis_server: RedisServer, args: list[str]) -> None:
    async with job_on(redis_server, "cli") as job:
        await job.admission.admit([Candidate("http://a.test/1"), Candidate("http://b.test/1")])
        before = await whole_db(redis_server)
        code, out, err = await sluice("host", "--redis", redis_server.url, "--job", "cli", *args)
        assert code == 2, (out, err)
        assert "Traceback" not in err and out == ""
        line = err.strip()
        assert line.startswith("sluice: ") and "\n" not in line and len(line) < 400
        assert await whole_db(redis_server) == before


async def test_cli_names_hosts_as_urls_do(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "names") as job:
        await job.admission.admit([Candidate("http://site-0013.test/1"),
                                   Candidate("http://site-0012.test/1")])
        base = ("host", "--redis", redis_server.url, "--job", "names")
        code, out, _ = await sluice(*base, "http://site-0013.test/", "pause")
        assert code == 0 and json.loads(out)["host"] == "site-0013.test"
        code, out, _ = await sluice(*base, "SITE-0012.TEST", "pause")
        assert code == 0 and json.loads(out)["state"] == "paused"
        assert await job.store.lease(5) == []  # both real hosts are paused
        for wrong in ("http://site-0013.test/", "SITE-0012.TEST"):
            assert not await job.store.host_known(wrong)
        code, _, err = await sluice(*base, "site-0014.test", "pause")
        assert code == 2 and "unknown host" in err
        assert not await job.store.host_known("site-0014.test")
        code, out, _ = await sluice(*base, "--new", "SITE-0014.test", "block")
        assert code == 0 and json.loads(out)["state"] == "blocked"
        assert (await job.store.host_info("site-0014.test"))["state"] == "blocked"


async def test_cli_block_unblock_round_trip(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "round") as job:
        await job.admission.admit([Candidate(f"http://a.test/{i}") for i in range(3)])
        base = ("host", "--redis", redis_server.url, "--job", "round")
        assert (await sluice(*base, "a.test", "block"))[0] == 0
        blocked = await job.store.counts()
        assert blocked.queued == 0 and blocked.excluded == 3 and blocked.balanced
        assert await job.store.lease(5) == []
        code, out, _ = await sluice(*base, "a.test", "unblock")
        assert code == 0 and json.loads(out)["queued"] == 3
        restored = await job.store.counts()
        assert restored.queued == 3 and restored.excluded == 0 and restored.balanced
        assert [x.host for x in await job.store.lease(5)] == ["a.test"]


async def test_cli_delay_and_clear(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "delays", politeness={**FAST, "max_delay_s": 30.0}) as job:
        await job.admission.admit([Candidate("http://a.test/1")])
        base = ("host", "--redis", redis_server.url, "--job", "delays")
        code, _, err = await sluice(*base, "a.test", "delay", "31")
        assert code == 2 and "30" in err  # the job's own cap is named
        code, out, _ = await sluice(*base, "a.test", "delay", "30")
        assert code == 0 and json.loads(out)["delay_ms"] == "30000"
        code, out, _ = await sluice(*base, "a.test", "clear")
        info = json.loads(out)
        assert code == 0 and "delay_ms" not in info and float(info["boost"]) == 1.0


async def test_cli_host_list(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "lst") as job:
        await job.admission.admit([Candidate(f"http://{h}.test/1") for h in "abcd"])
        base = ("host", "--redis", redis_server.url, "--job", "lst")
        for args in (["a.test", "pause"], ["b.test", "block"], ["c.test", "boost", "3"],
                     ["d.test", "delay", "4"]):
            assert (await sluice(*base, *args))[0] == 0
        code, out, _ = await sluice(*base, "list", "--json")
        rows = json.loads(out)
        assert code == 0 and [r["host"] for r in rows] == ["a.test", "b.test", "c.test", "d.test"]
        code, out, _ = await sluice(*base, "list", "--only", "blocked", "--json")
        assert [r["host"] for r in json.loads(out)] == ["b.test"]
        code, out, _ = await sluice(*base, "list", "--only", "delayed")
        lines = out.strip().splitlines()
        assert code == 0 and len(lines) == 2 and lines[1].split()[0] == "d.test"
        assert lines[0].split()[0] == "host"


# -- the admin API ----------------------------------------------------------------------------

@contextlib.asynccontextmanager
async def admin_api(job: Job) -> AsyncIterator[str]:
    address = f"127.0.0.1:{free_port()}"
    runner = await serve(Daemon(job, CollectorRegistry()).app(), address)
    try:
        yield f"http://{address}"
    finally:
        await runner.cleanup()


async def test_api_refuses_bad_input_with_400_json(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "api") as job, admin_api(job) as base:
        await job.admission.admit([Candidate("http://a.test/1"), Candidate("http://b.test/1")])
        before = await whole_db(redis_server)
        async with aiohttp.ClientSession() as http:
            for path, query in [
                ("a.test/boost", {"value": "nan"}), ("a.test/boost", {"value": "inf"}),
                ("a.test/delay", {"value": "inf"}), ("a.test/delay", {"value": "1e9"}),
                ("a.test/delay", {"value": "-1"}), ("a.test/boost", {"value": ""}),
                # (aiohttp itself refuses request lines over 8 kB, also with a 400)
                ("a.test/boost", {}), ("a.test/boost", {"value": "7" * 5000}),
                ("a.test/pause", {"value": "1"}), ("a.test/explode", {}),
                ("nosuch.test/pause", {}), ("a.test/pause", {"new": "maybe"}),
                ("a%20b.test/pause", {}), ("A.TEST..x/pause", {}),
            ]:
                async with http.post(f"{base}/hosts/{path}", params=query) as r:
                    assert r.status == 400, (path, query, r.status, await r.text())
                    body = await r.json()
                    assert "\n" not in body["error"] and len(body["error"]) < 400
            async with http.get(f"{base}/hosts", params={"state": "active"}) as r:
                assert r.status == 400 and "error" in await r.json()
            async with http.get(f"{base}/hosts/nosuch.test") as r:
                assert r.status == 404 and "error" in await r.json()
        assert await whole_db(redis_server) == before


async def test_api_controls_and_lists_hosts(redis_server: RedisServer) -> None:
    async with job_on(redis_server, "api2") as job, admin_api(job) as base:
        await job.admission.admit([Candidate("http://a.test/1"), Candidate("http://b.test/1")])
        async with aiohttp.ClientSession() as http:
            async with http.post(f"{base}/hosts/A.TEST/boost", params={"value": "3"}) as r:
                data = await r.json()
                assert r.status == 200 and data["host"] == "a.test" and data["state"] == "active"
            async with http.post(f"{base}/hosts/b.test/pause") as r:
                assert r.status == 200 and (await r.json())["state"] == "paused"
            async with http.post(f"{base}/hosts/new.test/block", params={"new": "1"}) as r:
                assert r.status == 200 and (await r.json())["state"] == "blocked"
            async with http.get(f"{base}/hosts") as r:
                assert [x["host"] for x in await r.json()] == ["a.test", "b.test", "new.test"]
            async with http.get(f"{base}/hosts", params={"state": "boosted"}) as r:
                assert [x["host"] for x in await r.json()] == ["a.test"]
            async with http.get(f"{base}/hosts/B.test") as r:
                assert r.status == 200 and (await r.json())["state"] == "paused"
            async with http.post(f"{base}/hosts/a.test/clear") as r:
                assert r.status == 200
            # value and new in a JSON body (what a client sends through the admin guard)
            async with http.post(f"{base}/hosts/b.test/delay", json={"value": 2.5}) as r:
                assert r.status == 200 and (await r.json())["delay_ms"] == "2500"
            for body in ({"value": "nan"}, {"value": True}, {"other": 1}, [1]):
                async with http.post(f"{base}/hosts/b.test/boost", json=body) as r:
                    assert r.status == 400 and "error" in await r.json()
            async with http.get(f"{base}/hosts", params={"state": "boosted"}) as r:
                assert await r.json() == []


# -- random operator input while a store leases and completes (hypothesis) --------------------

KNOWN = ("a.test", "b.test", "c.test", "d.test")
NAMES = st.one_of(  # known hosts (and their other spellings) half the time
    st.sampled_from(KNOWN),
    st.sampled_from(("A.TEST", "http://b.test/", "c.test.", "d.test:80", "e.test", "", " ",
                     "a\nb.test", "x" * 3000, "[::1]", "bücher.test")),
    st.text(max_size=24),
    st.from_regex(r"[a-z0-9-]{1,12}(\.[a-z0-9-]{1,12}){0,2}", fullmatch=True),
)
ACTIONS = st.one_of(st.sampled_from(controls.HOST_ACTIONS), st.sampled_from(controls.HOST_ACTIONS),
                    st.sampled_from(("explode", "", "BOOST", "list")), st.text(max_size=8))
FLOATS = st.one_of(st.none(), st.floats(0.001, 1000.0), st.floats(0.0, 120.0), st.floats(),
                   st.integers(-10**20, 10**20).map(float),
                   st.sampled_from([0.0, 0.001, 1.0, 120.0, 120.001, 1000.0, 1e9, -1.0]))
RAW_VALUES = st.one_of(FLOATS.map(lambda v: None if v is None else repr(v)),
                       st.text(max_size=12), st.just("9" * 2000))


def good_value(action: str) -> st.SearchStrategy[float | None]:
    if action == "boost":
        return st.floats(controls.MIN_BOOST, controls.MAX_BOOST)
    return st.floats(0.0, 120.0) if action == "delay" else st.none()


GOOD = st.tuples(st.sampled_from(KNOWN), st.sampled_from(controls.HOST_ACTIONS)).flatmap(
    lambda na: st.tuples(st.just(na[0]), st.just(na[1]), good_value(na[1])))
NON_FINITE = st.sampled_from([math.nan, math.inf, -math.inf])
BAD_NUMBERS = st.sampled_from([-1.0, 0.0, -0.0, 5e-324, 1e9, 1e308, 120.001, 1000.5])
NUMBERS = st.one_of(NON_FINITE, BAD_NUMBERS, FLOATS)
WHERE = ("store", "admin", "http", "list")


def step(where: str) -> st.SearchStrategy[tuple[Any, ...]]:
    """One step on one path: the store takes numbers, the admin paths take text too."""
    values = NUMBERS if where == "store" else st.one_of(NUMBERS, NUMBERS.map(repr), RAW_VALUES)
    odd = st.one_of(  # bad values for the actions that take one, or anything at all
        st.tuples(st.sampled_from(KNOWN), st.sampled_from(sorted(controls.VALUE_ACTIONS)), values),
        st.tuples(NAMES, ACTIONS, values))
    return st.tuples(st.just(where), st.one_of(GOOD, odd), st.booleans(),
                     st.sampled_from(list(Outcome)), st.sampled_from([0.0, 0.5, 3.0, 200.0]))


STEPS = st.lists(st.sampled_from(WHERE).flatmap(step), min_size=1, max_size=12)


class FuzzRig:
    """A store with an injected clock and the admin API around it, on its own event loop."""

    def __init__(self, client_factory: Any) -> None:
        self.loop = asyncio.new_event_loop()
        self.clock = Clock()
        self.client = client_factory()
        settings = JobSettings.model_validate({
            "name": "fz", "store": {"partitions": 2, "hot_capacity": 8},
            "politeness": {"min_delay_s": 0.5, "response_time_factor": 1.0, "max_delay_s": 120.0},
            "lease": {"ttl_s": 30.0, "max_attempts": 2}})
        self.store = FrontierStore(self.client, settings, clock=self.clock)
        scope = Scope(allow=[], include=[], exclude=[], max_depth=None)
        self.admission = Admission(self.store, scope)
        job = Job(self.store.settings, self.store, self.admission, None)
        self.address = f"127.0.0.1:{free_port()}"
        self.runner = self.run(serve(Daemon(job, CollectorRegistry()).app(), self.address))
        self.http = self.run(self._session())

    @staticmethod
    async def _session() -> aiohttp.ClientSession:
        return aiohttp.ClientSession()

    def run(self, coro: Any) -> Any:
        return self.loop.run_until_complete(coro)

    def close(self) -> None:
        self.run(self.http.close())
        self.run(self.runner.cleanup())
        self.run(self.client.aclose())
        self.loop.close()

    async def flush(self) -> None:
        if isinstance(self.client, AsyncRedisCluster):
            await self.client.flushall(target_nodes=AsyncRedisCluster.PRIMARIES)
        else:
            await self.client.flushall()

    async def example(self, steps: list[tuple[Any, ...]]) -> None:
        await self.flush()
        await self.admission.admit([Candidate(f"http://{h}/{i}") for h in KNOWN for i in range(10)])
        held: list[Any] = []
        for where, (name, action, value), new, outcome, advance in steps:
            await self.step(where, name, action, value, new)
            # the store goes on leasing and completing: no script error, ever
            held += await self.store.lease(3)
            if held:
                lease = held.pop(0)
                await self.store.complete_many([Completion(lease, outcome, reason="r",
                                                           response_s=0.2)])
            self.clock.advance(advance)
            await self.store.reap()
            held = [x for x in held if x.expires_ms > self.clock.ms]
            faults = await frontier_faults(self.store)
            assert faults == [], (where, name, action, value, new, faults)

    async def step(self, where: str, name: str, action: str, value: Any, new: bool) -> None:
        if where == "store":
            number = value if value is None or isinstance(value, float) else None
            with contextlib.suppress(StoreError):
                await self.store.control(name, action, number, create=new)
        elif where == "admin":
            with contextlib.suppress(ConfigError):
                await controls.apply(self.store, controls.host_command(
                    self.store.settings, name, action, value, new=new))
        elif where == "http":
            path = (f"http://{self.address}/hosts/{urllib.parse.quote(name, safe='')}/"
                    f"{urllib.parse.quote(action, safe='')}")
            query = {"new": "1" if new else "0"}
            if value is not None:
                query["value"] = str(value)
            async with self.http.post(path, params=query) as r:
                assert r.status < 500, (name, action, value, r.status, await r.text())
                if r.status == 400:
                    assert "error" in await r.json()
        else:
            which = action if action in controls.LIST_FILTERS else None
            async with self.http.get(f"http://{self.address}/hosts",
                                     params={"state": which} if which else {}) as r:
                assert r.status == 200
                assert all(row["state"] in ("active", "paused", "blocked")
                           for row in await r.json())


@pytest.mark.fuzz
@pytest.mark.parametrize("kind", ["single", "cluster"])
def test_random_controls_keep_the_frontier_runnable(
        kind: str, request: pytest.FixtureRequest) -> None:
    if kind == "single":
        url = request.getfixturevalue("redis_server").url
        factory: Any = lambda: aioredis.Redis.from_url(url)  # noqa: E731
    else:
        nodes = request.getfixturevalue("redis_cluster").startup_nodes
        factory = lambda: AsyncRedisCluster(  # noqa: E731
            startup_nodes=[ClusterNode(h, p) for h, p in nodes])
    rig = FuzzRig(factory)
    try:
        @given(steps=STEPS)
        def check(steps: list[tuple[Any, ...]]) -> None:
            rig.run(rig.example(steps))

        check()
    finally:
        rig.close()
