"""Tests for workers.archive when the disk fails and after a crash: disk errors become
one-line DiskFaults, a full disk or a vanished folder leaves nothing torn, and WARC
files a crash tore are cut back to their last whole record."""

from __future__ import annotations

import contextlib
import errno
import fcntl
import gzip
import json
import os
import random
import shutil
import subprocess
import sys
import tempfile
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import example, given
from hypothesis import strategies as st

import workers.archive as archive_module
from frontier.exceptions import DiskFault
from tests.archivekit import (
    BODIES,
    assert_warcio_check_passes,
    entry,
    new_archive,
    read_checked,
    read_lines,
    write_sample,
)
from workers.archive import RecordRef
from workers.disk_writes import disk_fault
from workers.fetch_log import FetchLog


# --- disk faults ------------------------------------------------------------------------

REPO = Path(__file__).resolve().parents[1]
# POSIX write(2)/open(2)/mkdir(2) errors meaning the folder takes no more writes: no space
# (ENOSPC), quota (EDQUOT), read-only (EROFS), I/O error (EIO), file too large (EFBIG),
# gone (ENOENT; ESTALE on NFS), refused (EACCES, EPERM).
DISK_ERRNOS = ["ENOSPC", "EDQUOT", "EROFS", "EIO", "EFBIG", "ENOENT", "ESTALE", "EACCES",
               "EPERM"]


@pytest.mark.parametrize("name", DISK_ERRNOS)
def test_disk_errors_become_one_line_disk_faults(name: str) -> None:
    code = getattr(errno, name)
    path = Path("/data/out\nnext/warc/x\udcff.warc.gz")
    fault = disk_fault(OSError(code, os.strerror(code)), path)
    assert isinstance(fault, DiskFault)
    message = str(fault)
    assert len(message.splitlines()) == 1
    assert name in message and os.strerror(code) in message
    assert "/data/out\\nnext/warc/x\\udcff.warc.gz" in message
    message.encode("utf-8")  # printable anywhere: no lone surrogate left


def test_other_errors_are_not_disk_faults() -> None:
    assert disk_fault(OSError(errno.EBADF, "bad"), Path("x")) is None
    assert disk_fault(ValueError("x"), Path("x")) is None


@contextlib.contextmanager
def tmpfs(where: Path, size: str) -> Iterator[bool]:
    """A private tmpfs of ``size`` mounted at ``where``, unmounted on exit; yields
    whether the mount worked (it needs root)."""
    where.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size},mode=0755",
                           "sluice-test", str(where)], capture_output=True)
    if done.returncode != 0:
        yield False
        return
    try:
        yield True
    finally:
        if subprocess.run(["umount", str(where)], capture_output=True).returncode != 0:
            subprocess.run(["umount", "-l", str(where)], check=True)


FILL_BODY = 30_000  # random bytes: gzip cannot shrink them, so each exchange costs ~31 KB
FILL_LINE_URL = "http://log.test/" + "p" * 2000  # ~2.1 KB a fetch-log line
FILL_BATCH = 40  # lines per flush, as a write-back batch
FILE_SIZE_LIMIT = 600_000  # RLIMIT_FSIZE of the child that fills files to their limit


def fill_until_fault(out: Path, ballast: int = 0) -> dict[str, Any]:
    """Write WARC exchanges, then fetch-log batches, each until the disk refuses.

    With ``ballast``, a file of that size is written first and removed after the WARC
    fault, and one more exchange goes into the same file. Returns what was written.
    """
    rng = random.Random(11)
    out.mkdir(parents=True, exist_ok=True)
    report: dict[str, Any] = {"warc_fault": None, "log_fault": None, "after_fault": None}
    if ballast:
        (out / "ballast").write_bytes(b"\0" * ballast)
    archive = new_archive(out)
    refs: list[RecordRef] = []
    try:
        for i in range(10_000):
            refs.append(write_sample(archive, i, rng.randbytes(FILL_BODY)))
    except DiskFault as fault:
        report["warc_fault"] = str(fault)
    if ballast:
        (out / "ballast").unlink()
        refs.append(write_sample(archive, len(refs), rng.randbytes(FILL_BODY)))
        report["after_fault"] = refs[-1].offset
    archive.close()
    log = FetchLog(out)
    lines = 0
    try:
        for _ in range(10_000):
            for i in range(FILL_BATCH):
                log.write(entry(lines + i, url=FILL_LINE_URL))
            log.flush()
            lines += FILL_BATCH
    except DiskFault as fault:
        report["log_fault"] = str(fault)
    with contextlib.suppress(DiskFault):  # the lines of the refused batch are still waiting
        log.close()
    report["refs"] = [[r.file, r.offset, r.length, r.record_id] for r in refs]
    report["lines"] = lines
    return report


