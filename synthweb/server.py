"""Serve a SyntheticWeb over HTTP on one loopback socket, choosing the site by Host.

Every request is logged (host, path, method, user agent, start/end on an injectable
monotonic clock, status, body bytes) and in-flight requests are counted per host,
so tests can tell whether a crawler ever had two requests open to one host.
"""

from __future__ import annotations

import asyncio
import functools
import html
import ipaddress
import posixpath
import random
import socket
import time
import zlib
from collections import defaultdict
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from types import TracebackType
from urllib.parse import urlsplit

from aiohttp import hdrs, web

from frontier.exceptions import ConfigError
from synthweb.graph import (
    ROBOTS_SERVER_ERROR,
    Behaviour,
    Link,
    Page,
    SyntheticWeb,
    WebSpec,
)

ROBOTS_PATH = "/robots.txt"
TEST_SUFFIX = ".test"
ROBOTS_TYPE = "text/plain; charset=utf-8"
DEFAULT_SLOW_DELAY = 0.2  # seconds added to every response of a slow host
# Seconds every response takes at least. Even at 0 each handler yields once to the
# event loop, so requests that arrive together overlap; a few milliseconds make the
# per-host concurrency check reliable for requests that arrive apart.
DEFAULT_LATENCY = 0.0
DEFAULT_DRIP_INTERVAL = 0.5  # seconds between bytes of the slow-drip page
DEFAULT_DRIP_DURATION = 60.0  # seconds the slow-drip page keeps dripping
SHUTDOWN_TIMEOUT = 1.0  # seconds stop() waits for open responses

HUGE_BODY_BYTES = 20 * 1024 * 1024
STREAM_CHUNK_BYTES = 64 * 1024
GZIP_BOMB_INFLATED_BYTES = 101 * 1024 * 1024
GZIP_BOMB_CHUNK_BYTES = 1024 * 1024
GZIP_WBITS = 31  # zlib: gzip container (RFC 1952)
GZIP_LEVEL = 9
HUGE_HEADER_COUNT = 64
HUGE_HEADER_VALUE_BYTES = 1000  # 64 x ~1 KB = ~64 KB of response headers
BINARY_BYTES = 4096
BINARY_SEED = "synthweb-binary"

# One-byte GIF89a image (a single transparent pixel).
TINY_GIF = (
    b"GIF89a\x01\x00\x01\x00\x80\x00\x00\x00\x00\x00\xff\xff\xff!\xf9\x04\x01\x00\x00\x00"
    b"\x00,\x00\x00\x00\x00\x01\x00\x01\x00\x00\x02\x02D\x01\x00;"
)

_WRONG_CHARSET_TEXT = "Kalé vasdör tuquin zeñe bélosk, façade shiwen."
_MALFORMED_HTML = (
    "<html><head><title>Broken <b>page</title><head><body>\n"
    "<p><b><i>unclosed tags <div <p>>< stray brackets <<>>\n"
    "<table><tr><td>cell</table></td></tr>\n"
    '<a href="{home}">back to bad inputs</a\n'
    "<p>attribute soup <img src=x alt='a' alt=\"b\" / / >\n"
    "&notanentity; &#xZZZ; &amp\n"
    "<!-- an unterminated comment\n"
)


@dataclass(frozen=True, slots=True)
class RequestRecord:
    """One request as the server saw it."""

    host: str
    path: str
    method: str
    user_agent: str
    start: float
    end: float
    status: int
    bytes: int


