"""Sample exchanges and fetch-log entries written with workers.archive and
workers.fetch_log, and warcio's readers to check what was written (tests/test_archive.py,
tests/test_fetch_log.py, tests/test_archive_faults.py)."""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from warcio.archiveiterator import ArchiveIterator

from workers.archive import RecordRef, WarcArchive
from workers.fetch_log import FetchEntry

FETCHED = datetime(2031, 5, 6, 7, 8, 9, 250_000, tzinfo=UTC)
FILE_CLOCK = datetime(2031, 5, 6, 7, 0, 0, tzinfo=UTC)


def new_archive(tmp_path: Path, **kwargs: object) -> WarcArchive:
    return WarcArchive(tmp_path, software="sluice/0.1", operator="desk@crawl.test", job="job-7",
                       clock=lambda: FILE_CLOCK, **kwargs)  # type: ignore[arg-type]


def write_sample(archive: WarcArchive, i: int, body: bytes, *, outlinks: bool = True) -> RecordRef:
    return archive.write_exchange(
        f"http://shop{i}.test/item/{i}",
        ("GET", f"/item/{i}", [("Host", f"shop{i}.test"), ("User-Agent", "sluice/0.1")]),
        200,
        "OK",
        [("Content-Type", "text/html; charset=utf-8"), ("Content-Encoding", "gzip"),
         ("Transfer-Encoding", "chunked"), ("Content-Length", "77")],
        body,
        FETCHED + timedelta(seconds=i),
        "127.0.0.1" if i % 2 == 0 else None,
        [(f"http://shop{i}.test/next", "Next  page"), ("http://other.test/a b", "")]
        if outlinks else None,
    )


BODIES = [b"<html><body>first</body></html>", b"", "<p>caf\u00e9 \u2603</p>".encode(),
          bytes(range(256)) * 4]


def entry(i: int, **overrides: object) -> FetchEntry:
    values: dict[str, object] = dict(
        url=f"http://log.test/p/{i}", outcome="archived", fetched_at=FETCHED, status=200,
        reason=None, bytes=1000 + i, duration_s=0.1234567, depth=i, host="log.test",
        warc_file="x.warc.gz", warc_offset=123, content_type="text/html", simhash=0xAB,
    )
    values.update(overrides)
    return FetchEntry(**values)  # type: ignore[arg-type]


def read_lines(path: Path) -> list[dict[str, object]]:
    text = path.read_text(encoding="utf-8")
    assert text.endswith("\n")
    return [json.loads(line) for line in text.splitlines()]


def read_checked(path: Path) -> list[tuple[str, Any, Any, bytes]]:
    """Every record as warcio reads it, block and payload digests verified on the way
    (ArchiveIterator with check_digests="raise")."""
    with open(path, "rb") as stream:
        return [(rec.rec_type, rec.rec_headers, rec.http_headers, rec.content_stream().read())
                for rec in ArchiveIterator(stream, check_digests="raise")]


def warcio_command() -> list[str]:
    base = [str(Path(sys.executable).with_name("warcio"))]
    help_text = subprocess.run(base + ["-h"], capture_output=True, text=True, check=True).stdout
    return base + (["check"] if "check" in help_text else ["index"])


def assert_warcio_check_passes(path: Path) -> None:
    """Reference implementation: the `warcio check` command verifies every digest."""
    done = subprocess.run(warcio_command() + [str(path)], capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr
