"""A synthetic web whose pages change over time at known Poisson rates, and a loopback
server that answers conditional GETs (RFC 9110) by it.

Each page's change times are drawn once, from a seeded generator, as a Poisson process
of its own rate up to a horizon; the page's content is a function of how many changes
happened so far (its version), so an unchanged page has the same bytes, ETag and
Last-Modified. Time comes from an injectable clock (epoch seconds): tests and the
revisit bench move it by hand, nothing waits. The default demo web is not touched.

The server answers ``If-None-Match`` (RFC 9110 s.13.1.2, weak comparison) and, only when
there is no ``If-None-Match``, ``If-Modified-Since`` (s.13.1.3) with ``304 Not Modified``
carrying the ETag and Last-Modified a 200 would carry (s.15.4.5). Pages can be given
odd validators (any text as ETag or Last-Modified) to see that a crawler copes.
"""

from __future__ import annotations

import bisect
import hashlib
import math
import random
from collections.abc import Callable
from dataclasses import dataclass, field

from aiohttp import web

from frontier.revisit import http_date, parse_http_date

DAY_S = 86400.0
START_EPOCH = 1_700_000_000.0  # the web's time 0 (2023-11-14), so Last-Modified is a real date


@dataclass
class ChangingPage:
    """One page: its URL, change rate (1/s) and change times (s after the web's start)."""

    url: str
    rate: float
    changes: list[float] = field(default_factory=list)

    def version(self, t: float) -> int:
        """Changes up to time ``t`` (s after start)."""
        return bisect.bisect_right(self.changes, t)

    def last_change(self, t: float) -> float:
        """When the page last changed at or before ``t`` (0: unchanged since the start)."""
        v = self.version(t)
        return self.changes[v - 1] if v else 0.0

    def next_change(self, t: float) -> float:
        """The first change after ``t`` (infinity past the horizon)."""
        i = bisect.bisect_right(self.changes, t)
        return self.changes[i] if i < len(self.changes) else math.inf

    def fresh_time(self, start: float, end: float) -> float:
        """Seconds of ``[start, end)`` a copy taken at ``start`` stays identical."""
        return max(0.0, min(end, self.next_change(start)) - start)


@dataclass
class ChangingWeb:
    """Hosts of pages with known change rates; ``host`` -> its pages, in order."""

    hosts: dict[str, list[ChangingPage]]
    horizon_s: float
    clock: Callable[[], float] = field(default=lambda: START_EPOCH)
    odd_validators: dict[str, tuple[str, str]] = field(default_factory=dict)

    @classmethod
    def generate(cls, hosts: int = 10, pages_per_host: int = 50, *, seed: int = 1,
                 min_rate_per_day: float = 0.1, max_rate_per_day: float = 20.0,
                 horizon_s: float = 14 * DAY_S) -> ChangingWeb:
        """Rates log-uniform between the bounds (a wide spread, as measured on the web by
        Cho & Garcia-Molina, VLDB 2000); change times a Poisson process per page."""
        rng = random.Random(seed)
        out: dict[str, list[ChangingPage]] = {}
        lo, hi = math.log(min_rate_per_day), math.log(max_rate_per_day)
        for h in range(hosts):
            name = f"news{h}.changing.test"
            pages = []
            for p in range(pages_per_host):
                rate = math.exp(rng.uniform(lo, hi)) / DAY_S
                page = ChangingPage(f"http://{name}/story/{p}.html", rate)
                t = rng.expovariate(rate)
                while t < horizon_s:
                    page.changes.append(t)
                    t += rng.expovariate(rate)
                pages.append(page)
            out[name] = pages
        return cls(out, horizon_s)

    @property
    def pages(self) -> list[ChangingPage]:
        return [p for pages in self.hosts.values() for p in pages]

    def page(self, url: str) -> ChangingPage | None:
        for pages in self.hosts.values():
            for p in pages:
                if p.url == url:
                    return p
        return None

    def now(self) -> float:
        """Seconds since the web's start, by its clock."""
        return self.clock() - START_EPOCH

    # -- what a page looks like at a time --------------------------------------------------

    @staticmethod
    def body(page: ChangingPage, version: int) -> bytes:
        words = " ".join(f"w{(version * 7919 + i * 104729) % 100000}" for i in range(60))
        return (f"<html><head><title>{page.url}</title></head><body><p>version {version}</p>"
                f"<p>{words}</p></body></html>").encode()

    @staticmethod
    def etag(page: ChangingPage, version: int) -> str:
        tag = hashlib.sha1(f"{page.url} {version}".encode()).hexdigest()[:16]
        return f'"{tag}"'

    def last_modified(self, page: ChangingPage, t: float) -> int:
        return int(START_EPOCH + page.last_change(t))

    # -- the server -------------------------------------------------------------------------

    async def handle(self, request: web.Request) -> web.StreamResponse:
        host = request.headers.get("Host", "").split(":")[0]
        pages = self.hosts.get(host)
        if pages is None:
            return web.Response(status=404)
        if request.path == "/robots.txt":
            return web.Response(text="User-agent: *\nAllow: /\n")
        if request.path == "/":
            links = "".join(f'<a href="{p.url}">s</a> ' for p in pages)
            return web.Response(body=f"<html><body>{links}</body></html>".encode(),
                                content_type="text/html")
        url = f"http://{host}{request.path}"
        page = next((p for p in pages if p.url == url), None)
        if page is None:
            return web.Response(status=404)
        t = self.now()
        version = page.version(t)
        etag, modified = self.etag(page, version), self.last_modified(page, t)
        headers = {"ETag": etag, "Last-Modified": http_date(modified)}
        if url in self.odd_validators:
            odd_etag, odd_date = self.odd_validators[url]
            headers = {"ETag": odd_etag, "Last-Modified": odd_date}
        elif self.not_modified(request, etag, modified):
            return web.Response(status=304, headers=headers)
        return web.Response(body=self.body(page, version), headers=headers,
                            content_type="text/html")

    @staticmethod
    def not_modified(request: web.Request, etag: str, modified: int) -> bool:
        """RFC 9110 s.13.2.2 order: If-None-Match decides when present; else
        If-Modified-Since (a GET whose date is not before the last modification)."""
        inm = request.headers.get("If-None-Match")
        if inm is not None:
            theirs = {t.strip().removeprefix("W/") for t in inm.split(",")}
            return "*" in theirs or etag.removeprefix("W/") in theirs
        ims = parse_http_date(request.headers.get("If-Modified-Since"))
        return ims is not None and modified <= ims
