"""Stopping a crawl with signals, with real processes: ``sluice crawl`` on the synthetic
.test web (served on loopback from this process), its slow-drip page in flight.

The first SIGINT stops leasing and gives in-flight work fetch.stop_grace_s; what is
still in flight then is handed back to the frontier (queued again, no attempt counted).
A second SIGINT hands back at once. Either way the job resumes and completes with
nothing lost: checked against the web's own graph (robots.txt per RFC 9309 via
protego), the WARC files read back with warcio (ISO 28500) and the frontier's books.
"""

from __future__ import annotations

import json
import signal
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

from tests.faultkit import (
    PLAIN, Proc, WebThread, fetch_log_lines, reachable, run_json, sluice, wait_until,
    warc_responses, write_job)
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.model import Behaviour
from synthweb.server import _BAD_RESPONDERS

DRIP_URL = "http://bad.test/slow-drip.html"
STARTUP_TIMEOUT_S = 90.0  # two loaded cores: the crawl starts its own Redis first
SLACK_S = 8.0  # what a stop may take beyond its grace: hand back, last write-back, Redis


@pytest.fixture
def web(monkeypatch: pytest.MonkeyPatch) -> Any:
    """A small web with the bad-input host; ``drip_started`` is set when the slow-drip
    page starts to answer."""
    spec = WebSpec(seed=21, hosts=8, pages=160, zipf_exponent=0.5,
                   **{**PLAIN, "bad_inputs": True})
    drip_started = threading.Event()
    drip = _BAD_RESPONDERS[Behaviour.SLOW_DRIP]

    async def watched_drip(server: Any, request: Any, page: Any, outcome: Any) -> Any:
        drip_started.set()
        return await drip(server, request, page, outcome)

    monkeypatch.setitem(_BAD_RESPONDERS, Behaviour.SLOW_DRIP, watched_drip)
    with WebThread(SyntheticWeb.generate(spec)) as thread:
        thread.server.drip_interval = 0.5
        thread.server.drip_duration = 120.0  # longer than any wait here: only a stop ends it
        yield thread, drip_started


def crawl_args(tmp_path: Path, web: WebThread, grace_s: float) -> list[str]:
    job = write_job(tmp_path / "job.toml", {
        "name": "stop",
        "seeds": list(web.web.seeds),
        "scope": {"allow_hosts": ["*.test"]},
        "budget": {"max_pages_per_host": 1_000_000},
        "priority": {"host_budget_base": 0},
        "politeness": {"min_delay_s": 0.05, "response_time_factor": 0.0,
                       "retry_backoff_s": 0.2, "crawl_delay_cap_s": 0.2},
        "fetch": {"user_agent": "sluice-stop/0.1 (+http://operator.test/contact)",
                  "map_hosts": [web.host_map], "concurrency": 16, "read_timeout_s": 5.0,
                  "total_timeout_s": 60.0, "stop_grace_s": grace_s},
        "lease": {"ttl_s": 30.0},
    })
    return sluice("crawl", "--config", str(job), "--out", str(tmp_path / "out"), "--quiet")


def stopped_state(tmp_path: Path) -> tuple[dict[str, Any], dict[str, Any]]:
    """The books of the stopped job and what it knows of the slow-drip page."""
    state = ["--job", "stop", "--state", str(tmp_path / "out" / "state")]
    status = run_json(sluice("status", *state))
    drip = run_json(sluice("explain", DRIP_URL, *state, "--json"))
    return status, drip


def resume_and_audit(tmp_path: Path, web: WebThread, args: list[str]) -> None:
    """Run the same command again (the drip now ends within a second); the crawl
    completes: every reachable page of the ordinary hosts archived and logged once."""
    web.server.drip_duration = 1.0
    again = Proc(args, tmp_path / "logs", "resume")
    assert again.wait() == 0, again.stderr()[-3000:]
    summary = json.loads(again.stdout())
    assert summary["balanced"] and summary["queued"] == 0 and summary["leased"] == 0
    assert summary["reasons"].get("dead:lease_expired", 0) == 0
    expected = {u for u in reachable(web.web) if u.split("/")[2] in set(web.web.site_hosts)}
    out = tmp_path / "out"
    responses, unreadable = warc_responses(sorted(out.rglob("*.warc.gz")))
    assert not unreadable
    assert expected <= set(responses), sorted(expected - set(responses))[:5]
    assert all(responses[u] == 1 for u in expected), [u for u in expected if responses[u] > 1]
    logged = Counter(ln["url"] for ln in fetch_log_lines(out) if ln["outcome"] == "fetched")
    assert all(logged[u] == 1 for u in expected), [u for u in expected if logged[u] != 1][:5]
    assert logged[DRIP_URL] == 1


def assert_handed_back(status: dict[str, Any], drip: dict[str, Any]) -> None:
    # nothing left leased, the books balance (DEVELOPERS.md invariant), and the page that
    # was in flight waits in the queue with no attempt counted against it
    assert status["balanced"] and status["leased"] == 0 and status["queued"] > 0
    assert drip["state"].startswith("queued"), drip
    assert drip["attempts"] == 0 and "lease" not in drip


def test_first_signal_finishes_within_the_grace_then_hands_back(
        tmp_path: Path, web: Any) -> None:
    thread, drip_started = web
    grace = 2.0
    args = crawl_args(tmp_path, thread, grace)
    proc = Proc(args, tmp_path / "logs", "crawl")
    try:
        wait_until(drip_started.is_set, STARTUP_TIMEOUT_S, "the slow-drip fetch", [proc])
        signalled = time.monotonic()
        proc.signal(signal.SIGINT)
        code = proc.wait()
        took = time.monotonic() - signalled
    finally:
        proc.ensure_gone()
    print(f"STOP-FIGURES first signal: exit {code} {took:.2f} s after SIGINT (grace {grace} s)")
    assert code == 0, proc.stderr()[-3000:]
    assert took < grace + SLACK_S, took
    assert json.loads(proc.stdout())["interrupted"] is True
    assert_handed_back(*stopped_state(tmp_path))
    resume_and_audit(tmp_path, thread, args)


def test_second_signal_hands_back_at_once(tmp_path: Path, web: Any) -> None:
    thread, drip_started = web
    grace = 120.0  # the drip would hold the first stop this long
    args = crawl_args(tmp_path, thread, grace)
    proc = Proc(args, tmp_path / "logs", "crawl")
    try:
        wait_until(drip_started.is_set, STARTUP_TIMEOUT_S, "the slow-drip fetch", [proc])
        proc.signal(signal.SIGINT)
        time.sleep(1.0)
        assert proc.alive()  # still waiting on the drip within its grace
        signalled = time.monotonic()
        proc.signal(signal.SIGINT)
        code = proc.wait()
        took = time.monotonic() - signalled
    finally:
        proc.ensure_gone()
    print(f"STOP-FIGURES second signal: exit {code} {took:.2f} s after the second SIGINT "
          f"(grace {grace} s)")
    assert code == 0, proc.stderr()[-3000:]
    assert took < SLACK_S, took
    assert_handed_back(*stopped_state(tmp_path))
    resume_and_audit(tmp_path, thread, args)
