"""WARC 1.1 output (ISO 28500:2017) and the per-fetch JSON-lines log.

``WarcArchive`` writes each fetch as a request record, a response record and,
when outlinks are known, a metadata record, into rotating gzip files
``out_dir/warc/{prefix}-{UTC timestamp}-{serial:05d}-{pid}.warc.gz``. Each file
starts with a warcinfo record; each record is its own gzip member, so a
``RecordRef`` (file name, offset, length) addresses one record directly.

Decoded bodies: the fetch client hands over the body with Transfer-Encoding
removed and, by default, Content-Encoding (gzip, br, ...) already decoded. The
response record stores exactly those bytes, so its HTTP headers must not claim
an encoding the stored body no longer has: Transfer-Encoding and (for decoded
bodies) Content-Encoding are dropped, Content-Length is set to the stored body
length, and the original values are kept as ``Sluice-Original-<name>`` headers.
WARC-Payload-Digest is then the SHA-1 of the stored body, which is what a
reader gets back. ISO 28500 s.6 ('response') asks for the response "received
over the network"; this rewrite is the documented deviation that keeps the record
self-consistent.

``FetchLog`` appends one JSON object per final fetch outcome to
``out_dir/fetches.jsonl``; reopening appends (resume).
"""

from __future__ import annotations

import io
import json
import math
import os
import socket
import uuid
import zlib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any

from warcio.statusandheaders import StatusAndHeaders
from warcio.warcwriter import GzippingWrapper, WARCWriter

WARC_VERSION = "1.1"
WARC_SUBDIR = "warc"
WARC_SUFFIX = ".warc.gz"
DEFAULT_PREFIX = "sluice"
DEFAULT_MAX_FILE_BYTES = 1_000_000_000
GZIP_LEVEL = 6  # zlib's default: level 9 costs several times the CPU for a few % of size
FETCH_LOG_NAME = "fetches.jsonl"
HTTP_VERSION = "HTTP/1.1"
FILE_TIMESTAMP_FORMAT = "%Y%m%d%H%M%S"
SERIAL_WIDTH = 5
WARC_FORMAT = "WARC File Format 1.1"
WARC_CONFORMS_TO = "https://iipc.github.io/warc-specifications/specifications/warc-format/warc-1.1/"
ORIGINAL_HEADER_PREFIX = "Sluice-Original-"
METADATA_CONTENT_TYPE = "application/warc-fields"
OUTLINK_FIELD = "outlink"

_DROPPED_ALWAYS = ("transfer-encoding", "content-length")
_DROPPED_WHEN_DECODED = ("content-encoding",)
_LINE_BREAKS = str.maketrans({"\r": " ", "\n": " "})
_URI_UNSAFE = {c: f"%{c:02X}" for c in (*range(0x21), 0x7F)}
"""Whitespace and controls percent-encoded in WARC URIs (ISO 28500 s.5,
WARC-Target-URI: "written with no internal whitespace")."""

Clock = Callable[[], datetime]
HeaderList = Sequence[tuple[str, str]]
RequestHead = bytes | tuple[str, str, HeaderList]


class _Writer(WARCWriter):  # type: ignore[misc]
    """warcio's writer, minus the payload digest on metadata records.

    ISO 28500 s.4: warcinfo, metadata and revisit records have no payload, and
    s.5.9: WARC-Payload-Digest shall not be used on records without one.
    """

    NO_PAYLOAD_DIGEST_TYPES = ("warcinfo", "metadata", "revisit")

    def _write_warc_record(self, out: Any, record: Any) -> Any:
        """One gzip member per record (ISO 28500 annex D), at GZIP_LEVEL, not warcio's 9."""
        if not self.gzip:
            return super()._write_warc_record(out, record)
        self.gzip = False
        try:
            return super()._write_warc_record(_LeveledGzip(out, GZIP_LEVEL), record)
        finally:
            self.gzip = True


class _LeveledGzip(GzippingWrapper):  # type: ignore[misc]
    """warcio's per-record gzip wrapper with a chosen compression level."""

    def __init__(self, out: Any, level: int) -> None:
        self.compressor = zlib.compressobj(level, zlib.DEFLATED, zlib.MAX_WBITS + 16)
        self.out = out


def utc_now() -> datetime:
    """The current time, timezone-aware UTC."""
    return datetime.now(UTC)


