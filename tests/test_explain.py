"""``explain``: what the frontier knows about one URL, on a real server and a real Cluster.

Scores follow OPIC (Abiteboul, Preda & Cobena, WWW 2003): a queued URL's rank in its host
queue is its rank by cash. Canonical forms follow RFC 3986 section 6.2.2.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from frontier.admission import Admission
from frontier.explain import (
    DEAD,
    INVALID,
    LEASED,
    QUEUED_COLD,
    QUEUED_HOT,
    SEEN,
    UNKNOWN,
    explain,
    format_explain,
)
from frontier.model import Candidate, Completion, Outcome
from frontier.priority import DATE_PATH
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory

NO_DELAY = {"min_delay_s": 0.0, "response_time_factor": 0.0}


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


async def test_queued_url_rank_cash_and_host(make_store: StoreFactory) -> None:
    store = make_store(politeness=NO_DELAY, budget={"max_pages_per_host": 100},
                       priority={"host_budget_base": 10, "host_budget_per_linking_host": 5})
    adm = admission(store)
    await adm.admit([Candidate(f"http://a.test/{i}", depth=2, cash=float(i + 1), source_host="x.test")
                     for i in range(5)])
    await adm.admit([Candidate("http://a.test/0", depth=2, credit=0.5, source_host="y.test")])
    info = await explain(store, "HTTP://A.TEST/3")  # RFC 3986 s.6.2.2.1: case-insensitive host
    assert info["url"] == "http://a.test/3" and info["state"] == QUEUED_HOT
    assert info["cash"] == pytest.approx(4.0) and info["depth"] == 2
    assert info["queue"]["rank"] == 2 and info["queue"]["of"] == 5  # by cash: 5, 4, 3, ...
    host = info["host_fields"]
    assert host["linking_hosts"] == 2 and host["admitted"] == 5 and host["state"] == "active"
    assert host["budget"]["earned"] == 10 + 5 * 2 and host["budget"]["limit"] == 20
    assert host["budget"]["left"] == 15
    assert info["schedule"]["place"].startswith(("due now", "ready"))
    low = await explain(store, "http://a.test/0")
    assert low["cash"] == pytest.approx(1.5) and low["queue"]["rank"] == 5  # 1.0 + credit 0.5
    json.dumps(info)  # JSON-ready
    text = format_explain(info)
    assert "queued (hot window)" in text and "rank 2 of 5" in text and "linking hosts 2" in text


async def test_cold_leased_seen_unknown_and_invalid(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=NO_DELAY, store={"hot_capacity": 8})
    adm = admission(store)
    await adm.admit([Candidate(f"http://b.test/{i}", cash=float(10 - i)) for i in range(10)])
    cold = await explain(store, "http://b.test/9")  # the two poorest wait in the cold list
    assert cold["state"] == QUEUED_COLD and cold["queue"]["of"] == 2
    assert cold["cash"] == pytest.approx(1.0)
    # depth-0 candidates are seeds: their host has only the absolute budget
    assert cold["host_fields"]["seeded"] and cold["host_fields"]["budget"]["earned"] is None
    assert cold["host_fields"]["budget"]["limit"] == 5000
    (lease,) = await store.lease(1)
    held = await explain(store, lease.url)
    assert held["state"] == LEASED and held["lease"]["id"] == lease.id
    assert held["schedule"]["place"].startswith("leased")
    await store.complete(Completion(lease, Outcome.FETCHED))
    done = await explain(store, lease.url)
    assert done["state"] == SEEN and "cash" not in done
    assert done["host_fields"]["fetched"] == 1
    assert (await explain(store, "http://b.test/never"))["state"] == UNKNOWN
    bad = await explain(store, "http://")
    assert bad["state"] == INVALID and "url_malformed" in format_explain(bad)


async def test_dead_url(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness=NO_DELAY, lease={"max_attempts": 1})
    await admission(store).admit([Candidate("http://c.test/x")])
    (lease,) = await store.lease(1)
    await store.complete(Completion(lease, Outcome.RETRY, reason="timeout"))
    info = await explain(store, "http://c.test/x")
    assert info["state"] == DEAD and info["dead_reason"] == "timeout"


async def test_trap_signs_and_due_host(make_store: StoreFactory, clock: Clock) -> None:
    store = make_store(politeness={"min_delay_s": 30.0, "response_time_factor": 0.0})
    adm = admission(store)
    await adm.admit([Candidate("http://d.test/calendar/2024/01"), Candidate("http://d.test/x")])
    (lease,) = await store.lease(1)
    await store.complete(Completion(lease, Outcome.FETCHED))
    other = "http://d.test/x" if lease.url != "http://d.test/x" else "http://d.test/calendar/2024/01"
    info = await explain(store, other)
    assert info["schedule"]["place"] == "due in 30.0 s"  # min delay 30 s after the fetch
    cal = await explain(store, "http://d.test/calendar/2024/01")
    # an endless calendar's page ends in a date (common practice, no source)
    assert DATE_PATH in cal["trap"]["signs"] and cal["trap"]["factor"] < 1
    assert "date_path" in format_explain(cal)


async def test_an_ended_url_shows_its_outcome_from_the_fetch_log(
        make_store: StoreFactory, tmp_path: Path) -> None:
    from datetime import UTC, datetime

    from workers.fetch_log import FetchEntry, FetchLog

    store = make_store(politeness=NO_DELAY)
    await admission(store).admit([Candidate("http://e.test/a"), Candidate("http://f.test/b")])
    log = FetchLog(tmp_path)
    for lease in await store.lease(2):
        await store.complete(Completion(lease, Outcome.FETCHED, "http_200"))
        log.write(FetchEntry(url=lease.url, outcome="fetched", status=200,
                             fetched_at=datetime(2026, 1, 2, tzinfo=UTC), warc_file="x.warc.gz",
                             warc_offset=7))
    log.close()
    info = await explain(store, "HTTP://E.TEST/a", [tmp_path / "fetches.jsonl"])
    assert info["state"] == SEEN
    assert info["logged"] == [{"outcome": "fetched", "reason": None, "status": 200,
                               "fetched_at": "2026-01-02T00:00:00Z", "warc_file": "x.warc.gz",
                               "warc_offset": 7}]
    assert "logged:   2026-01-02T00:00:00Z fetched HTTP 200, x.warc.gz @ 7" in format_explain(info)
    assert (await explain(store, "http://e.test/a"))["logged"] == []  # no log given
