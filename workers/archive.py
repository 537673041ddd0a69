"""WARC 1.1 files (ISO 28500:2017): opening, appending, rotation, disk faults, crash repair.

``WarcArchive`` writes each fetch as a request record, a response record (or, for a
payload seen before, a revisit record) and, when outlinks are known, a metadata record
holding the page's links as one JSON document, into rotating gzip files
``out_dir/warc/{prefix}-{UTC timestamp}-{serial:05d}-{pid}.warc.gz``. Each file
starts with a warcinfo record; each record is its own gzip member, so a
``RecordRef`` (file name, offset, length) addresses one record directly.
The records themselves are built in ``workers/warc_records.py``.

Disk faults. An exchange's records go to the file in one positioned write; when that
fails the file is cut back (ftruncate) to where the exchange began, the end of the last
whole gzip member, and an OSError meaning the folder takes no more writes
(``DISK_FAULT_ERRNOS``) is raised as ``DiskFault``. A file whose folder vanished (no
link left, or the folder made anew) is a ``DiskFault`` at the next write or close,
never written on silently.

Repair on open. A crash can leave half a gzip member at the end of a WARC file. The
first file an archive opens in a folder repairs every WARC file there that no live
writer holds (a writer keeps an exclusive ``flock`` on its open file): it is cut back
to the end of its last whole member, or removed when none is whole.
"""

from __future__ import annotations

import contextlib
import fcntl
import logging
import mmap
import os
import socket
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from stat import S_ISREG
from typing import Any

from frontier.digests import Capture
from frontier.exceptions import DiskFault
from workers.disk_writes import cut_back, disk_fault, disk_faults, vanished, write_all
from workers.warc_records import (
    GZIP_WBITS,
    RECORD_END,
    REVISIT_PROFILE,
    WARC_CONFORMS_TO,
    WARC_FORMAT,
    HeaderList,
    OutLink,
    RequestHead,
    exchange_records,
    warc_date,
    warcinfo_record,
)

log = logging.getLogger(__name__)

WARC_SUBDIR = "warc"
WARC_SUFFIX = ".warc.gz"
DEFAULT_PREFIX = "sluice"
DEFAULT_MAX_FILE_BYTES = 1_000_000_000
FILE_TIMESTAMP_FORMAT = "%Y%m%d%H%M%S"
SERIAL_WIDTH = 5
_MEMBER_MAGIC = b"\x1f\x8b\x08"  # RFC 1952 s.2.3.1: ID1 ID2, CM 8 (deflate)
_RECORD_START = b"WARC/"  # ISO 28500 s.4: a record opens with its version line
_INFLATE_CHUNK = 1 << 14  # compressed bytes read at a time while checking a member

Clock = Callable[[], datetime]


def utc_now() -> datetime:
    """The current time, timezone-aware UTC."""
    return datetime.now(UTC)


# -- repair on open --------------------------------------------------------------------


def _member_end(data: mmap.mmap | bytes, start: int) -> int | None:
    """End of the whole gzip member at ``start`` holding one WARC record, else None.

    zlib checks the deflate stream and the member's CRC-32 and length (RFC 1952 s.2.3.1);
    the record must open with its version line and end with CRLF CRLF (ISO 28500 s.4).
    """
    inflater = zlib.decompressobj(GZIP_WBITS)
    head = tail = b""
    pos = start
    while not inflater.eof:
        chunk = data[pos:pos + _INFLATE_CHUNK]
        if not chunk:
            return None  # the file ends inside the member
        pos += len(chunk)
        try:
            out = inflater.decompress(chunk)
        except zlib.error:
            return None
        if len(head) < len(_RECORD_START):
            head = (head + out)[:len(_RECORD_START)]
            if not _RECORD_START.startswith(head):
                return None
        if out:
            tail = (tail + out)[-len(RECORD_END):]
    if head != _RECORD_START or tail != RECORD_END:
        return None
    return pos - len(inflater.unused_data)


def whole_members_end(data: mmap.mmap | bytes) -> int:
    """Where the last whole gzip member (one WARC record) of ``data`` ends; 0 if none.

    Searches back from the end for a member start whose member inflates whole. A writer
    only ever appends, so everything before that member is whole too; this costs about
    one record's inflation, not the whole file's.
    """
    limit = len(data)
    while (start := data.rfind(_MEMBER_MAGIC, 0, limit)) >= 0:
        end = _member_end(data, start)
        if end is not None:
            return end
        limit = start
    return 0


