"""Operator host controls: every admin input validated in one place, a control script that
checks before it writes, block/unblock that keeps a host's URLs, delay changes that take
effect at once, the list of hosts under control; through the store, `sluice host` and the
admin API, on a real Redis server and a real 3-master Cluster.

Host names are canonicalised as URLs are: RFC 3986 s.6.2.2.1 (case), s.6.2.3 (default
port, empty path), IDNA (RFC 5891) for non-ASCII names; the politeness key is the host
(or its registrable domain) exactly as admission derives it.
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
from tests.conftest import Clock, StoreFactory
from tests.servers import RedisServer

FAST = {"min_delay_s": 0.0, "response_time_factor": 0.0}  # a host is due again at once
BAD_BOOSTS = [math.nan, math.inf, -math.inf, -1.0, 0.0, 1e9, 1e308]
BAD_DELAYS = [math.nan, math.inf, -math.inf, -1.0, 1e9, 121.0]  # max_delay_s is 120 by default


def _text(x: Any) -> str:
    return x.decode() if isinstance(x, bytes) else str(x)


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


async def frontier_faults(store: FrontierStore) -> list[str]:
    """What is wrong with the frontier: hosts with queued URLs in no schedule, counts that
    do not balance or do not match the queues, priorities or boosts that are not finite."""
    r = store.redis
    faults: list[str] = []
    queued = leased = 0
    for pk in store.keys.parts:
        hosts = sorted(_text(h) for h in await r.smembers(pk.hosts))
        # (the skiplist mark sits at +inf in due and leases, -inf in ready)
        due = {_text(h) for h in await r.zrangebyscore(pk.due, "-inf", "(+inf")}
        ready = {_text(h) for h in await r.zrangebyscore(pk.ready, "(-inf", "+inf")}
        claims = {_text(h) for h in await r.zrange(pk.claims, 0, -1)}
        members = [_text(m) for m in await r.zrangebyscore(pk.leases, "-inf", "(+inf")]
        leased += len(members)
        for host, prio in (await r.hgetall(pk.prio)).items():
            if not math.isfinite(float(prio)):
                faults.append(f"{_text(host)}: priority {_text(prio)}")
        for host in hosts:
            state, lease, boost, delay = (
                None if v is None else _text(v)
                for v in await r.hmget(pk.host(host), "state", "lease", "boost", "delay_ms"))
            n = await r.zcard(pk.hot(host)) + await r.llen(pk.cold(host))
            queued += n
            if state not in ("active", "paused", "blocked"):
                faults.append(f"{host}: state {state}")
            if n and state == "active" and not lease and host not in due | ready | claims:
                faults.append(f"{host}: {n} queued URLs but in no schedule")
            if n and state == "blocked":
                faults.append(f"{host}: blocked but {n} URLs still queued")
            if not (controls.MIN_BOOST <= float(boost or 1) <= controls.MAX_BOOST):
                faults.append(f"{host}: boost {boost}")
            limit = store.settings.politeness.max_delay_s * 1000
            if not (0 <= float(delay or 0) <= limit):
                faults.append(f"{host}: delay {delay}")
    counts = await store.counts()
    if not counts.balanced:
        faults.append(f"counts do not balance: {counts}")
    if counts.queued != queued:
        faults.append(f"queued count {counts.queued} but {queued} URLs in the queues")
    if counts.leased != leased:
        faults.append(f"leased count {counts.leased} but {leased} leases")
    return faults


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


# -- controls.py: the one place admin inputs are validated ------------------------------------

def settings_for(**over: Any) -> JobSettings:
    data: dict[str, Any] = {"name": "t", "store": {"partitions": 4}}
    data.update(over)
    return JobSettings.model_validate(data)


@pytest.mark.parametrize("raw,key", [
    ("site-0013.test", "site-0013.test"),
    ("http://site-0013.test/", "site-0013.test"),  # a URL: its host
    ("SITE-0012.TEST", "site-0012.test"),  # RFC 3986 s.6.2.2.1: case-insensitive host
    ("Site-0012.Test.", "site-0012.test"),  # trailing dot (common practice, no source)
    ("http://site.test:80/x?y#z", "site.test"),  # RFC 3986 s.6.2.3: the default port
    ("site.test:8080", "site.test"),  # politeness keys are hosts, ports apart
    ("https://user@site.test/", "site.test"),
    ("bücher.test", "xn--bcher-kva.test"),  # IDNA (RFC 5891), as admission encodes it
    ("[::1]", "[::1]"),
    ("127.0.0.1", "127.0.0.1"),
])
def test_host_names_are_canonicalised_like_urls(raw: str, key: str) -> None:
    assert controls.host_command(settings_for(), raw, "pause").host == key


def test_politeness_key_by_domain() -> None:
    s = settings_for(politeness={"key": "domain"})
    # names under the reserved .test TLD (RFC 2606) group by their last two labels
    assert controls.host_command(s, "http://www.shop.site.test/", "pause").host == "site.test"


def test_politeness_key_by_address() -> None:
    s = settings_for(politeness={"key": "ip"})
    # addresses in their standard text form (RFC 5952 s.4 for IPv6), as the resolver gives them
    assert controls.host_command(s, "[::1]", "pause").host == "::1"
    assert controls.host_command(s, "0:0:0:0:0:0:0:1", "pause").host == "::1"
    assert controls.host_command(s, "127.0.0.1", "pause").host == "127.0.0.1"
    assert controls.host_command(s, "Unresolved.TEST", "pause").host == "unresolved.test"


@pytest.mark.parametrize("raw", [
    "", " ", "a b.test", "a\nb.test", "x" * 5000, "ftp://a.test/", "http://", "[::1", "a..b.test",
    "http://a.test:99999/", "a.test\x00", "\ud800.test", "%zz.test", "*.test",
])
def test_odd_host_names_are_refused_in_one_line(raw: str) -> None:
    with pytest.raises(ConfigError) as err:
        controls.host_command(settings_for(), raw, "pause")
    assert "\n" not in str(err.value) and len(str(err.value)) < 300


@pytest.mark.parametrize("action,value", [
    ("boost", "nan"), ("boost", "NaN"), ("boost", "inf"), ("boost", "-inf"), ("boost", "-1"),
    ("boost", "0"), ("boost", "1000.5"), ("boost", "1e9"), ("boost", ""), ("boost", None),
    ("boost", "x"), ("boost", "1" * 5000), ("boost", "1e400"), ("boost", "0x10"),
    ("delay", "nan"), ("delay", "inf"), ("delay", "-1"), ("delay", "1e9"), ("delay", "120.001"),
    ("delay", ""), ("delay", None), ("delay", " "), ("delay", math.nan), ("delay", math.inf),
    ("pause", "1"), ("clear", "0"), ("clear", ""), ("explode", None), ("", None), ("BOOST", "2"),
    ("list", None),
])
def test_bad_values_and_actions_are_refused_in_one_line(action: str, value: Any) -> None:
    with pytest.raises(ConfigError) as err:
        controls.host_command(settings_for(), "a.test", action, value)
    assert "\n" not in str(err.value) and len(str(err.value)) < 300


@pytest.mark.parametrize("action,value,expected", [
    ("boost", "1000", 1000.0), ("boost", "0.001", 0.001), ("boost", 2, 2.0), ("boost", " 3 ", 3.0),
    ("delay", "0", 0.0), ("delay", "120", 120.0), ("delay", "2.5", 2.5), ("pause", None, None),
])
def test_good_values_in_their_ranges(action: str, value: Any, expected: float | None) -> None:
    assert controls.host_command(settings_for(), "a.test", action, value).value == expected


@pytest.mark.parametrize("raw,ok", [
    (None, True), ("paused", True), ("blocked", True), ("boosted", True), ("delayed", True),
    ("active", False), ("", False), ("PAUSED", False), ("x" * 1000, False),
])
def test_list_filter(raw: str | None, ok: bool) -> None:
    if ok:
        assert controls.list_filter(raw) == raw
    else:
        with pytest.raises(ConfigError):
            controls.list_filter(raw)


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