def fill_in_child_with_file_size_limit(out: Path) -> dict[str, Any]:
    """fill_until_fault in a child process whose files may not grow past FILE_SIZE_LIMIT
    (setrlimit(2) RLIMIT_FSIZE: a write past it fails with EFBIG; Python ignores SIGXFSZ)."""
    code = (
        "import json, resource, sys\n"
        f"resource.setrlimit(resource.RLIMIT_FSIZE, ({FILE_SIZE_LIMIT}, {FILE_SIZE_LIMIT}))\n"
        "from pathlib import Path\n"
        "from tests.test_archive_faults import fill_until_fault\n"
        "print(json.dumps(fill_until_fault(Path(sys.argv[1]))))\n"
    )
    done = subprocess.run([sys.executable, "-B", "-c", code, str(out)], cwd=REPO,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.splitlines()[-1])


@pytest.mark.parametrize("limit", ["tmpfs", "file_size"])
def test_a_full_disk_is_a_disk_fault_and_leaves_nothing_torn(tmp_path: Path, limit: str) -> None:
    # A real small file system (a 1 MiB tmpfs: ENOSPC) and a real file size limit (EFBIG).
    # Without mount rights the tmpfs case runs with the file size limit.
    out = tmp_path / "out"
    with tmpfs(out, "1m") if limit == "tmpfs" else contextlib.nullcontext(False) as mounted:
        if mounted:
            report, cause = fill_until_fault(out, ballast=256 * 1024), "ENOSPC"
        else:
            report, cause = fill_in_child_with_file_size_limit(out), "EFBIG"
        warc_files = sorted((out / "warc").glob("*.warc.gz"))
        assert len(warc_files) == 1
        path = warc_files[0]
        assert report["warc_fault"] and cause in report["warc_fault"]
        assert str(path) in report["warc_fault"] and "\n" not in report["warc_fault"]
        # Nothing torn: every gzip member whole (RFC 1952 s.2.2, as `gzip -t` checks) and
        # every record read back with its digests (warcio).
        data = path.read_bytes()
        gzip.decompress(data)
        records = read_checked(path)
        refs = report["refs"]
        assert len(records) == 1 + 3 * len(refs) and len(refs) >= 10
        responses = [fields.get_header("WARC-Record-ID") for kind, fields, *_ in records
                     if kind == "response"]
        assert responses == [ref[3] for ref in refs]
        for name, offset, length, _ in refs:
            assert name == path.name
            assert zlib.decompressobj(wbits=31).decompress(data[offset:offset + length])
        if mounted:  # after room was made, the next exchange went where the cut left off
            metadata_at = refs[-2][1] + refs[-2][2]
            request_at = metadata_at + member_length(data, metadata_at)
            assert report["after_fault"] == request_at + member_length(data, request_at)
        assert_warcio_check_passes(path)
        # The fetch log: whole lines only, exactly the ones flushed before the fault.
        log_path = out / "fetches.jsonl"
        assert report["log_fault"] and cause in report["log_fault"]
        assert str(log_path) in report["log_fault"]
        lines = read_lines(log_path)
        assert report["lines"] >= FILL_BATCH and len(lines) == report["lines"]
        assert [line["depth"] for line in lines] == list(range(report["lines"]))


def member_length(data: bytes, offset: int) -> int:
    """Length of the gzip member starting at ``offset`` (RFC 1952 s.2.2)."""
    inflater = zlib.decompressobj(wbits=31)
    inflater.decompress(data[offset:])
    assert inflater.eof
    return len(data) - offset - len(inflater.unused_data)


def test_a_read_only_folder_is_a_disk_fault(tmp_path: Path) -> None:
    out = tmp_path / "out"
    with tmpfs(out, "1m") as mounted:
        (out / "warc").mkdir()
        (out / "fetches.jsonl").write_bytes(b"")
        if mounted:  # the file system turns read-only (EROFS)
            subprocess.run(["mount", "-o", "remount,ro", str(out)], check=True)
            cause = "EROFS"
        else:  # without mount rights: a folder this user may not write to (EACCES)
            (out / "fetches.jsonl").chmod(0o444)
            (out / "warc").chmod(0o555)
            cause = "EACCES"
        with pytest.raises(DiskFault, match=cause):
            FetchLog(out)
        archive = new_archive(out)
        with pytest.raises(DiskFault, match=cause):
            write_sample(archive, 0, b"x")
        assert list((out / "warc").iterdir()) == []
        if not mounted:
            (out / "warc").chmod(0o755)


@pytest.mark.parametrize("how", ["removed", "replaced"])
def test_a_vanished_output_folder_is_a_disk_fault_at_the_next_write_and_flush(
    tmp_path: Path, how: str
) -> None:
    # Writing on into files whose folder was deleted would lose every page silently.
    out = tmp_path / "out"
    archive, log = new_archive(out), FetchLog(out)
    write_sample(archive, 0, b"a")
    log.write(entry(0))
    log.flush()
    shutil.rmtree(out)
    if how == "replaced":
        (out / "warc").mkdir(parents=True)
    with pytest.raises(DiskFault, match="vanished"):
        write_sample(archive, 1, b"b")
    log.write(entry(1))
    with pytest.raises(DiskFault, match="vanished"):
        log.flush()
    with pytest.raises(DiskFault, match="vanished"):
        archive.close()
    with pytest.raises(DiskFault):  # a later file is not made in a folder made anew
        write_sample(archive, 2, b"c")
    with pytest.raises(DiskFault):
        log.close()
    assert list(out.rglob("*")) == ([] if how == "removed" else [out / "warc"])


