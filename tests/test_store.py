"""The Redis frontier against a real redis-server and a real 3-master Cluster.

Time is injected (tests move the clock), so nothing sleeps for politeness.
"""

from __future__ import annotations

import asyncio
from typing import Any

import pytest

from frontier.admission import Admission
from frontier.exceptions import ConfigError, LeaseNotHeld, StoreError
from frontier.job import load_settings as load_job_settings
from frontier.job import open_job
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.redis_boundary import reply_text
from frontier.scripts import run_many
from frontier.settings import CLUSTER_PARTITIONS, SINGLE_SERVER_PARTITIONS, load_settings
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


async def admit(store: FrontierStore, *urls: str, cash: float = 1.0, depth: int = 0) -> Any:
    return await admission(store).admit([Candidate(u, depth=depth, cash=cash) for u in urls])


async def lease_all(store: FrontierStore, n: int = 100) -> list[Any]:
    return await store.lease(n)


def done(lease: Any, outcome: Outcome = Outcome.FETCHED, **kw: Any) -> Completion:
    return Completion(lease, outcome, **kw)


async def test_lease_never_returns_more_than_asked(make_store: StoreFactory) -> None:
    store = make_store(store={"partitions": 4})
    await admit(store, *(f"http://h{i}.test/x" for i in range(12)))
    assert len(await store.lease(1)) == 1
    assert len(await store.lease(3)) == 3
    assert len(await store.lease(100)) == 8


async def test_one_lease_per_host_and_next_fetch_time(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness={"min_delay_s": 2.0, "response_time_factor": 10.0})
    await admit(store, *(f"http://a.test/{i}" for i in range(5)), *(f"http://b.test/{i}" for i in range(5)))
    first = await store.lease(10)
    assert sorted(lease.host for lease in first) == ["a.test", "b.test"]  # one per host
    assert await store.lease(10) == []  # both hosts are held
    await store.complete_many([done(x, response_s=0.5) for x in first])
    # next fetch = now + max(min delay 2 s, 10 x 0.5 s) = now + 5 s (Najork & Heydon 2001 factor)
    clock.advance(4.9)
    assert await store.lease(10) == []
    clock.advance(0.2)
    again = await store.lease(10)
    assert sorted(lease.host for lease in again) == ["a.test", "b.test"]


