"""One owner per state folder: the flock-held owner lock, and `sluice crawl`, `status`,
`explain` and `seeds add` on a running crawl's folder (real `.venv/bin/sluice` processes,
the embedded redis-server, the synthetic web on loopback)."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import AsyncIterator
from dataclasses import dataclass
from pathlib import Path

import pytest
import redis

from frontier.embedded import RedisProcess, process_start_ticks
from frontier.exceptions import ConfigError, FolderInUse, RedisLaunchError
from frontier.folders import (
    LOCK_FILE, FolderLock, Owner, command_name, read_owner, writable_folder,
)
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import SyntheticServer

REPO = Path(__file__).resolve().parents[1]
SLUICE = str(REPO / ".venv" / "bin" / "sluice")
UA = "sluice-test/0.1 (+http://operator.test/contact)"
PLAIN = dict(robots=False, slow_hosts=False, failing_hosts=False, redirects=False, trap=False,
             farm=False, near_duplicates=False, ssrf_bait=False, bad_inputs=False)
WAIT_S = 60.0  # generous: two shared cores
POLL_S = 0.05


def clean_env() -> dict[str, str]:
    """The environment without SLUICE_ settings, so only the flags decide."""
    return {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}


async def sluice(*args: str, timeout: float = WAIT_S) -> tuple[int, str, str]:
    proc = await asyncio.create_subprocess_exec(
        SLUICE, *args, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE,
        env=clean_env())
    out, err = await asyncio.wait_for(proc.communicate(), timeout)
    return proc.returncode or 0, out.decode(), err.decode()


# -- the lock itself ------------------------------------------------------------------------

HOLDER = """
import sys, time
sys.path.insert(0, {repo!r})
from pathlib import Path
from frontier.folders import FolderLock
lock = FolderLock(Path(sys.argv[1]), command=sys.argv[2])
lock.take()
lock.publish(redis_url="redis://127.0.0.1:1/0")
print("held", flush=True)
if sys.argv[3] == "until-stdin-closes":
    sys.stdin.read()
else:
    time.sleep(float(sys.argv[3]))
lock.release()
"""


def start_holder(folder: Path, command: str = "sluice crawl",
                 hold: str = "until-stdin-closes") -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-c", HOLDER.format(repo=str(REPO)), str(folder), command, hold],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)


def test_the_lock_names_its_owner_and_a_second_taker_is_refused(tmp_path: Path) -> None:
    lock = FolderLock(tmp_path, command="sluice crawl", label="--out")
    assert lock.take() is None  # nothing was left behind
    lock.publish(redis_url="redis://127.0.0.1:7/0")
    owner = read_owner(tmp_path)
    assert owner is not None
    assert (owner.pid, owner.host, owner.command, owner.redis_url) == (
        os.getpid(), socket.gethostname(), "sluice crawl", "redis://127.0.0.1:7/0")
    with pytest.raises(FolderInUse) as refused:
        FolderLock(tmp_path, label="--out", fix="pass another --out").take(wait_s=0.1)
    message = str(refused.value)
    assert "\n" not in message
    assert f"pid {os.getpid()} on host {socket.gethostname()}" in message
    assert message.startswith(f"--out {tmp_path} is in use by sluice crawl")
    assert message.endswith("pass another --out")
    lock.release()
    assert read_owner(tmp_path) is None
    again = FolderLock(tmp_path)
    assert again.take() is None  # a clean release leaves nothing to take over
    again.release()


def test_a_lock_held_by_another_process_is_refused_and_freed_when_it_is_killed(
        tmp_path: Path) -> None:
    with start_holder(tmp_path) as holder:
        try:
            assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
            owner = read_owner(tmp_path)
            assert owner is not None and owner.pid == holder.pid
            assert owner.redis_url == "redis://127.0.0.1:1/0"
            with pytest.raises(FolderInUse, match=f"pid {holder.pid} on host"):
                FolderLock(tmp_path).take(wait_s=0.1)
        finally:
            holder.kill()  # SIGKILL: no clean-up runs; flock(2) locks die with the process
            holder.wait()
    assert read_owner(tmp_path) is None
    lock = FolderLock(tmp_path)
    left = lock.take(wait_s=0)
    assert left is not None and left.pid == holder.pid and left.command == "sluice crawl"
    lock.release()


def test_a_crawl_waits_for_a_status_command_to_let_go(tmp_path: Path) -> None:
    with start_holder(tmp_path, "sluice status", "1.0") as holder:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        lock = FolderLock(tmp_path, command="sluice crawl")
        assert lock.take(wait_s=0.1) is None  # waited past 0.1 s for the status to end
        lock.release()
        assert holder.wait(WAIT_S) == 0
    with start_holder(tmp_path, "sluice status", "1.0") as holder:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        with pytest.raises(FolderInUse, match="in use by sluice status"):
            FolderLock(tmp_path).take(wait_s=0)  # a reader does not wait
        assert holder.wait(WAIT_S) == 0


def test_owner_details_that_are_not_json_read_as_unknown(tmp_path: Path) -> None:
    (tmp_path / LOCK_FILE).write_bytes(b"\xff garbage")
    lock = FolderLock(tmp_path)
    assert lock.take() is None
    lock.release()
    assert Owner.parse(b"[1, 2]") is None
    assert Owner().describe() == "another sluice (pid unknown)"


def test_writable_folder_names_the_flag_and_the_fix(tmp_path: Path) -> None:
    a_file = tmp_path / "file"
    a_file.write_text("x")
    with pytest.raises(ConfigError, match=r"^--out .*: is a file, not a folder; pass a folder"):
        writable_folder(a_file, "--out")
    with pytest.raises(ConfigError, match=r"^--out /proc/sluice-out: cannot create it"):
        writable_folder(Path("/proc/sluice-out"), "--out")
    with pytest.raises(ConfigError, match=r"^--state .*: cannot create it \(Not a directory\)"):
        writable_folder(a_file / "below", "--state")
    assert writable_folder(tmp_path / "new" / "out", "--out").is_dir()
    assert list((tmp_path / "new" / "out").iterdir()) == []  # the write probe is gone


# -- the embedded server's ownership record ---------------------------------------------------

GROWER = """
import sys
print("ready", flush=True)
sys.stdin.readline()
ballast = bytearray(64 * 1024 * 1024)
for i in range(0, len(ballast), 4096):
    ballast[i] = 1
