"""The per-fetch JSON-lines log.

``FetchLog`` appends one JSON object per final fetch outcome to
``out_dir/fetches.jsonl``; reopening appends (resume). Lines wait in memory until
``flush``, which appends them in one write under an exclusive ``flock`` (the workers of
one crawl share the file), cuts the file back to its last whole line when the write
fails, and then fsyncs. Opening the log cuts off a torn last line.
"""

from __future__ import annotations

import json
import logging
import math
import os
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import orjson

from workers.disk_writes import cut_back, disk_faults, locked, vanished, write_all
from workers.warc_records import warc_date

log = logging.getLogger(__name__)

FETCH_LOG_NAME = "fetches.jsonl"
_TAIL_CHUNK = 1 << 16  # bytes read at a time while looking for the log's last newline


def _cut_torn_line(fd: int) -> int:
    """Cut the file back to the end of its last whole line; returns its length.

    The caller holds the file's lock, so no writer is in the middle of a line.
    """
    size = os.fstat(fd).st_size
    if size == 0 or os.pread(fd, 1, size - 1) == b"\n":
        return size
    end, keep = size, 0
    while end > 0:
        start = max(0, end - _TAIL_CHUNK)
        newline = os.pread(fd, end - start, start).rfind(b"\n")
        if newline >= 0:
            keep = start + newline + 1
            break
        end = start
    os.ftruncate(fd, keep)
    log.warning("repaired the fetch log: cut a torn line of %d bytes off its end", size - keep)
    return keep


def repair_fetch_log(path: Path) -> int:
    """Cut a torn last line (one without its newline) off a fetch log; returns the
    log's length (0 when there is none)."""
    try:
        fd = os.open(path, os.O_RDWR | os.O_CLOEXEC)
    except FileNotFoundError:
        return 0
    try:
        with locked(fd):
            return _cut_torn_line(fd)
    finally:
        os.close(fd)


@dataclass(frozen=True, slots=True)
class FetchEntry:
    """One final fetch outcome, as logged."""

    url: str
    outcome: str
    fetched_at: datetime
    status: int | None = None
    reason: str | None = None
    bytes: int = 0
    duration_s: float = 0.0
    depth: int = 0
    host: str = ""
    warc_file: str | None = None
    warc_offset: int | None = None
    content_type: str | None = None
    simhash: int | None = None
    duplicate_of: str | None = None  # the URL first captured with the same payload
    near_duplicate_of: str | None = None  # the URL whose SimHash this page's is near
    hamming: int | None = None  # bits between the two SimHashes

    def to_json(self) -> dict[str, Any]:
        """JSON-ready dict: ISO UTC time ending in Z, SimHash as 16 hex digits."""
        data = {name: getattr(self, name) for name in self.__slots__}  # flat: no deep copy
        data["fetched_at"] = warc_date(self.fetched_at)
        finite = math.isfinite(self.duration_s)
        data["duration_s"] = round(self.duration_s, 6) if finite else None
        data["simhash"] = None if self.simhash is None else f"{self.simhash:016x}"
        return data


class FetchLog:
    """JSON-lines log of fetch outcomes; appends when reopened.

    Lines wait in memory until :meth:`flush` (the worker flushes after each write-back
    batch, before it awaits anything), which appends the batch in one write and fsyncs.
    Several logs (the workers of one crawl) may share the file: each append holds an
    exclusive flock, so lines never interleave. Opening cuts off a torn last line.
    """

    def __init__(self, out_dir: Path) -> None:
        self.path = Path(out_dir) / FETCH_LOG_NAME
        self._lines: list[bytes] = []
        with disk_faults(self.path):
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC,
                         0o644)
            try:
                with locked(fd):
                    _cut_torn_line(fd)
            except BaseException:
                os.close(fd)
                raise
        self._fd: int | None = fd

    def write(self, entry: FetchEntry) -> None:
        """Buffer one line for ``entry``."""
        if self._fd is None:
            raise ValueError("fetch log is closed")
        data = entry.to_json()
        try:
            line = orjson.dumps(data, option=orjson.OPT_APPEND_NEWLINE)
        except orjson.JSONEncodeError:  # a lone surrogate, or an integer past 64 bits
            line = json.dumps(data, separators=(",", ":")).encode("ascii") + b"\n"
        self._lines.append(line)

    def flush(self) -> None:
        """Append the buffered lines in one write and make them durable (fsync).

        Raises ``DiskFault`` when the folder takes no more writes or vanished; the file
        then still ends with a whole line, and the lines stay buffered for a later flush.
        """
        fd = self._fd
        if fd is None:
            return
        with disk_faults(self.path):
            if os.fstat(fd).st_nlink == 0:
                raise vanished(self.path)
            if self._lines:
                data = b"".join(self._lines)
                with locked(fd):
                    end = _cut_torn_line(fd)  # what another writer's failure may have left
                    try:
                        write_all(fd, data)
                    except BaseException:
                        cut_back(fd, end)
                        raise
                self._lines.clear()
            os.fsync(fd)

    def close(self) -> None:
        """Flush and close the log; the file is closed even when the flush fails."""
        fd = self._fd
        if fd is None:
            return
        try:
            self.flush()
        finally:
            self._fd = None
            self._lines.clear()
            with disk_faults(self.path):
                os.close(fd)

    def __enter__(self) -> FetchLog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