@functools.cache
def gzip_bomb_body() -> bytes:
    """Gzip stream of >100 MB of zeros, built once by compressing 1 MB at a time."""
    compressor = zlib.compressobj(GZIP_LEVEL, zlib.DEFLATED, GZIP_WBITS)
    zeros = bytes(GZIP_BOMB_CHUNK_BYTES)
    parts = [compressor.compress(zeros) for _ in range(GZIP_BOMB_INFLATED_BYTES // len(zeros))]
    parts.append(compressor.flush())
    return b"".join(parts)


def _is_loopback(host: str) -> bool:
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _request_host(request: web.BaseRequest) -> str:
    """The Host header's name: lower case, no port, no trailing dot."""
    raw = request.headers.get(hdrs.HOST, "")
    if raw.startswith("["):
        name = raw[1 : raw.find("]")] if "]" in raw else raw
    else:
        name = raw.rsplit(":", 1)[0] if raw.count(":") == 1 else raw
    return name.strip().rstrip(".").lower()


# --- page rendering --------------------------------------------------------------------


def _relative(target_path: str, base_path: str) -> str:
    """A path-relative reference from ``base_path``'s directory to ``target_path``."""
    rel = posixpath.relpath(target_path, posixpath.dirname(base_path))
    if target_path.endswith("/") and not rel.endswith("/"):
        rel += "/"
    return rel


def href_for(page: Page, link: Link, position: int) -> str:
    """How ``link`` is written on ``page``: absolute, protocol-relative or relative.

    The form is a fixed function of page and position, so the HTML is deterministic;
    every form resolves (RFC 3986 section 5) to ``link.url`` against the page's base.
    """
    choice = (zlib.crc32(page.url.encode()) + position) % 6
    target = urlsplit(link.url)
    base = urlsplit(page.base_href or page.url)
    fragment = "#section" if choice == 5 else ""
    if target.scheme != "http" or not (target.hostname or "").endswith(TEST_SUFFIX):
        return link.url  # bait and foreign links are written verbatim
    if target.netloc != base.netloc:
        return (f"//{target.netloc}{target.path}" if choice % 2 else link.url) + fragment
    if choice in (0, 1):
        return link.url + fragment
    if choice == 2:
        return target.path + fragment
    return _relative(target.path, base.path) + fragment


def render_page(page: Page) -> bytes:
    """The HTML of an ordinary page."""
    head = [f"<title>{html.escape(page.title)}</title>"]
    if page.base_href:
        head.append(f'<base href="{html.escape(page.base_href)}">')
    if page.meta_nofollow:
        head.append('<meta name="robots" content="nofollow">')
    items = []
    for i, link in enumerate(page.links):
        rel = ' rel="nofollow"' if link.nofollow else ""
        items.append(
            f'<li><a href="{html.escape(href_for(page, link, i))}"{rel}>'
            f"{html.escape(link.anchor)}</a></li>"
        )
    doc = (
        '<!DOCTYPE html>\n<html><head><meta charset="utf-8">'
        + "".join(head)
        + f"</head>\n<body><h1>{html.escape(page.title)}</h1>\n<p>{html.escape(page.text)}</p>\n"
        + "<ul>\n"
        + "\n".join(items)
        + "\n</ul></body></html>\n"
    )
    return doc.encode("utf-8")


@functools.cache
def _huge_body_chunks() -> tuple[bytes, bytes]:
    """(first chunk, every later chunk) of the 20 MB page."""
    prefix = b"<!DOCTYPE html><html><body><p>"
    word = b"kalo vasdor tuquin "
    filler = word * (STREAM_CHUNK_BYTES // len(word) + 1)
    return prefix + filler[: STREAM_CHUNK_BYTES - len(prefix)], filler[:STREAM_CHUNK_BYTES]


@functools.cache
def _binary_body() -> bytes:
    return random.Random(BINARY_SEED).randbytes(BINARY_BYTES)


# --- the server ------------------------------------------------------------------------


class _Outcome:
    """Mutable status/bytes of a request in progress, for the log."""

    __slots__ = ("status", "bytes")

    def __init__(self) -> None:
        self.status = 0
        self.bytes = 0


class SyntheticServer:
    """An aiohttp server for a SyntheticWeb on one loopback socket.

    ``slow_delay`` is added to responses of the web's slow hosts, ``latency`` to all
    others; ``drip_interval``/``drip_duration`` shape the slow-drip page; ``clock``
    stamps the request log.
    """

    def __init__(
        self,
        synthetic_web: SyntheticWeb | None = None,
        *,
        slow_delay: float = DEFAULT_SLOW_DELAY,
        latency: float = DEFAULT_LATENCY,
        drip_interval: float = DEFAULT_DRIP_INTERVAL,
        drip_duration: float = DEFAULT_DRIP_DURATION,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.web = synthetic_web if synthetic_web is not None else SyntheticWeb.generate(WebSpec())
        self.slow_delay = slow_delay
        self.latency = latency
        self.drip_interval = drip_interval
        self.drip_duration = drip_duration
        self.clock = clock
        self.log: list[RequestRecord] = []
        self.port: int | None = None
        self._hosts = self.web.hosts
        self._html_cache: dict[str, bytes] = {}
        self._fail_counts: dict[str, int] = defaultdict(int)
        self._in_flight: dict[str, int] = defaultdict(int)
        self._max_in_flight: dict[str, int] = defaultdict(int)
        self._runner: web.ServerRunner | None = None

    def prerender(self) -> int:
        """Render every ordinary page into the cache now; returns how many.

        Benchmarks call it so that every request, the crawler's first and the reference
        loop's later ones, is answered from memory at the same cost.
        """
        for url, page in self.web.pages.items():
            if page.behaviour is Behaviour.OK and url not in self._html_cache:
                self._html_cache[url] = render_page(page)
        return len(self._html_cache)

    # -- lifecycle --
    async def start(self, host: str = "127.0.0.1", port: int = 0) -> int:
        """Listen on ``host:port`` (a free port if 0) and return the port."""
        if not _is_loopback(host):
            raise ConfigError(f"host: {host!r} is not a loopback address")
        if self._runner is not None:
            raise ConfigError("server: already started")
        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        sock = socket.socket(family, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind((host, port))
        except OSError as exc:
            sock.close()
            raise ConfigError(f"port: cannot listen on {host}:{port}: {exc}") from exc
        server = web.Server(self._handle, handler_cancellation=True)
        self._runner = web.ServerRunner(server, shutdown_timeout=SHUTDOWN_TIMEOUT)
        await self._runner.setup()
        await web.SockSite(self._runner, sock).start()
        self.port = int(sock.getsockname()[1])
        return self.port

    async def stop(self) -> None:
        """Stop listening and close open connections."""
        if self._runner is not None:
            runner, self._runner = self._runner, None
            await runner.cleanup()

    async def __aenter__(self) -> SyntheticServer:
        await self.start()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.stop()

    # -- the log --
    def requests_for(self, host: str) -> list[RequestRecord]:
        """Logged requests to ``host``, in completion order."""
        return [r for r in self.log if r.host == host]

    def max_concurrency_per_host(self) -> dict[str, int]:
        """The most requests ever in flight at once, per host."""
        return dict(self._max_in_flight)

    def in_flight(self, host: str) -> int:
        """Requests to ``host`` being served right now."""
        return self._in_flight.get(host, 0)

    def clear_log(self) -> None:
        """Forget logged requests and concurrency peaks (flaky-page counters stay)."""
        self.log.clear()
        self._max_in_flight.clear()

    # -- handling --
    async def _handle(self, request: web.BaseRequest) -> web.StreamResponse:
        host = _request_host(request)
        start = self.clock()
        self._in_flight[host] += 1
        if self._in_flight[host] > self._max_in_flight[host]:
            self._max_in_flight[host] = self._in_flight[host]
        outcome = _Outcome()
        try:
            return await self._respond(request, host, outcome)
        finally:
            self._in_flight[host] -= 1
            self.log.append(RequestRecord(
                host=host, path=request.path_qs, method=request.method,
                user_agent=request.headers.get(hdrs.USER_AGENT, ""),
                start=start, end=self.clock(), status=outcome.status, bytes=outcome.bytes,
            ))

    @staticmethod
    def _simple(
        outcome: _Outcome, status: int, body: bytes = b"", headers: dict[str, str] | None = None
    ) -> web.Response:
        outcome.status, outcome.bytes = status, len(body)
        return web.Response(status=status, body=body, headers=headers)

    async def _respond(
        self, request: web.BaseRequest, host: str, outcome: _Outcome
    ) -> web.StreamResponse:
        if host not in self._hosts:
            return self._simple(outcome, 404, b"unknown host\n", {"Content-Type": "text/plain"})
        if request.method not in (hdrs.METH_GET, hdrs.METH_HEAD):
            return self._simple(outcome, 405, b"", {"Allow": "GET, HEAD"})
        await asyncio.sleep(self.slow_delay if host in self.web.slow_hosts else self.latency)
        if request.path == ROBOTS_PATH:
            return self._robots(host, outcome)
        served = self.web.files.get(f"http://{host}{request.path_qs}")
        if served is not None:
            return self._simple(outcome, *served)
        page = self.web.resolve(f"http://{host}{request.path_qs}")
        if page is None:
            return self._simple(outcome, 404, b"<html><body>not found</body></html>\n",
                                {"Content-Type": "text/html"})
        return await self._page(request, page, outcome)

    def _robots(self, host: str, outcome: _Outcome) -> web.Response:
        body = self.web.robots.get(host)
        if body is None:
            return self._simple(outcome, 404, b"no robots.txt\n")
        if body == ROBOTS_SERVER_ERROR:
            return self._simple(outcome, 500, b"robots.txt is broken today\n")
        data = body.encode("utf-8", "surrogateescape")
        return self._simple(outcome, 200, data, {"Content-Type": ROBOTS_TYPE})

    def _location(self, page: Page) -> str:
        """The Location header: relative on the same host for every other page."""
        assert page.location is not None
        target = urlsplit(page.location)
        if target.hostname == page.host and zlib.crc32(page.url.encode()) % 2:
            return target.path
        return page.location

    async def _page(
        self, request: web.BaseRequest, page: Page, outcome: _Outcome
    ) -> web.StreamResponse:
        b = page.behaviour
        if b in (Behaviour.REDIRECT, Behaviour.ENDLESS_REDIRECT):
            return self._simple(outcome, page.status, b"", {"Location": self._location(page)})
        if b is Behaviour.ERROR:
            return self._simple(outcome, page.status, b"<html><body>server error</body></html>",
                                {"Content-Type": "text/html"})
        if b is Behaviour.FLAKY and self._fail_counts[page.url] < page.fail_count:
            self._fail_counts[page.url] += 1
            return self._simple(outcome, 503, b"<html><body>try later</body></html>",
                                {"Content-Type": "text/html",
                                 "Retry-After": str(page.retry_after or 0)})
        if b is Behaviour.ASSET:
            return self._simple(outcome, 200, TINY_GIF, {"Content-Type": page.content_type})
        if b in _BAD_RESPONDERS:
            return await _BAD_RESPONDERS[b](self, request, page, outcome)
        body = self._html_cache.get(page.url)
        if body is None:
            body = render_page(page)
            if page.url in self.web.pages:  # endless pages are not cached
                self._html_cache[page.url] = body
        return self._simple(outcome, 200, body, {"Content-Type": page.content_type})

    # -- bad inputs --
    async def _malformed(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        body = _MALFORMED_HTML.format(home=page.links[0].url if page.links else "/").encode()
        return self._simple(o, 200, body, {"Content-Type": "text/html; charset=utf-8"})

    async def _wrong_charset(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        body = f"<html><body><p>{_WRONG_CHARSET_TEXT}</p></body></html>".encode("cp1252")
        return self._simple(o, 200, body, {"Content-Type": "text/html; charset=utf-8"})

    async def _unknown_charset(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        body = f"<html><body><p>{_WRONG_CHARSET_TEXT}</p></body></html>".encode("utf-8")
        return self._simple(o, 200, body, {"Content-Type": "text/html; charset=x-no-such-charset"})

    async def _binary(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        body = _binary_body()
        return self._simple(o, 200, body, {"Content-Type": "text/html; charset=utf-8"})

    async def _huge_headers(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        resp = self._simple(o, 200, render_page(page), {"Content-Type": page.content_type})
        value = "k" * HUGE_HEADER_VALUE_BYTES
        for i in range(HUGE_HEADER_COUNT):
            resp.headers[f"X-Filler-{i:02d}"] = value
        return resp

    async def _gzip_bomb(self, request: web.BaseRequest, page: Page, o: _Outcome) -> web.Response:
        body = await asyncio.get_running_loop().run_in_executor(None, gzip_bomb_body)
        return self._simple(o, 200, body, {"Content-Type": "text/html", "Content-Encoding": "gzip"})

    async def _huge_body(
        self, request: web.BaseRequest, page: Page, o: _Outcome
    ) -> web.StreamResponse:
        resp = web.StreamResponse(status=200, headers={hdrs.CONTENT_TYPE: "text/html"})
        resp.content_length = HUGE_BODY_BYTES
        o.status = 200
        await resp.prepare(request)
        if request.method == hdrs.METH_HEAD:
            return resp
        first, chunk = _huge_body_chunks()
        sent = 0
        while sent < HUGE_BODY_BYTES:
            data = (first if sent == 0 else chunk)[: HUGE_BODY_BYTES - sent]
            await resp.write(data)
            sent += len(data)
            o.bytes = sent
        await resp.write_eof()
        return resp

    async def _slow_drip(
        self, request: web.BaseRequest, page: Page, o: _Outcome
    ) -> web.StreamResponse:
        resp = web.StreamResponse(status=200, headers={hdrs.CONTENT_TYPE: "text/html"})
        o.status = 200
        await resp.prepare(request)
        if request.method == hdrs.METH_HEAD:
            return resp
        try:
            for _ in range(int(self.drip_duration / self.drip_interval)):
                await resp.write(b".")
                o.bytes += 1
                await asyncio.sleep(self.drip_interval)
            await resp.write_eof()
        except ConnectionResetError:  # the client gave up on the drip, as it should
            pass
        return resp


_Responder = Callable[
    [SyntheticServer, web.BaseRequest, Page, _Outcome], Awaitable[web.StreamResponse]
]
_BAD_RESPONDERS: dict[Behaviour, _Responder] = {
    Behaviour.MALFORMED: SyntheticServer._malformed,
    Behaviour.WRONG_CHARSET: SyntheticServer._wrong_charset,
    Behaviour.UNKNOWN_CHARSET: SyntheticServer._unknown_charset,
    Behaviour.BINARY: SyntheticServer._binary,
    Behaviour.HUGE_HEADERS: SyntheticServer._huge_headers,
    Behaviour.GZIP_BOMB: SyntheticServer._gzip_bomb,
    Behaviour.HUGE_BODY: SyntheticServer._huge_body,
    Behaviour.SLOW_DRIP: SyntheticServer._slow_drip,
}
