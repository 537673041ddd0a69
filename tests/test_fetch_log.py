"""Tests for workers.fetch_log, the fetch log (JSON lines, one a fetch): its fields, lines
reaching the file at each flush (fsynced), several workers appending to one file, and
a torn last line cut back on open."""

from __future__ import annotations

import os
import tempfile
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

import workers.fetch_log as fetch_log_module
from tests.archivekit import entry, read_lines
from workers.fetch_log import FetchLog


def test_fetch_log_lines_and_fields(tmp_path: Path) -> None:
    # RFC 8259: each line is a JSON text; s.8.1 UTF-8. RFC 3339 s.5.6 timestamp.
    with FetchLog(tmp_path) as log:
        log.write(entry(0))
        log.write(entry(1, url="http://log.test/caf\u00e9", status=None, outcome="robots_denied",
                        reason="disallowed", warc_file=None, warc_offset=None, simhash=None,
                        fetched_at=datetime(2031, 1, 1, 12, tzinfo=timezone(timedelta(hours=2)))))
    lines = read_lines(tmp_path / "fetches.jsonl")
    assert len(lines) == 2
    first, second = lines
    assert set(first) == {"url", "status", "outcome", "reason", "fetched_at", "bytes",
                          "duration_s", "depth", "host", "warc_file", "warc_offset",
                          "content_type", "simhash", "duplicate_of", "near_duplicate_of",
                          "hamming"}
    assert first["fetched_at"] == "2031-05-06T07:08:09.250000Z"
    assert first["simhash"] == "00000000000000ab"
    assert first["duration_s"] == 0.123457
    assert second["fetched_at"] == "2031-01-01T10:00:00Z"  # converted to UTC
    assert second["url"] == "http://log.test/caf\u00e9"
    assert "caf\u00e9".encode() in (tmp_path / "fetches.jsonl").read_bytes()
    assert second["status"] is None and second["simhash"] is None


def test_fetch_log_keeps_a_line_with_a_lone_surrogate(tmp_path: Path) -> None:
    # A reason built from hostile text may carry a lone surrogate, which UTF-8 cannot
    # encode (RFC 3629 s.3); the line is still written, with the text escaped (RFC 8259 s.7).
    with FetchLog(tmp_path) as log:
        log.write(entry(0, reason="bad_\ud800_text"))
        log.write(entry(1))
    first, second = read_lines(tmp_path / "fetches.jsonl")
    assert first["reason"] == "bad_\ud800_text"
    assert second["url"] == entry(1).url


def test_fetch_log_lines_reach_the_file_on_flush(tmp_path: Path) -> None:
    # Lines reach the file at each flush, before close (crash safety per batch).
    log = FetchLog(tmp_path)
    try:
        log.write(entry(0))
        log.write(entry(1))
        log.flush()
        assert len(read_lines(tmp_path / "fetches.jsonl")) == 2
    finally:
        log.close()


def test_fetch_log_appends_on_resume_and_repairs_torn_line(tmp_path: Path) -> None:
    with FetchLog(tmp_path) as log:
        log.write(entry(0))
    with FetchLog(tmp_path) as log:
        log.write(entry(1))
    assert [line["depth"] for line in read_lines(tmp_path / "fetches.jsonl")] == [0, 1]
    with open(tmp_path / "fetches.jsonl", "a", encoding="utf-8") as crashed:
        crashed.write('{"url": "http://log.test/half')  # a crash mid-line
    with FetchLog(tmp_path) as log:
        log.write(entry(2))
    # The torn line is cut back, not kept as a line of its own: every line is a JSON
    # text (RFC 8259 s.2), one per entry.
    assert [line["depth"] for line in read_lines(tmp_path / "fetches.jsonl")] == [0, 1, 2]


def test_fetch_log_non_finite_duration_is_null(tmp_path: Path) -> None:
    # RFC 8259 s.6: NaN and Infinity are not permitted JSON numbers.
    with FetchLog(tmp_path) as log:
        log.write(entry(0, duration_s=float("nan")))
    assert read_lines(tmp_path / "fetches.jsonl")[0]["duration_s"] is None


def test_fetch_log_flush_writes_the_batch_at_once_and_fsyncs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Lines wait in memory until flush, which writes them and makes them durable
    # (fsync(2)) before the worker goes on.
    path = tmp_path / "fetches.jsonl"
    synced: list[tuple[int, int]] = []
    real_fsync = os.fsync

    def watched_fsync(fd: int) -> None:
        stat = os.fstat(fd)
        synced.append((stat.st_ino, stat.st_size))
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", watched_fsync)
    log = FetchLog(tmp_path)
    try:
        for i in range(3):
            log.write(entry(i))
        assert path.read_bytes() == b""
        log.flush()
        stat = path.stat()
        assert synced == [(stat.st_ino, stat.st_size)]
        assert [line["depth"] for line in read_lines(path)] == [0, 1, 2]
    finally:
        log.close()


def test_fetch_logs_of_several_workers_in_one_folder_keep_whole_lines(tmp_path: Path) -> None:
    # `sluice crawl --workers N` runs N workers, each with its own FetchLog, on one file.
    logs = [FetchLog(tmp_path) for _ in range(3)]
    expected = []
    for batch in range(4):
        for n, log in enumerate(logs):
            for i in range(5):
                depth = 100 * n + 10 * batch + i
                log.write(entry(depth))
                expected.append(depth)
        for log in reversed(logs):
            log.flush()
    for log in logs:
        log.close()
    assert sorted(line["depth"] for line in read_lines(tmp_path / "fetches.jsonl")) == \
        sorted(expected)


def log_lines(count: int) -> bytes:
    """The bytes of a fetch log holding ``count`` entries."""
    with tempfile.TemporaryDirectory() as tmp:
        with FetchLog(Path(tmp)) as log:
            for i in range(count):
                log.write(entry(i, reason=f"r{'x' * i}"))
        return (Path(tmp) / "fetches.jsonl").read_bytes()


@given(cut=st.integers(0, len(log_lines(6))))
def test_opening_the_fetch_log_cuts_a_torn_last_line(cut: int) -> None:
    whole = log_lines(6)
    kept = whole[:cut].count(b"\n")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "fetches.jsonl"
        path.write_bytes(whole[:cut])
        with FetchLog(Path(tmp)) as log:
            log.write(entry(99))
        assert [line["depth"] for line in read_lines(path)] == [*range(kept), 99]
        assert fetch_log_module.repair_fetch_log(path) == path.stat().st_size  # whole already
