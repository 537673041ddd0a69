"""One HTTP fetch, bounded in every direction, through the address guard.

Redirects are not followed here: a redirect is a response whose Location becomes a new
frontier URL (scope, robots and address checks again). Bodies are capped before and
after decompression; a compressed bomb stops at the cap.
"""

from __future__ import annotations

import asyncio
import time
import zlib
from dataclasses import dataclass, field

import aiohttp

from frontier.exceptions import AddressRefused, FetchError
from frontier.settings import FetchSettings
from frontier.guard import GuardedConnector, GuardedResolver

READ_CHUNK = 64 * 1024
ACCEPT = "text/html,application/xhtml+xml;q=0.9,*/*;q=0.5"


@dataclass
class Response:
    """What came back: status, headers, the decoded body, and how it went."""

    url: str
    status: int
    reason: str
    headers: list[tuple[str, str]]
    body: bytes
    elapsed_s: float
    remote_ip: str | None = None
    truncated: str | None = None  # WARC-Truncated reason when the body was cut
    request_headers: list[tuple[str, str]] = field(default_factory=list)
    _by_name: dict[str, str] | None = field(default=None, repr=False, compare=False)

    def header(self, name: str) -> str | None:
        """The first value of header ``name`` (any case), or None."""
        if self._by_name is None:
            self._by_name = {}
            for k, v in self.headers:
                self._by_name.setdefault(k.lower(), v)
        return self._by_name.get(name.lower())

    @property
    def content_type(self) -> str:
        return (self.header("Content-Type") or "").split(";", 1)[0].strip().lower()


class Decoder:
    """Content-Encoding decoding with a hard cap on the decoded size."""

    def __init__(self, encoding: str | None, limit: int) -> None:
        enc = (encoding or "identity").strip().lower()
        if enc in ("gzip", "x-gzip"):
            self._z: zlib._Decompress | None = zlib.decompressobj(16 + zlib.MAX_WBITS)
        elif enc == "deflate":
            self._z = zlib.decompressobj()
        elif enc in ("identity", ""):
            self._z = None
        else:
            raise FetchError("unsupported_encoding", enc)
        self.limit = limit
        self.parts: list[bytes] = []
        self.size = 0

    def feed(self, chunk: bytes) -> bool:
        """Add a raw chunk; False once the decoded size reached the cap."""
        if self._z is None:
            data = chunk
        else:
            try:
                data = self._z.decompress(chunk, self.limit - self.size + 1)
            except zlib.error as exc:
                raise FetchError("bad_encoding", str(exc)) from exc
        self.parts.append(data)
        self.size += len(data)
        return self.size <= self.limit

    def body(self) -> bytes:
        return b"".join(self.parts)[: self.limit]


class Fetcher:
    """An aiohttp session behind the address guard, with the job's limits."""

    def __init__(self, settings: FetchSettings, user_agent: str) -> None:
        self.settings = settings
        self.user_agent = user_agent
        self.resolver = GuardedResolver.from_settings(settings)
        self._session: aiohttp.ClientSession | None = None

    async def __aenter__(self) -> Fetcher:
        s = self.settings
        connector = GuardedConnector(
            self.resolver, limit=s.concurrency * 2, limit_per_host=4, ttl_dns_cache=300,
            enable_cleanup_closed=True)
        self._session = aiohttp.ClientSession(
            connector=connector, trust_env=False, auto_decompress=False,
            timeout=aiohttp.ClientTimeout(
                total=s.total_timeout_s, sock_connect=s.connect_timeout_s,
                sock_read=s.read_timeout_s),
            headers={"User-Agent": self.user_agent, "Accept": ACCEPT,
                     "Accept-Encoding": "gzip, deflate"},
            max_line_size=s.max_header_bytes, max_field_size=s.max_header_bytes,
        )
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._session is not None:
            await self._session.close()
            self._session = None

    async def get(self, url: str, *, max_body: int | None = None,
                  max_decoded: int | None = None,
                  headers: dict[str, str] | None = None) -> Response:
        """GET ``url`` without following redirects. Raises FetchError or AddressRefused.
        ``max_body``/``max_decoded`` replace the job's caps (a sitemap's are its own);
        ``headers`` are added to the request (a conditional GET's validators)."""
        assert self._session is not None, "use 'async with Fetcher(...)'"
        s = self.settings
        limit = max_body or s.max_body_bytes
        started = time.monotonic()
        try:
            async with self._session.get(url, allow_redirects=False, headers=headers) as resp:
                header_bytes = sum(len(k) + len(v) + 4 for k, v in resp.raw_headers)
                if header_bytes > s.max_header_bytes:
                    raise FetchError("headers_too_large", f"{header_bytes} bytes of headers")
                decoder = Decoder(resp.headers.get("Content-Encoding"),
                                  max_decoded or s.max_decompressed_bytes)
                truncated = None
                raw = 0
                try:
                    async for chunk in resp.content.iter_chunked(READ_CHUNK):
                        room = limit - raw
                        raw += len(chunk)
                        if not decoder.feed(chunk[:room]) or raw > limit:
                            truncated = "length"  # keep the first `limit` bytes, say so
                            break
                except asyncio.TimeoutError:  # a slow drip: keep what came, say so
                    truncated = "time"
                peer = resp.connection.transport.get_extra_info("peername") if (
                    resp.connection and resp.connection.transport) else None
                return Response(
                    url=url, status=resp.status, reason=resp.reason or "",
                    headers=list(resp.raw_headers and [
                        (k.decode("latin-1"), v.decode("latin-1")) for k, v in resp.raw_headers]),
                    body=decoder.body(), elapsed_s=time.monotonic() - started,
                    remote_ip=peer[0] if peer else None, truncated=truncated,
                    request_headers=[(k, v) for k, v in resp.request_info.headers.items()],
                )
        except AddressRefused:
            raise
        except FetchError:
            raise
        except asyncio.TimeoutError as exc:
            raise FetchError("timeout", url, retryable=True) from exc
        except aiohttp.ClientResponseError as exc:  # bad status line, headers too large
            raise FetchError("bad_response", f"{exc.status} {exc.message}") from exc
        except aiohttp.ClientConnectorError as exc:
            raise FetchError("connect_error", str(exc), retryable=True) from exc
        except aiohttp.ClientPayloadError as exc:
            raise FetchError("bad_payload", str(exc), retryable=True) from exc
        except aiohttp.ClientError as exc:
            raise FetchError("client_error", f"{type(exc).__name__}: {exc}", retryable=True) from exc
        except (ValueError, UnicodeError) as exc:  # invalid URL for aiohttp/yarl
            raise FetchError("bad_url", str(exc)) from exc
