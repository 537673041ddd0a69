"""Fuzzing the WARC writer and the fetch log: any text and any bytes in every field.

Each WARC file written must pass warcio's own check (the Checker behind `warcio check`:
every record read, block and payload digests verified, ISO 28500 s.5.8/5.9), hold
exactly the records written and give every body back. Each fetch-log entry must be
one JSON text on one line (RFC 8259). A file cut anywhere after a crash must repair
to its whole records. Example counts come from the hypothesis profile registered in
tests/conftest.py ("ci" by default, HYPOTHESIS_PROFILE=fuzz for 10,000 each).
"""

from __future__ import annotations

import contextlib
import gzip
import io
import json
import math
import tempfile
import zlib
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from warcio.archiveiterator import ArchiveIterator
from warcio.checker import Checker
from warcio.recordloader import ArcWarcRecordLoader

from workers.archive import RecordRef, WarcArchive, repair_warc
from workers.fetch_log import FetchEntry, FetchLog
from workers.warc_records import rewrite_response_headers

FILE_CLOCK = datetime(2031, 5, 6, 7, 0, 0, tzinfo=UTC)
# Characters that have broken writers: line breaks, NUL, separators, escapes, quotes,
# DEL, an undecodable byte kept as a surrogate (PEP 383), a lone surrogate, U+2028.
TRICKY = "\r\n\x00 :%;=\"\t\x7f\udce9\ud800\u2028\ufffd\u00e9"
any_text = st.text(st.one_of(st.characters(exclude_categories=()), st.sampled_from(TRICKY)),
                   max_size=40)
urls = st.one_of(any_text, st.builds(
    str.__add__, st.sampled_from(["http://", "https://", "http://e.test/", "<http://"]),
    any_text))
headers = st.lists(st.tuples(any_text, any_text), max_size=6)
# warcio reads request records only with these methods (its HTTP_VERBS; RFC 9110 s.9
# and RFC 5789 PATCH), so the fuzzed method is one of them.
methods = st.sampled_from(ArcWarcRecordLoader.HTTP_VERBS)
moments = st.datetimes(min_value=datetime(1971, 1, 1), max_value=datetime(2099, 1, 1),
                       timezones=st.sampled_from([None, UTC, timezone(timedelta(hours=-9))]))
truncations = st.one_of(st.none(), st.sampled_from(["length", "time", "disconnect"]), any_text)
exchanges = st.fixed_dictionaries({
    "url": urls,
    "request": st.tuples(methods, any_text, headers),
    "status": st.integers(-1000, 10**6),
    "reason": any_text,
    "headers": headers,
    "body": st.binary(max_size=3000),
    "fetched_at": moments,
    "remote_ip": st.one_of(st.none(), any_text),
    "outlinks": st.one_of(st.none(), st.lists(st.tuples(urls, any_text), max_size=6)),
    "body_decoded": st.booleans(),
    "truncated": truncations,
})


def new_archive(out: Path, max_file_bytes: int = 10**9) -> WarcArchive:
    return WarcArchive(out, software="sluice/0.1", operator="desk@crawl.test", job="fuzz",
                       max_file_bytes=max_file_bytes, clock=lambda: FILE_CLOCK)


def write(archive: WarcArchive, exchange: dict[str, Any]) -> RecordRef:
    return archive.write_exchange(
        exchange["url"], exchange["request"], exchange["status"], exchange["reason"],
        exchange["headers"], exchange["body"], exchange["fetched_at"], exchange["remote_ip"],
        exchange["outlinks"], body_decoded=exchange["body_decoded"],
        truncated=exchange["truncated"])


def warcio_check(paths: list[Path]) -> list[str]:
    """Run warcio's checker (the code of `warcio check -v`) over ``paths``; returns one
    verdict per record, failing on any problem it reports."""
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        status = Checker(SimpleNamespace(inputs=[str(p) for p in paths], verbose=True)) \
            .process_all()
    report = printed.getvalue()
    assert status == 0, report
    return [line.strip() for line in report.splitlines() if line.startswith("    ")]


