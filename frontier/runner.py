"""Running a crawl: the scheduler's loops beside the fetch workers, which run in this
process or in worker processes of their own.

``sluice crawl``, ``sluice demo`` and ``sluice bench crawl`` call :func:`crawl`;
``sluice worker --processes N`` calls :func:`run_worker_processes`.

Worker processes are ``sluice worker`` children. They share one job (its settings, page
budget and frontier live in Redis) and one output folder: each writes WARC files of
its own (the process id is in the file name) and appends to the one fetch log, whose
appends hold an exclusive ``flock`` (workers/fetch_log.py), so the log stays one file of
whole lines. A child that dies (``kill -9``, a bug) loses nothing: its leases expire
after ``lease.ttl_s`` and the reaper queues them again, while the other children go on.
A stop signal reaches the parent only (each child runs in a process group of its own)
and is passed on once per signal: the first stops leasing and gives fetches in flight
``fetch.stop_grace_s``, a second hands them back at once. Children die with the parent
(``PR_SET_PDEATHSIG``), and the parent alone holds the folder locks and owns the
embedded Redis, which the children reach by its address.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from prometheus_client import CollectorRegistry

from frontier.exceptions import ConfigError, DiskFault
from frontier.process import crawl_process
from frontier.settings import JobSettings

log = logging.getLogger("sluice")

EXIT_DISK_FAULT = 3  # a worker's exit status when the output folder takes no more writes
SERVER_CHECK_S = 1.0  # how often the embedded Redis and the worker processes are checked
CHILD_EXIT_MARGIN_S = 15.0  # past the stop grace, before a child still running is killed


def default_processes(embedded: bool) -> int:
    """One worker process per core, leaving one core for Redis when it runs here."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (
        os.cpu_count() or 1)
    return max(1, cores - 1 if embedded else cores)


def dump_tasks() -> None:
    """SIGUSR1: print what every asyncio task is waiting on (for a crawl that seems stuck)."""
    for task in asyncio.all_tasks():
        task.print_stack(limit=12, file=sys.stderr)
    sys.stderr.flush()


def watch_signals(on_stop: Callable[[], None], on_cancel: Callable[[], None] | None = None
                  ) -> None:
    """The first SIGINT/SIGTERM stops cleanly (``on_stop``), a second one calls
    ``on_cancel`` (stop at once), if given; SIGUSR1 dumps the tasks."""
    loop = asyncio.get_running_loop()
    signals = 0

    def received() -> None:
        nonlocal signals
        signals += 1
        (on_cancel if signals > 1 and on_cancel is not None else on_stop)()

    with contextlib.suppress(NotImplementedError):
        loop.add_signal_handler(signal.SIGINT, received)
        loop.add_signal_handler(signal.SIGTERM, received)
        loop.add_signal_handler(signal.SIGUSR1, dump_tasks)


# -- worker processes ------------------------------------------------------------------------

def worker_command(redis_url: str, job: str, out: Path, *, workers: int = 1,
                   concurrency: int | None = None, drain: bool = False) -> list[str]:
    """The ``sluice worker`` command line of one worker process."""
    args = [sys.executable, "-m", "frontier.cli", "worker", "--redis", redis_url, "--job", job,
            "--out", str(out), "--processes", "1", "--workers", str(workers)]
    if concurrency:
        args += ["--concurrency", str(concurrency)]
    if drain:
        args.append("--drain")
    return args


def _child_setup(parent_pid: int) -> None:
    """In the child before exec: a process group of its own (a terminal's Ctrl-C reaches
    the parent only, which passes it on) and death with the parent (Linux)."""
    os.setpgid(0, 0)
    if sys.platform == "linux":
        from frontier.embedded import _die_with_parent
        _die_with_parent(parent_pid)