def repair_warc(path: Path) -> int | None:
    """Cut a WARC file left by a crash back to the end of its last whole gzip member,
    or remove it when no member is whole.

    A file a live writer holds (its exclusive flock), or no regular file, is left
    alone: returns None.
    Otherwise returns the file's length afterwards (0: removed).
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
    except FileNotFoundError:
        return 0
    try:
        if not S_ISREG(os.fstat(fd).st_mode):
            return None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return None
        held = os.fstat(fd)  # read under the lock: no writer is at work now
        try:
            named = os.stat(path)
        except FileNotFoundError:
            return 0  # another repair removed it meanwhile
        if (named.st_dev, named.st_ino) != (held.st_dev, held.st_ino):
            return None
        size, end = held.st_size, 0
        if size:
            with mmap.mmap(fd, size, access=mmap.ACCESS_READ) as data:
                end = whole_members_end(data)
        if end == 0:
            os.unlink(path)  # a writer that made it a moment ago sees no link and moves on
        elif end < size:
            writable = os.open(path, os.O_WRONLY | os.O_CLOEXEC)
            try:
                os.ftruncate(writable, end)
                os.fsync(writable)
            finally:
                os.close(writable)
        if end < size:
            log.warning("repaired %s: cut %d torn bytes off its end%s", path, size - end,
                        " (nothing whole: removed)" if end == 0 else "")
        return end
    finally:
        os.close(fd)


def repair_warc_folder(directory: Path) -> None:
    """``repair_warc`` every WARC file of ``directory``."""
    for path in sorted(directory.glob(f"*{WARC_SUFFIX}")):
        repair_warc(path)


@dataclass(slots=True)
class _OpenWarc:
    """The WARC file being written."""

    path: Path
    fd: int
    end: int  # the end of its last whole exchange: where the next one goes
    torn: bool = False  # a failed write left bytes past ``end`` that could not be cut


@dataclass(frozen=True, slots=True)
class RecordRef:
    """Where a response record lies: file name, gzip member offset and length."""

    file: str
    offset: int
    length: int
    record_id: str

class WarcArchive:
    """Rotating gzip WARC 1.1 writer for request/response/metadata triples.

    Files open lazily on the first write; ``close()`` finishes the current
    file, and a later write starts a new one. One asyncio loop, no locking.
    The first open repairs the folder's WARC files left by a crash.
    """

    def __init__(
        self,
        out_dir: Path,
        *,
        prefix: str = DEFAULT_PREFIX,
        max_file_bytes: int = DEFAULT_MAX_FILE_BYTES,
        software: str,
        operator: str | None,
        job: str,
        clock: Clock = utc_now,
    ) -> None:
        if max_file_bytes <= 0:
            raise ValueError(f"max_file_bytes must be positive, got {max_file_bytes}")
        self.directory = Path(out_dir) / WARC_SUBDIR
        self.prefix = prefix
        self.max_file_bytes = max_file_bytes
        self.software = software
        self.operator = operator
        self.job = job
        self.clock = clock
        self.files: list[Path] = []
        self._serial = 0
        self._file: _OpenWarc | None = None
        self._folder: tuple[int, int] | None = None  # (device, inode) once the folder is made

    @property
    def current_path(self) -> Path | None:
        """The file being written, or None between files."""
        return self._file.path if self._file is not None else None

    def write_exchange(
        self,
        url: str,
        request_line_and_headers: RequestHead,
        response_status: int,
        response_reason: str,
        response_headers: HeaderList,
        body: bytes,
        fetched_at: datetime,
        remote_ip: str | None = None,
        outlinks: Sequence[OutLink] | None = None,
        *,
        body_decoded: bool = True,
        truncated: str | None = None,
        record_id: str | None = None,
        payload_digest: str | None = None,
        revisit_of: Capture | None = None,
        revisit_profile: str = REVISIT_PROFILE,
    ) -> RecordRef:
        """Write request, response (or revisit) and (with outlinks) metadata records.

        ``request_line_and_headers`` is the raw request head (bytes) or
        ``(method, path, headers)``. ``truncated`` is a WARC-Truncated reason
        ("length", "time", "disconnect", "unspecified") for partial bodies.
        A metadata record is written only for a non-empty ``outlinks``.
        ``record_id`` is the response record's ID when chosen beforehand
        (:func:`new_record_id`), ``payload_digest`` the body's digest when known
        (:func:`payload_digest`). With ``revisit_of`` (the first capture of the same
        payload) the response is written as a revisit record (ISO 28500 s.6.7.2): the
        HTTP head without the body.
        Returns the location of the response (or revisit) record. Rotates afterwards
        when the file has grown past ``max_file_bytes``.

        The exchange is written whole or not at all. Raises ``DiskFault`` when the
        folder takes no more writes (the file is then cut back to the exchange before),
        and ValueError, writing nothing, for a raw request head readers cannot parse.
        """
        members, response_id = exchange_records(
            url, request_line_and_headers, response_status, response_reason,
            response_headers, body, fetched_at, remote_ip, outlinks,
            body_decoded=body_decoded, truncated=truncated, record_id=record_id,
            payload_digest=payload_digest, revisit_of=revisit_of,
            revisit_profile=revisit_profile,
        )
        file = self._open()
        offset = self._append(file, b"".join(members))
        ref = RecordRef(file.path.name, offset + len(members[0]), len(members[1]),
                        response_id)
        if file.end >= self.max_file_bytes:
            self.close()
        return ref

    def close(self) -> None:
        """Make the current file durable (fsync) and close it, if any.

        Raises ``DiskFault`` when that failed or the folder vanished; the file is
        closed either way.
        """
        file, self._file = self._file, None
        if file is None:
            return
        with disk_faults(file.path):
            try:
                if os.fstat(file.fd).st_nlink == 0:
                    raise vanished(file.path)
                os.fsync(file.fd)
            finally:
                os.close(file.fd)

    def __enter__(self) -> WarcArchive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- internals -------------------------------------------------------------------

    def _open(self) -> _OpenWarc:
        if self._file is not None:
            return self._file
        with disk_faults(self.directory):
            self._check_folder()
            now = self.clock()
            stamp = now.astimezone(UTC).strftime(FILE_TIMESTAMP_FORMAT)
            while True:
                serial = f"{self._serial:0{SERIAL_WIDTH}d}"
                name = f"{self.prefix}-{stamp}-{serial}-{os.getpid()}{WARC_SUFFIX}"
                self._serial += 1
                path = self.directory / name
                try:
                    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC,
                                 0o644)
                except FileExistsError:
                    continue
                try:  # held while the file is open: repairs leave it alone
                    fcntl.flock(fd, fcntl.LOCK_EX)
                    if os.fstat(fd).st_nlink:
                        break
                except BaseException:
                    os.close(fd)
                    raise
                os.close(fd)  # a repair took it for a crash's leftover: take the next name
        file = _OpenWarc(path, fd, 0)
        try:
            self._append(file, self._warcinfo(name, now))
        except BaseException:
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(path)
            raise
        self._file = file
        self.files.append(path)
        return file

    def _check_folder(self) -> None:
        """Make the folder and repair its files the first time; later, make sure it is
        still the same folder (a vanished one is not made again)."""
        if self._folder is None:
            self.directory.mkdir(parents=True, exist_ok=True)
            repair_warc_folder(self.directory)
            stat = os.stat(self.directory)
            self._folder = (stat.st_dev, stat.st_ino)
            return
        try:
            stat = os.stat(self.directory)
        except FileNotFoundError:
            raise vanished(self.directory) from None
        if (stat.st_dev, stat.st_ino) != self._folder:
            raise vanished(self.directory)

    def _warcinfo(self, name: str, now: datetime) -> bytes:
        """The warcinfo record opening file ``name`` (ISO 28500 s.6.2)."""
        info: dict[str, Any] = {
            "software": self.software,
            "operator": self.operator,
            "hostname": socket.gethostname(),
            "format": WARC_FORMAT,
            "conformsTo": WARC_CONFORMS_TO,
            "isPartOf": self.job,
        }
        return warcinfo_record(name, warc_date(now), info)

    @staticmethod
    def _append(file: _OpenWarc, data: bytes) -> int:
        """Write ``data`` at the end of the file's whole records; returns where it went.

        On any error the file is cut back to where ``data`` began.
        """
        start = file.end
        try:
            if os.fstat(file.fd).st_nlink == 0:
                raise vanished(file.path)
            if file.torn:
                os.ftruncate(file.fd, start)
                file.torn = False
            write_all(file.fd, data, start)
        except DiskFault:
            raise
        except BaseException as exc:
            file.torn = not cut_back(file.fd, start)
            fault = disk_fault(exc, file.path)
            if fault is None:
                raise
            raise fault from exc
        file.end = start + len(data)
        return start