async def test_best_url_first_and_best_host_first(make_store: StoreFactory, clock: Clock) -> None:
    # best-first holds within a partition (each is its own queue of ready hosts)
    store = make_store(store={"partitions": 1},
                       politeness={"min_delay_s": 0.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/low", cash=1.0)
    await admit(store, "http://a.test/high", cash=5.0)
    await admit(store, "http://b.test/mid", cash=3.0)
    (first,) = await store.lease(1)
    assert (first.host, first.url) == ("a.test", "http://a.test/high")
    (second,) = await store.lease(1)
    assert second.url == "http://b.test/mid"
    await store.complete_many([done(first), done(second)])
    (third,) = await store.lease(1)
    assert third.url == "http://a.test/low"


async def test_boost_reorders_hosts_at_once(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(store={"partitions": 1})
    await admit(store, "http://a.test/x", cash=2.0)
    await admit(store, "http://b.test/x", cash=1.0)
    await store.control("b.test", "boost", 10.0)
    (first,) = await store.lease(1)
    assert first.host == "b.test"


async def test_canonical_equal_urls_admitted_once(make_store: StoreFactory) -> None:
    store = make_store()
    # RFC 3986 section 6.2.2: case, percent-encoding and dot-segment normalisation;
    # section 6.2.3: default port and empty path.
    variants = [
        "http://a.test/b/c/%7Efoo",
        "HTTP://A.TEST/b/c/%7efoo",
        "http://a.test/b/./c/../c/~foo",
        "http://a.test:80/b/c/~foo",
        "http://a.test/b/c/~foo#frag",  # fragment dropped: common practice, no source
    ]
    res = await admit(store, *variants)
    assert (res.new, res.duplicates) == (1, 4)
    res = await admit(store, "http://a.test", "http://a.test:80/", "http://a.test/?")
    # "http://a.test/?" is not equivalent to "http://a.test/" (RFC 3986 section 6.2.3)
    assert (res.new, res.duplicates) == (2, 1)


async def test_known_queued_url_gains_priority(make_store: StoreFactory) -> None:
    store = make_store(store={"partitions": 1})
    await admit(store, "http://a.test/x", "http://a.test/y", cash=1.0)
    res = await admission(store).admit([Candidate("http://a.test/x", credit=3.0)])
    assert res.credited == 1
    (lease,) = await store.lease(1)
    assert lease.url == "http://a.test/x" and lease.cash == pytest.approx(4.0)


async def test_bad_urls_end_excluded_with_reason(make_store: StoreFactory) -> None:
    store = make_store()
    res = await admit(store, "http://", "ftp://a.test/file", "http://a.test/" + "x" * 3000,
                      "javascript:alert(1)", "http://a.test/ok")
    assert res.new == 1 and res.excluded == 4
    counts = await store.counts()
    assert counts.balanced and counts.excluded == 4
    assert counts.reasons["excluded:url_too_long"] == 1
    assert counts.reasons["excluded:url_scheme"] == 2
    assert counts.reasons["excluded:url_malformed"] == 1


async def test_lease_expiry_attempts_dead_letter(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(lease={"ttl_s": 10.0, "max_attempts": 2},
                       politeness={"min_delay_s": 0.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/x")
    (lease,) = await store.lease(1)
    clock.advance(11)
    with pytest.raises(LeaseNotHeld):  # expired, not yet reaped: refused
        await store.complete(done(lease))
    assert await store.reap() == {"requeued": 1}
    with pytest.raises(LeaseNotHeld):  # reaped: unknown
        await store.complete(done(lease))
    (again,) = await store.lease(1)
    assert again.url == lease.url and again.attempts == 1
    clock.advance(11)
    assert await store.reap() == {"dead": 1}
    counts = await store.counts()
    assert (counts.dead, counts.queued, counts.leased) == (1, 0, 0) and counts.balanced
    assert counts.reasons["dead:lease_expired"] == 1


async def test_retry_outcome_and_final_failure(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(lease={"max_attempts": 3},
                       politeness={"min_delay_s": 0.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/x", "http://b.test/y")
    leases = await store.lease(2)
    by_host = {x.host: x for x in leases}
    await store.complete_many([
        done(by_host["a.test"], Outcome.RETRY, reason="http_503", extra_delay_s=30.0),
        done(by_host["b.test"], Outcome.FAILED, reason="http_404"),
    ])
    clock.advance(29)
    assert await store.lease(2) == []  # Retry-After holds the host back
    clock.advance(2)
    (retry,) = await store.lease(2)
    assert retry.url == "http://a.test/x" and retry.attempts == 1
    counts = await store.counts()
    assert counts.failed == 1 and counts.reasons["failed:http_404"] == 1 and counts.balanced


async def test_pause_resume_block_delay(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness={"min_delay_s": 0.0, "response_time_factor": 0.0})
    await admit(store, "http://a.test/1", "http://a.test/2", "http://b.test/1")
    assert await store.control("a.test", "pause") == "paused"
    assert [x.host for x in await store.lease(5)] == ["b.test"]
    assert await store.control("a.test", "resume") == "active"
    (a1,) = await store.lease(5)
    assert a1.host == "a.test"
    await store.control("a.test", "delay", 60.0)
    await store.complete(done(a1))
    clock.advance(59)
    assert [x.host for x in await store.lease(5)] == []
    clock.advance(2)
    (a2,) = await store.lease(5)
    await store.complete(done(a2, Outcome.RETRY, reason="timeout"))
    assert await store.control("a.test", "block") == "blocked"
    clock.advance(120)
    assert await store.lease(5) == []
    res = await admit(store, "http://a.test/new")
    assert res.excluded == 1
    counts = await store.counts()
    assert counts.balanced and counts.reasons["excluded:host_blocked"] == 2
    with pytest.raises(StoreError):
        await store.control("a.test", "explode")


async def test_script_cache_flush_changes_nothing(make_store: StoreFactory, redis_client: Any) -> None:
    store = make_store()
    await admit(store, "http://a.test/1", "http://b.test/1")
    await redis_client.script_flush()  # on a Cluster, redis-py sends it to every primary
    assert not any(await redis_client.script_exists(store.scripts.lease_pick.sha))
    leases = await store.lease(5)
    assert len(leases) == 2
    await store.complete_many([done(x) for x in leases])
    counts = await store.counts()
    assert counts.fetched == 2 and counts.balanced


async def test_host_budget_excludes_beyond(make_store: StoreFactory) -> None:
    store = make_store(budget={"max_pages_per_host": 3})
    res = await admit(store, *(f"http://a.test/{i}" for i in range(5)))
    assert (res.new, res.excluded) == (3, 2)
    counts = await store.counts()
    assert counts.reasons["excluded:host_budget"] == 2 and counts.balanced


async def test_politeness_by_ip_address_shares_one_queue(make_store: StoreFactory) -> None:
    """Hosts that resolve to one address share one politeness queue ('ip' key)."""
    from frontier.job import address_resolver

    store = make_store(politeness={"key": "ip", "min_delay_s": 0.0, "response_time_factor": 0.0},
                       fetch={"map_hosts": ["*.shared.test=127.0.0.1", "own.test=127.0.0.2"]})
    resolver = address_resolver(store.settings)
    adm = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None), resolver)
    await adm.admit([Candidate(u) for u in (
        "http://a.shared.test/1", "http://b.shared.test/1", "http://own.test/1")])
    first = await store.lease(10)
    assert sorted(x.host for x in first) == ["127.0.0.1", "127.0.0.2"]  # a and b: one queue
    await store.complete_many([done(x) for x in first])
    (second,) = await store.lease(10)
    assert second.host == "127.0.0.1"


# -- the layout: decided when a job is created, kept when it resumes ----------------------


@pytest.mark.parametrize("kind", ["single", "cluster"])
async def test_default_partitions_follow_the_server(kind: str, request: pytest.FixtureRequest) -> None:
    # One server runs every script on one thread: fewer partitions, fewer calls. A Cluster
    # spreads partitions over its masters, so it gets more of them.
    if kind == "single":
        url = request.getfixturevalue("redis_server").url
    else:
        url = request.getfixturevalue("redis_cluster").url.replace("redis://", "redis+cluster://")
    settings = load_settings(None, {"name": f"layout-{kind}", "redis": {"url": url}})
    assert settings.store.partitions is None
    async with open_job(settings) as job:
        expected = SINGLE_SERVER_PARTITIONS if kind == "single" else CLUSTER_PARTITIONS
        assert job.store.partitions == expected == len(job.store.keys.parts)
        assert job.admission.partitions == expected
        stored = await load_job_settings(job.store.redis, settings.name)
        assert stored.store.partitions == expected  # workers read the decided layout


async def test_resumed_job_keeps_its_layout(redis_server: Any) -> None:
    def job_settings(**store: int) -> Any:
        return load_settings(None, {"name": "layout-resume", "store": store,
                                    "redis": {"url": redis_server.url}})

    async with open_job(job_settings(partitions=16)) as job:  # made with an older default
        await admit(job.store, "http://a.test/1", "http://b.test/2")
    async with open_job(job_settings()) as job:  # no partitions given: the job's own
        assert job.store.partitions == 16
        assert (await job.store.counts()).queued == 2
    with pytest.raises(ConfigError, match="fixed when a job is created"):
        async with open_job(job_settings(partitions=2)):
            pass


# -- script calls that share a round trip -------------------------------------------------


async def test_calls_made_together_share_one_round_trip(single_client: Any, monkeypatch: Any) -> None:
    import asyncio

    from redis.exceptions import ResponseError

    from frontier.redis_client import FastConnection
    from frontier.scripts import CallBatcher

    echo = single_client.register_script("return ARGV[1]")
    fail = single_client.register_script("return redis.error_reply('refused ' .. ARGV[1])")
    for script in (echo, fail):  # loaded: no NOSCRIPT retries to count
        await single_client.script_load(script.script)
    pipelines = 0  # writes to the server: one per round trip
    send = FastConnection.send_packed_command

    async def counting(self: Any, *args: Any, **kwargs: Any) -> Any:
        nonlocal pipelines
        pipelines += 1
        return await send(self, *args, **kwargs)

    monkeypatch.setattr(FastConnection, "send_packed_command", counting)
    batcher = CallBatcher(single_client)

    async def one(i: int) -> Any:
        return await batcher.run(fail if i == 2 else echo, [], [i])

    results = await asyncio.gather(*(one(i) for i in range(5)), return_exceptions=True)
    assert pipelines == 1  # five callers, one round trip
    assert [r for i, r in enumerate(results) if i != 2] == [b"0", b"1", b"3", b"4"]
    assert isinstance(results[2], ResponseError) and "refused 2" in str(results[2])
    assert await batcher.run(echo, [], ["later"]) == b"later"  # a later call: its own trip
    assert pipelines == 2

    # a call made some event-loop turns later (without a linger it would go alone, as
    # "later" above did) still shares the trip; the linger outlasts those turns by far
    lingering = CallBatcher(single_client, linger_s=1.0)
    first = lingering.run(echo, [], ["a"])
    for _ in range(3):
        await asyncio.sleep(0)
    second = lingering.run(echo, [], ["b"])
    assert await asyncio.gather(first, second) == [b"a", b"b"]
    assert pipelines == 3


async def test_take_passes_over_hosts_taken_since_the_pick(make_store: StoreFactory,
                                                           clock: Clock) -> None:
    # lease_take leases a host only while it is still ready: hosts another caller leased
    # after this caller's pick are replaced by the next stand-ins, a host named twice is
    # leased once, and the hosts taken leave ready (at most one lease per politeness key).
    store = make_store(store={"partitions": 1})
    await admit(store, *(f"http://h{i}.test/{p}" for i in range(6) for p in "ab"))
    t = clock.ms
    (flat,) = await run_many(store.redis, [store._pick_call(0, 6, t)])
    shown = [host for host, _ in store._picked(flat)]
    assert len(shown) == 6
    assert [x.host for x in await store.lease(2)] == shown[:2]  # another caller
    expires = t + 60_000
    hosts = [*shown[:3], shown[2], *shown[3:]]
    (members,) = await run_many(store.redis, [store._take_call(0, hosts, 3, expires, t)])
    assert [Lease.from_member(reply_text(m), expires).host for m in members] == shown[2:5]
    pk = store.keys.part(0)
    ready = await store.redis.zrangebyscore(pk.ready, "(-inf", "+inf")
    assert [reply_text(h) for h in ready] == [shown[5]]
    assert (await store.counts()).leased == 5


async def test_a_race_between_pick_and_take_costs_no_lease(make_store: StoreFactory,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # Another process leases this process's chosen hosts between its pick and its take:
    # the stand-ins (one per four chosen hosts, frontier/store.py stand_ins) and the second
    # round still lease as many URLs as asked for, no host twice. Before the stand-ins
    # were capped every host picked went to the take as a stand-in.
    import frontier.store as store_module

    this = make_store(store={"partitions": 1})
    other = make_store(store={"partitions": 1})
    await admit(this, *(f"http://h{i:02d}.test/{p}" for i in range(40) for p in "ab"))
    real_run_many = store_module.run_many
    raced = False

    async def racing(redis: Any, calls: Any) -> Any:
        nonlocal raced
        if not raced and calls and calls[0][0] is this.scripts.lease_take:
            raced = True
            taken = await other.lease(6)  # the other process's best hosts: this one's too
            assert len(taken) == 6
        return await real_run_many(redis, calls)

    monkeypatch.setattr(store_module, "run_many", racing)
    got = await this.lease(8)
    assert raced
    assert len(got) == 8
    assert len({x.host for x in got}) == 8
    assert (await this.counts()).leased == 14


async def test_lease_calls_made_at_once_choose_different_hosts(make_store: StoreFactory,
                                                               clock: Clock) -> None:
    # one process's lease calls made at once go one at a time, so three calls of 4 lease
    # 12 distinct hosts in one round each (no call falls back to stand-ins or a second
    # round), best first overall, and no host is leased twice
    store = make_store(store={"partitions": 2}, lease={"rank_spread": 1.0})
    for i in range(16):
        await admit(store, f"http://h{i:02d}.test/a", cash=1.0 + i)
    calls = 0
    pick = store._pick_call

    def counted(*args: Any) -> Any:
        nonlocal calls
        calls += 1
        return pick(*args)

    store._pick_call = counted  # type: ignore[method-assign]
    got = await asyncio.gather(*(store.lease(4) for _ in range(3)))
    hosts = [x.host for g in got for x in g]
    assert [len(g) for g in got] == [4, 4, 4]
    assert len(set(hosts)) == 12
    assert sorted(hosts) == [f"h{i:02d}.test" for i in range(4, 16)]  # the 12 best
    assert calls == 3 * 2  # one round each (a pick call per partition)
    assert (await store.counts()).leased == 12