print("grown", flush=True)
sys.stdin.read()
"""


def test_process_start_ticks_is_the_starttime_field_of_proc_stat() -> None:
    # proc(5): field 22 of /proc/PID/stat is starttime, clock ticks after boot; it never
    # changes while the process lives (field 24, rss, does).
    with subprocess.Popen([sys.executable, "-c", GROWER], stdin=subprocess.PIPE,
                          stdout=subprocess.PIPE, text=True) as proc:
        try:
            assert proc.stdout is not None and proc.stdin is not None
            assert proc.stdout.readline().strip() == "ready"
            before = process_start_ticks(proc.pid)
            uptime_s = float(Path("/proc/uptime").read_text().split()[0])
            assert before is not None
            age_s = uptime_s - before / os.sysconf("SC_CLK_TCK")
            assert -1.0 <= age_s < 30.0  # started moments ago (bound generous: loaded machine)
            proc.stdin.write("grow\n")
            proc.stdin.flush()
            assert proc.stdout.readline().strip() == "grown"
            assert process_start_ticks(proc.pid) == before
        finally:
            proc.kill()
            proc.wait()


OWNER_OF_SERVER = """
import sys
sys.path.insert(0, {repo!r})
from pathlib import Path
from frontier.embedded import RedisProcess
server = RedisProcess(Path(sys.argv[1]))
server.start()
ballast = bytearray(64 * 1024 * 1024)
for i in range(0, len(ballast), 4096):
    ballast[i] = 1
