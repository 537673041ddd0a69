"""The folders a job writes: each checked writable, each with one owner at a time.

The owner holds ``owner.lock`` in the folder with ``flock(2)`` for as long as it runs and
writes its details there (pid, host name, command, and the address of the Redis it
started). The kernel drops an flock when its holder ends, however it ends, so a dead
owner never blocks anyone: the details it left stay in the file, and the next owner
says it took over. Other commands read the details to reach the owner's Redis instead
of starting a second server on the same data.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import re
import socket
import sys
import time
import uuid
from dataclasses import asdict, dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any

from frontier.exceptions import ConfigError, FolderInUse

LOCK_FILE = "owner.lock"
TAKE_WAIT_S = 0.5  # a reader holds the lock for a moment while it looks at the owner
BRIEF_WAIT_S = 15.0  # how long to wait for a command that ends by itself to let go
BRIEF_COMMANDS = frozenset({"sluice status", "sluice explain", "sluice host", "sluice seeds"})
DETAILS_WAIT_S = 1.0  # an owner writes its details just after it takes the lock
POLL_S = 0.02
MAX_DETAILS_BYTES = 4096
SUBCOMMAND = re.compile(r"^[a-z]{1,16}$")


@dataclass(frozen=True)
class Owner:
    """Who holds a folder (fields a dead owner left behind read the same way)."""

    pid: int | None = None
    host: str = ""
    command: str = ""
    redis_url: str | None = None
    since: str = ""

    @classmethod
    def parse(cls, raw: bytes) -> Owner | None:
        """Details written by :meth:`FolderLock.publish`; None when absent or unreadable."""
        try:
            data = json.loads(raw.decode("utf-8"))
        except ValueError:
            return None
        if not isinstance(data, dict):
            return None
        pid = data.get("pid")
        url = data.get("redis_url")
        return cls(pid=pid if isinstance(pid, int) and not isinstance(pid, bool) else None,
                   host=str(data.get("host") or ""), command=str(data.get("command") or ""),
                   redis_url=url if isinstance(url, str) and url else None,
                   since=str(data.get("since") or ""))

    @property
    def on_this_host(self) -> bool:
        return self.host == socket.gethostname()

    def describe(self) -> str:
        """``sluice crawl (pid 4242 on host box, since 2026-01-02T03:04:05+00:00)``."""
        where = [f"pid {self.pid}" if self.pid is not None else "pid unknown"]
        if self.host:
            where.append(f"on host {self.host}")
        since = f", since {self.since}" if self.since else ""
        return f"{self.command or 'another sluice'} ({' '.join(where)}{since})"


def command_name(argv: list[str] | None = None) -> str:
    """``sluice <subcommand>`` for the details a lock shows to others."""
    args = sys.argv if argv is None else argv
    words = [arg for arg in args[1:] if not arg.startswith("-")]  # past -v and the like
    if words and SUBCOMMAND.match(words[0]):
        return f"sluice {words[0]}"
    return "sluice"


def this_process(command: str) -> Owner:
    return Owner(pid=os.getpid(), host=socket.gethostname(), command=command,
                 since=datetime.now(UTC).isoformat(timespec="seconds"))


class FolderLock:
    """The owner lock of one folder; ``label`` names the folder in messages (a flag)."""

    def __init__(self, folder: Path, *, command: str | None = None,
                 label: str = "folder", fix: str = "") -> None:
        self.folder = Path(folder)
        self.label = label
        self.fix = fix or "stop it first, or use another folder"
        self._details = this_process(command or command_name())
        self._fd: int | None = None

    @property
    def path(self) -> Path:
        return self.folder / LOCK_FILE

    @property
    def held(self) -> bool:
        return self._fd is not None

    def take(self, *, wait_s: float = TAKE_WAIT_S) -> Owner | None:
        """Take the lock and write this process's details.

        Returns the details a dead owner left behind (None if there were none). Raises
        :class:`FolderInUse` naming the owner when another running process holds it.
        """
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        except OSError as exc:
            raise ConfigError(f"{self.label} {self.folder}: cannot create {LOCK_FILE} there "
                              f"({exc.strerror or exc}); use a folder you can write to") from exc
        deadline = time.monotonic() + wait_s
        patient = wait_s > 0
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    owner = _details_of_holder(fd)
                    if patient and owner.command in BRIEF_COMMANDS:
                        patient = False  # a status or host command: it lets go by itself
                        deadline = time.monotonic() + BRIEF_WAIT_S
                        continue
                    os.close(fd)
                    raise FolderInUse(
                        f"{self.label} {self.folder} is in use by {owner.describe()}: "
                        f"{self.fix}", owner) from None
                time.sleep(POLL_S)
            except OSError as exc:  # a file system without locks (some network mounts)
                os.close(fd)
                raise ConfigError(f"{self.label} {self.folder}: cannot lock {LOCK_FILE} "
                                  f"({exc.strerror or exc}); use a local folder") from exc
        self._fd = fd
        try:
            left = Owner.parse(os.pread(fd, MAX_DETAILS_BYTES, 0))
            self._write()
        except OSError as exc:
            self.release()
            raise ConfigError(f"{self.label} {self.folder}: cannot write {LOCK_FILE} "
                              f"({exc.strerror or exc}); use a folder you can write to") from exc
        return left if left is not None and left.pid is not None else None

    def publish(self, **changes: Any) -> None:
        """Add to the details others read (e.g. ``redis_url`` once the server answers)."""
        self._details = replace(self._details, **changes)
        if self._fd is not None:
            try:
                self._write()
            except OSError as exc:
                raise ConfigError(f"{self.label} {self.folder}: cannot write {LOCK_FILE} "
                                  f"({exc.strerror or exc})") from exc

    def release(self) -> None:
        """Clear the details (a clean end leaves nothing to take over) and unlock."""
        fd, self._fd = self._fd, None
        if fd is None:
            return
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)

    def _write(self) -> None:
        assert self._fd is not None
        data = json.dumps(asdict(self._details)).encode()[:MAX_DETAILS_BYTES]
        os.ftruncate(self._fd, 0)
        os.pwrite(self._fd, data, 0)

    def __enter__(self) -> FolderLock:
        self.take()
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.release()


def read_owner(folder: Path) -> Owner | None:
    """The running owner of ``folder`` (details may be partly unknown), or None if nobody
    holds its lock."""
    try:
        fd = os.open(Path(folder) / LOCK_FILE, os.O_RDONLY | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return _details_of_holder(fd)
        except OSError:
            return None  # no locks on this file system: nobody can hold one
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


def _details_of_holder(fd: int) -> Owner:
    """What the holder wrote; it writes just after taking the lock, so wait a moment."""
    deadline = time.monotonic() + DETAILS_WAIT_S
    while True:
        owner = Owner.parse(os.pread(fd, MAX_DETAILS_BYTES, 0))
        if owner is not None or time.monotonic() >= deadline:
            return owner or Owner()
        time.sleep(POLL_S)


_announced: set[tuple[int | None, str]] = set()


def say_taken_over(folder: Path, left: Owner | None) -> None:
    """One line on stderr when a folder's lock was left by an owner that is gone (once per
    owner: a crawl takes its output and its state folder from the same dead process)."""
    if left is None:
        return
    seen = (left.pid, left.host)
    if seen in _announced:
        return
    _announced.add(seen)
    print(f"sluice: took over {folder} from {left.describe()}, which is no longer running",
          file=sys.stderr, flush=True)


def owner_redis_url(folder: Path, timeout_s: float) -> tuple[Owner | None, str | None]:
    """The running owner and the Redis address it published (waiting up to ``timeout_s``
    while its server starts). (None, None) once nobody holds the folder."""
    deadline = time.monotonic() + timeout_s
    while True:
        owner = read_owner(folder)
        if owner is None or owner.redis_url or time.monotonic() >= deadline:
            return owner, owner.redis_url if owner else None
        time.sleep(POLL_S * 5)


def writable_folder(path: Path, label: str) -> Path:
    """Create ``path`` if missing and prove a file can be written in it, or raise a
    :class:`ConfigError` naming ``label`` (the flag) and the fix."""
    path = Path(path)
    fix = "pass a folder you can write to (it is created if missing)"
    if path.exists() and not path.is_dir():
        raise ConfigError(f"{label} {path}: is a file, not a folder; {fix}")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"{label} {path}: cannot create it ({exc.strerror or exc}); {fix}") from exc
    probe = path / f".write-test-{uuid.uuid4().hex}"
    try:
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise ConfigError(f"{label} {path}: cannot write there ({exc.strerror or exc}); {fix}") from exc
    return path
