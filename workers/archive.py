"""WARC 1.1 output (ISO 28500:2017) and the per-fetch JSON-lines log.

``WarcArchive`` writes each fetch as a request record, a response record (or, for a
payload seen before, a revisit record) and, when outlinks are known, a metadata record
holding the page's links as one JSON document, into rotating gzip files
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

Exact duplicates. A response whose payload digest equals an earlier capture's is
written as a ``revisit`` record with the identical-payload-digest profile (ISO
28500:2017 s.6.7.2): WARC-Profile, WARC-Refers-To (the first capture's record ID),
WARC-Refers-To-Target-URI, WARC-Refers-To-Date and WARC-Payload-Digest; its block is the
HTTP head alone, no body.

Links. The metadata record of a page is ``application/json``: ``{"url": page, "links":
[{"url", "anchor", "followed", "why"}]}``, one entry per link in page order; ``why`` says
why a link was not followed (``nofollow``, ``meta_nofollow``, ``exact_duplicate``) and
is null for a followed one. URLs are written as URIs (as WARC-Target-URI is), anchors
as text (a lone surrogate becomes U+FFFD, RFC 8259 s.8.1 asks for UTF-8).

Request, response and metadata records are built here as bytes (header block,
block, CRLF CRLF) and compressed one gzip member each with ISA-L (``isal``), which
compresses these small records about three times as fast as zlib for a similar size
(measured: 10 vs 29 microseconds for a 1 KB record, 0.56 vs 0.55 of the input);
warcio's record builder re-reads and re-serialises every record, which dominated a
worker's CPU. HTTP heads are serialised as warcio's ``StatusAndHeaders`` does
(its own code encodes the rare non-ASCII value), a raw request head is stored as given
(warcio's request parser finds its payload), and the warcinfo record, once per file,
is still written through warcio.

Any text is written and reads back. URLs (WARC-Target-URI, outlinks, the request
target) are written as URIs: an IRI's other characters become percent-encoded UTF-8
octets (RFC 3987 s.3.1), whitespace and controls too; a lone surrogate standing for an
undecodable byte (PEP 383) goes back to that octet, any other becomes U+FFFD. HTTP heads
are ASCII: values as warcio writes them (RFC 8187), then names, the first line and what
is still not ASCII as percent-encoded UTF-8. Header text loses its line breaks, so
nothing is injected into a head. A response or request record carries a payload digest
only under an http(s) target, the only one whose block readers parse as HTTP.

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

``FetchLog`` appends one JSON object per final fetch outcome to
``out_dir/fetches.jsonl``; reopening appends (resume). Lines wait in memory until
``flush``, which appends them in one write under an exclusive ``flock`` (the workers of
one crawl share the file), cuts the file back to its last whole line when the write
fails, and then fsyncs. Opening the log cuts off a torn last line.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import functools
import hashlib
import io
import json
import logging
import math
import mmap
import os
import re
import socket
import threading
import zlib
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from stat import S_ISREG
from typing import Any
from urllib.parse import quote

import orjson
from isal import isal_zlib
from warcio.recordloader import ArcWarcRecordLoader
from warcio.statusandheaders import (
    StatusAndHeaders,
    StatusAndHeadersParser,
    StatusAndHeadersParserException,
)
from warcio.warcwriter import GzippingWrapper, WARCWriter

from frontier.digests import Capture
from frontier.exceptions import DiskFault

log = logging.getLogger(__name__)

WARC_VERSION = "1.1"
WARC_SUBDIR = "warc"
WARC_SUFFIX = ".warc.gz"
DEFAULT_PREFIX = "sluice"
DEFAULT_MAX_FILE_BYTES = 1_000_000_000
GZIP_LEVEL = 6  # warcinfo records, through warcio and zlib: zlib's default level
ISAL_LEVEL = 1  # every other record: ISA-L's levels are 0-3; above 1 gained nothing here
GZIP_WBITS = 16 + 15  # a gzip wrapper (RFC 1952) around a 32 KiB-window deflate stream
FETCH_LOG_NAME = "fetches.jsonl"
HTTP_VERSION = "HTTP/1.1"
FILE_TIMESTAMP_FORMAT = "%Y%m%d%H%M%S"
SERIAL_WIDTH = 5
WARC_FORMAT = "WARC File Format 1.1"
WARC_CONFORMS_TO = "https://iipc.github.io/warc-specifications/specifications/warc-format/warc-1.1/"
ORIGINAL_HEADER_PREFIX = "Sluice-Original-"
LINKS_CONTENT_TYPE = "application/json"
REQUEST_CONTENT_TYPE = "application/http; msgtype=request"
RESPONSE_CONTENT_TYPE = "application/http; msgtype=response"
DIGEST_ALGORITHM = "sha1"
REVISIT_PROFILE = "http://netpreserve.org/warc/1.1/revisit/identical-payload-digest"
"""ISO 28500:2017 s.6.7.2: the WARC 1.1 identical-payload-digest profile."""
NOT_MODIFIED_PROFILE = "http://netpreserve.org/warc/1.1/revisit/server-not-modified"
"""ISO 28500:2017 s.6.7.3 (from memory): the server-not-modified profile, for a 304
answer to a conditional GET; no payload digest (there is no payload)."""

_CRLF = "\r\n"
_RECORD_END = b"\r\n\r\n"
"""ISO 28500 s.4: warc-record = header CRLF block CRLF CRLF."""
_DROPPED_ALWAYS = ("transfer-encoding", "content-length")
_DROPPED_WHEN_DECODED = ("content-encoding",)
_LINE_BREAKS = str.maketrans({"\r": " ", "\n": " "})
_URI_UNSAFE = {c: f"%{c:02X}" for c in (*range(0x21), 0x7F)}
"""Whitespace and controls percent-encoded in WARC URIs (ISO 28500 s.5,
WARC-Target-URI: "written with no internal whitespace")."""
_URI_UNSAFE_SEARCH = re.compile(r"[\x00-\x20\x7f]").search
_URI_KEEP = "".join(map(chr, range(0x21, 0x7F)))  # printable ASCII: '%' escapes stay
_ASCII = "".join(map(chr, range(0x80)))
_HTTP_SCHEMES = ("http:", "https:")
"""Targets whose request and response blocks readers parse as HTTP (warcio's rule)."""
_REQUEST_PARSER = StatusAndHeadersParser(ArcWarcRecordLoader.HTTP_VERBS)
"""The parser warcio reads request records with."""
DISK_FAULT_ERRNOS = frozenset({
    errno.ENOSPC, errno.EDQUOT, errno.EFBIG,  # full: no space, quota, file size limit
    errno.EROFS, errno.EACCES, errno.EPERM,  # read-only, or refused to this process
    errno.EIO,  # the device failed
    errno.ENOENT, errno.ESTALE,  # gone: the folder vanished (ESTALE on NFS)
})
"""OSError numbers meaning the output folder takes no more writes."""
_LINE_ESCAPES = {ord(c): c.encode("unicode_escape").decode("ascii")
                 for c in "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029"}
"""Every character str.splitlines breaks at, escaped."""
_MEMBER_MAGIC = b"\x1f\x8b\x08"  # RFC 1952 s.2.3.1: ID1 ID2, CM 8 (deflate)
_RECORD_START = b"WARC/"  # ISO 28500 s.4: a record opens with its version line
_INFLATE_CHUNK = 1 << 14  # compressed bytes read at a time while checking a member
_TAIL_CHUNK = 1 << 16  # bytes read at a time while looking for the log's last newline
UUID_BYTES = 16
_VARIANT_DIGIT = {f"{n:x}": f"{8 | n & 3:x}" for n in range(16)}
"""A random hex digit with its top two bits set to 10: RFC 9562 s.4.1, the variant."""
_BASE32_ALPHABET = "ABCDEFGHIJKLMNOPQRSTUVWXYZ234567"  # RFC 4648 s.6
_BASE32_PAIRS = [a + b for a in _BASE32_ALPHABET for b in _BASE32_ALPHABET]
"""Two Base32 digits per 10 bits; a 160-bit SHA-1 digest is 16 pairs, no padding."""
_BASE32_PAIR_BITS = 10
_BASE32_PAIR_MASK = (1 << _BASE32_PAIR_BITS) - 1

Clock = Callable[[], datetime]
HeaderList = Sequence[tuple[str, str]]
RequestHead = bytes | tuple[str, str, HeaderList]
OutLink = tuple[str, str] | tuple[str, str, str | None]
"""(URL, anchor) of a followed link, or (URL, anchor, why not followed or None)."""


class _Writer(WARCWriter):  # type: ignore[misc]
    """warcio's writer (used for warcinfo records) at GZIP_LEVEL."""

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


@functools.lru_cache(maxsize=4096)  # a page's time is written twice: WARC-Date, the log
def warc_date(moment: datetime) -> str:
    """W3C-ISO8601 UTC timestamp with microseconds when present (WARC 1.1 s.5.4)."""
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    naive = moment.astimezone(UTC).replace(tzinfo=None)
    return naive.isoformat() + "Z"


def _without_surrogates(text: str) -> str:
    """``text`` with every lone surrogate replaced by U+FFFD (RFC 3629 s.3)."""
    return text.encode("utf-16", "surrogatepass").decode("utf-16", "replace")


def _utf8(text: str) -> bytes:
    """UTF-8 of any text: undecodable bytes kept as surrogates (PEP 383) go back to
    those bytes; when other lone surrogates are present, every one becomes U+FFFD."""
    try:
        return text.encode("utf-8")
    except UnicodeEncodeError:
        pass
    try:
        return text.encode("utf-8", "surrogateescape")
    except UnicodeEncodeError:
        return _without_surrogates(text).encode("utf-8")


def _uri(url: str) -> str:
    """``url`` as a URI: whitespace, controls and (RFC 3987 s.3.1) the UTF-8 octets of
    other characters percent-encoded; '%' escapes already there stay."""
    if url.isascii():
        return url.translate(_URI_UNSAFE) if _URI_UNSAFE_SEARCH(url) else url
    return quote(_utf8(url), safe=_URI_KEEP)


def _percent(text: str) -> str:
    """ASCII ``text`` as it is; other characters as percent-encoded UTF-8 octets."""
    return text if text.isascii() else quote(_utf8(text), safe=_ASCII)


def _clean(text: str) -> str:
    """A header-safe string: no line breaks, no lone surrogates."""
    if "\r" in text or "\n" in text:
        text = text.translate(_LINE_BREAKS)
    if text.isascii():
        return text
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        try:  # undecodable bytes kept as surrogates: give them back as bytes
            text = text.encode("utf-8", "surrogateescape").decode("latin-1")
        except UnicodeEncodeError:  # any other lone surrogate: U+FFFD (RFC 3629 s.3)
            text = _without_surrogates(text)
    return text


def _one_line(text: str) -> str:
    """``text`` on one printable line: line breaks and lone surrogates escaped."""
    return text.translate(_LINE_ESCAPES).encode("utf-8", "backslashreplace").decode("utf-8")


# -- disk faults and whole writes ----------------------------------------------------


def disk_fault(exc: BaseException, path: Path | str) -> DiskFault | None:
    """The ``DiskFault`` for an OSError meaning the folder takes no more writes, else None.

    The message is one line naming the path and the cause.
    """
    if not isinstance(exc, OSError) or exc.errno not in DISK_FAULT_ERRNOS:
        return None
    cause = exc.strerror or os.strerror(exc.errno)
    return DiskFault(_one_line(f"cannot write {os.fspath(path)}: {cause} "
                               f"({errno.errorcode[exc.errno]})"))


def _vanished(path: Path) -> DiskFault:
    return DiskFault(_one_line(f"cannot write {path}: the output folder vanished"))


@contextlib.contextmanager
def _disk_faults(path: Path) -> Iterator[None]:
    """Raise the OSErrors of the block that mean a disk fault as ``DiskFault``."""
    try:
        yield
    except OSError as exc:
        fault = disk_fault(exc, path)
        if fault is None:
            raise
        raise fault from exc


@contextlib.contextmanager
def _locked(fd: int) -> Iterator[None]:
    """An exclusive flock(2) on ``fd`` for the block."""
    fcntl.flock(fd, fcntl.LOCK_EX)
    try:
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)


