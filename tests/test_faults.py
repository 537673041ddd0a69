"""Fault tests with real processes: kill, stop and restart sluice and Redis mid-crawl.

Each test crawls a small synthetic .test web with ``.venv/bin/sluice`` subprocesses
(``crawl`` on its embedded Redis, or ``daemon`` + ``worker``s on a redis-server or a
Redis Cluster started here), injects one fault, lets the crawl finish, and then checks
against things outside the crawler (tests/faultkit.py):

- lost: reachable pages (the web's own graph, robots.txt per RFC 9309 through protego,
  nofollow honoured) without a response record in the WARC files: must be 0;
- repeats: URLs the synthetic web served more than once, at most one lease batch per
  crash (the at-least-once promise in workers/loop.py);
- the frontier's books from ``sluice status``: admitted = queued + leased + fetched +
  failed + excluded + dead, queued = leased = 0;
- every WARC file passes ``warcio check`` and ends on a whole gzip member (ISO 28500
  annex D, RFC 1952).

Each test prints its figures as one JSON line (``./test.sh -m faults -s``);
docs/faults.md tabulates them.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from frontier.embedded import process_alive
from tests.faultkit import (
    Crew,
    Proc,
    ReplicatedCluster,
    WebThread,
    assert_clean,
    audit,
    job_settings,
    make_web,
    run_json,
    server_tuning,
    sluice,
    wait_until,
    write_job,
    tmpfs_at,
)
from tests.servers import RedisServer

pytestmark = [pytest.mark.faults, pytest.mark.timeout(420)]

BATCH = 16  # lease.batch = fetch.concurrency in job_settings: what one worker can hold
LEASE_TTL_S = 4.0
PAUSE_S = LEASE_TTL_S + 4.0  # a stop longer than the lease
PROGRESS_S = 120.0  # generous wait for the crawl to reach the point of the fault


def served(web: WebThread, n: int, procs: list[Proc]) -> None:
    wait_until(lambda: web.page_requests() >= n, PROGRESS_S, f"{n} pages served", procs)


@pytest.fixture
def redis_aof(tmp_path: Path) -> Iterator[RedisServer]:
    """A private server with an fsync per write, for killing and restarting."""
    server = RedisServer(tmp_path / "redis", config=server_tuning(), appendonly=True).start()
    with redis.Redis(host="127.0.0.1", port=server.port, decode_responses=True) as client:
        assert client.config_get("appendfsync") == {"appendfsync": "always"}
    yield server
    if server.pid is not None and process_alive(server.pid):
        os.kill(server.pid, signal.SIGCONT)  # a test that failed while it was stopped
    server.stop()


# -- 1. the crawl process killed ------------------------------------------------------------


def embedded_pid(out: Path) -> int | None:
    record = out / "state" / "redis" / "sluice-redis.json"
    try:
        return int(json.loads(record.read_text())["pid"])
    except (OSError, ValueError, KeyError):
        return None


def test_crawl_killed_then_run_again_finishes(tmp_path: Path) -> None:
    with WebThread(make_web(seed=11, hosts=12, pages=500)) as web:
        job = write_job(tmp_path / "job.toml", job_settings("kill-crawl", web))
        out = tmp_path / "out"
        args = sluice("crawl", "--config", str(job), "--out", str(out), "--quiet")
        procs = [Proc(args, tmp_path / "logs", "crawl-1")]
        server_pid = None
        try:
            served(web, 120, procs)
            server_pid = embedded_pid(out)
            assert server_pid is not None and process_alive(server_pid)
            procs[0].kill()
            at_kill = web.page_requests()
            # PR_SET_PDEATHSIG (frontier/embedded.py) ends the embedded server with its
            # parent; a server left running would be stopped by the next run
            deadline = time.monotonic() + 10
            while process_alive(server_pid) and time.monotonic() < deadline:
                time.sleep(0.05)
            fate = "orphaned" if process_alive(server_pid) else "exited"
            procs.append(Proc(args, tmp_path / "logs", "crawl-2"))
            code = procs[1].wait()
            assert code == 0, procs[1].stderr()[-3000:]
            summary = json.loads(procs[1].stdout())
            assert not process_alive(server_pid)  # no server of the killed run left behind
            status = run_json(sluice("status", "--job", "kill-crawl", "--state", str(out / "state")))
        finally:
            for p in procs:
                p.ensure_gone()
            if server_pid is not None and process_alive(server_pid):
                os.kill(server_pid, signal.SIGKILL)
        fig = audit("crawl process kill -9, run again", web=web, out=out, status=status,
                    crashes=1, batch=BATCH, served_at_fault=at_kill,
                    embedded_redis_after_kill=fate, resume_s=summary["elapsed_s"])
    assert_clean(fig)


# -- 2-4. Redis killed or paused, a worker paused ----------------------------------------------


def crawl_with_crew(tmp_path: Path, web: WebThread, name: str, redis_url: str,
                    workers: int = 2, **settings: object) -> Crew:
    job = write_job(tmp_path / "job.toml", job_settings(name, web, **settings))
    crew = Crew(job, name, redis_url, tmp_path)
    crew.start_daemon()
    for _ in range(workers):
        crew.start_worker()
    return crew


def test_redis_killed_and_restarted_loses_nothing(tmp_path: Path, redis_aof: RedisServer) -> None:
    with WebThread(make_web(seed=12, hosts=12, pages=500)) as web:
        crew = crawl_with_crew(tmp_path, web, "kill-redis", redis_aof.url)
        try:
            served(web, 150, crew.procs)
            before = crew.status()  # acknowledged by the server before it dies
            redis_aof.kill()
            at_kill = web.page_requests()
            time.sleep(1.0)  # every client meets the dead server
            redis_aof.start()  # same port and folder: the append-only file is replayed
            after = crew.status()
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit("Redis kill -9 and restart (AOF, fsync always)", web=web,
                    out=tmp_path / "out", status=status, crashes=1, batch=BATCH,
                    served_at_fault=at_kill, fetched_before_kill=before["fetched"],
                    fetched_after_restart=after["fetched"])
    # nothing the server acknowledged before the kill is gone after the restart
    for state in ("admitted", "fetched"):
        assert after[state] >= before[state], (state, before, after)
    assert_clean(fig)


def test_redis_paused_past_the_lease_ttl(tmp_path: Path, redis_aof: RedisServer) -> None:
    with WebThread(make_web(seed=13, hosts=12, pages=500)) as web:
        crew = crawl_with_crew(tmp_path, web, "pause-redis", redis_aof.url)
        try:
            served(web, 150, crew.procs)
            assert redis_aof.pid is not None
            os.kill(redis_aof.pid, signal.SIGSTOP)
            at_stop = web.page_requests()
            time.sleep(PAUSE_S)  # every lease held now expires on the server's clock
            during = web.page_requests() - at_stop
            os.kill(redis_aof.pid, signal.SIGCONT)
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit(f"Redis SIGSTOP {PAUSE_S:.0f} s (lease TTL {LEASE_TTL_S:.0f} s), SIGCONT",
                    web=web, out=tmp_path / "out", status=status, crashes=2, batch=BATCH,
                    served_at_fault=at_stop, served_during_pause=during)
    assert_clean(fig)


def test_worker_paused_past_its_lease_ttl(tmp_path: Path, redis_aof: RedisServer) -> None:
    with WebThread(make_web(seed=14, hosts=12, pages=500)) as web:
        crew = crawl_with_crew(tmp_path, web, "pause-worker", redis_aof.url)
        try:
            served(web, 150, crew.procs)
            paused = crew.workers[0]
            paused.signal(signal.SIGSTOP)
            at_stop = web.page_requests()
            time.sleep(PAUSE_S)  # its leases expire; the reaper hands them to the other
            during = web.page_requests() - at_stop
            paused.signal(signal.SIGCONT)
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit(f"worker SIGSTOP {PAUSE_S:.0f} s (lease TTL {LEASE_TTL_S:.0f} s), SIGCONT",
                    web=web, out=tmp_path / "out", status=status, crashes=1, batch=BATCH,
                    served_at_fault=at_stop, served_while_paused=during)
    assert_clean(fig)


# -- 5. a Cluster master killed, its replica promoted ------------------------------------------


def test_cluster_master_killed_replica_takes_over(tmp_path: Path) -> None:
    with ReplicatedCluster(tmp_path / "cluster") as cluster, \
            WebThread(make_web(seed=15, hosts=12, pages=500)) as web:
        # Redis replicates asynchronously: an admit is confirmed by a replica (WAIT) before
        # the page that found its links is completed on another master
        crew = crawl_with_crew(tmp_path, web, "failover", cluster.url,
                               redis={"wait_replicas": 1, "wait_timeout_ms": 2000})
        try:
            served(web, 150, crew.procs)
            started = time.monotonic()
            victim = cluster.kill_master(spare=cluster.nodes[0])  # the URL's node stays up
            failover_s = time.monotonic() - started
            at_kill = web.page_requests()
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit("Redis Cluster master kill -9, replica promoted", web=web,
                    out=tmp_path / "out", status=status, crashes=1, batch=BATCH,
                    served_at_fault=at_kill, failover_s=round(failover_s, 2),
                    killed_port=victim.port)
    assert_clean(fig)


# -- 6. the output disk full -------------------------------------------------------------------


DISK_FULL_EXIT = 3  # the worker's exit status for an output folder that takes no more writes
SMALL_DISK = "256k"  # about a third of what this crawl writes (WARC and fetch log)
ROOMY_DISK = "64m"


@pytest.fixture
def tmpfs(tmp_path: Path) -> Iterator[Path]:
    """A small tmpfs of our own as the output folder (needs root), unmounted after."""
    with tmpfs_at(tmp_path / "out", SMALL_DISK, keep_to=tmp_path / "out-kept") as where:
        yield where


def test_disk_full_worker_exits_then_resume_drains(tmp_path: Path, tmpfs: Path,
                                                   redis_aof: RedisServer) -> None:
    folder = tmpfs / "crawl"
    with WebThread(make_web(seed=18, hosts=12, pages=500)) as web:
        crew = crawl_with_crew(tmp_path, web, "disk-full", redis_aof.url, workers=0)
        try:
            full = crew.start_worker(folder)
            code = full.wait()
            at_full = web.page_requests()
            lines = [ln for ln in full.stderr().splitlines() if ln.strip()]
            midway = crew.status()
            subprocess.run(["mount", "-o", f"remount,size={ROOMY_DISK}", str(tmpfs)], check=True)
            crew.start_worker(folder)  # the same folder, with room again
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit("output disk full (tmpfs), then room again", web=web, out=tmpfs,
                    status=status, crashes=1, batch=BATCH, served_at_fault=at_full,
                    exit_code=code, stderr_lines=len(lines),
                    fetched_before_full=midway["fetched"])
    assert code == DISK_FULL_EXIT, (code, lines[-5:])
    assert len(lines) == 1 and str(folder) in lines[0], lines[-5:]  # one line naming the place
    assert 0 < midway["fetched"] < fig["reachable"]  # it stopped midway, not at the end
    assert midway["leased"] == 0, midway  # what it held was handed back, not left to expire
    assert_clean(fig)


# -- 7. workers killed again and again -----------------------------------------------------------


KILLS = 10
SERVED_BETWEEN_KILLS = 40


def test_ten_worker_kills_in_one_crawl(tmp_path: Path, redis_aof: RedisServer) -> None:
    rng = random.Random(7)
    with WebThread(make_web(seed=16, hosts=20, pages=800)) as web:
        # each kill counts a failed attempt against every URL its worker held: more attempts
        # than kills, so no URL runs out of them through kills alone (under load a URL was
        # held at three of the ten kills and ended dead, though archived)
        crew = crawl_with_crew(tmp_path, web, "ten-kills", redis_aof.url,
                               lease={"ttl_s": 4.0, "batch": 16, "max_attempts": KILLS + 1})
        try:
            marks = []
            for _ in range(KILLS):
                served(web, web.page_requests() + SERVED_BETWEEN_KILLS, crew.live_workers())
                victim = rng.choice(crew.live_workers())
                victim.kill()
                marks.append(web.page_requests())
                crew.start_worker()
            crew.finish()
            status = crew.status()
        finally:
            crew.close()
        fig = audit(f"{KILLS} worker kill -9s, each replaced", web=web, out=tmp_path / "out",
                    status=status, crashes=KILLS, batch=BATCH, served_at_kills=marks)
    assert_clean(fig)
