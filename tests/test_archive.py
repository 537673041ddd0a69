"""Tests for workers.archive: WARC 1.1 records read back and checked, rotation, fetch log."""

from __future__ import annotations

import base64
import contextlib
import errno
import fcntl
import gzip
import hashlib
import io
import json
import os
import random
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
import uuid
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import pytest
from hypothesis import example, given
from hypothesis import strategies as st
from warcio.archiveiterator import ArchiveIterator
from warcio.statusandheaders import StatusAndHeaders
from warcio.warcwriter import WARCWriter

import workers.archive as archive_module
from frontier.exceptions import DiskFault
from workers.archive import FetchEntry, FetchLog, RecordRef, WarcArchive

FETCHED = datetime(2031, 5, 6, 7, 8, 9, 250_000, tzinfo=UTC)
FILE_CLOCK = datetime(2031, 5, 6, 7, 0, 0, tzinfo=UTC)
# ISO 28500:2017 s.5.2-5.5: the four fields every record shall have.
MANDATORY_FIELDS = ("WARC-Record-ID", "Content-Length", "WARC-Date", "WARC-Type")
NAME_PATTERN = re.compile(
    r"^(?P<prefix>[a-z]+)-(?P<ts>\d{14})-(?P<serial>\d{5})-(?P<pid>\d+)\.warc\.gz$"
)


Written = tuple[WarcArchive, list[RecordRef]]


def sha1_b32(data: bytes) -> str:
    """Labelled SHA-1 in Base32 (ISO 28500 s.5.8/5.9 example; RFC 4648 s.6)."""
    return "sha1:" + base64.b32encode(hashlib.sha1(data).digest()).decode("ascii")