@dataclass
class WorkerProcesses:
    """``count`` worker processes running one command line each; watched from the event
    loop of the thread that started them (which must live as long as they do)."""

    command: list[str]
    count: int
    procs: list[subprocess.Popen[bytes]] = field(default_factory=list)
    stops_sent: int = 0
    crashed: list[tuple[int, int]] = field(default_factory=list)  # (pid, exit status)
    fault_message: str | None = None  # the first full-disk message of a child
    relays: list[threading.Thread] = field(default_factory=list)

    def start(self) -> None:
        parent = os.getpid()
        for _ in range(self.count):
            proc = subprocess.Popen(
                self.command, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                preexec_fn=lambda: _child_setup(parent))  # noqa: PLW1509 - main thread
            self.procs.append(proc)
            relay = threading.Thread(target=self._relay, args=(proc,), daemon=True)
            relay.start()
            self.relays.append(relay)

    def _relay(self, proc: subprocess.Popen[bytes]) -> None:
        """Pass a child's stderr on line by line, holding its own one-line messages
        (``sluice: ...``) until it ends: children that stop on a full disk all say so, and
        the operator reads it once (the first, raised by the parent as a DiskFault)."""
        assert proc.stderr is not None
        held: list[str] = []
        for raw in iter(proc.stderr.readline, b""):
            line = raw.decode(errors="replace")
            if line.startswith("sluice: "):
                held.append(line)
            else:
                sys.stderr.write(line)
                sys.stderr.flush()
        proc.stderr.close()
        if proc.wait() == EXIT_DISK_FAULT and held:
            if self.fault_message is None:
                self.fault_message = held[-1].removeprefix("sluice: ").strip()
            return
        sys.stderr.writelines(held)
        sys.stderr.flush()

    def join_relays(self) -> None:
        for relay in self.relays:
            relay.join(timeout=5)

    def stop(self) -> None:
        """Pass one stop signal on to every child still running (a second call: the
        second signal, which hands back what is in flight at once)."""
        self.stops_sent += 1
        for p in self.procs:
            if p.poll() is None:
                with contextlib.suppress(ProcessLookupError):
                    p.send_signal(signal.SIGTERM)

    def running(self) -> int:
        return sum(p.poll() is None for p in self.procs)

    def check(self) -> bool:
        """Note children that ended badly; True while any runs."""
        for p in self.procs:
            code = p.poll()
            if code not in (None, 0) and all(pid != p.pid for pid, _ in self.crashed):
                self.crashed.append((p.pid, code))
                if code == EXIT_DISK_FAULT:  # its message comes once, from the parent
                    continue
                how = f"signal {-code}" if code < 0 else f"exit status {code}"
                print(f"sluice: worker process {p.pid} ended ({how}); its leases return to "
                      "the frontier when they expire, the other processes go on",
                      file=sys.stderr, flush=True)
        return self.running() > 0

    @property
    def disk_fault(self) -> bool:
        return any(code == EXIT_DISK_FAULT for _, code in self.crashed)

    async def wait(self, stopping: Callable[[], bool], grace_s: float) -> None:
        """Until every child ended; once ``stopping()`` holds, children past the stop
        grace (and a margin) are killed."""
        deadline: float | None = None
        while self.check():
            if stopping() and deadline is None:
                deadline = time.monotonic() + grace_s + CHILD_EXIT_MARGIN_S
            if deadline is not None and time.monotonic() > deadline:
                for p in self.procs:
                    if p.poll() is None:
                        p.kill()
            await asyncio.sleep(0.05 if deadline is not None else SERVER_CHECK_S / 4)

    def pages(self) -> int:
        """Pages the children fetched, from the JSON line each prints as it ends."""
        total = 0
        for p in self.procs:
            if p.stdout is None:
                continue
            try:
                lines = p.stdout.read().decode(errors="replace").strip().splitlines()
                total += int(json.loads(lines[-1])["pages"]) if lines else 0
            except (ValueError, KeyError, TypeError, OSError):
                continue
            finally:
                p.stdout.close()
        return total

    def kill_all(self) -> None:
        for p in self.procs:
            if p.poll() is None:
                p.kill()
                p.wait()


async def run_worker_processes(command: list[str], count: int, grace_s: float) -> int:
    """``sluice worker --processes N``: run and watch N children; the exit status is 3 when
    one found the output folder full, else 0. Prints the pages they fetched."""
    crew = WorkerProcesses(command, count)
    crew.start()
    watch_signals(crew.stop, crew.stop)
    try:
        await crew.wait(lambda: crew.stops_sent > 0, grace_s)
    finally:
        crew.kill_all()
        crew.join_relays()
    print(json.dumps({"pages": crew.pages(), "processes": count,
                      "crashed": [pid for pid, _ in crew.crashed]}))
    if crew.disk_fault:
        print(f"sluice: {crew.fault_message or 'a worker process found its output full'}",
              file=sys.stderr, flush=True)
        return EXIT_DISK_FAULT
    if len(crew.crashed) == count:  # none ended well: the first one's status
        code = crew.crashed[0][1]
        return code if code > 0 else 1
    return 0


