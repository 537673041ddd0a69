"""WARC 1.1 records (ISO 28500:2017) as bytes: record headers, digests, record IDs, one
gzip member per record, HTTP heads rewritten for the stored body, and the metadata
record's links document. Pure functions: nothing here touches a file
(``workers/archive.py`` writes the records).

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
"""

from __future__ import annotations

import functools
import hashlib
import io
import os
import re
import threading
import zlib
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime
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

WARC_VERSION = "1.1"
GZIP_LEVEL = 6  # warcinfo records, through warcio and zlib: zlib's default level
ISAL_LEVEL = 1  # every other record: ISA-L's levels are 0-3; above 1 gained nothing here
GZIP_WBITS = 16 + 15  # a gzip wrapper (RFC 1952) around a 32 KiB-window deflate stream
HTTP_VERSION = "HTTP/1.1"
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
RECORD_END = b"\r\n\r\n"
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
_LINE_ESCAPES = {ord(c): c.encode("unicode_escape").decode("ascii")
                 for c in "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029"}
"""Every character str.splitlines breaks at, escaped."""
UUID_BYTES = 16
_VARIANT_DIGIT = {f"{n:x}": f"{8 | n & 3:x}" for n in range(16)}
"""A random hex digit with its top two bits set to 10: RFC 9562 s.4.1, the variant."""
_BASE32_ALPHABET = "ABCDEFGHIJKLMNOPQRSTUVWXYZ234567"  # RFC 4648 s.6
_BASE32_PAIRS = [a + b for a in _BASE32_ALPHABET for b in _BASE32_ALPHABET]
"""Two Base32 digits per 10 bits; a 160-bit SHA-1 digest is 16 pairs, no padding."""
_BASE32_PAIR_BITS = 10
_BASE32_PAIR_MASK = (1 << _BASE32_PAIR_BITS) - 1

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


def one_line(text: str) -> str:
    """``text`` on one printable line: line breaks and lone surrogates escaped."""
    return text.translate(_LINE_ESCAPES).encode("utf-8", "backslashreplace").decode("utf-8")


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
    raw = head if head.endswith(RECORD_END) else head.rstrip(b"\r\n") + RECORD_END
    stream = io.BytesIO(raw)
    try:
        parsed = _REQUEST_PARSER.parse(stream)
    except (StatusAndHeadersParserException, EOFError) as exc:
        raise ValueError(one_line(f"not an HTTP request head: {exc}")[:200]) from None
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
    return isal_zlib.compress(b"".join([header, *block, RECORD_END]), ISAL_LEVEL, GZIP_WBITS)


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


def request_block(head: RequestHead) -> tuple[bytes, bytes]:
    """(block, HTTP payload) of the request record."""
    if isinstance(head, bytes):
        return _raw_request_block(head)
    method, path, headers = head
    return _http_head(_uri(method), f"{_uri(path)} {HTTP_VERSION}",
                      [(_clean(n), _clean(v)) for n, v in headers]), b""


def metadata_record(
    target: str, date: str, record_id: str, response_id: str,
    outlinks: Sequence[OutLink],
) -> bytes:
    """The page's links as one JSON document (see the module docstring); no payload,
    so no payload digest (ISO 28500 s.5.9)."""
    return _gzip_record(
        "metadata", record_id, date, target, f"WARC-Refers-To: {response_id}{_CRLF}",
        LINKS_CONTENT_TYPE, (links_document(target, outlinks),),
    )


def exchange_records(
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
) -> tuple[list[bytes], str]:
    """An exchange's records, each one gzip member: request, response (or revisit) and,
    for a non-empty ``outlinks``, metadata; and the response record's ID.

    The arguments are those of ``WarcArchive.write_exchange``. Raises ValueError for a
    raw request head readers cannot parse.
    """
    target = _uri(url)
    http = target.startswith(_HTTP_SCHEMES)
    date = warc_date(fetched_at)
    request_id, response_id, metadata_id = _record_ids(3)
    response_id = record_id or response_id
    ip_field = f"WARC-IP-Address: {_uri(remote_ip)}{_CRLF}" if remote_ip else ""

    request_block_, request_payload = request_block(request_line_and_headers)
    request_digest = _digest(request_payload) if request_payload else _EMPTY_DIGEST
    request = _gzip_record(
        "request", request_id, date, target,
        f"{ip_field}WARC-Concurrent-To: {response_id}{_CRLF}", REQUEST_CONTENT_TYPE,
        (request_block_,), request_digest if http else None,
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
        members.append(metadata_record(target, date, metadata_id, response_id, outlinks))
    return members, response_id


def warcinfo_record(filename: str, date: str, info: dict[str, Any]) -> bytes:
    """The warcinfo record opening file ``filename`` (ISO 28500 s.6.2), through warcio."""
    buffer = io.BytesIO()
    writer = _Writer(buffer, gzip=True, warc_version=WARC_VERSION)
    warcinfo = writer.create_warcinfo_record(filename, info)
    warcinfo.rec_headers.replace_header("WARC-Date", date)
    writer.write_record(warcinfo)
    return buffer.getvalue()


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