@dataclass
class RawRecord:
    version: str
    fields: list[tuple[str, str]]
    block: bytes
    headers: dict[str, list[str]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name, value in self.fields:
            self.headers.setdefault(name.lower(), []).append(value)

    def get(self, name: str) -> str | None:
        values = self.headers.get(name.lower())
        return values[0] if values else None


def read_raw(path: Path) -> list[RawRecord]:
    """An independent WARC reader (ISO 28500 s.4 grammar), not using warcio.

    warc-record = header CRLF block CRLF CRLF; header = version *named-field.
    """
    data = gzip.decompress(path.read_bytes())
    records, pos = [], 0
    while pos < len(data):
        end = data.index(b"\r\n\r\n", pos)
        lines = data[pos:end].decode("utf-8").split("\r\n")
        fields = [tuple(line.split(": ", 1)) for line in lines[1:]]
        record = RawRecord(lines[0], fields, b"")  # type: ignore[arg-type]
        length = int(record.get("Content-Length") or -1)
        start = end + 4
        record.block = data[start:start + length]
        assert len(record.block) == length
        assert data[start + length:start + length + 4] == b"\r\n\r\n"
        records.append(record)
        pos = start + length + 4
    return records


def http_payload(block: bytes) -> tuple[bytes, bytes]:
    head, _, body = block.partition(b"\r\n\r\n")
    return head, body


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


@pytest.fixture
def written(tmp_path: Path) -> tuple[WarcArchive, list[RecordRef]]:
    archive = new_archive(tmp_path)
    refs = [write_sample(archive, i, body) for i, body in enumerate(BODIES)]
    archive.close()
    return archive, refs


def test_single_file_named_by_prefix_timestamp_serial_pid(
    written: Written, tmp_path: Path
) -> None:
    archive, _ = written
    assert len(archive.files) == 1
    path = archive.files[0]
    assert path.parent == tmp_path / "warc"
    match = NAME_PATTERN.match(path.name)
    assert match and match["prefix"] == "sluice" and match["ts"] == "20310506070000"
    assert match["serial"] == "00000"


def test_record_types_in_order_and_version_line(written: Written) -> None:
    # ISO 28500 s.4: every record begins with the version line; s.5.5 WARC-Type;
    # s.6: starting a file with a warcinfo record is recommended.
    archive, _ = written
    with open(archive.files[0], "rb") as stream:
        types = [rec.rec_type for rec in ArchiveIterator(stream)]
    assert types == ["warcinfo"] + ["request", "response", "metadata"] * len(BODIES)
    raw = read_raw(archive.files[0])
    assert [r.get("WARC-Type") for r in raw] == types
    assert all(r.version == "WARC/1.1" for r in raw)


def test_mandatory_fields_present_and_well_formed(written: Written) -> None:
    # ISO 28500 s.5.2 WARC-Record-ID (a URI in angle brackets), s.5.3
    # Content-Length (block octets), s.5.4 WARC-Date (W3C ISO 8601, UTC "Z"),
    # s.5.5 WARC-Type. Named fields do not repeat except WARC-Concurrent-To (s.5.1).
    archive, _ = written
    ids = set()
    for record in read_raw(archive.files[0]):
        for name in MANDATORY_FIELDS:
            assert len(record.headers.get(name.lower(), [])) == 1, name
        record_id = record.get("WARC-Record-ID") or ""
        assert re.fullmatch(r"<urn:uuid:[0-9a-f-]{36}>", record_id)
        ids.add(record_id)
        assert int(record.get("Content-Length") or -1) == len(record.block)
        date = record.get("WARC-Date") or ""
        assert date.endswith("Z")
        datetime.fromisoformat(date.replace("Z", "+00:00"))
        for name, values in record.headers.items():
            assert len(values) == 1 or name == "warc-concurrent-to"
    assert len(ids) == 1 + 3 * len(BODIES)


def test_digests_match_independent_sha1_base32(written: Written) -> None:
    # ISO 28500 s.5.8 WARC-Block-Digest covers the whole block; s.5.9
    # WARC-Payload-Digest covers the HTTP entity body (application/http).
    # Computed here with hashlib + base64.b32encode.
    archive, _ = written
    raw = read_raw(archive.files[0])
    responses = [r for r in raw if r.get("WARC-Type") == "response"]
    for record, body in zip(responses, BODIES, strict=True):
        _, payload = http_payload(record.block)
        assert payload == body
        assert record.get("WARC-Payload-Digest") == sha1_b32(body)
    for record in raw:
        assert record.get("WARC-Block-Digest") == sha1_b32(record.block)


def test_warcio_reads_back_bodies_and_links(written: Written) -> None:
    # Reference reader: warcio.ArchiveIterator.
    archive, _ = written
    with open(archive.files[0], "rb") as stream:
        records = [(rec.rec_type, dict(rec.rec_headers.headers), rec.http_headers,
                    rec.content_stream().read()) for rec in ArchiveIterator(stream)]
    by_id = {headers["WARC-Record-ID"]: (kind, headers) for kind, headers, _, _ in records}
    responses = [r for r in records if r[0] == "response"]
    for i, (kind, headers, http, content) in enumerate(responses):
        assert content == BODIES[i]
        assert headers["WARC-Target-URI"] == f"http://shop{i}.test/item/{i}"
        assert http.get_statuscode() == "200"
        # ISO 28500 s.5 WARC-Concurrent-To: links request and response.
        request_kind, request_headers = by_id[headers["WARC-Concurrent-To"]]
        assert request_kind == "request"
        assert request_headers["WARC-Concurrent-To"] == headers["WARC-Record-ID"]
        # ISO 28500 s.5.4: records of one capture event share the WARC-Date.
        assert headers["WARC-Date"] == request_headers["WARC-Date"]
        assert headers["WARC-Date"] == (FETCHED + timedelta(seconds=i)).strftime(
            "%Y-%m-%dT%H:%M:%S.%fZ")
        # ISO 28500 s.5.10: WARC-IP-Address when the address is known.
        assert headers.get("WARC-IP-Address") == ("127.0.0.1" if i % 2 == 0 else None)
    metadata = [r for r in records if r[0] == "metadata"]
    for i, (_, headers, _, content) in enumerate(metadata):
        # ISO 28500 s.5.11 WARC-Refers-To names the described response.
        assert by_id[headers["WARC-Refers-To"]][0] == "response"
        # ISO 28500 s.6.6: a metadata block of any format its Content-Type names; ours
        # is one JSON document (RFC 8259) per page.
        assert headers["Content-Type"] == "application/json"
        # s.4 / s.5.9: metadata has no payload, hence no payload digest.
        assert "WARC-Payload-Digest" not in headers
        assert json.loads(content) == {"url": f"http://shop{i}.test/item/{i}", "links": [
            {"url": f"http://shop{i}.test/next", "anchor": "Next  page", "followed": True,
             "why": None},
            {"url": "http://other.test/a%20b", "anchor": "", "followed": True, "why": None},
        ]}


def test_request_record_holds_the_request_head(written: Written) -> None:
    # ISO 28500 s.6 'request': the block is the HTTP request; RFC 9112 s.3
    # request-line = method SP request-target SP HTTP-version.
    archive, _ = written
    requests = [r for r in read_raw(archive.files[0]) if r.get("WARC-Type") == "request"]
    head, body = http_payload(requests[1].block)
    assert head.split(b"\r\n") == [b"GET /item/1 HTTP/1.1", b"Host: shop1.test",
                                    b"User-Agent: sluice/0.1"]
    assert body == b""
    assert requests[1].get("Content-Type") == "application/http; msgtype=request"


def test_raw_request_bytes_are_stored(tmp_path: Path) -> None:
    archive = new_archive(tmp_path)
    raw_head = b"GET /x?q=1 HTTP/1.1\r\nHost: raw.test\r\nAccept: */*\r\n\r\n"
    archive.write_exchange("http://raw.test/x?q=1", raw_head, 204, "No Content", [], b"",
                           FETCHED, None, None)
    archive.close()
    records = read_raw(archive.files[0])
    assert [r.get("WARC-Type") for r in records] == ["warcinfo", "request", "response"]
    assert records[1].block == raw_head
    status_line = http_payload(records[2].block)[0].split(b"\r\n")[0]
    assert status_line == b"HTTP/1.1 204 No Content"


def test_decoded_body_headers_no_longer_claim_encoding(
    written: Written
) -> None:
    # RFC 9110 s.8.4 Content-Encoding describes the stored octets, s.8.6
    # Content-Length is their count; RFC 9112 s.6.1 Transfer-Encoding is gone
    # once the body is de-chunked. The stored body is decoded, so neither
    # encoding header may remain; originals are kept under another name.
    archive, _ = written
    responses = [r for r in read_raw(archive.files[0]) if r.get("WARC-Type") == "response"]
    for record, body in zip(responses, BODIES, strict=True):
        head, _ = http_payload(record.block)
        lines = head.decode().split("\r\n")
        assert lines[0] == "HTTP/1.1 200 OK"
        names = [line.split(":", 1)[0].lower() for line in lines[1:]]
        assert "content-encoding" not in names and "transfer-encoding" not in names
        assert f"Content-Length: {len(body)}" in lines
        assert names.count("content-length") == 1
        assert "Sluice-Original-Content-Encoding: gzip" in lines


def test_raw_body_keeps_content_encoding(tmp_path: Path) -> None:
    archive = new_archive(tmp_path)
    compressed = gzip.compress(b"<p>still compressed</p>")
    archive.write_exchange("http://gz.test/", ("GET", "/", []), 200, "OK",
                           [("Content-Encoding", "gzip"), ("Transfer-Encoding", "chunked")],
                           compressed, FETCHED, None, None, body_decoded=False, truncated="length")
    archive.close()
    response = read_raw(archive.files[0])[2]
    lines = http_payload(response.block)[0].decode().split("\r\n")
    assert "Content-Encoding: gzip" in lines
    assert f"Content-Length: {len(compressed)}" in lines
    assert not any(line.lower().startswith("transfer-encoding") for line in lines)
    # ISO 28500 s.5 WARC-Truncated: reason token "length".
    assert response.get("WARC-Truncated") == "length"


def test_warcinfo_fields(written: Written) -> None:
    # ISO 28500 s.6 'warcinfo': application/warc-fields with operator, software,
    # hostname...; s.5 WARC-Filename names the containing file.
    archive, _ = written
    info = read_raw(archive.files[0])[0]
    assert info.get("Content-Type") == "application/warc-fields"
    assert info.get("WARC-Filename") == archive.files[0].name
    assert info.get("WARC-Target-URI") is None  # shall not have one
    fields = dict(line.split(": ", 1) for line in info.block.decode().split("\r\n") if line)
    assert fields["software"] == "sluice/0.1"
    assert fields["operator"] == "desk@crawl.test"
    assert fields["isPartOf"] == "job-7"
    assert fields["format"] == "WARC File Format 1.1"


def test_record_ref_addresses_one_gzip_member(written: Written) -> None:
    # ISO 28500 Annex D: record-at-a-time compression, one gzip member (RFC 1952
    # s.2.2) per record, so a reader can seek to a record's offset.
    archive, refs = written
    data = archive.files[0].read_bytes()
    for ref, body in zip(refs, BODIES, strict=True):
        assert ref.file == archive.files[0].name
        member = data[ref.offset:ref.offset + ref.length]
        inflater = zlib.decompressobj(wbits=31)
        text = inflater.decompress(member)
        assert inflater.eof and inflater.unused_data == b""
        assert text.startswith(b"WARC/1.1\r\n")
        assert f"WARC-Record-ID: {ref.record_id}\r\n".encode() in text
        assert text.endswith(body + b"\r\n\r\n")
        with open(archive.files[0], "rb") as stream:
            stream.seek(ref.offset)
            first = next(iter(ArchiveIterator(stream)))
            assert first.rec_headers.get_header("WARC-Record-ID") == ref.record_id


def test_record_ids_stay_unique_across_threads_and_forks() -> None:
    # ISO 28500 s.5.2: a WARC-Record-ID is globally unique. Writers in several threads
    # (or a forked child) must never draw the same random bytes.
    sys_interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # switch threads as often as possible
    drawn: list[list[str]] = [[] for _ in range(4)]

    def draw(into: list[str]) -> None:
        for _ in range(5000):
            into.extend(archive_module._record_ids(3))

    try:
        threads = [threading.Thread(target=draw, args=(ids,)) for ids in drawn]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
    finally:
        sys.setswitchinterval(sys_interval)
    archive_module._record_ids(1)  # the pool now holds bytes a child would inherit
    reader, writer = os.pipe()
    child = os.fork()
    if child == 0:  # pragma: no cover - runs in the child
        os.write(writer, "\n".join(archive_module._record_ids(3)).encode())
        os._exit(0)
    os.close(writer)
    os.waitpid(child, 0)
    with os.fdopen(reader) as pipe:
        in_child = pipe.read().split("\n")
    ids = [i for batch in drawn for i in batch] + archive_module._record_ids(3) + in_child
    assert len(ids) == 4 * 5000 * 3 + 6 and len(set(ids)) == len(ids)


def test_response_record_matches_warcio_builder_field_by_field(tmp_path: Path) -> None:
    # Reference implementation: warcio's own record builder (create_warc_record
    # + WARC-Payload/Block-Digest) given the same URI, date, IP, HTTP head and
    # body must yield the same named fields and block; record IDs are random
    # version 4 UUIDs (RFC 9562 s.5.4).
    archive = new_archive(tmp_path)
    body = "<p>caf\u00e9</p>".encode()
    ref = archive.write_exchange(
        "http://ref.test/a b", ("GET", "/a%20b", [("Host", "ref.test")]), 200, "OK",
        [("Content-Type", "text/html; charset=utf-8"), ("X-Note", "sn\u2603w")], body,
        FETCHED, "127.0.0.2", None, truncated="length")
    archive.close()
    with open(archive.files[0], "rb") as stream:
        ours = [rec for rec in ArchiveIterator(stream) if rec.rec_type == "response"][0]
        our_fields = dict(ours.rec_headers.headers)
    raw_response = read_raw(archive.files[0])[2]
    buffer = io.BytesIO()
    reference = WARCWriter(buffer, gzip=False, warc_version="1.1")
    http_headers = StatusAndHeaders(
        "200 OK", [("Content-Type", "text/html; charset=utf-8"), ("X-Note", "sn\u2603w"),
                   ("Content-Length", str(len(body)))], protocol="HTTP/1.1")
    record = reference.create_warc_record(
        "http://ref.test/a%20b", "response", payload=io.BytesIO(body), length=len(body),
        http_headers=http_headers, warc_headers_dict={
            "WARC-Date": "2031-05-06T07:08:09.250000Z", "WARC-IP-Address": "127.0.0.2",
            "WARC-Record-ID": ref.record_id,
            "WARC-Concurrent-To": our_fields["WARC-Concurrent-To"], "WARC-Truncated": "length"})
    reference.write_record(record)
    buffer.seek(0)
    theirs = next(iter(ArchiveIterator(buffer)))
    assert our_fields == dict(theirs.rec_headers.headers)
    expected_block = buffer.getvalue().split(b"\r\n\r\n", 1)[1][:-4]
    assert raw_response.block == expected_block
    for record_id in (ref.record_id, our_fields["WARC-Concurrent-To"]):
        parsed = uuid.UUID(record_id.removeprefix("<urn:uuid:").removesuffix(">"))
        assert parsed.version == 4 and parsed.variant == uuid.RFC_4122


def test_no_metadata_record_without_outlinks(tmp_path: Path) -> None:
    archive = new_archive(tmp_path)
    write_sample(archive, 0, b"x", outlinks=False)
    archive.write_exchange("http://e.test/", ("GET", "/", []), 200, "OK", [], b"y", FETCHED,
                           None, [])
    archive.close()
    assert [r.get("WARC-Type") for r in read_raw(archive.files[0])] == [
        "warcinfo", "request", "response", "request", "response"]


@pytest.mark.parametrize("anchor, expected", [
    ("Next page", "Next page"),  # nothing to escape
    ("caf\u00e9", "caf\u00e9"),  # JSON text is UTF-8 (RFC 8259 s.8.1)
    ("a\ud800b", "a\ufffdb"),  # a lone surrogate cannot be UTF-8 (RFC 3629 s.3): U+FFFD
    ("a\r\nb", "a\r\nb"),  # a line break is escaped in a JSON string (RFC 8259 s.7)
])
def test_link_record_reads_back(tmp_path: Path, anchor: str, expected: str) -> None:
    archive = new_archive(tmp_path)
    archive.write_exchange("http://e.test/", ("GET", "/", []), 200, "OK", [], b"y", FETCHED,
                           None, [("http://e.test/a", anchor), ("http://f.test/", "home", "nofollow")])
    archive.close()
    with open(archive.files[0], "rb") as stream:  # reference reader: warcio
        blocks = [(rec.rec_headers.get_header("Content-Type"), rec.content_stream().read())
                  for rec in ArchiveIterator(stream) if rec.rec_type == "metadata"]
    assert blocks[0][0] == "application/json"
    assert json.loads(blocks[0][1]) == {"url": "http://e.test/", "links": [
        {"url": "http://e.test/a", "anchor": expected, "followed": True, "why": None},
        {"url": "http://f.test/", "anchor": "home", "followed": False, "why": "nofollow"}]}


def test_rotation_starts_each_file_with_warcinfo(tmp_path: Path) -> None:
    # Rotation bound: a file is closed once it reaches max_file_bytes; ISO 28500
    # "Record segmentation" forbids splitting a record that fits a new file,
    # so whole exchanges move to the next file.
    rng = random.Random(4)
    archive = new_archive(tmp_path, max_file_bytes=3000)
    bodies = [rng.randbytes(1500) for _ in range(7)]
    for i, body in enumerate(bodies):
        write_sample(archive, i, body)
    archive.close()
    assert len(archive.files) >= 3
    serials = []
    seen_bodies = []
    for path in archive.files:
        match = NAME_PATTERN.match(path.name)
        assert match
        serials.append(int(match["serial"]))
        records = read_raw(path)
        assert records[0].get("WARC-Type") == "warcinfo"
        assert records[0].get("WARC-Filename") == path.name
        assert [r.get("WARC-Type") for r in records[1:]] == \
            ["request", "response", "metadata"] * ((len(records) - 1) // 3)
        assert (len(records) - 1) % 3 == 0
        seen_bodies += [
            http_payload(r.block)[1] for r in records if r.get("WARC-Type") == "response"
        ]
    assert serials == list(range(len(archive.files)))
    assert seen_bodies == bodies
    # Every file except the last went past the bound before rotating.
    assert all(p.stat().st_size >= 3000 for p in archive.files[:-1])


def test_close_is_idempotent_and_later_write_starts_new_file(tmp_path: Path) -> None:
    archive = new_archive(tmp_path)
    write_sample(archive, 0, b"a")
    archive.close()
    archive.close()
    write_sample(archive, 1, b"b")
    archive.close()
    assert len(archive.files) == 2
    assert read_raw(archive.files[1])[0].get("WARC-Type") == "warcinfo"


def _warcio_command() -> list[str]:
    base = [str(Path(sys.executable).with_name("warcio"))]
    help_text = subprocess.run(base + ["-h"], capture_output=True, text=True, check=True).stdout
    return base + (["check"] if "check" in help_text else ["index"])


def test_warcio_cli_accepts_files_and_rejects_corruption(
    written: Written, tmp_path: Path
) -> None:
    # Reference implementation: `warcio check` verifies every digest.
    archive, _ = written
    command = _warcio_command()
    ok = subprocess.run(command + [str(archive.files[0])], capture_output=True, text=True)
    assert ok.returncode == 0, ok.stdout + ok.stderr
    if command[-1] == "check":
        # Negative control: one flipped body byte must make the check fail.
        plain = gzip.decompress(archive.files[0].read_bytes())
        at = plain.index(b"first</body>")
        broken = tmp_path / "broken.warc"
        broken.write_bytes(plain[:at] + b"F" + plain[at + 1:])
        bad = subprocess.run(command + [str(broken)], capture_output=True, text=True)
        assert bad.returncode != 0


def test_write_speed(tmp_path: Path) -> None:
    # Project target: hundreds of pages per second (common practice, no source);
    # asserted loosely at >= 100 exchanges/s for 10 KB pages.
    rng = random.Random(9)
    words = [f"w{i}" for i in range(2000)]
    pages = [("<html><body>" + " ".join(rng.choices(words, k=1600)) + "</body></html>").encode()
             for _ in range(10)]
    archive = new_archive(tmp_path)
    count = 200
    start = time.perf_counter()
    for i in range(count):
        write_sample(archive, i, pages[i % len(pages)])
    archive.close()
    assert count / (time.perf_counter() - start) >= 100


# --- fetch log ------------------------------------------------------------------------


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


# --- any text in links, heads and URLs --------------------------------------------------


def read_checked(path: Path) -> list[tuple[str, Any, Any, bytes]]:
    """Every record as warcio reads it, block and payload digests verified on the way
    (ArchiveIterator with check_digests="raise")."""
    with open(path, "rb") as stream:
        return [(rec.rec_type, rec.rec_headers, rec.http_headers, rec.content_stream().read())
                for rec in ArchiveIterator(stream, check_digests="raise")]


def assert_warcio_check_passes(path: Path) -> None:
    """Reference implementation: the `warcio check` command verifies every digest."""
    done = subprocess.run(_warcio_command() + [str(path)], capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr


@pytest.mark.parametrize("link, anchor, url, text", [
    # RFC 3987 s.3.1: an IRI maps to a URI by percent-encoding its UTF-8 octets.
    ("http://e.test/caf\u00e9", "menu", "http://e.test/caf%C3%A9", "menu"),
    # The HTML parser turns the reference &#0; into U+FFFD (WHATWG HTML, numeric
    # character reference end state).
    ("http://e.test/\ufffd", "zero", "http://e.test/%EF%BF%BD", "zero"),
    # An undecodable byte kept as a surrogate (PEP 383) goes back to that octet.
    ("http://e.test/\udce9", "raw", "http://e.test/%E9", "raw"),
    # Any other lone surrogate cannot be UTF-8 (RFC 3629 s.3): U+FFFD.
    ("http://e.test/\ud800", "lone", "http://e.test/%EF%BF%BD", "lone"),
    # Controls and whitespace percent-encoded (ISO 28500 s.5; RFC 3986 s.2.1).
    ("http://e.test/a\x00b\r\nc d", "nul", "http://e.test/a%00b%0D%0Ac%20d", "nul"),
    # Anchor text: any character a JSON string holds (RFC 8259 s.7), a lone surrogate
    # as U+FFFD (RFC 8259 s.8.1: UTF-8).
    ("http://e.test/ok", "a\r\nb\x00\u00e9\ud800", "http://e.test/ok", "a\r\nb\x00\u00e9\ufffd"),
])
def test_outlinks_with_any_text_are_written_and_read_back(
    tmp_path: Path, link: str, anchor: str, url: str, text: str
) -> None:
    archive = new_archive(tmp_path)
    archive.write_exchange("http://e.test/", ("GET", "/", []), 200, "OK", [], b"y", FETCHED,
                           None, [(link, anchor), ("http://f.test/", "home")])
    archive.close()
    blocks = [content for kind, _, _, content in read_checked(archive.files[0])
              if kind == "metadata"]
    links = json.loads(blocks[0].decode("utf-8"))["links"]
    assert [(ln["url"], ln["anchor"]) for ln in links] == [(url, text), ("http://f.test/", "home")]
    assert_warcio_check_passes(archive.files[0])


HEAD_CASES = {
    # RFC 9110 s.5.1: a field name is a token (ASCII); other text is percent-encoded.
    "header name": dict(headers=[("X-\u00e9t\u00e9", "v")]),
    # warcio's RFC 8187 encoder leaves this value non-ASCII; it must still be written.
    "parameter value": dict(headers=[("Content-Disposition", "x=1;\u00e9")]),
    "line breaks in a value": dict(headers=[("X-A", "1\r\nX-Injected: 2"), ("X-B", "\x00\t")]),
    "surrogates in a header": dict(headers=[("X-\ud800", "\udce9\ud83d")]),
    "reason phrase": dict(reason="Tr\u00e8s bien \ud800\r\n"),
    "request target": dict(request=("GET", "/caf\u00e9 x\ud800", [("H\u00f4te", "\u00e9")])),
    "target URI": dict(url="http://e.test/caf\u00e9\ud800\r\n"),
    "address": dict(remote_ip="127.0.0.1\r\nX-Injected: 1"),
}


@pytest.mark.parametrize("case", list(HEAD_CASES))
def test_any_text_in_heads_and_urls_is_written_and_read_back(tmp_path: Path, case: str) -> None:
    given_values: dict[str, Any] = dict(
        url="http://e.test/a", request=("GET", "/a", [("Host", "e.test")]), reason="OK",
        headers=[("Content-Type", "text/plain")], remote_ip="127.0.0.1")
    given_values.update(HEAD_CASES[case])
    body = b"body \x00\xff"
    archive = new_archive(tmp_path)
    archive.write_exchange(given_values["url"], given_values["request"], 200,
                           given_values["reason"], given_values["headers"], body, FETCHED,
                           given_values["remote_ip"], [("http://e.test/b", "b")])
    archive.close()
    records = read_checked(archive.files[0])
    assert [kind for kind, *_ in records] == ["warcinfo", "request", "response", "metadata"]
    _, request_fields, request_http, _ = records[1]
    _, response_fields, response_http, payload = records[2]
    assert payload == body
    # ISO 28500 s.5: one WARC-IP-Address, nothing injected into the named fields.
    assert response_fields.get_header("X-Injected") is None
    assert [name for name, _ in response_fields.headers].count("WARC-IP-Address") == 1
    # Every header given is one header line (RFC 9112 s.5), plus Content-Length.
    assert len(response_http.headers) == len(given_values["headers"]) + 1
    assert len(request_http.headers) == len(given_values["request"][2])
    # The WARC-Target-URI is a URI (ISO 28500 s.5.6; RFC 3987 s.3.1 maps an IRI).
    target = response_fields.get_header("WARC-Target-URI")
    assert target.isascii() and not re.search(r"[\x00-\x20\x7f]", target)
    assert request_fields.get_header("WARC-Target-URI") == target
    assert_warcio_check_passes(archive.files[0])


def test_target_uri_maps_an_iri_octet_by_octet(tmp_path: Path) -> None:
    # RFC 3987 s.3.1 step 2: each octet of the UTF-8 form not allowed in a URI is
    # percent-encoded (upper-case hex, RFC 3986 s.2.1); '%' escapes already there stay.
    archive = new_archive(tmp_path)
    archive.write_exchange("http://e.test/caf\u00e9/%41 \u2603?q=\udcff", ("GET", "/", []),
                           200, "OK", [], b"", FETCHED)
    archive.close()
    fields = read_checked(archive.files[0])[2][1]
    assert fields.get_header("WARC-Target-URI") == "http://e.test/caf%C3%A9/%41%20%E2%98%83?q=%FF"


def test_an_unparseable_raw_request_head_is_refused_before_anything_is_written(
    tmp_path: Path
) -> None:
    # A request record warcio cannot parse (no request line, RFC 9112 s.3) would make the
    # file unreadable: refused before any byte of the exchange is written.
    archive = new_archive(tmp_path)
    write_sample(archive, 0, b"first")
    size = archive.files[0].stat().st_size
    with pytest.raises(ValueError, match="request head"):
        archive.write_exchange("http://e.test/", b"\xff\xfe not a request\r\n\r\n", 200, "OK",
                               [], b"x", FETCHED)
    write_sample(archive, 1, b"second")
    archive.close()
    assert archive.files[0].stat().st_size > size
    assert [kind for kind, *_ in read_checked(archive.files[0])] == \
        ["warcinfo"] + ["request", "response", "metadata"] * 2


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
    fault = archive_module.disk_fault(OSError(code, os.strerror(code)), path)
    assert isinstance(fault, DiskFault)
    message = str(fault)
    assert len(message.splitlines()) == 1
    assert name in message and os.strerror(code) in message
    assert "/data/out\\nnext/warc/x\\udcff.warc.gz" in message
    message.encode("utf-8")  # printable anywhere: no lone surrogate left


def test_other_errors_are_not_disk_faults() -> None:
    assert archive_module.disk_fault(OSError(errno.EBADF, "bad"), Path("x")) is None
    assert archive_module.disk_fault(ValueError("x"), Path("x")) is None


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
        "from tests.test_archive import fill_until_fault\n"
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
        assert archive_module.repair_fetch_log(path) == path.stat().st_size  # whole already