print(server.pid, flush=True)
sys.stdin.read()
server.stop()
"""


def test_a_live_owner_whose_memory_grew_keeps_its_server(tmp_path: Path) -> None:
    with subprocess.Popen(
            [sys.executable, "-c", OWNER_OF_SERVER.format(repo=str(REPO)), str(tmp_path)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True) as owner:
        try:
            assert owner.stdout is not None and owner.stdin is not None
            server_pid = int(owner.stdout.readline())
            with pytest.raises(RedisLaunchError, match="in use by a running sluice"):
                RedisProcess(tmp_path).start()
            os.kill(server_pid, 0)  # still running: the second start did not stop it
            owner.stdin.close()
            assert owner.wait(WAIT_S) == 0
        finally:
            if owner.poll() is None:
                owner.kill()
                owner.wait()


# -- a running one-machine crawl ------------------------------------------------------------


@dataclass
class RunningCrawl:
    proc: asyncio.subprocess.Process
    out: Path
    seeds: Path
    args: list[str]
    owner: Owner
    web: SyntheticWeb
    stderr_lines: list[str]

    @property
    def state(self) -> Path:
        return self.out / "state"

    def fetched(self) -> int:
        with redis.Redis.from_url(self.owner.redis_url or "", decode_responses=True) as c:
            return sum(int(c.hget(k, "fetched") or 0) for k in c.scan_iter("*counts*"))


async def start_crawl(tmp_path: Path, port: int, web: SyntheticWeb, *extra: str,
                      out_name: str = "out") -> RunningCrawl:
    seeds = tmp_path / "seeds.txt"
    seeds.write_text("\n".join(web.seeds) + "\n")
    out = tmp_path / out_name
    args = ["crawl", "--seeds", str(seeds), "--out", str(out), "--user-agent", UA,
            "--map-hosts", f"*.test=127.0.0.1:{port}", "--allow-host", "*.test",
            "--min-delay", "0.5", *extra]
    proc = await asyncio.create_subprocess_exec(
        SLUICE, *args, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE,
        env=clean_env())
    lines: list[str] = []
    assert proc.stderr is not None

    async def collect() -> None:
        assert proc.stderr is not None
        async for raw in proc.stderr:
            lines.append(raw.decode())

    asyncio.get_running_loop().create_task(collect())
    deadline = time.monotonic() + WAIT_S
    while True:
        owner = read_owner(out / "state")
        if owner is not None and owner.redis_url:
            break
        assert proc.returncode is None, "".join(lines)
        assert time.monotonic() < deadline, "the crawl never published its Redis"
        await asyncio.sleep(POLL_S)
    return RunningCrawl(proc, out, seeds, args, owner, web, lines)


async def stop_crawl(crawl: RunningCrawl) -> tuple[int, str]:
    if crawl.proc.returncode is None:
        crawl.proc.send_signal(signal.SIGTERM)
    assert crawl.proc.stdout is not None
    out = await asyncio.wait_for(crawl.proc.stdout.read(), WAIT_S)
    code = await asyncio.wait_for(crawl.proc.wait(), WAIT_S)
    await asyncio.sleep(0.1)  # the stderr reader takes the last lines
    return code, out.decode()


@pytest.fixture
async def web_server() -> AsyncIterator[tuple[SyntheticServer, SyntheticWeb]]:
    # 4 hosts of about 30 pages at 0.5 s a host: a crawl of several seconds
    web = SyntheticWeb.generate(WebSpec(seed=3, hosts=4, pages=120, zipf_exponent=0, **PLAIN))
    async with SyntheticServer(web) as server:
        yield server, web


async def test_status_and_explain_on_a_running_crawl_use_its_redis(
        tmp_path: Path, web_server: tuple[SyntheticServer, SyntheticWeb]) -> None:
    server, web = web_server
    crawl = await start_crawl(tmp_path, server.port, web)
    try:
        assert crawl.owner.pid == crawl.proc.pid
        assert crawl.owner.command == "sluice crawl" and crawl.owner.on_this_host
        code, out, err = await sluice("status", "--state", str(crawl.state), "--job", "crawl")
        assert code == 0, err
        status = json.loads(out)
        assert status["admitted"] >= len(web.seeds) and status["balanced"]
        code, out, err = await sluice("explain", web.seeds[0], "--state", str(crawl.state),
                                      "--job", "crawl", "--json")
        assert code == 0, err
        extra = f"http://{web.site_hosts[0]}/not-linked-anywhere"
        code, out, err = await sluice("seeds", "add", "--state", str(crawl.state), "--job",
                                      "crawl", extra, f"{extra} and words")
        assert code == 0, err
        added = json.loads(out)
        assert added["added"] == 1 and [r["line"] for r in added["rejected"]] == [2]
        assert err.strip().startswith("sluice: rejected seed argument 2: ")
        # the crawl and its Redis live on: the same server, and pages still being fetched
        assert crawl.proc.returncode is None
        assert read_owner(crawl.state) == crawl.owner
        with redis.Redis.from_url(crawl.owner.redis_url or "") as c:
            assert c.ping() is True
        before = crawl.fetched()
        deadline = time.monotonic() + WAIT_S
        while crawl.fetched() <= before and crawl.proc.returncode is None:
            assert time.monotonic() < deadline
            await asyncio.sleep(0.2)
        assert crawl.fetched() > before
        assert not any("Redis unavailable" in line for line in crawl.stderr_lines)
    finally:
        code, _ = await stop_crawl(crawl)
    assert code == 0, "".join(crawl.stderr_lines)


async def test_a_second_crawl_on_the_same_folder_refuses_naming_the_owner(
        tmp_path: Path, web_server: tuple[SyntheticServer, SyntheticWeb]) -> None:
    server, web = web_server
    crawl = await start_crawl(tmp_path, server.port, web)
    try:
        log = crawl.out / "fetches.jsonl"
        code, out, err = await sluice(*crawl.args)
        assert code == 2
        lines = (out + err).strip().splitlines()
        assert len(lines) == 1, lines
        assert f"is in use by sluice crawl (pid {crawl.proc.pid} on host " \
               f"{socket.gethostname()}" in lines[0]
        assert "--out" in lines[0]
        # the same through another --out but the running crawl's state folder
        code, out, err = await sluice(*crawl.args[:-6], "--state", str(crawl.state),
                                      "--out", str(tmp_path / "other"), *crawl.args[-6:])
        assert code == 2 and f"pid {crawl.proc.pid}" in err and "Traceback" not in err
        assert crawl.proc.returncode is None
        with redis.Redis.from_url(crawl.owner.redis_url or "") as c:
            assert c.ping() is True
        assert log.exists()
    finally:
        code, _ = await stop_crawl(crawl)
    assert code == 0, "".join(crawl.stderr_lines)


async def test_a_killed_crawls_folder_is_taken_over_with_one_line(
        tmp_path: Path, web_server: tuple[SyntheticServer, SyntheticWeb]) -> None:
    server, web = web_server
    crawl = await start_crawl(tmp_path, server.port, web)
    crawl.proc.kill()
    await crawl.proc.wait()
    code, out, err = await sluice(*crawl.args, "--max-pages", "2", "--quiet")
    assert code == 0, err
    taken = [ln for ln in err.splitlines() if "took over" in ln]
    assert len(taken) == 1, err
    assert f"sluice crawl (pid {crawl.proc.pid} on host {socket.gethostname()}" in taken[0]
    assert "no longer running" in taken[0]
    assert read_owner(crawl.out) is None and read_owner(crawl.state) is None


async def test_a_crawl_whose_redis_dies_stops_with_one_line(
        tmp_path: Path, web_server: tuple[SyntheticServer, SyntheticWeb]) -> None:
    server, web = web_server
    crawl = await start_crawl(tmp_path, server.port, web)
    record = json.loads((crawl.state / "redis" / "sluice-redis.json").read_text())
    os.kill(record["pid"], signal.SIGKILL)  # as the kernel's OOM killer would
    assert crawl.proc.stdout is not None
    await asyncio.wait_for(crawl.proc.stdout.read(), WAIT_S)
    code = await asyncio.wait_for(crawl.proc.wait(), WAIT_S)
    await asyncio.sleep(0.1)
    assert code == 2
    last = crawl.stderr_lines[-1]
    assert last.startswith(f"sluice: the Redis server of {crawl.state} exited while in use"), last
    assert "run the same command again to resume" in last
    assert read_owner(crawl.state) is None and read_owner(crawl.out) is None


def test_the_command_a_lock_names() -> None:
    assert command_name(["/x/.venv/bin/sluice", "crawl", "--out", "o"]) == "sluice crawl"
    assert command_name(["sluice", "-v", "status", "--job", "j"]) == "sluice status"
    assert command_name(["python", "--", "Weird Thing"]) == "sluice"


async def test_seeds_do_not_wait_for_an_embedded_redis_that_died(tmp_path: Path) -> None:
    # Seeds wait up to SEED_PATIENCE_S (60 s) for a Redis that is restarting; the job's own
    # embedded server, once dead, is not coming back: killed before the seeds go in (as the
    # OOM killer could at any moment), the crawl says so at once instead of a minute later.
    from frontier.job import SEED_PATIENCE_S, admit_seeds, open_job
    from frontier.settings import load_settings

    settings = load_settings(None, {"name": "dies", "seeds": ["http://a.test/"],
                                    "state_dir": str(tmp_path / "state")})
    started = time.monotonic()
    with pytest.raises(RedisLaunchError, match="exited while in use"):
        async with open_job(settings) as job:
            assert job.server is not None
            assert job.server.pid is not None
            os.kill(job.server.pid, signal.SIGKILL)
            while job.server.is_running():
                await asyncio.sleep(0.05)
            await admit_seeds(job, settings.seeds)
    assert time.monotonic() - started < SEED_PATIENCE_S / 4