# -- the crawl -------------------------------------------------------------------------------

async def crawl(settings: JobSettings, out: Path, workers: int = 1, *, processes: int = 1,
                quiet: bool = False, admin: str | None = None,
                progress_every: float | None = None) -> dict[str, Any]:
    """Scheduler loops here and ``processes`` x ``workers`` workers (one process: in this
    one), until drained or spent. The output folder has one owner at a time
    (frontier/folders.py)."""
    from frontier.folders import FolderLock, say_taken_over
    from frontier.seeds import parse_seed_lines, usable_seeds

    if not settings.seeds:
        raise ConfigError("no seeds: pass --seeds FILE (one URL a line) or set seeds in the "
                          "job file")
    seeds = usable_seeds(parse_seed_lines(
        settings.seeds, source="seeds item", max_length=settings.scope.max_url_length,
        schemes=frozenset(settings.scope.schemes)), "seeds")
    settings = settings.model_copy(update={"seeds": tuple(seeds)})
    if not settings.fetch.user_agent:
        raise ConfigError("fetch.user_agent is required: pass --user-agent "
                          "'name/1.0 (+https://you.example/contact)', an honest User-Agent "
                          "with a way to reach you")
    lock = FolderLock(out, label="--out", fix="stop that crawl first, or pass another --out")
    say_taken_over(out, lock.take())
    try:
        with crawl_process():
            return await _crawl_job(settings, out, workers, processes, CollectorRegistry(),
                                    quiet=quiet, admin=admin, progress_every=progress_every)
    finally:
        lock.release()


def _fresh_hint(settings: JobSettings) -> str:
    return ("start afresh with another --out" if settings.redis.url is None
            else "start afresh with another --job")


def nothing_to_do(settings: JobSettings, counts: dict[str, Any]) -> str | None:
    """Why a (resumed) job has nothing to fetch before its workers start, or None."""
    name, fetched = settings.name, counts.get("fetched", 0)
    limit = settings.budget.max_pages
    if limit is not None and fetched >= limit:
        return (f"nothing to do: job {name!r} has spent its page budget ({fetched} of {limit} "
                f"pages fetched); raise --max-pages to fetch more, or {_fresh_hint(settings)}")
    if counts.get("queued", 0) == 0 and counts.get("leased", 0) == 0:
        return (f"nothing to do: job {name!r} has no URL left to fetch ({fetched} fetched of "
                f"{counts.get('admitted', 0)} admitted); add seeds with 'sluice seeds add', "
                f"or {_fresh_hint(settings)}")
    return None


def ending(settings: JobSettings, counts: dict[str, Any], interrupted: bool) -> str:
    """Why the crawl's workers stopped, in words (the summary's ``ended``)."""
    limit = settings.budget.max_pages
    if interrupted:
        return "interrupted"
    if limit is not None and counts.get("fetched", 0) >= limit:
        return "page budget spent"
    if counts.get("queued", 0) == 0 and counts.get("leased", 0) == 0:
        return "nothing left to fetch"
    return "stopped"


class _InProcess:
    """The crawl's workers as tasks of this process."""

    def __init__(self, job: Any, out: Path, workers: int, registry: CollectorRegistry) -> None:
        from frontier.metrics import WorkerMetrics
        from workers.loop import Worker

        metrics = WorkerMetrics(registry)  # one set of counters for all workers here
        self.crew = [Worker(job.store, job.admission, out, metrics=metrics, drain=True)
                     for _ in range(workers)]

    def stop(self) -> None:  # lease no more; in-flight work gets fetch.stop_grace_s
        for w in self.crew:
            w.stop()

    def cancel(self) -> None:  # a second signal: hand back what is in flight, at once
        for w in self.crew:
            w.abandon()

    async def run(self) -> dict[str, Any]:
        await run_together(self.crew)
        return {}


