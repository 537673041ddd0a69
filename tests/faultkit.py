"""Tools for fault tests with real processes: the synthetic web in a thread, sluice
commands as subprocesses, a Redis Cluster with replicas, and the audit of a finished crawl.

The crawl runs as ``.venv/bin/sluice`` processes (``crawl``, or ``daemon`` plus
``worker``s) against the synthetic ``.test`` web served on loopback from this process;
the web's request log and graph are the ground truth the audit compares with: the
pages a polite crawler can reach (robots.txt per RFC 9309 via protego, nofollow
honoured), the WARC files read back with warcio (ISO 28500) and ``warcio check``, and
the frontier's own accounting from ``sluice status``.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import shutil
import os
import signal
import subprocess
import sys
import threading
import time
import zlib
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from warcio.archiveiterator import ArchiveIterator

from frontier.embedded import LOOPBACK, RedisProcess
from frontier.exceptions import RedisLaunchError
from frontier.local_cluster import (
    CLUSTER_SLOTS, LoopbackCluster, cluster_info, replication_info,
)
from frontier.robots_rules import product_token
from frontier.settings import JobSettings
from frontier.store_tuning import redis_tuning
from frontier.urls import canonicalize
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import RequestRecord, SyntheticServer

REPO = Path(__file__).resolve().parent.parent
BIN = Path(sys.executable).parent
SLUICE = str(BIN / "sluice")
WARCIO = str(BIN / "warcio")
USER_AGENT = "sluice-faults/0.1 (+http://operator.test/contact)"
ROBOTS_PATH = "/robots.txt"
POLL_S = 0.05
EXIT_TIMEOUT_S = 180.0  # generous: two loaded cores shared with other work
FIGURES_PREFIX = "FAULT-FIGURES "

# Every hostile corner of the synthetic web off except robots.txt and redirects: a page
# whose links the crawler drops on purpose (near-duplicates, traps, farms, bad inputs)
# would blur "reachable". Robots rules and redirect chains stay, so reachability is not
# the bare link graph.
PLAIN = dict(slow_hosts=False, failing_hosts=False, trap=False, farm=False,
             near_duplicates=False, ssrf_bait=False, bad_inputs=False)


def make_web(seed: int, hosts: int, pages: int) -> SyntheticWeb:
    """A small synthetic web with robots.txt rules and redirects."""
    return SyntheticWeb.generate(WebSpec(seed=seed, hosts=hosts, pages=pages,
                                         zipf_exponent=0.5, **PLAIN))


def reachable(web: SyntheticWeb) -> set[str]:
    """Canonical URLs a polite crawler must fetch: BFS from the seeds over links not
    marked nofollow, skipping what robots.txt disallows for our product token
    (RFC 9309 s.2.2.1; 5xx robots.txt: all disallowed, s.2.3.1.4)."""
    token = product_token(USER_AGENT)
    return {canonicalize(u) for u in web.reachable(user_agent=token, honour_nofollow=True)}


# -- the synthetic web on a thread ---------------------------------------------------------


class WebThread:
    """A SyntheticServer on 127.0.0.1, run by its own event loop on a thread."""

    def __init__(self, web: SyntheticWeb, *, latency: float = 0.01) -> None:
        self.web = web
        self.server = SyntheticServer(web, latency=latency)
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._loop.run_forever, daemon=True)
        self.port = 0

    def __enter__(self) -> WebThread:
        self._thread.start()
        self.port = asyncio.run_coroutine_threadsafe(
            self.server.start(LOOPBACK, 0), self._loop).result(30)
        return self

    def __exit__(self, *exc: object) -> None:
        asyncio.run_coroutine_threadsafe(self.server.stop(), self._loop).result(30)
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(30)
        self._loop.close()

    @property
    def host_map(self) -> str:
        return f"*.test=127.0.0.1:{self.port}"

    def log(self) -> list[RequestRecord]:
        return list(self.server.log)

    def page_requests(self) -> int:
        """Requests served so far, robots.txt left out."""
        return sum(1 for r in self.log() if r.path != ROBOTS_PATH)


# -- job files -----------------------------------------------------------------------------


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # JSON string escapes are valid TOML basic strings
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"no TOML form for {value!r}")


def toml_text(data: Mapping[str, Any]) -> str:
    """A TOML document for a two-level mapping (top-level keys and [tables])."""
    lines = [f"{k} = {_toml_value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    for name, table in data.items():
        if isinstance(table, dict):
            lines.append(f"\n[{name}]")
            lines += [f"{k} = {_toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


def merge(base: dict[str, Any], over: Mapping[str, Any]) -> dict[str, Any]:
    out = dict(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merge(out[key], value)
        else:
            out[key] = value
    return out


@contextlib.contextmanager
def tmpfs_at(where: Path, size: str, keep_to: Path | None = None) -> Iterator[Path]:
    """A tmpfs of ``size`` mounted on a new folder ``where`` (needs root), unmounted after;
    its files are copied to ``keep_to`` first, for a look after a failure."""
    where.mkdir()
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                   check=True)
    try:
        yield where
    finally:
        if keep_to is not None:
            shutil.copytree(where, keep_to)
        if subprocess.run(["umount", str(where)], check=False).returncode != 0:
            subprocess.run(["umount", "-l", str(where)], check=False)


def job_settings(name: str, web: WebThread, **over: Any) -> dict[str, Any]:
    """Job settings for a fault test: no page budget, short delays, a short lease."""
    data: dict[str, Any] = {
        "name": name,
        "seeds": list(web.web.seeds),
        "scope": {"allow_hosts": ["*.test"]},
        "budget": {"max_pages_per_host": 1_000_000},  # no budget limit in these tests
        # no earned host budget either, and neither a slow lane nor a probation for hosts
        # the link-spam defence does not trust yet (the synthetic web's small hosts)
        "priority": {"host_budget_base": 0, "untrusted_delay_s": 0.0, "suspect_delay_s": 0.0,
                     "probation_s": 0.0},
        "politeness": {"min_delay_s": 0.05, "response_time_factor": 0.0,
                       "retry_backoff_s": 0.2, "crawl_delay_cap_s": 0.2},
        "fetch": {"user_agent": USER_AGENT, "map_hosts": [web.host_map], "concurrency": 16,
                  "connect_timeout_s": 5.0, "read_timeout_s": 5.0, "total_timeout_s": 10.0},
        "lease": {"ttl_s": 4.0, "batch": 16},
    }
    return merge(data, over)


def write_job(path: Path, settings: Mapping[str, Any]) -> Path:
    JobSettings.model_validate(settings)  # fail here, not in a subprocess
    path.write_text(toml_text(settings), encoding="utf-8")
    return path


def server_tuning(extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """What sluice asks of a Redis server, plus an fsync per write (nothing acknowledged
    is lost when the server is killed: Redis persistence docs, appendfsync always)."""
    return {**redis_tuning(JobSettings()), "appendfsync": "always", **(extra or {})}


# -- processes -----------------------------------------------------------------------------


class Proc:
    """A sluice command as a subprocess, its output in files under ``logs``."""

    def __init__(self, args: Sequence[str], logs: Path, name: str) -> None:
        logs.mkdir(parents=True, exist_ok=True)
        self.name = name
        self.args = list(args)
        self.stdout_path = logs / f"{name}.out"
        self.stderr_path = logs / f"{name}.err"
        with self.stdout_path.open("wb") as out, self.stderr_path.open("wb") as err:
            self.popen = subprocess.Popen(self.args, stdout=out, stderr=err, cwd=REPO,
                                          stdin=subprocess.DEVNULL)

    @property
    def pid(self) -> int:
        return self.popen.pid

    def alive(self) -> bool:
        return self.popen.poll() is None

    def signal(self, sig: int) -> None:
        if self.alive():
            os.kill(self.pid, sig)

    def kill(self) -> None:
        """SIGKILL, as a crash; waits for the process to be gone."""
        self.signal(signal.SIGKILL)
        self.popen.wait(30)

    def wait(self, timeout: float = EXIT_TIMEOUT_S) -> int:
        try:
            return self.popen.wait(timeout)
        except subprocess.TimeoutExpired:
            self.signal(signal.SIGUSR1)  # sluice prints what every task waits on
            time.sleep(1.0)
            self.kill()
            raise AssertionError(f"{self.name} did not finish in {timeout:.0f} s:\n"
                                 + self.stderr()[-4000:]) from None

    def terminate(self, timeout: float = 60.0) -> int:
        """SIGTERM (a clean stop), then wait."""
        self.signal(signal.SIGCONT)
        self.signal(signal.SIGTERM)
        return self.wait(timeout)

    def stdout(self) -> str:
        return self.stdout_path.read_text(errors="replace")

    def stderr(self) -> str:
        return self.stderr_path.read_text(errors="replace")

    def ensure_gone(self) -> None:
        """For teardown: a process still running is continued and killed."""
        if self.alive():
            self.signal(signal.SIGCONT)
            self.kill()


def sluice(*args: str) -> list[str]:
    return [SLUICE, *args]


def child_pids(pid: int) -> list[int]:
    """The processes ``pid`` started (Linux /proc; its main thread's children)."""
    try:
        return [int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except (OSError, ValueError):
        return []


def run_json(args: Sequence[str], timeout: float = 60.0) -> dict[str, Any]:
    """Run a sluice command that prints one JSON document; return it."""
    done = subprocess.run(list(args), capture_output=True, text=True, timeout=timeout, cwd=REPO,
                          check=False)
    assert done.returncode == 0, f"{args} exited {done.returncode}:\n{done.stderr[-3000:]}"
    return json.loads(done.stdout)


def wait_until(check: Callable[[], bool], timeout: float, what: str,
               procs: Iterable[Proc] = ()) -> None:
    """Poll ``check``; fail if ``timeout`` passes or a watched process ends first."""
    watched = list(procs)
    deadline = time.monotonic() + timeout
    while not check():
        for p in watched:
            if not p.alive():
                raise AssertionError(f"{p.name} ended ({p.popen.returncode}) before {what}:\n"
                                     + p.stderr()[-3000:])
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")
        time.sleep(POLL_S)


@dataclass
class Crew:
    """A daemon and its workers for one job on one Redis (a server or a Cluster)."""

    job_file: Path
    name: str
    redis_url: str
    root: Path
    procs: list[Proc] = field(default_factory=list)
    workers: list[Proc] = field(default_factory=list)
    daemon: Proc | None = None
    _serial: int = 0

    def start_daemon(self) -> Proc:
        self.daemon = self._spawn(sluice("daemon", "--config", str(self.job_file),
                                         "--redis", self.redis_url), "daemon")
        wait_until(lambda: "sluice daemon:" in self.daemon.stdout(), 60, "the daemon to start",
                   [self.daemon])
        return self.daemon

    def start_worker(self, folder: Path | None = None) -> Proc:
        """A draining worker of one process (killing it kills the worker itself); its
        output goes to ``folder``, else a folder of its own (out/wN)."""
        self._serial += 1
        name = f"w{self._serial}"
        out = folder if folder is not None else self.root / "out" / name
        proc = self._spawn(sluice("worker", "--redis", self.redis_url, "--job", self.name,
                                  "--out", str(out), "--drain", "--processes", "1"), name)
        self.workers.append(proc)
        return proc

    def _spawn(self, args: list[str], name: str) -> Proc:
        proc = Proc(args, self.root / "logs", name)
        self.procs.append(proc)
        return proc

    def live_workers(self) -> list[Proc]:
        return [w for w in self.workers if w.alive()]

    def finish(self, timeout: float = EXIT_TIMEOUT_S) -> None:
        """Wait for every live worker to drain and exit 0, then stop the daemon."""
        for w in self.live_workers():
            code = w.wait(timeout)
            assert code == 0, f"{w.name} exited {code}:\n{w.stderr()[-3000:]}"
        if self.daemon is not None:
            self.daemon.terminate()

    def status(self) -> dict[str, Any]:
        return run_json(sluice("status", "--redis", self.redis_url, "--job", self.name))

    def close(self) -> None:
        for p in self.procs:
            p.ensure_gone()


# -- a Redis Cluster with replicas -----------------------------------------------------------


INFO_TIMEOUT_S = 2.0  # a node's INFO read during a failover: how long it may take


class ReplicatedCluster(LoopbackCluster):
    """Three masters and three replicas on loopback (frontier/local_cluster.py), a short
    node timeout so that a replica takes over a dead master within seconds (Redis Cluster
    spec: failover)."""

    NODE_TIMEOUT_MS = 1000
    READY_TIMEOUT_S = 60.0

    def __init__(self, directory: Path, masters: int = 3) -> None:
        super().__init__(directory, masters=masters, replicas=1, config=server_tuning({
            "cluster-node-timeout": str(self.NODE_TIMEOUT_MS),
            "cluster-replica-validity-factor": "0",
        }))

    @property
    def url(self) -> str:
        return f"redis+cluster://{LOOPBACK}:{self.nodes[0].port}"

    def masters_now(self) -> list[RedisProcess]:
        return [n for n in self.nodes if n.is_running()
                and _replication(n.port).get("role") == "master"]

    def wait_serving(self, live: list[RedisProcess]) -> None:
        """Every live node sees cluster_state:ok and all slots served."""
        deadline = time.monotonic() + self.READY_TIMEOUT_S
        while True:
            infos = [cluster_info(n.port, timeout_s=INFO_TIMEOUT_S) for n in live]
            if all(i.get("cluster_state") == "ok"
                   and i.get("cluster_slots_ok") == str(CLUSTER_SLOTS) for i in infos):
                return
            if time.monotonic() > deadline:
                raise RedisLaunchError(f"cluster not healthy: {infos}")
            time.sleep(0.1)

    def kill_master(self, spare: RedisProcess) -> RedisProcess:
        """SIGKILL a master other than ``spare`` and wait until its replica has been
        promoted and every live node serves all slots again; returns the killed node."""
        victim = next(n for n in self.masters_now() if n is not spare)
        replica = next(n for n in self.nodes
                       if _replication(n.port).get("master_port") == str(victim.port))
        victim.kill()
        deadline = time.monotonic() + self.READY_TIMEOUT_S
        while _replication(replica.port).get("role") != "master":
            if time.monotonic() > deadline:
                raise RedisLaunchError(f"replica {replica.port} of {victim.port} not promoted")
            time.sleep(0.05)
        self.wait_serving([n for n in self.nodes if n.is_running()])
        return victim


def _replication(port: int) -> dict[str, str]:
    return replication_info(port, timeout_s=INFO_TIMEOUT_S)


# -- the audit ---------------------------------------------------------------------------


def warcio_check(path: Path) -> str | None:
    """``warcio check FILE`` (digests and record structure); None if it passes."""
    done = subprocess.run([WARCIO, "check", str(path)], capture_output=True, text=True,
                          timeout=120, check=False)
    if done.returncode == 0:
        return None
    return f"{path.name}: exit {done.returncode}: {(done.stdout + done.stderr).strip()[-500:]}"


def torn_member(path: Path) -> str | None:
    """Where a WARC file stops inside a gzip member, if it does. ISO 28500 annex D: each
    record is its own gzip member (RFC 1952 s.2.2), so a file cut between records still
    reads; warcio reads a cut last member without complaint, hence this check."""
    data = path.read_bytes()
    view = memoryview(data)
    pos = members = 0
    while pos < len(data):
        inflater = zlib.decompressobj(zlib.MAX_WBITS | 16)
        end = pos
        try:
            while not inflater.eof and end < len(data):
                chunk = view[end:end + 65536]
                end += len(chunk)
                inflater.decompress(chunk)
        except zlib.error as exc:
            return f"{path.name}: member {members} at offset {pos}: {exc}"
        if not inflater.eof:
            return f"{path.name}: member {members} at offset {pos} is cut short at {len(data)}"
        pos = end - len(inflater.unused_data)
        members += 1
    return None


CAPTURE_TYPES = ("response", "revisit")  # ISO 28500 s.6.3 and s.6.7: a capture's record


def warc_responses(paths: Iterable[Path]) -> tuple[Counter[str], list[str]]:
    """Captures (response records, and revisit records of a payload archived before) per
    WARC-Target-URI over ``paths``, and files that do not read."""
    counts: Counter[str] = Counter()
    unreadable = []
    for path in paths:
        try:
            with path.open("rb") as fh:
                for record in ArchiveIterator(fh):
                    if record.rec_type in CAPTURE_TYPES:
                        counts[record.rec_headers.get_header("WARC-Target-URI")] += 1
        except Exception as exc:  # noqa: BLE001 - reported as a figure, asserted empty
            unreadable.append(f"{path.name}: {type(exc).__name__}: {exc}")
    return counts, unreadable


def fetch_log_lines(root: Path) -> list[dict[str, Any]]:
    lines = []
    for path in sorted(root.rglob("fetches.jsonl")):
        for raw in path.read_text(errors="replace").splitlines():
            if raw.strip():
                lines.append(json.loads(raw))
    return lines


def repeats(counts: Counter[str]) -> int:
    """Fetches past the first of each URL."""
    return sum(n - 1 for n in counts.values() if n > 1)


def audit(fault: str, *, web: WebThread, out: Path, status: Mapping[str, Any],
          crashes: int, batch: int, **extra: Any) -> dict[str, Any]:
    """The figures of a finished crawl; printed as one JSON line (``-s`` shows it)."""
    expected = reachable(web.web)
    requested = Counter(canonicalize(f"http://{r.host}{r.path}") for r in web.log()
                        if r.path != ROBOTS_PATH)
    warcs = sorted(out.rglob("*.warc.gz"))
    responses, unreadable = warc_responses(warcs)
    failures = [f for f in (warcio_check(p) for p in warcs) if f is not None]
    torn = [t for t in (torn_member(p) for p in warcs) if t is not None]
    log = fetch_log_lines(out)
    logged_fetched = Counter(ln["url"] for ln in log if ln["outcome"] == "fetched")
    missing = sorted(expected - set(responses))
    figures = {
        "fault": fault,
        "reachable": len(expected),
        "archived": len(expected & set(responses)),
        "lost": len(missing),
        "lost_sample": missing[:5],
        "crashes": crashes,
        "repeat_bound": crashes * batch,
        "repeats_http": repeats(requested),
        "repeats_warc": repeats(responses),
        "warc_files": len(warcs),
        "warc_check_failures": failures,
        "warc_unreadable": unreadable,
        "warc_torn": torn,
        "log_fetched_lines": sum(logged_fetched.values()),
        "log_fetched_urls": len(logged_fetched),
        "status": {k: status[k] for k in ("admitted", "queued", "leased", "fetched", "failed",
                                          "excluded", "dead")},
        "balanced": status["balanced"],
        **extra,
    }
    print(FIGURES_PREFIX + json.dumps(figures), flush=True)
    return figures


def assert_clean(fig: Mapping[str, Any]) -> None:
    """Nothing lost, repeats within a lease batch per crash, books balanced, WARCs valid."""
    s = fig["status"]
    assert fig["lost"] == 0, f"{fig['lost']} reachable pages never archived: {fig['lost_sample']}"
    assert fig["warc_check_failures"] == [], fig["warc_check_failures"]
    assert fig["warc_unreadable"] == [], fig["warc_unreadable"]
    assert fig["warc_torn"] == [], fig["warc_torn"]
    # the frontier's accounting invariant (DEVELOPERS.md) and a drained frontier
    assert fig["balanced"] and s["admitted"] == sum(
        s[k] for k in ("queued", "leased", "fetched", "failed", "excluded", "dead")), s
    assert s["queued"] == 0 and s["leased"] == 0, s
    assert s["fetched"] >= fig["reachable"], s
    assert fig["repeats_http"] <= fig["repeat_bound"], (fig["repeats_http"], fig["repeat_bound"])
    # every URL the frontier counts as fetched has its line in a fetch log, once
    assert fig["log_fetched_urls"] == s["fetched"], (fig["log_fetched_urls"], s["fetched"])
    # lines are written before their completion (at least once): a page whose worker died
    # in between has a line from each fetch, within the repeats a crash may cost
    extra_lines = fig["log_fetched_lines"] - fig["log_fetched_urls"]
    assert extra_lines <= fig["repeat_bound"], (extra_lines, fig["repeat_bound"])