def _write_all(fd: int, data: bytes, offset: int | None = None) -> None:
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


def _cut_back(fd: int, end: int) -> bool:
    """Truncate the file to ``end``; False when that failed too."""
    try:
        os.ftruncate(fd, end)
    except OSError:
        return False
    return True


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
            tail = (tail + out)[-len(_RECORD_END):]
    if head != _RECORD_START or tail != _RECORD_END:
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
        with _locked(fd):
            return _cut_torn_line(fd)
    finally:
        os.close(fd)


_RANDOM_BATCH = 256  # UUIDs' worth of random bytes drawn from the OS at a time
_random = threading.local()  # a pool per thread: two writers never take the same bytes
os.register_at_fork(after_in_child=lambda: setattr(_random, "pool", bytearray()))


def _record_ids(count: int) -> list[str]:
    """``count`` record IDs: random (version 4) UUID URNs.

    Same bits as ``uuid.uuid4()`` (RFC 9562 s.5.4: version 4, variant 10x); the bytes come
    from ``os.urandom``, drawn for many IDs at once (a system call each time cost more
    than formatting the IDs), into a pool of the calling thread's own.
    """
    need = UUID_BYTES * count
    pool: bytearray | None = getattr(_random, "pool", None)
    if pool is None:
        pool = _random.pool = bytearray()
    if len(pool) < need:
        pool.extend(os.urandom(UUID_BYTES * max(count, _RANDOM_BATCH)))
    digits = pool[:need].hex()
    del pool[:need]
    # hex digit 12 of each UUID is its version (4), digit 16 holds the variant bits (10)
    # over two random bits: the same bits as clearing and setting them in the number
    return [f"<urn:uuid:{digits[i:i + 8]}-{digits[i + 8:i + 12]}-4{digits[i + 13:i + 16]}-"
            f"{_VARIANT_DIGIT[digits[i + 16]]}{digits[i + 17:i + 20]}-{digits[i + 20:i + 32]}>"
            for i in range(0, 2 * need, 2 * UUID_BYTES)]


def new_record_id() -> str:
    """A record ID (a version 4 UUID URN), for a record written later."""
    return _record_ids(1)[0]


def payload_digest(body: bytes) -> str:
    """The WARC-Payload-Digest a response record with this body gets (ISO 28500 s.5.9)."""
    return _digest(body)


def _digest(*parts: bytes) -> str:
    """Labelled SHA-1 in Base32 of the concatenated parts (ISO 28500 s.5.8/5.9)."""
    hasher = hashlib.sha1()
    for part in parts:
        hasher.update(part)
    number = int.from_bytes(hasher.digest(), "big")
    pairs = [_BASE32_PAIRS[(number >> shift) & _BASE32_PAIR_MASK] for shift in _DIGEST_SHIFTS]
    return f"{DIGEST_ALGORITHM}:{''.join(pairs)}"


_DIGEST_SHIFTS = tuple(
    range(hashlib.sha1().digest_size * 8 - _BASE32_PAIR_BITS, -1, -_BASE32_PAIR_BITS)
)
_EMPTY_DIGEST = _digest()



def _http_head(protocol: str, statusline: str, headers: HeaderList) -> bytes:
    """An HTTP head in ASCII, as warcio's ``StatusAndHeaders.to_ascii_bytes`` writes it.

    ASCII heads are joined here. Otherwise values are encoded as warcio encodes them
    (RFC 8187), and the names, the first line and any value warcio leaves non-ASCII
    become percent-encoded UTF-8 (field names are ASCII tokens, RFC 9110 s.5.1), where
    warcio would refuse the head. The text must have been through ``_clean``.
    """
    first = f"{protocol} {statusline}" if protocol and statusline else protocol or statusline
    lines = [f"{first}{_CRLF}"] if first else []
    lines += [f"{name}: {value}{_CRLF}" for name, value in headers]
    lines.append(_CRLF)
    text = "".join(lines)
    if text.isascii():
        return text.encode("ascii")
    head = StatusAndHeaders(_percent(statusline), [(_percent(n), v) for n, v in headers],
                            protocol=_percent(protocol))
    head.percent_encode_non_ascii_headers()
    head.headers = [(name, _percent(value)) for name, value in head.headers]
    return bytes(head.to_ascii_bytes())


def _raw_request_block(head: bytes) -> tuple[bytes, bytes]:
    """(block, payload) for a raw request head: stored as given, its payload where
    warcio's request parser finds it. ValueError for a head that parser refuses."""
    raw = head if head.endswith(_RECORD_END) else head.rstrip(b"\r\n") + _RECORD_END
    stream = io.BytesIO(raw)
    try:
        parsed = _REQUEST_PARSER.parse(stream)
    except (StatusAndHeadersParserException, EOFError) as exc:
        raise ValueError(_one_line(f"not an HTTP request head: {exc}")[:200]) from None
    if not parsed.protocol:
        raise ValueError("not an HTTP request head: no request line")
    return raw, stream.read()


def _gzip_record(
    warc_type: str, record_id: str, date: str, target: str, fields: str, content_type: str,
    block: Sequence[bytes], payload_digest: str | None = None, truncated: str | None = None,
) -> bytes:
    """One WARC record (ISO 28500 s.4) as one gzip member (annex D).

    ``fields`` holds the type-specific named fields, each ending in CRLF.
    """
    head = [
        f"WARC/{WARC_VERSION}{_CRLF}WARC-Type: {warc_type}{_CRLF}",
        f"WARC-Record-ID: {record_id}{_CRLF}WARC-Date: {date}{_CRLF}",
        f"WARC-Target-URI: {target}{_CRLF}",  # shall be present (ISO 28500 s.5.6)
        f"{fields}Content-Type: {content_type}{_CRLF}",
        f"WARC-Block-Digest: {_digest(*block)}{_CRLF}",
    ]
    if payload_digest is not None:
        head.append(f"WARC-Payload-Digest: {payload_digest}{_CRLF}")
    if truncated:
        head.append(f"WARC-Truncated: {truncated}{_CRLF}")
    block_length = sum(map(len, block))
    head.append(f"Content-Length: {block_length}{_CRLF}{_CRLF}")
    header = "".join(head).encode("utf-8")
    return isal_zlib.compress(b"".join([header, *block, _RECORD_END]), ISAL_LEVEL, GZIP_WBITS)


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
        target = _uri(url)
        http = target.startswith(_HTTP_SCHEMES)
        date = warc_date(fetched_at)
        request_id, response_id, metadata_id = _record_ids(3)
        response_id = record_id or response_id
        ip_field = f"WARC-IP-Address: {_uri(remote_ip)}{_CRLF}" if remote_ip else ""

        request_block, request_payload = self._request_block(request_line_and_headers)
        request_digest = _digest(request_payload) if request_payload else _EMPTY_DIGEST
        request = _gzip_record(
            "request", request_id, date, target,
            f"{ip_field}WARC-Concurrent-To: {response_id}{_CRLF}", REQUEST_CONTENT_TYPE,
            (request_block,), request_digest if http else None,
        )
        http_head = _http_head(
            HTTP_VERSION, _clean(f"{response_status} {response_reason}"),
            rewrite_response_headers(response_headers, len(body), body_decoded=body_decoded),
        )
        if revisit_of is not None:
            response = _gzip_record(
                "revisit", response_id, date, target,
                f"{ip_field}WARC-Concurrent-To: {request_id}{_CRLF}"
                f"{_revisit_fields(revisit_of, revisit_profile)}", RESPONSE_CONTENT_TYPE,
                (http_head,), None if revisit_profile == NOT_MODIFIED_PROFILE
                else payload_digest or _digest(body),
            )
        else:
            response = _gzip_record(
                "response", response_id, date, target,
                f"{ip_field}WARC-Concurrent-To: {request_id}{_CRLF}", RESPONSE_CONTENT_TYPE,
                (http_head, body), (payload_digest or _digest(body)) if http else None,
                _uri(truncated) if truncated else None,
            )
        members = [request, response]
        if outlinks:
            members.append(self._metadata_record(target, date, metadata_id, response_id,
                                                 outlinks))
        file = self._open()
        offset = self._append(file, b"".join(members))
        ref = RecordRef(file.path.name, offset + len(request), len(response), response_id)
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
        with _disk_faults(file.path):
            try:
                if os.fstat(file.fd).st_nlink == 0:
                    raise _vanished(file.path)
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
        with _disk_faults(self.directory):
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
            raise _vanished(self.directory) from None
        if (stat.st_dev, stat.st_ino) != self._folder:
            raise _vanished(self.directory)

    def _warcinfo(self, name: str, now: datetime) -> bytes:
        """The warcinfo record opening file ``name`` (ISO 28500 s.6.2), through warcio."""
        buffer = io.BytesIO()
        writer = _Writer(buffer, gzip=True, warc_version=WARC_VERSION)
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
        return buffer.getvalue()

    @staticmethod
    def _append(file: _OpenWarc, data: bytes) -> int:
        """Write ``data`` at the end of the file's whole records; returns where it went.

        On any error the file is cut back to where ``data`` began.
        """
        start = file.end
        try:
            if os.fstat(file.fd).st_nlink == 0:
                raise _vanished(file.path)
            if file.torn:
                os.ftruncate(file.fd, start)
                file.torn = False
            _write_all(file.fd, data, start)
        except DiskFault:
            raise
        except BaseException as exc:
            file.torn = not _cut_back(file.fd, start)
            fault = disk_fault(exc, file.path)
            if fault is None:
                raise
            raise fault from exc
        file.end = start + len(data)
        return start

    @staticmethod
    def _request_block(head: RequestHead) -> tuple[bytes, bytes]:
        """(block, HTTP payload) of the request record."""
        if isinstance(head, bytes):
            return _raw_request_block(head)
        method, path, headers = head
        return _http_head(_uri(method), f"{_uri(path)} {HTTP_VERSION}",
                          [(_clean(n), _clean(v)) for n, v in headers]), b""

    @staticmethod
    def _metadata_record(
        target: str, date: str, record_id: str, response_id: str,
        outlinks: Sequence[OutLink],
    ) -> bytes:
        """The page's links as one JSON document (see the module docstring); no payload,
        so no payload digest (ISO 28500 s.5.9)."""
        return _gzip_record(
            "metadata", record_id, date, target, f"WARC-Refers-To: {response_id}{_CRLF}",
            LINKS_CONTENT_TYPE, (links_document(target, outlinks),),
        )