async def run_together(crew: list[Any]) -> None:
    """Run workers of one process until all end; one that fails (a full disk, a bug) makes
    the others hand back what they hold at once, and its error is raised."""
    def cancel() -> None:
        for w in crew:
            w.abandon()

    async def one(w: Any) -> None:
        try:
            await w.run()
        except BaseException:
            cancel()
            raise

    ends = await asyncio.gather(*(one(w) for w in crew), return_exceptions=True)
    for end in ends:
        if isinstance(end, BaseException):
            raise end


class _Children:
    """The crawl's workers as ``sluice worker`` processes on the job's Redis."""

    def __init__(self, job: Any, out: Path, workers: int, processes: int,
                 redis_url: str) -> None:
        s = job.settings
        self.grace_s = s.fetch.stop_grace_s
        self.out = out
        self.crew = WorkerProcesses(
            worker_command(redis_url, s.name, out, workers=workers, drain=True), processes)
        self.crew.start()

    def stop(self) -> None:
        if self.crew.stops_sent == 0:
            self.crew.stop()

    def cancel(self) -> None:
        if self.crew.stops_sent == 0:
            self.crew.stop()
        self.crew.stop()

    async def run(self) -> dict[str, Any]:
        try:
            await self.crew.wait(lambda: self.crew.stops_sent > 0, self.grace_s)
        finally:
            self.crew.kill_all()
            self.crew.join_relays()
        if self.crew.disk_fault:
            raise DiskFault(self.crew.fault_message or (
                f"a worker process found {self.out} full or gone; the others stopped and "
                "handed back what they held. Free space, then run the same command again "
                "to resume"))
        return {"processes": self.crew.count,
                "processes_crashed": [pid for pid, _ in self.crew.crashed]}


async def _crawl_job(settings: JobSettings, out: Path, workers: int, processes: int,
                     registry: CollectorRegistry, *, quiet: bool, admin: str | None,
                     progress_every: float | None = None) -> dict[str, Any]:
    from frontier.daemon import Daemon, serve_admin
    from frontier.job import admit_seeds, open_job
    from frontier.progress import Progress

    async with open_job(settings) as job:
        if job.server is not None:  # a private server: leases of an earlier run are orphans
            await job.store.recover()
        await admit_seeds(job, settings.seeds)
        daemon = Daemon(job, registry)
        before = await daemon.stats_once()
        idle = nothing_to_do(job.settings, before)
        if idle is not None:
            print(f"sluice: {idle}", file=sys.stderr, flush=True)
        stop = asyncio.Event()
        if processes > 1:
            url = job.server.url if job.server is not None else settings.redis.url
            assert url is not None
            runners: _InProcess | _Children = _Children(job, out, workers, processes, url)
        else:
            runners = _InProcess(job, out, workers, registry)
        interrupted = False

        def interrupt() -> None:
            nonlocal interrupted
            interrupted = True
            stop.set()
            runners.stop()

        watch_signals(interrupt, runners.cancel)
        api = await serve_admin(daemon, admin) if admin else None
        background = asyncio.create_task(daemon.run(stop))
        watchdog = asyncio.create_task(_watch_server(job.server, stop, interrupt))
        started = time.monotonic()
        progress = Progress(daemon, quiet=quiet, **(
            {"every_s": progress_every} if progress_every is not None else {}))
        progress.start_from(before)
        async with progress:
            try:
                extra = await runners.run()
            finally:
                stop.set()
                await background
                await watchdog
                if api is not None:
                    await api.cleanup()
            summary = await daemon.stats_once()
            summary["elapsed_s"] = round(time.monotonic() - started, 2)
            summary["interrupted"] = interrupted
            summary["ended"] = ending(job.settings, summary, interrupted)
            summary["out"] = str(out)
            summary.update(extra)
            progress.final(summary)  # the last frame shows these very numbers
        return summary


async def _watch_server(server: Any, stop: asyncio.Event, interrupt: Callable[[], None]
                        ) -> None:
    """Stop the crawl when its embedded Redis exits (no server: nothing to watch)."""
    from frontier.daemon import wait_or_timeout

    while server is not None and not await wait_or_timeout(stop, SERVER_CHECK_S):
        if not server.is_running():
            interrupt()
            return