def warc_date(moment: datetime) -> str:
    """W3C-ISO8601 UTC timestamp with microseconds when present (WARC 1.1 s.5.4)."""
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    naive = moment.astimezone(UTC).replace(tzinfo=None)
    return naive.isoformat() + "Z"


def _uri(url: str) -> str:
    return url.translate(_URI_UNSAFE)


def _clean(text: str) -> str:
    """A header-safe string: no line breaks, no lone surrogates."""
    text = text.translate(_LINE_BREAKS)
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = text.encode("utf-8", "surrogateescape").decode("latin-1")
    return text


def _record_id() -> str:
    return f"<urn:uuid:{uuid.uuid4()}>"


def rewrite_response_headers(
    headers: Iterable[tuple[str, str]], body_length: int, *, body_decoded: bool = True
) -> list[tuple[str, str]]:
    """Headers describing the stored body: see the module docstring."""
    dropped = _DROPPED_ALWAYS + (_DROPPED_WHEN_DECODED if body_decoded else ())
    kept: list[tuple[str, str]] = []
    originals: list[tuple[str, str]] = []
    for name, value in headers:
        name, value = _clean(name), _clean(value)
        if name.lower() in dropped:
            originals.append((ORIGINAL_HEADER_PREFIX + name, value))
        else:
            kept.append((name, value))
    kept.append(("Content-Length", str(body_length)))
    return kept + originals


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
        self._file: IO[bytes] | None = None
        self._writer: WARCWriter | None = None

    @property
    def current_path(self) -> Path | None:
        """The file being written, or None between files."""
        return self.files[-1] if self._file is not None else None

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
        outlinks: Sequence[tuple[str, str]] | None = None,
        *,
        body_decoded: bool = True,
        truncated: str | None = None,
    ) -> RecordRef:
        """Write request, response and (with outlinks) metadata records.

        ``request_line_and_headers`` is the raw request head (bytes) or
        ``(method, path, headers)``. ``truncated`` is a WARC-Truncated reason
        ("length", "time", "disconnect", "unspecified") for partial bodies.
        A metadata record is written only for a non-empty ``outlinks``.
        Returns the location of the response record. Rotates afterwards when
        the file has grown past ``max_file_bytes``.
        """
        writer, out = self._open()
        target = _uri(url)
        date = warc_date(fetched_at)
        request_id, response_id = _record_id(), _record_id()
        common = {"WARC-Date": date}
        if remote_ip:
            common["WARC-IP-Address"] = remote_ip

        request = self._request_record(
            writer, target, request_line_and_headers,
            {**common, "WARC-Record-ID": request_id, "WARC-Concurrent-To": response_id},
        )
        writer.write_record(request)

        response_warc_headers = {
            **common, "WARC-Record-ID": response_id, "WARC-Concurrent-To": request_id
        }
        if truncated:
            response_warc_headers["WARC-Truncated"] = truncated
        http_headers = StatusAndHeaders(
            _clean(f"{response_status} {response_reason}"),
            rewrite_response_headers(response_headers, len(body), body_decoded=body_decoded),
            protocol=HTTP_VERSION,
        )
        response = writer.create_warc_record(
            target, "response", payload=io.BytesIO(body), length=len(body),
            http_headers=http_headers, warc_headers_dict=response_warc_headers,
        )
        offset = out.tell()
        writer.write_record(response)
        ref = RecordRef(self.files[-1].name, offset, out.tell() - offset, response_id)

        if outlinks:
            writer.write_record(self._metadata_record(writer, target, date, response_id, outlinks))

        if out.tell() >= self.max_file_bytes:
            self.close()
        return ref

    def close(self) -> None:
        """Flush and close the current file, if any."""
        if self._file is not None:
            self._file.flush()
            os.fsync(self._file.fileno())
            self._file.close()
        self._file = None
        self._writer = None

    def __enter__(self) -> WarcArchive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- internals -------------------------------------------------------------------

    def _open(self) -> tuple[WARCWriter, IO[bytes]]:
        if self._file is not None and self._writer is not None:
            return self._writer, self._file
        self.directory.mkdir(parents=True, exist_ok=True)
        now = self.clock()
        stamp = now.astimezone(UTC).strftime(FILE_TIMESTAMP_FORMAT)
        while True:
            serial = f"{self._serial:0{SERIAL_WIDTH}d}"
            name = f"{self.prefix}-{stamp}-{serial}-{os.getpid()}{WARC_SUFFIX}"
            self._serial += 1
            try:
                out = open(self.directory / name, "xb")  # noqa: SIM115 - kept open across writes
            except FileExistsError:
                continue
            break
        writer = _Writer(out, gzip=True, warc_version=WARC_VERSION)
        info: dict[str, Any] = {
            "software": self.software,
            "operator": self.operator,
            "hostname": socket.gethostname(),
            "format": WARC_FORMAT,
            "conformsTo": WARC_CONFORMS_TO,
            "isPartOf": self.job,
        }
        warcinfo = writer.create_warcinfo_record(name, info)
        warcinfo.rec_headers.replace_header("WARC-Date", warc_date(now))
        writer.write_record(warcinfo)
        self._file, self._writer = out, writer
        self.files.append(self.directory / name)
        return writer, out

    @staticmethod
    def _request_record(
        writer: WARCWriter, target: str, head: RequestHead, warc_headers: dict[str, str]
    ) -> Any:
        if isinstance(head, bytes):
            raw = head if head.endswith(b"\r\n\r\n") else head.rstrip(b"\r\n") + b"\r\n\r\n"
            return writer.create_warc_record(
                target, "request", payload=io.BytesIO(raw), length=len(raw),
                warc_headers_dict=warc_headers,
            )
        method, path, headers = head
        http_headers = StatusAndHeaders(
            _clean(f"{method} {path} {HTTP_VERSION}"),
            [(_clean(n), _clean(v)) for n, v in headers],
            is_http_request=True,
        )
        return writer.create_warc_record(
            target, "request", payload=io.BytesIO(b""), length=0,
            http_headers=http_headers, warc_headers_dict=warc_headers,
        )

    @staticmethod
    def _metadata_record(
        writer: WARCWriter, target: str, date: str, response_id: str,
        outlinks: Sequence[tuple[str, str]],
    ) -> Any:
        lines = [
            f"{OUTLINK_FIELD}: {_uri(link)} {_clean(anchor)}".rstrip() + "\r\n"
            for link, anchor in outlinks
        ]
        block = "".join(lines).encode("utf-8")
        return writer.create_warc_record(
            target, "metadata", payload=io.BytesIO(block), length=len(block),
            warc_content_type=METADATA_CONTENT_TYPE,
            warc_headers_dict={
                "WARC-Date": date, "WARC-Record-ID": _record_id(), "WARC-Refers-To": response_id,
            },
        )


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

    def to_json(self) -> dict[str, Any]:
        """JSON-ready dict: ISO UTC time ending in Z, SimHash as 16 hex digits."""
        data = {name: getattr(self, name) for name in self.__slots__}  # flat: no deep copy
        data["fetched_at"] = warc_date(self.fetched_at)
        finite = math.isfinite(self.duration_s)
        data["duration_s"] = round(self.duration_s, 6) if finite else None
        data["simhash"] = None if self.simhash is None else f"{self.simhash:016x}"
        return data