def links_document(target: str, outlinks: Sequence[OutLink]) -> bytes:
    """``{"url": target, "links": [...]}`` as UTF-8 JSON (RFC 8259)."""
    links = []
    for link in outlinks:
        why = link[2] if len(link) > 2 else None
        links.append({"url": _uri(link[0]), "anchor": link[1], "followed": why is None,
                      "why": why})
    document = {"url": target, "links": links}
    try:
        return orjson.dumps(document)
    except orjson.JSONEncodeError:  # a lone surrogate in an anchor (or a reason)
        for entry in links:
            for name in ("anchor", "why"):
                if entry[name] is not None:  # PEP 383 bytes back, then U+FFFD for bad ones
                    entry[name] = _utf8(entry[name]).decode("utf-8", "replace")
        return orjson.dumps(document)


def _revisit_fields(first: Capture, profile: str = REVISIT_PROFILE) -> str:
    """A revisit's named fields (ISO 28500 s.6.7.2, s.5.11, and WARC 1.1's
    WARC-Refers-To-Target-URI and WARC-Refers-To-Date); WARC-Refers-To only when the
    earlier record's ID is known."""
    refers = f"WARC-Refers-To: {first.record_id}{_CRLF}" if first.record_id else ""
    return (f"WARC-Profile: {profile}{_CRLF}{refers}"
            f"WARC-Refers-To-Target-URI: {_uri(first.url)}{_CRLF}"
            f"WARC-Refers-To-Date: {first.date}{_CRLF}")


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
        with _disk_faults(self.path):
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC,
                         0o644)
            try:
                with _locked(fd):
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
        with _disk_faults(self.path):
            if os.fstat(fd).st_nlink == 0:
                raise _vanished(self.path)
            if self._lines:
                data = b"".join(self._lines)
                with _locked(fd):
                    end = _cut_torn_line(fd)  # what another writer's failure may have left
                    try:
                        _write_all(fd, data)
                    except BaseException:
                        _cut_back(fd, end)
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
            with _disk_faults(self.path):
                os.close(fd)

    def __enter__(self) -> FetchLog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
