"""The revisit script on real Redis (a server and a 3-master Cluster): state, schedule,
release into the host's queue with the counts still adding up, the interval it picks
against the Python reference (frontier/revisit.py, itself checked against Cho &
Garcia-Molina in tests/test_revisit.py), drops, blocked hosts, and bytes per page."""

from __future__ import annotations

from typing import Any

import pytest

from frontier.admission import Admission
from frontier.model import Candidate, Completion, Outcome
from frontier.revisit import RevisitState, change_rate, optimal_interval
from frontier.revisit_store import Observation, RevisitStore
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory

DAY = 86400
SETTINGS = {"revisit": {"enabled": True, "min_interval_s": 60.0, "max_interval_s": 8 * DAY,
                        "host_fetches_per_day": 24.0},
            "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0}}


async def fetch_all(store: FrontierStore, rv: RevisitStore, clock: Clock,
                    **seen: Any) -> list[Any]:
    """Lease everything leasable, complete it fetched, record it (same pipeline)."""
    got = []
    while leases := await store.lease(100):
        obs = [Observation(lz.host, lz.url, lz.score, **seen) for lz in leases]
        statuses = await store.complete_many(
            [Completion(lz, Outcome.FETCHED, "http_200") for lz in leases],
            also=rv.record_calls(obs))
        assert set(statuses) == {"ok"}
        got += leases
    return got


async def test_record_release_lease_and_counts(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(**SETTINGS)
    rv = RevisitStore(store)
    urls = [f"http://a.test/{i}" for i in range(3)]
    await Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None)).admit(
        [Candidate(u) for u in urls])
    first = await fetch_all(store, rv, clock, not_modified=False, digest="sha1:AAA",
                            etag='"v1"', last_modified=1000)
    assert sorted(lz.url for lz in first) == urls
    states = await rv.states([("a.test", u) for u in urls])
    assert all(s is not None and s.visits == 1 and s.etag == '"v1"' for s in states)
    # three pages, 24 revisits a day: the uniform interval is 3 h (nothing known yet)
    assert {s.interval_s for s in states if s} == {3 * DAY // 24}
    figures = await rv.figures()
    assert (figures.tracked, figures.due) == (3, 0)
    assert await rv.release_due() == 0  # not yet
    clock.advance(3 * 3600 + 1)
    assert (await rv.figures()).due == 3
    assert await rv.release_due() == 3
    counts = await store.counts()
    assert (counts.admitted, counts.queued, counts.fetched) == (6, 3, 3) and counts.balanced
    second = await fetch_all(store, rv, clock, not_modified=True)  # all answered 304
    assert sorted(lz.url for lz in second) == urls
    counts = await store.counts()
    assert (counts.admitted, counts.fetched) == (6, 6) and counts.balanced
    states = await rv.states([("a.test", u) for u in urls])
    assert all(s and (s.visits, s.changes, s.digest, s.etag) == (2, 0, "AAA", '"v1"')
               for s in states)
    assert (await rv.figures()).due == 0


async def test_interval_matches_the_reference(make_store: StoreFactory, clock: Clock,
                                              redis_client: Any) -> None:
    """After visits with known changes, the script's interval is the Lagrange interval of
    frontier/revisit.py for the host's multiplier and the estimated rate (then bounded
    and at most doubled)."""
    store = make_store(**SETTINGS)
    rv = RevisitStore(store)
    url, host = "http://b.test/p", "b.test"
    digests = ["sha1:A", "sha1:B", "sha1:B", "sha1:C", "sha1:C", "sha1:C", "sha1:D"]
    for d in digests:
        obs = Observation(host, url, 4096, False, d)
        mu = await redis_client.hget(store.keys.part_for(host).host(host), "rv_mu")
        before = (await rv.states([(host, url)]))[0]
        (changed, interval), = await rv.record([obs])
        after = (await rv.states([(host, url)]))[0]
        assert after is not None
        if before is None:
            assert changed == -1
        else:
            assert changed == (0 if before.digest == d[5:] else 1)
            n = after.visits - 1
            rate = change_rate(n, after.changes, (after.last_s - after.first_s) / n)
            assert rate is not None
            expected = optimal_interval(rate, float(mu), 60.0, 8 * DAY)
            expected = min(expected, 2 * before.interval_s)
            assert interval == max(1, int(expected + 0.5))
        clock.advance(3600)
    assert after.changes == 3 and after.visits == 7


async def test_drop_and_blocked_host(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(**SETTINGS)
    rv = RevisitStore(store)
    await rv.record([Observation("c.test", "http://c.test/1", 4096, False, "sha1:X"),
                     Observation("c.test", "http://c.test/2", 4096, False, "sha1:Y")])
    assert await rv.drop([("c.test", "http://c.test/1")]) == 1
    assert (await rv.states([("c.test", "http://c.test/1")]))[0] is None
    assert (await rv.figures()).tracked == 1
    await store.control("c.test", "block")
    clock.advance(8 * DAY)
    assert await rv.release_due() == 0  # blocked: waits a max interval more
    assert (await store.counts()).queued == 0
    await store.control("c.test", "unblock")
    clock.advance(8 * DAY + 1)
    assert await rv.release_due() == 1


async def test_bytes_per_revisited_page(make_store: StoreFactory, clock: Clock) -> None:
    """Memory of the state and schedule, by Redis's own MEMORY USAGE: 2,000 pages of 20
    hosts with an ETag, a date and a digest each (URLs of about 40 characters)."""
    store = make_store(**SETTINGS)
    rv = RevisitStore(store)
    pages = [(f"h{i % 20}.test", f"http://h{i % 20}.test/section/page-{i:05d}.html")
             for i in range(2000)]
    await Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None)).admit(
        [Candidate(u) for _, u in pages[:20]])  # the hosts become known to the partition
    for i in range(0, 2000, 200):
        await rv.record([Observation(h, u, 4096 * 1000, False,
                                     "sha1:ABCDEFGHIJKLMNOPQRSTUVWXYZ234567", f'"e{j:08x}"',
                                     1_700_000_000 + j)
                         for j, (h, u) in enumerate(pages[i:i + 200], i)])
    per_page = await rv.memory_bytes() / len(pages)
    print(f"revisit state + schedule: {per_page:.0f} bytes per page")
    assert 150 < per_page < 400