def read_records(path: Path) -> list[tuple[str, Any, Any, bytes]]:
    """Every record of ``path`` as warcio reads it, digests verified on the way; the
    payload is read raw (no Content-Encoding undone, which fuzzed headers may claim)."""
    with open(path, "rb") as stream:
        return [(rec.rec_type, rec.rec_headers, rec.http_headers, rec.raw_stream.read())
                for rec in ArchiveIterator(stream, check_digests="raise")]


def header_lines(exchange: dict[str, Any]) -> int:
    """How many headers a reader finds in the response head: one a line, except that a
    line opening with a space or tab after the first continues the one before (RFC 9112
    s.5.2 obs-fold, as warcio reads it). The lines are in the order the writer puts
    them (kept headers, Content-Length, the originals of dropped ones)."""
    written = rewrite_response_headers(exchange["headers"], len(exchange["body"]),
                                       body_decoded=exchange["body_decoded"])
    folded = [name.startswith((" ", "\t")) for name, _ in written]
    return len(written) - sum(folded[1:])


def expected_types(written: list[dict[str, Any]]) -> list[str]:
    return [kind for exchange in written
            for kind in ["request", "response"] + (["metadata"] if exchange["outlinks"] else [])]


@pytest.mark.fuzz
@given(batch=st.lists(exchanges, min_size=1, max_size=3), rotate=st.booleans())
def test_any_exchange_is_written_whole_and_passes_warcio_check(
    batch: list[dict[str, Any]], rotate: bool
) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        archive = new_archive(Path(tmp), max_file_bytes=1 if rotate else 10**9)
        refs = [write(archive, exchange) for exchange in batch]
        archive.close()
        paths = archive.files
        assert len(paths) == (len(batch) if rotate else 1)
        records = [record for path in paths for record in read_records(path)]
        # Every record checked by warcio, and every one has a digest that passed.
        verdicts = warcio_check(paths)
        assert verdicts == ["digest pass"] * len(records)
        assert [kind for kind, *_ in records if kind != "warcinfo"] == expected_types(batch)
        assert sum(kind == "warcinfo" for kind, *_ in records) == len(paths)
        responses = [r for r in records if r[0] == "response"]
        metadata = iter(r for r in records if r[0] == "metadata")
        for exchange, ref, (_, fields, http, payload) in zip(batch, refs, responses,
                                                             strict=True):
            assert fields.get_header("WARC-Record-ID") == ref.record_id
            target = fields.get_header("WARC-Target-URI")
            assert target.isascii() and " " not in target  # a URI (ISO 28500 s.5.6)
            if http is not None:  # warcio parsed the HTTP head: the payload is the body
                assert payload == exchange["body"]
                assert ("Content-Length", str(len(exchange["body"]))) in http.headers
                assert len(http.headers) == header_lines(exchange)
            else:  # a target readers do not parse as HTTP: the body ends the block
                assert payload.endswith(exchange["body"])
            if exchange["outlinks"]:
                block = next(metadata)[3]
                document = json.loads(block)  # one JSON text (RFC 8259), UTF-8 (s.8.1)
                assert len(document["links"]) == len(exchange["outlinks"])
                assert all(ln["url"].isascii() and " " not in ln["url"]  # URIs (RFC 3986)
                           and ln["followed"] for ln in document["links"])
        # Each RecordRef addresses its response as one gzip member (ISO 28500 annex D).
        for ref in refs:
            path = next(p for p in paths if p.name == ref.file)
            with open(path, "rb") as stream:
                stream.seek(ref.offset)
                record = next(iter(ArchiveIterator(stream)))
                assert record.rec_headers.get_header("WARC-Record-ID") == ref.record_id


request_heads = st.one_of(
    st.binary(max_size=200),
    st.builds(lambda method, rest: method.encode() + b" " + rest, methods, st.binary(max_size=200)),
)