# --- repair on open ---------------------------------------------------------------------


def member_ends(data: bytes) -> list[int]:
    """Ends of the gzip members of ``data``, inflated one after another (RFC 1952 s.2.2)."""
    ends, pos = [], 0
    while pos < len(data):
        pos += member_length(data, pos)
        ends.append(pos)
    return ends


_SAMPLE: list[tuple[bytes, list[int]]] = []


def sample_warc() -> tuple[bytes, list[int]]:
    """A WARC file of four exchanges (one without outlinks) and its member ends."""
    if not _SAMPLE:
        with tempfile.TemporaryDirectory() as tmp:
            archive = new_archive(Path(tmp))
            for i, body in enumerate(BODIES):
                write_sample(archive, i, body, outlinks=i != 1)
            archive.close()
            data = archive.files[0].read_bytes()
        _SAMPLE.append((data, member_ends(data)))
    return _SAMPLE[0]


def cuts(data: st.DataObject) -> tuple[int, bytes]:
    """A cut offset in the sample, often near a member boundary, and what follows it
    after a crash: nothing, zeros (a file extended but not written) or stray bytes."""
    whole, ends = sample_warc()
    near_end = st.sampled_from([0, *ends]).flatmap(
        lambda e: st.integers(max(0, e - 3), min(len(whole), e + 3)))
    cut = data.draw(st.one_of(st.integers(0, len(whole)), near_end), label="cut")
    tail = data.draw(st.one_of(st.just(b""), st.binary(max_size=40),
                               st.integers(1, 4096).map(lambda n: b"\0" * n),
                               st.sampled_from([b"\x1f", b"\x1f\x8b", b"\x1f\x8b\x08\0"])),
                     label="tail")
    return cut, tail


@given(data=st.data())
@example(data=None)  # type: ignore[arg-type]
def test_repair_cuts_a_torn_warc_file_back_to_its_last_whole_member(
    data: st.DataObject | None
) -> None:
    whole, ends = sample_warc()
    cut, tail = cuts(data) if data is not None else (ends[-1] - 5, b"")
    damaged = whole[:cut] + tail
    # The last whole member ends at the last member end the damaged file still holds
    # (a tail of zeros can restore a cut length field: its high bytes are zero).
    kept = max([end for end in ends if damaged[:end] == whole[:end]], default=0)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "sluice-20310506070000-00000-1.warc.gz"
        path.write_bytes(damaged)
        archive_module.repair_warc(path)
        if kept == 0:  # not even the warcinfo record was whole: nothing to keep
            assert not path.exists()
            return
        repaired = path.read_bytes()
        assert repaired == whole[:kept]
        gzip.decompress(repaired)  # every member whole, as `gzip -t` checks
        assert len(read_checked(path)) == ends.index(kept) + 1  # warcio, digests checked


def test_a_new_run_repairs_the_warc_files_of_a_crashed_one(tmp_path: Path) -> None:
    earlier = new_archive(tmp_path)
    for i in range(3):
        write_sample(earlier, i, BODIES[i])
    earlier.close()
    crashed = earlier.files[0]
    whole = crashed.read_bytes()
    ends = member_ends(whole)
    crashed.write_bytes(whole[:ends[-1] - 9])  # the last record half written
    leftover = crashed.with_name("sluice-20310506065900-00003-7.warc.gz")
    leftover.write_bytes(b"")  # a file made just before the crash
    later = new_archive(tmp_path)
    write_sample(later, 9, b"later")
    later.close()
    assert crashed.read_bytes() == whole[:ends[-2]]
    assert not leftover.exists()
    for path in (crashed, later.files[0]):
        gzip.decompress(path.read_bytes())
        assert_warcio_check_passes(path)


def test_repair_leaves_a_file_held_by_a_live_writer_alone(tmp_path: Path) -> None:
    # A live writer holds an exclusive flock(2) on its open file; a file seen mid-write
    # must not be cut under it. Once the writer is gone (its lock with it) it is repaired.
    whole, ends = sample_warc()
    (tmp_path / "warc").mkdir()
    held_path = tmp_path / "warc" / "sluice-20310506070000-00000-1.warc.gz"
    torn = whole[:ends[2] + 10]
    held_path.write_bytes(torn)
    with open(held_path, "rb") as held:
        fcntl.flock(held, fcntl.LOCK_EX)
        archive = new_archive(tmp_path)
        write_sample(archive, 0, b"x")
        archive.close()
        assert held_path.read_bytes() == torn
    archive = new_archive(tmp_path)
    write_sample(archive, 1, b"y")
    archive.close()
    assert held_path.read_bytes() == whole[:ends[2]]