def test_state_written_by_the_script_reads_back() -> None:
    raw = "3 1 100 300 120 200 ABC 4096 \"x\" 99"
    s = RevisitState.decode(raw)
    assert (s.visits, s.changes, s.digest, s.etag, s.last_modified) == (3, 1, "ABC", '"x"', 99)
    assert s.encode() == raw
    assert s.rate == pytest.approx(change_rate(2, 1, 100.0))


async def test_status_figures_and_metrics(make_store: StoreFactory, clock: Clock) -> None:
    """One page seen changed on its only revisit an hour later: the TOIT 2003 estimate is
    ln(1.5 / 0.5) / 3600 s, so half an hour after that visit the page is unchanged with
    probability e^(-ln 3 / 2) = 1 / sqrt(3) = 0.5774; that is the collection's estimated
    freshness, and the metrics carry it."""
    from prometheus_client import CollectorRegistry, generate_latest

    from frontier.metrics import FrontierMetrics
    from frontier.revisit_store import read_revisits

    store = make_store(**SETTINGS)
    rv = RevisitStore(store)
    await rv.record([Observation("d.test", "http://d.test/a", 4096, False, "sha1:P")])
    clock.advance(3600)
    await rv.record([Observation("d.test", "http://d.test/a", 4096, False, "sha1:Q")])
    clock.advance(1800)
    figures = await read_revisits(store)
    assert figures is not None
    assert figures["freshness"] == pytest.approx(3 ** -0.5, abs=1e-3)
    assert (figures["tracked"], figures["fresh"], figures["due"]) == (1, 1, 0)
    registry = CollectorRegistry()
    metrics = FrontierMetrics(registry, "t")
    metrics.update_revisits(figures)
    text = generate_latest(registry).decode()
    assert 'sluice_revisit_pages{job="t",state="tracked"} 1.0' in text
    assert 'sluice_revisit_freshness{job="t"} 0.577' in text
    off = make_store(name="t2")
    assert await read_revisits(off) is None