@pytest.mark.fuzz
@given(head=request_heads, exchange=exchanges)
def test_any_raw_request_head_is_written_readably_or_refused_whole(
    head: bytes, exchange: dict[str, Any]
) -> None:
    # A raw head warcio can parse is stored as given; any other is refused with
    # ValueError before a byte is written, and the file stays whole.
    exchange = {**exchange, "request": head}
    with tempfile.TemporaryDirectory() as tmp:
        archive = new_archive(Path(tmp))
        write(archive, {**exchange, "request": ("GET", "/", []), "outlinks": None})
        try:
            write(archive, exchange)
            written = True
        except ValueError:
            written = False
        archive.close()
        path = archive.files[0]
        records = read_records(path)
        assert len(records) == 3 + (2 + bool(exchange["outlinks"]) if written else 0)
        assert warcio_check([path]) == ["digest pass"] * len(records)
        if written:  # stored as given (ISO 28500 s.6.4: the request as sent)
            block = gzip.decompress(path.read_bytes()).split(b"WARC-Type: request")[2]
            assert head.rstrip(b"\r\n") in block


@pytest.mark.fuzz
@given(batch=st.lists(exchanges, min_size=1, max_size=3), where=st.floats(0, 1),
       tail=st.binary(max_size=64))
def test_a_file_cut_anywhere_repairs_to_its_whole_records(
    batch: list[dict[str, Any]], where: float, tail: bytes
) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        archive = new_archive(Path(tmp))
        for exchange in batch:
            write(archive, exchange)
        archive.close()
        path = archive.files[0]
        whole = path.read_bytes()
        ends = member_ends(whole)
        damaged = whole[:int(where * len(whole))] + tail
        kept = max([end for end in ends if damaged[:end] == whole[:end]], default=0)
        path.write_bytes(damaged)
        assert repair_warc(path) == kept
        if kept == 0:
            assert not path.exists()
            return
        repaired = path.read_bytes()
        assert repaired == whole[:kept]
        gzip.decompress(repaired)  # every gzip member whole (RFC 1952), as `gzip -t` checks
        assert warcio_check([path]) == ["digest pass"] * (ends.index(kept) + 1)


def member_ends(data: bytes) -> list[int]:
    """Where each gzip member (one record, ISO 28500 annex D) ends, inflated one after
    another (RFC 1952 s.2.2)."""
    ends, pos = [], 0
    while pos < len(data):
        inflater = zlib.decompressobj(wbits=31)
        inflater.decompress(data[pos:])
        assert inflater.eof
        pos = len(data) - len(inflater.unused_data)
        ends.append(pos)
    return ends


entries = st.builds(
    FetchEntry, url=any_text, outcome=any_text, fetched_at=moments,
    status=st.one_of(st.none(), st.integers()), reason=st.one_of(st.none(), any_text),
    bytes=st.integers(), duration_s=st.floats(), depth=st.integers(), host=any_text,
    warc_file=st.one_of(st.none(), any_text), warc_offset=st.one_of(st.none(), st.integers()),
    content_type=st.one_of(st.none(), any_text), simhash=st.one_of(st.none(), st.integers()),
)
TEXT_FIELDS = ("url", "outcome", "reason", "host", "warc_file", "content_type")
INT_FIELDS = ("status", "bytes", "depth", "warc_offset")


@pytest.mark.fuzz
@given(batches=st.lists(st.lists(entries, max_size=5), min_size=1, max_size=4),
       reopen_after=st.integers(0, 4))
def test_any_fetch_entry_is_one_json_line(
    batches: list[list[FetchEntry]], reopen_after: int
) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        log = FetchLog(Path(tmp))
        for n, batch in enumerate(batches):
            if n == reopen_after:  # a resumed run appends to the same file
                log.close()
                log = FetchLog(Path(tmp))
            for entry in batch:
                log.write(entry)
            log.flush()
        log.close()
        data = (Path(tmp) / "fetches.jsonl").read_bytes()
    written = [entry for batch in batches for entry in batch]
    assert data.count(b"\n") == len(written) and (not data or data.endswith(b"\n"))
    data.decode("utf-8")  # RFC 8259 s.8.1: UTF-8
    for line, entry in zip(data.splitlines(), written, strict=True):
        logged = json.loads(line)
        for name in TEXT_FIELDS + INT_FIELDS:
            assert logged[name] == getattr(entry, name), name
        duration = entry.duration_s
        assert logged["duration_s"] == (round(duration, 6) if math.isfinite(duration) else None)
        assert logged["fetched_at"].endswith("Z")
