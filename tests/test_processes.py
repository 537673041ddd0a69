"""Worker processes: ``sluice crawl --processes N`` and ``sluice worker --processes N``
with real processes, a real redis-server and the synthetic web on loopback.

The checks are the fault audit's (tests/faultkit.py): the web's own graph says which
pages are reachable (robots.txt per RFC 9309 through protego), the WARC files are read
back with warcio (ISO 28500), the frontier's books come from ``sluice status``.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import signal
import time
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from frontier.cli import parser as cli_parser
from frontier.embedded import process_alive
from tests.faultkit import (
    Proc, WebThread, assert_clean, audit, child_pids, job_settings, make_web, run_json,
    sluice, wait_until, write_job,
)

FAULTS = [pytest.mark.faults, pytest.mark.timeout(420)]

BATCH = 16  # lease.batch in job_settings: what one worker process can hold
PROGRESS_S = 120.0


def worker_pids(crawl_pid: int) -> list[int]:
    """The crawl's worker processes (its other child is the embedded redis-server)."""
    pids = []
    for pid in child_pids(crawl_pid):
        try:
            argv = Path(f"/proc/{pid}/cmdline").read_bytes().split(b"\0")
        except OSError:
            continue
        if b"worker" in argv:
            pids.append(pid)
    return pids


def wait_gone(pids: list[int], timeout: float = 30.0) -> list[int]:
    deadline = time.monotonic() + timeout
    while any(process_alive(p) for p in pids) and time.monotonic() < deadline:
        time.sleep(0.05)
    return [p for p in pids if process_alive(p)]


def warc_pids(out: Path) -> set[str]:
    """Writer process ids from the WARC file names (``prefix-stamp-serial-pid.warc.gz``)."""
    return {p.name.removesuffix(".warc.gz").rsplit("-", 1)[1] for p in out.rglob("*.warc.gz")}


@FAULTS[0]
@FAULTS[1]
def test_one_worker_process_killed_the_others_go_on(tmp_path: Path) -> None:
    with WebThread(make_web(seed=21, hosts=16, pages=600)) as web:
        job = write_job(tmp_path / "job.toml", job_settings("procs-kill", web))
        out = tmp_path / "out"
        crawl = Proc(sluice("crawl", "--config", str(job), "--out", str(out), "--quiet",
                            "--processes", "3"), tmp_path / "logs", "crawl")
        try:
            wait_until(lambda: len(worker_pids(crawl.pid)) == 3, 60, "three worker processes",
                       [crawl])
            pids = worker_pids(crawl.pid)
            wait_until(lambda: web.page_requests() >= 120, PROGRESS_S, "120 pages served",
                       [crawl])
            victim = pids[0]
            os.kill(victim, signal.SIGKILL)
            at_kill = web.page_requests()
            code = crawl.wait()
            assert code == 0, crawl.stderr()[-3000:]
            summary = json.loads(crawl.stdout())
            status = run_json(sluice("status", "--job", "procs-kill", "--state",
                                     str(out / "state")))
        finally:
            crawl.ensure_gone()
        assert wait_gone(pids) == []
        fig = audit("one of three worker processes kill -9", web=web, out=out, status=status,
                    crashes=1, batch=BATCH, served_at_fault=at_kill,
                    summary_processes=summary["processes"],
                    summary_crashed=summary["processes_crashed"])
    assert_clean(fig)
    assert summary["processes"] == 3 and summary["processes_crashed"] == [victim]
    assert "worker process" in crawl.stderr() and "signal 9" in crawl.stderr()
    # the others went on: pages were served after the kill, by the survivors' WARC files
    assert web.page_requests() > at_kill
    assert len(warc_pids(out) & {str(p) for p in pids[1:]}) == 2
    # one merged fetch log for every process (appends under flock)
    assert [p.name for p in out.rglob("fetches.jsonl")] == ["fetches.jsonl"]


@FAULTS[0]
@FAULTS[1]
def test_sigterm_stops_every_worker_process_and_the_same_command_resumes(
        tmp_path: Path) -> None:
    with WebThread(make_web(seed=22, hosts=16, pages=600)) as web:
        job = write_job(tmp_path / "job.toml", job_settings("procs-stop", web))
        out = tmp_path / "out"
        args = sluice("crawl", "--config", str(job), "--out", str(out), "--quiet",
                      "--processes", "2")
        first = Proc(args, tmp_path / "logs", "crawl-1")
        second = None
        try:
            wait_until(lambda: len(worker_pids(first.pid)) == 2, 60, "two worker processes",
                       [first])
            pids = worker_pids(first.pid)
            wait_until(lambda: web.page_requests() >= 100, PROGRESS_S, "100 pages served",
                       [first])
            stopped_at = time.monotonic()
            code = first.terminate()
            stop_s = time.monotonic() - stopped_at
            assert code == 0, first.stderr()[-3000:]
            summary = json.loads(first.stdout())
            assert wait_gone(pids, 5.0) == []  # no child outlives the crawl
            mid = run_json(sluice("status", "--job", "procs-stop", "--state",
                                  str(out / "state")))
            second = Proc(args, tmp_path / "logs", "crawl-2")
            assert second.wait() == 0, second.stderr()[-3000:]
            status = run_json(sluice("status", "--job", "procs-stop", "--state",
                                     str(out / "state")))
        finally:
            first.ensure_gone()
            if second is not None:
                second.ensure_gone()
        fig = audit("SIGTERM to a crawl of two worker processes, run again", web=web, out=out,
                    status=status, crashes=0, batch=BATCH, stop_s=round(stop_s, 2),
                    leased_after_stop=mid["leased"])
    assert summary["interrupted"] and summary["processes_crashed"] == []
    # the stop handed back every lease: nothing waits for a lease to expire
    assert mid["leased"] == 0 and mid["balanced"], mid
    assert_clean(fig)


# -- the flags an operator types --------------------------------------------------------------

COUNTS = st.one_of(
    st.text(max_size=30),
    st.lists(st.integers(-5, 100).map(str), min_size=1, max_size=5).map(",".join),
)


@pytest.mark.fuzz
@given(text=COUNTS, command=st.sampled_from(["crawl", "worker", "bench"]))
def test_any_processes_flag_is_a_count_or_a_one_line_usage_error(text: str, command: str
                                                                  ) -> None:
    """``--processes`` of crawl and worker (a count above 0) and of bench crawl (counts
    1-64, comma-separated): a value, or exit status 2 with one line naming the flag."""
    args = {"crawl": ["crawl", "--out", "o"],
            "worker": ["worker", "--redis", "redis://127.0.0.1:1", "--job", "j", "--out", "o"],
            "bench": ["bench", "crawl"]}[command]
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err):
            parsed = cli_parser().parse_args([*args, "--processes", text])
    except SystemExit as stop:
        assert stop.code == 2
        message = err.getvalue()
        assert "--processes" in message and message.count("\n") == 1, message
        return
    value = parsed.processes
    if command == "bench":
        assert value == tuple(int(part) for part in text.split(","))
        assert all(1 <= n <= 64 for n in value)
    else:
        assert isinstance(value, int) and value > 0