# sitemaps.org protocol 0.9, <lastmod> (quoted from memory): "The date of last
# modification of the file. This date should be in W3C Datetime format. This format allows
# you to omit the time portion, if desired, and use YYYY-MM-DD." A lastmod after a tracked
# page's last fetch says it changed since: the page is made due now, but no sooner than its
# last fetch + min_interval_s (a bound of docs/revisits.md). A date without a time is read
# as its first moment (W3C Datetime names no moment within the day): our choice.
async def test_a_newer_sitemap_lastmod_makes_a_revisit_due(make_store: StoreFactory,
                                                          clock: Clock) -> None:
    from datetime import UTC, datetime

    from frontier.digests import PayloadDigestIndex
    from frontier.revisit_fetch import WorkerRevisits
    from frontier.sitemaps import listed, parse_sitemap
    from synthweb.sitemaps import urlset

    def at(text: str) -> float:
        return datetime.fromisoformat(text).timestamp()

    store = make_store(revisit={**SETTINGS["revisit"], "min_interval_s": 3600.0},
                       politeness=SETTINGS["politeness"])
    rv = RevisitStore(store)
    worker = WorkerRevisits(store, PayloadDigestIndex(store.redis, store.keys.payload_digests))
    admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
    pages = [f"http://a.test/{i}" for i in range(4)]
    await admission.admit([Candidate(u) for u in pages])
    clock.advance(at("2026-03-02T10:00:00+00:00") - clock.t)
    await fetch_all(store, rv, clock, not_modified=False, digest="sha1:AAA")
    pk = store.keys.part_for("a.test")

    async def due_at() -> dict[str, str]:
        out = {}
        for u in pages:
            ms = await store.redis.zscore(pk.revisits, f"a.test {u}")
            out[u[-1]] = "-" if ms is None else datetime.fromtimestamp(
                ms / 1000, UTC).strftime("%H:%M")
        return out

    async def sitemap_lists(entries: list[tuple[str, str | None]]) -> int:
        parsed = parse_sitemap(urlset(entries), 50_000)
        assert parsed.error is None and len(parsed.entries) == len(entries)
        return await worker.listed([listed(e.loc, 1, 0.1, 0.0, "a.test", e.lastmod)
                                    for e in parsed.entries], admission.locate)

    # four pages on a host with 24 revisits a day: each is due 4 h after its fetch
    assert await due_at() == {"0": "14:00", "1": "14:00", "2": "14:00", "3": "14:00"}
    clock.advance(1800)  # 10:30
    moved = await sitemap_lists([
        ("http://a.test/0", "2026-03-02T10:20:00+00:00"),  # changed after the 10:00 fetch
        ("http://a.test/1", "2026-03-02T10:59:00+01:00"),  # 09:59 UTC: before it
        ("http://a.test/2", "2026-03-02"),  # the day's first moment: before it
        ("http://a.test/3", None),  # no lastmod: nothing known
        ("http://a.test/9", "2026-03-02T10:25:00Z"),  # never fetched: not tracked
    ])
    assert moved == 1
    # due at 10:00 + the 1 h minimum interval, not at once; the others keep their time
    assert await due_at() == {"0": "11:00", "1": "14:00", "2": "14:00", "3": "14:00"}
    assert await store.redis.hget(pk.revisit_state("a.test"), "http://a.test/9") is None
    clock.advance(1799)
    assert await rv.release_due() == 0
    clock.advance(1)  # 11:00
    assert await rv.release_due() == 1
    # released and not fetched again: a newer lastmod does not queue it twice
    assert await sitemap_lists([("http://a.test/0", "2026-03-02T10:50:00Z")]) == 0
    clock.advance(5400)  # 12:30, past the minimum interval: due at once
    assert await sitemap_lists([("http://a.test/1", "2026-03-02T12:00:00Z")]) == 1
    assert (await due_at())["1"] == "12:30"
    assert await rv.release_due() == 1
    again = await fetch_all(store, rv, clock, not_modified=False, digest="sha1:BBB")
    assert sorted(lz.url for lz in again) == pages[:2]
    counts = await store.counts()
    # four admissions and two revisits, each counted as an admission and a fetch
    assert counts.balanced and (counts.admitted, counts.fetched) == (6, 6)
