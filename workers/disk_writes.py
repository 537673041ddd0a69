"""Whole writes to the output folder, and the OSErrors that mean it takes no more.

A write goes on after short writes; a failed one is cut back (ftruncate) by its caller
to where it began. An OSError meaning the folder takes no more writes
(``DISK_FAULT_ERRNOS``) becomes a ``DiskFault`` naming the path and the cause, on one
line. Used by the WARC files (``workers/archive.py``) and the fetch log
(``workers/fetch_log.py``).
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import os
from collections.abc import Iterator
from pathlib import Path

from frontier.exceptions import DiskFault
from workers.warc_records import one_line

DISK_FAULT_ERRNOS = frozenset({
    errno.ENOSPC, errno.EDQUOT, errno.EFBIG,  # full: no space, quota, file size limit
    errno.EROFS, errno.EACCES, errno.EPERM,  # read-only, or refused to this process
    errno.EIO,  # the device failed
    errno.ENOENT, errno.ESTALE,  # gone: the folder vanished (ESTALE on NFS)
})
"""OSError numbers meaning the output folder takes no more writes."""


def disk_fault(exc: BaseException, path: Path | str) -> DiskFault | None:
    """The ``DiskFault`` for an OSError meaning the folder takes no more writes, else None.

    The message is one line naming the path and the cause.
    """
    if not isinstance(exc, OSError) or exc.errno not in DISK_FAULT_ERRNOS:
        return None
    cause = exc.strerror or os.strerror(exc.errno)
    return DiskFault(one_line(f"cannot write {os.fspath(path)}: {cause} "
                              f"({errno.errorcode[exc.errno]})"))


def vanished(path: Path) -> DiskFault:
    return DiskFault(one_line(f"cannot write {path}: the output folder vanished"))


@contextlib.contextmanager
def disk_faults(path: Path) -> Iterator[None]:
    """Raise the OSErrors of the block that mean a disk fault as ``DiskFault``."""
    try:
        yield
    except OSError as exc:
        fault = disk_fault(exc, path)
        if fault is None:
            raise
        raise fault from exc


@contextlib.contextmanager
def locked(fd: int) -> Iterator[None]:
    """An exclusive flock(2) on ``fd`` for the block."""
    fcntl.flock(fd, fcntl.LOCK_EX)
    try:
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)


def write_all(fd: int, data: bytes, offset: int | None = None) -> None:
    """Write all of ``data`` at ``offset`` (or at the end of an O_APPEND file), going on
    after short writes. An error can leave part of it written."""
    view = memoryview(data)
    while True:
        written = os.write(fd, view) if offset is None else os.pwrite(fd, view, offset)
        if written == len(view):
            return
        if written <= 0:
            raise OSError(errno.EIO, "a write made no progress")
        view = view[written:]
        if offset is not None:
            offset += written


def cut_back(fd: int, end: int) -> bool:
    """Truncate the file to ``end``; False when that failed too."""
    try:
        os.ftruncate(fd, end)
    except OSError:
        return False
    return True