class FetchLog:
    """Line-buffered JSON-lines log of fetch outcomes; appends when reopened."""

    def __init__(self, out_dir: Path) -> None:
        self.path = Path(out_dir) / FETCH_LOG_NAME
        self.path.parent.mkdir(parents=True, exist_ok=True)
        torn = self._ends_mid_line(self.path)
        self._out: IO[str] | None = open(  # noqa: SIM115 - kept open across writes
            self.path, "a", encoding="utf-8", buffering=1, newline="\n"
        )
        if torn:
            self._out.write("\n")

    @staticmethod
    def _ends_mid_line(path: Path) -> bool:
        try:
            with open(path, "rb") as existing:
                existing.seek(0, os.SEEK_END)
                if existing.tell() == 0:
                    return False
                existing.seek(-1, os.SEEK_END)
                return existing.read(1) != b"\n"
        except FileNotFoundError:
            return False

    def write(self, entry: FetchEntry) -> None:
        """Append one line for ``entry``."""
        if self._out is None:
            raise ValueError("fetch log is closed")
        line = json.dumps(entry.to_json(), ensure_ascii=False, separators=(",", ":"),
                          allow_nan=False)
        self._out.write(line + "\n")

    def close(self) -> None:
        """Flush and close the log."""
        if self._out is not None:
            self._out.flush()
            os.fsync(self._out.fileno())
            self._out.close()
            self._out = None

    def __enter__(self) -> FetchLog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
