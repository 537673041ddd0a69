"""The synthetic web: an invented, seeded graph of ``.test`` pages (no HTTP here).

``SyntheticWeb.generate(WebSpec(seed=...))`` builds the same web for the same spec.
Ordinary hosts (``site-NNNN.test``) get Zipf-distributed sizes; links pick their
targets by preferential attachment (probability proportional to in-degree + 1), so
in-degrees follow a power law. Optional features add hostile corners: robots rules,
slow and failing hosts, redirect chains and a loop, an endless calendar, a link farm,
near-duplicate pages, links to internal addresses, and a host of malformed responses.

The web also answers ground-truth questions: which URLs robots.txt allows
(``allowed``, via protego), the static edge list (``edges``) and which pages a
polite crawler can reach (``reachable``).
"""

from __future__ import annotations

import enum
import gc
import posixpath
import random
import re
from collections import deque
from collections.abc import Collection, Iterable, Iterator
from dataclasses import dataclass, field
from typing import NamedTuple
from urllib.parse import urlsplit

from protego import Protego

from frontier.exceptions import ConfigError

# --- names -------------------------------------------------------------------------

TLD = "test"
SITE_HOST_FORMAT = "site-{:04d}.test"
FARM_HOST_FORMAT = "farm-{:03d}.test"
CALENDAR_HOST = "calendar.test"
RFC_EXAMPLE_HOST = "rfc-example.test"
RFC_LONGEST_MATCH_HOST = "rfc-longest.test"
BAD_HOST = "bad.test"
GARBAGE_ROBOTS_HOST = "garbage-robots.test"
BIG_ROBOTS_HOST = "big-robots.test"

HOME_PATH = "/"
PAGE_DIR = "/p/"
PRIVATE_DIR = "/private/"
FARM_DIR = "/f/"
REDIRECT_DIR = "/r/"
LOOP_PATHS = ("/loop/a", "/loop/b")
CALENDAR_DIR = "/calendar/"
ENDLESS_REDIRECT_DIR = "/endless-redirect/"

HTML_TYPE = "text/html; charset=utf-8"
GIF_TYPE = "image/gif"

#: Marker stored in ``SyntheticWeb.robots`` for a host whose robots.txt answers 5xx.
ROBOTS_SERVER_ERROR = "\x00robots.txt answers 5xx\x00"

#: Links from ordinary pages to addresses a crawler must refuse to fetch.
SSRF_BAIT_URLS: tuple[str, ...] = (
    "http://127.0.0.1/",
    "http://10.0.0.1/",
    "http://169.254.169.254/latest/",
    "http://[::1]/",
    "http://0x7f000001/",
    "http://2130706433/",
    "http://localhost/",
    "http://metadata.internal/",
    "http://admin.internal/login",
)

# --- shape constants (common practice, no source) -----------------------------------

NAV_FANOUT = 10  # each page links to up to this many "child" pages: a site tree
PRIVATE_EVERY = 7  # local page index i with i % PRIVATE_EVERY == PRIVATE_OFFSET is private
PRIVATE_OFFSET = 3
HOME_LINK_SHARE = 0.5  # share of pages that link back to their home page
ERROR_SHARE_OF_FAILING = 0.5  # failing pages: this share 500, the rest flaky 503
DRAWS_PER_LINK = 3  # give up on a page's links after this many draws per link
NOFOLLOW_SHARE = 0.02  # share of links carrying rel="nofollow"
META_NOFOLLOW_SHARE = 0.005  # share of pages with <meta name="robots" content="nofollow">
BASE_HREF_SHARE = 0.02  # share of pages with <base href> pointing at the site root
SENTENCES = (3, 5)
WORDS_PER_SENTENCE = (6, 12)
TITLE_WORDS = 2
CALENDAR_START = (2024, 1)
CALENDAR_MIN_YEAR = 1
CALENDAR_TEXT_WORDS = 8
MONTHS = 12
REDIRECT_STATUSES = (301, 302, 303, 307, 308)
LOOP_STATUS = 302
ENDLESS_REDIRECT_STATUS = 302
CRAWL_DELAYS = (1, 2)

# --- the invented vocabulary ---------------------------------------------------------

_SYLLABLES = (
    "ka", "lo", "mi", "ren", "tu", "vas", "shi", "dor",
    "bel", "quin", "fa", "ze", "pry", "gal", "osk", "wen",
)
#: 256 invented two-syllable words, so one random byte picks one word.
WORDS: tuple[str, ...] = tuple(a + b for a in _SYLLABLES for b in _SYLLABLES)
_CAPITALISED = tuple(w.capitalize() for w in WORDS)

# --- robots bodies -------------------------------------------------------------------

# RFC 9309 section 5.1 ("Simple Example"), reproduced with its comments; the example
# host name is changed to this web's host. Reproduced from memory of the RFC text and
# checked against a public copy; any wording slip in comments does not change rules.
RFC_9309_SIMPLE_EXAMPLE = """\
# robots.txt for http://rfc-example.test/
User-Agent: *
Disallow: *.gif$
Disallow: /example/
Allow: /publications/

# Foobot is only allowed on specific pages
User-Agent: foobot
Disallow:/
Allow:/example/page.html
Allow:/example/allowed.gif

# Both barbot and bazbot apply
User-Agent: barbot
User-Agent: bazbot
Disallow: /example/page.html

# Unrestricted
User-Agent: quxbot
"""
RFC_EXAMPLE_PATHS = (
    "/",
    "/publications/",
    "/publications/paper-1.html",
    "/publications/figure.gif",
    "/example/page.html",
    "/example/allowed.gif",
    "/example/x.gif",
    "/image.gif",
)

# RFC 9309 section 5.2 ("Longest Match"); the RFC places it under "foobot", here
# it is the "*" group so every crawler is bound by it.
RFC_9309_LONGEST_MATCH_EXAMPLE = """\
User-Agent: *
Allow: /example/page/
Disallow: /example/page/disallowed.gif
"""
RFC_LONGEST_MATCH_PATHS = (
    "/",
    "/example/page/",
    "/example/page/allowed.html",
    "/example/page/disallowed.gif",
)

ROBOTS_VARIANTS: tuple[str, ...] = (
    "User-agent: *\n{delay}Disallow: /private/\n",
    "User-agent: *\n{delay}Disallow: /private/\nDisallow: /p/*7.html$\n\n"
    "User-agent: otherbot\nDisallow: /\n",
    "User-agent: *\n{delay}Disallow: /private/\nAllow: /private/1\n",
)

BIG_ROBOTS_BYTES = 2 * 1024 * 1024
BIG_ROBOTS_HEAD = "User-agent: *\nDisallow: /private/\n"
BIG_ROBOTS_FILLER_LINE = "# {:07d} " + "kalo vasdor tuquin " * 5 + "\n"  # ~100-byte comment
BIG_ROBOTS_RULE_LINE = "Disallow: /filler/{}/\n"
BIG_ROBOTS_RULE_EVERY = 10  # one real (harmless) rule per this many filler lines
GARBAGE_ROBOTS = (
    "<html><head><title>Kalo vasdor</title></head>\n<body><h1>Tuquin</h1>\n"
    "<p>This file is not a robots file at all.</p>\x00\x01\x02\ufffd\udcff\udcfe"
    "\n{{{{ ]]]] ;;;; \x7f\x1b[31m\n</body></html>\n"
)


# --- data model ----------------------------------------------------------------------


class Behaviour(enum.StrEnum):
    """How the server answers a page (host-level slowness is kept separately)."""

    OK = "ok"
    ASSET = "asset"  # a small GIF image
    ERROR = "error"  # always 500
    FLAKY = "flaky"  # 503 with Retry-After for the first ``fail_count`` requests
    REDIRECT = "redirect"
    ENDLESS_REDIRECT = "endless-redirect"
    MALFORMED = "malformed"
    WRONG_CHARSET = "wrong-charset"
    UNKNOWN_CHARSET = "unknown-charset"
    BINARY = "binary"
    HUGE_BODY = "huge-body"
    GZIP_BOMB = "gzip-bomb"
    SLOW_DRIP = "slow-drip"
    HUGE_HEADERS = "huge-headers"


class Link(NamedTuple):
    """An out-link: absolute target URL, anchor text, and whether it is rel=nofollow."""

    url: str
    anchor: str
    nofollow: bool = False


@dataclass(slots=True)
class Page:
    """One URL of the web and how it is served."""

    url: str
    host: str
    path: str
    title: str
    text: str
    links: list[Link]
    status: int = 200
    behaviour: Behaviour = Behaviour.OK
    location: str | None = None  # absolute redirect target
    retry_after: int | None = None
    fail_count: int = 0
    content_type: str = HTML_TYPE
    base_href: str | None = None
    meta_nofollow: bool = False
    trap: bool = False  # part of an endless space (within or beyond the static horizon)


@dataclass(frozen=True)
class WebSpec:
    """Everything that determines a synthetic web. Same spec, same web."""

    seed: int = 0
    hosts: int = 200  # ordinary site hosts; special hosts come on top
    pages: int = 20_000  # pages over the ordinary hosts
    zipf_exponent: float = 1.0  # host size of rank r is proportional to 1 / r**s
    mean_links: float = 10.0
    cross_host_share: float = 0.3
    preferential: bool = True  # False: link targets are uniform
    seed_count: int = 5
    # feature switches
    robots: bool = True
    slow_hosts: bool = True
    failing_hosts: bool = True
    redirects: bool = True
    trap: bool = True
    farm: bool = True
    near_duplicates: bool = True
    ssrf_bait: bool = True
    bad_inputs: bool = True
    # feature sizes
    robots_share: float = 0.3
    robots_error_hosts: int = 3
    crawl_delay_hosts: int = 3
    slow_share: float = 0.05
    failing_share: float = 0.05
    failing_page_share: float = 0.2
    flaky_fail_count: int = 2
    retry_after_seconds: int = 1
    redirect_chains: int = 20
    max_redirect_hops: int = 3
    trap_horizon_months: int = 24
    trap_extra_links: int = 1  # links from each month page to seed pages
    farm_hosts: int = 20
    farm_pages: int = 50
    farm_links: int = 30
    farm_entry_links: int = 5
    near_duplicate_groups: int = 10
    near_duplicate_size: int = 4
    near_duplicate_max_edits: int = 2
    ssrf_pages: int = 5

    def __post_init__(self) -> None:
        if self.hosts < 1:
            raise ConfigError("hosts: must be at least 1")
        if self.pages < self.hosts:
            raise ConfigError("pages: must be at least the number of hosts")
        if self.mean_links < 1:
            raise ConfigError("mean_links: must be at least 1")
        for name in ("cross_host_share", "robots_share", "slow_share", "failing_share",
                     "failing_page_share"):
            if not 0.0 <= getattr(self, name) <= 1.0:
                raise ConfigError(f"{name}: must be between 0 and 1")
        if self.farm and (self.farm_hosts < 1 or self.farm_pages < 1):
            raise ConfigError("farm_hosts, farm_pages: must be at least 1 with farm on")
        if self.max_redirect_hops < 1:
            raise ConfigError("max_redirect_hops: must be at least 1")


def host_of(url: str) -> str:
    """The lower-cased host name of an absolute URL ("" if it has none)."""
    return (urlsplit(url).hostname or "").lower()


def _url(host: str, path: str) -> str:
    return f"http://{host}{path}"


_CALENDAR_RE = re.compile(r"^/calendar/(\d{4,})/(\d{2})$")
_ENDLESS_RE = re.compile(r"^/endless-redirect/(\d+)$")


def calendar_path(year: int, month: int) -> str:
    """Path of one month page of the endless calendar."""
    return f"{CALENDAR_DIR}{year:04d}/{month:02d}"


def _month_index(year: int, month: int) -> int:
    return year * MONTHS + (month - 1)


# --- the web -------------------------------------------------------------------------


@dataclass
class SyntheticWeb:
    """A generated web plus ground-truth queries over it."""

    spec: WebSpec
    pages: dict[str, Page]
    robots: dict[str, str | None]
    seeds: list[str]
    site_hosts: list[str]
    farm_hosts: set[str] = field(default_factory=set)
    trap_prefixes: list[str] = field(default_factory=list)
    slow_hosts: set[str] = field(default_factory=set)
    failing_hosts: set[str] = field(default_factory=set)
    bad_hosts: set[str] = field(default_factory=set)
    crawl_delays: dict[str, float] = field(default_factory=dict)
    redirect_loop: list[str] = field(default_factory=list)
    near_duplicate_groups: list[list[str]] = field(default_factory=list)
    ssrf_urls: list[str] = field(default_factory=list)
    _parsers: dict[str, Protego] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def generate(cls, spec: WebSpec | None = None) -> SyntheticWeb:
        """Build the web for ``spec`` (defaults: seed 0, 200 hosts, 20,000 pages)."""
        # The build allocates a few hundred thousand small objects that all live on;
        # pausing the cyclic collector meanwhile roughly halves the build time.
        was_enabled = gc.isenabled()
        gc.disable()
        try:
            return _Builder(spec or WebSpec()).build()
        finally:
            if was_enabled:
                gc.enable()

    @property
    def hosts(self) -> set[str]:
        """Every host name that serves something."""
        return set(self.robots) | {p.host for p in self.pages.values()}

    def is_trap(self, url: str) -> bool:
        """True if ``url`` lies in an endless URL space."""
        return any(url.startswith(prefix) for prefix in self.trap_prefixes)

    def resolve(self, url: str) -> Page | None:
        """The page at ``url``: static pages, plus endless pages generated on demand."""
        page = self.pages.get(url)
        if page is not None or not self.is_trap(url):
            return page
        parts = urlsplit(url)
        host, path = (parts.hostname or ""), parts.path
        if parts.query or parts.fragment:
            return None
        if host == CALENDAR_HOST and (m := _CALENDAR_RE.match(path)):
            year, month = int(m.group(1)), int(m.group(2))
            if year >= CALENDAR_MIN_YEAR and 1 <= month <= MONTHS:
                return _calendar_page(year, month, self.spec.trap_extra_links, self.seeds)
        if host == BAD_HOST and (m := _ENDLESS_RE.match(path)):
            return _endless_redirect_page(int(m.group(1)))
        return None

    def edges(self, *, include_nofollow: bool = True) -> Iterator[tuple[str, str]]:
        """Static edges (src, dst) between pages of ``pages``.

        Links leaving the static graph (endless spaces beyond the horizon, SSRF bait)
        are left out; redirects count as an edge to their target.
        """
        pages = self.pages
        for src, page in pages.items():
            if page.location is not None and page.location in pages:
                yield src, page.location
            if not include_nofollow and page.meta_nofollow:
                continue
            for link in page.links:
                if link.url in pages and (include_nofollow or not link.nofollow):
                    yield src, link.url

    def allowed(self, url: str, user_agent_token: str) -> bool:
        """Ground truth: may ``user_agent_token`` fetch ``url`` under the host's robots.txt.

        RFC 9309 section 2.3.1.3: robots.txt unavailable (4xx) means allow everything;
        section 2.3.1.4: unreachable (5xx) means disallow everything.
        """
        host = host_of(url)
        body = self.robots.get(host)
        if body is None:
            return True
        if body == ROBOTS_SERVER_ERROR:
            return False
        parser = self._parsers.get(host)
        if parser is None:
            parser = self._parsers[host] = Protego.parse(body)
        return bool(parser.can_fetch(url, user_agent_token))

    def reachable(
        self,
        seeds: Iterable[str] | None = None,
        *,
        user_agent: str | None = None,
        hosts: Collection[str] | None = None,
        honour_nofollow: bool = False,
        include_bad: bool = False,
    ) -> set[str]:
        """Pages a crawler can fetch by BFS over static edges from ``seeds``.

        With ``user_agent`` set, pages its robots rules disallow are neither fetched
        nor expanded. ``hosts`` limits the crawl to those hosts; the bad-input hosts
        and SSRF bait are left out unless ``include_bad``.
        """
        start = list(self.seeds if seeds is None else seeds)
        host_set = set(hosts) if hosts is not None else None

        def admissible(url: str) -> bool:
            page = self.pages.get(url)
            if page is None:
                return False
            if host_set is not None and page.host not in host_set:
                return False
            if not include_bad and page.host in self.bad_hosts:
                return False
            return user_agent is None or self.allowed(url, user_agent)

        seen = {u for u in start if admissible(u)}
        queue = deque(seen)
        while queue:
            page = self.pages[queue.popleft()]
            targets = [link.url for link in page.links
                       if not (honour_nofollow and (link.nofollow or page.meta_nofollow))]
            if page.location is not None:
                targets.append(page.location)
            for dst in targets:
                if dst not in seen and admissible(dst):
                    seen.add(dst)
                    queue.append(dst)
        return seen


# --- endless spaces ------------------------------------------------------------------


def _calendar_page(year: int, month: int, extra_links: int, seeds: list[str]) -> Page:
    """One month of the endless calendar: links to both neighbours and a few others."""
    idx = _month_index(year, month)
    links: list[Link] = []
    for label, other in (("previous month", idx - 1), ("next month", idx + 1)):
        y, m = divmod(other, MONTHS)
        if y >= CALENDAR_MIN_YEAR:
            links.append(Link(_url(CALENDAR_HOST, calendar_path(y, m + 1)), label))
    links.append(Link(_url(CALENDAR_HOST, HOME_PATH), "calendar"))
    links.append(Link(_url(CALENDAR_HOST, "/about.html"), "about the calendar"))
    links.extend(Link(s, "elsewhere") for s in seeds[:extra_links])
    path = calendar_path(year, month)
    return Page(
        url=_url(CALENDAR_HOST, path), host=CALENDAR_HOST, path=path,
        title=f"Calendar {year:04d}-{month:02d}",
        text=f"Nothing happens in {year:04d}-{month:02d}. " + " ".join(
            WORDS[(idx + i) % len(WORDS)] for i in range(CALENDAR_TEXT_WORDS)),
        links=links, trap=True,
    )


def _endless_redirect_page(n: int) -> Page:
    path = f"{ENDLESS_REDIRECT_DIR}{n}"
    return Page(
        url=_url(BAD_HOST, path), host=BAD_HOST, path=path, title="", text="", links=[],
        status=ENDLESS_REDIRECT_STATUS, behaviour=Behaviour.ENDLESS_REDIRECT,
        location=_url(BAD_HOST, f"{ENDLESS_REDIRECT_DIR}{n + 1}"), trap=True,
    )


# --- generation ----------------------------------------------------------------------


def _host_sizes(total: int, hosts: int, exponent: float) -> list[int]:
    """Zipf host sizes: at least one page each, summing to ``total``."""
    weights = [1.0 / (rank**exponent) for rank in range(1, hosts + 1)]
    scale = (total - hosts) / sum(weights)
    sizes = [1 + int(w * scale) for w in weights]
    for i in range(total - sum(sizes)):  # hand out the rounding remainder to the top
        sizes[i % hosts] += 1
    return sizes


class _Builder:
    """Builds one SyntheticWeb; each feature draws from its own seeded stream."""

    def __init__(self, spec: WebSpec) -> None:
        self.spec = spec
        self.pages: dict[str, Page] = {}
        self.robots: dict[str, str | None] = {}
        self.web_fields: dict[str, object] = {}
        # ordinary-page arrays, indexed by page id
        self.urls: list[str] = []
        self.page_host: list[int] = []
        self.titles: list[str] = []
        self.host_first: list[int] = []  # id of each host's home page
        self.site_hosts = [SITE_HOST_FORMAT.format(i) for i in range(spec.hosts)]

    def rng(self, stream: str) -> random.Random:
        return random.Random(f"{self.spec.seed}:{stream}")

    # -- text --
    @staticmethod
    def text(rng: random.Random) -> str:
        """A few sentences of invented words; one random byte per choice (fast)."""
        lo_s, hi_s = SENTENCES
        lo_w, hi_w = WORDS_PER_SENTENCE
        raw = rng.randbytes(1 + hi_s + hi_s * hi_w)
        n = lo_s + raw[0] % (hi_s - lo_s + 1)
        pos = 1 + hi_s
        out = []
        for i in range(n):
            length = lo_w + raw[1 + i] % (hi_w - lo_w + 1)
            chunk = raw[pos : pos + length]
            pos += length
            out.append(" ".join([_CAPITALISED[chunk[0]], *[WORDS[b] for b in chunk[1:]]]) + ".")
        return " ".join(out)

    @staticmethod
    def title(rng: random.Random, suffix: str) -> str:
        raw = rng.randbytes(TITLE_WORDS)
        return " ".join(_CAPITALISED[b] for b in raw) + f" {suffix}"

    def add(self, page: Page) -> Page:
        self.pages[page.url] = page
        return page

    # -- ordinary sites --
    def build_sites(self) -> None:
        spec = self.spec
        rng = self.rng("sites")
        sizes = _host_sizes(spec.pages, spec.hosts, spec.zipf_exponent)
        for h, (host, size) in enumerate(zip(self.site_hosts, sizes)):
            self.host_first.append(len(self.urls))
            for local in range(size):
                if local == 0:
                    path = HOME_PATH
                elif local % PRIVATE_EVERY == PRIVATE_OFFSET:
                    path = f"{PRIVATE_DIR}{local}.html"
                else:
                    path = f"{PAGE_DIR}{local}.html"
                self.urls.append(_url(host, path))
                self.page_host.append(h)
                self.titles.append(self.title(rng, f"{h}.{local}"))
        self.host_first.append(len(self.urls))
        trng = self.rng("text")
        texts = [self.text(trng) for _ in self.urls]
        links = self.site_links(sizes)
        look = self.rng("look")
        last = len(self.urls) - 1  # always has a <base href> and a meta nofollow
        for pid, url in enumerate(self.urls):
            h = self.page_host[pid]
            host = self.site_hosts[h]
            path = url[len("http://") + len(host) :]
            with_base = path != HOME_PATH and (look.random() < BASE_HREF_SHARE or pid == last)
            self.add(Page(
                url=url, host=host, path=path, title=self.titles[pid], text=texts[pid],
                links=links[pid], base_href=_url(host, HOME_PATH) if with_base else None,
                meta_nofollow=look.random() < META_NOFOLLOW_SHARE or pid == last,
            ))

    def site_links(self, sizes: list[int]) -> list[list[Link]]:
        """Site-tree links plus preferential-attachment links for every ordinary page.

        Pages arrive in a random order (home pages first) and link to pages that
        arrived before them, each chosen with probability proportional to its
        in-degree + 1: Price's model (Price 1976; Barabasi and Albert 1999), which
        yields power-law in-degrees. With ``preferential`` off, targets are uniform
        over the arrived pages.
        """
        spec = self.spec
        rng = self.rng("links")
        r = rng.random
        n_pages = len(self.urls)
        homes = self.host_first[:-1]
        home_set = set(homes)
        others = [pid for pid in range(n_pages) if pid not in home_set]
        rng.shuffle(others)
        host_pools: list[list[int]] = [[] for _ in range(spec.hosts)]
        global_pool: list[int] = []
        titles, urls, page_host, host_first = self.titles, self.urls, self.page_host, self.host_first
        span = 2 * spec.mean_links - 1
        cross, preferential = spec.cross_host_share, spec.preferential
        new = tuple.__new__
        result: list[list[Link]] = [[] for _ in range(n_pages)]
        for pid in homes + others:
            h = page_host[pid]
            first = host_first[h]
            local = pid - first
            local_pool = host_pools[h]
            local_pool.append(pid)
            global_pool.append(pid)
            chosen: dict[int, None] = {}
            for kid in range(local * NAV_FANOUT + 1, min((local + 1) * NAV_FANOUT + 1, sizes[h])):
                chosen[first + kid] = None
            if local and r() < HOME_LINK_SHARE:
                chosen[first] = None
            want = max(len(chosen) + 1, int(1 + r() * span))
            for _ in range(want * DRAWS_PER_LINK):
                if len(chosen) >= want:
                    break
                pool = global_pool if r() < cross else local_pool
                t = pool[int(r() * len(pool))]
                if t == pid or t in chosen:
                    continue
                chosen[t] = None
                if preferential:
                    host_pools[page_host[t]].append(t)
                    global_pool.append(t)
            # tuple.__new__ skips the generated NamedTuple constructor: 2x faster here
            result[pid] = [new(Link, (urls[t], titles[t], r() < NOFOLLOW_SHARE)) for t in chosen]
        return result

    def seeds(self) -> list[str]:
        """Home pages of the biggest hosts that are fetchable and healthy."""
        homes = [u for u in self.safe_sources() if u.endswith(HOME_PATH)]
        return homes[: self.spec.seed_count]

    @property
    def hub(self) -> Page:
        """The home page of the biggest host: links to every special host start here."""
        return self.pages[_url(self.site_hosts[0], HOME_PATH)]

    def safe_sources(self) -> list[str]:
        """Home pages of healthy, fetchable hosts and the public pages they link to."""
        avoid = self.web_fields.get("slow_hosts", set()) | self.web_fields.get("failing_hosts", set())  # type: ignore[operator]
        out = []
        for h, host in enumerate(self.site_hosts):
            if host in avoid or self.robots.get(host) == ROBOTS_SERVER_ERROR:
                continue
            first, end = self.host_first[h], self.host_first[h + 1]
            out.extend(u for u in self.urls[first : min(end, first + NAV_FANOUT + 1)]
                       if PRIVATE_DIR not in u)
        return out

    def link_from_random_pages(self, rng: random.Random, targets: list[str], anchor: str) -> None:
        """Add one link to each target from a random page of ``safe_sources``."""
        sources = self.safe_sources()
        for target in targets:
            self.pages[sources[rng.randrange(len(sources))]].links.append(Link(target, anchor))

    def featured_hosts(self, rng: random.Random, share: float) -> list[str]:
        """A random share of ordinary hosts other than the hub host."""
        candidates = self.site_hosts[1:]
        return rng.sample(candidates, min(len(candidates), round(share * len(self.site_hosts))))

    # -- features --
    def build_robots(self) -> None:
        spec = self.spec
        rng = self.rng("robots")
        candidates = self.site_hosts[1:]
        rng.shuffle(candidates)
        n_err = min(spec.robots_error_hosts, len(candidates))
        n_body = min(round(spec.robots_share * spec.hosts), len(candidates) - n_err)
        delays: dict[str, float] = {}
        for i, host in enumerate(candidates[n_err : n_err + n_body]):
            delay = ""
            if i < spec.crawl_delay_hosts:
                d = CRAWL_DELAYS[i % len(CRAWL_DELAYS)]
                delays[host] = float(d)
                delay = f"Crawl-delay: {d}\n"
            self.robots[host] = ROBOTS_VARIANTS[rng.randrange(len(ROBOTS_VARIANTS))].format(delay=delay)
        for host in candidates[:n_err]:
            self.robots[host] = ROBOTS_SERVER_ERROR
        self.web_fields["crawl_delays"] = delays
        self.add_special_host(RFC_EXAMPLE_HOST, RFC_EXAMPLE_PATHS, RFC_9309_SIMPLE_EXAMPLE)
        self.add_special_host(
            RFC_LONGEST_MATCH_HOST, RFC_LONGEST_MATCH_PATHS, RFC_9309_LONGEST_MATCH_EXAMPLE)

    def add_special_host(self, host: str, paths: Iterable[str], robots: str | None) -> None:
        """A small host whose home page links to all of ``paths``; linked from the hub."""
        rng = self.rng(host)
        self.robots[host] = robots
        paths = list(paths)
        home = _url(host, HOME_PATH)
        for path in paths:
            url = _url(host, path)
            gif = path.endswith(".gif")
            links = [] if gif else [Link(_url(host, p), p) for p in paths if p != path]
            self.add(Page(
                url=url, host=host, path=path, title="" if gif else self.title(rng, host),
                text="" if gif else self.text(rng), links=links,
                behaviour=Behaviour.ASSET if gif else Behaviour.OK,
                content_type=GIF_TYPE if gif else HTML_TYPE,
            ))
        self.hub.links.append(Link(home, host))

    def build_slow_and_failing(self) -> None:
        spec = self.spec
        if spec.slow_hosts:
            self.web_fields["slow_hosts"] = set(self.featured_hosts(self.rng("slow"), spec.slow_share))
        if spec.failing_hosts:
            rng = self.rng("failing")
            failing = set(self.featured_hosts(rng, spec.failing_share))
            self.web_fields["failing_hosts"] = failing
            for page in self.pages.values():
                if page.host not in failing or page.path == HOME_PATH:
                    continue
                if rng.random() >= spec.failing_page_share:
                    continue
                if rng.random() < ERROR_SHARE_OF_FAILING:
                    page.status, page.behaviour = 500, Behaviour.ERROR
                else:
                    page.behaviour = Behaviour.FLAKY
                    page.fail_count = spec.flaky_fail_count
                    page.retry_after = spec.retry_after_seconds

    def build_redirects(self) -> None:
        spec = self.spec
        rng = self.rng("redirects")
        for chain in range(spec.redirect_chains):
            host = self.site_hosts[rng.randrange(len(self.site_hosts))]
            target = self.urls[rng.randrange(len(self.urls))]
            hops = rng.randint(1, spec.max_redirect_hops)
            urls = [_url(host, f"{REDIRECT_DIR}{chain}/{hop}") for hop in range(hops)] + [target]
            for hop in range(hops):
                self.add(Page(
                    url=urls[hop], host=host, path=urls[hop][len(f"http://{host}") :],
                    title="", text="", links=[],
                    status=REDIRECT_STATUSES[(chain + hop) % len(REDIRECT_STATUSES)],
                    behaviour=Behaviour.REDIRECT, location=urls[hop + 1],
                ))
            self.link_from_random_pages(rng, [urls[0]], "moved")
        host = self.site_hosts[rng.randrange(len(self.site_hosts))]
        loop = [_url(host, p) for p in LOOP_PATHS]
        for i, path in enumerate(LOOP_PATHS):
            self.add(Page(
                url=loop[i], host=host, path=path, title="", text="", links=[],
                status=LOOP_STATUS, behaviour=Behaviour.REDIRECT, location=loop[(i + 1) % len(loop)],
            ))
        self.link_from_random_pages(rng, [loop[0]], "round and round")
        self.web_fields["redirect_loop"] = loop

    def build_trap(self, seeds: list[str]) -> None:
        spec = self.spec
        rng = self.rng("trap")
        self.robots[CALENDAR_HOST] = None
        start = _month_index(*CALENDAR_START)
        first_month = _url(CALENDAR_HOST, calendar_path(*CALENDAR_START))
        for idx in range(start - spec.trap_horizon_months, start + spec.trap_horizon_months + 1):
            y, m = divmod(idx, MONTHS)
            if y >= CALENDAR_MIN_YEAR:
                self.add(_calendar_page(y, m + 1, spec.trap_extra_links, seeds))
        for path, links in ((HOME_PATH, [Link(first_month, "this month")]),
                            ("/about.html", [Link(_url(CALENDAR_HOST, HOME_PATH), "calendar")])):
            self.add(Page(url=_url(CALENDAR_HOST, path), host=CALENDAR_HOST, path=path,
                          title=self.title(rng, "calendar"), text=self.text(rng), links=links))
        self.hub.links.append(Link(_url(CALENDAR_HOST, HOME_PATH), "calendar"))
        self.web_fields["trap_prefixes"] = [_url(CALENDAR_HOST, CALENDAR_DIR)]

    def build_farm(self) -> None:
        spec = self.spec
        rng = self.rng("farm")
        hosts = [FARM_HOST_FORMAT.format(i) for i in range(spec.farm_hosts)]
        urls = [_url(h, HOME_PATH if j == 0 else f"{FARM_DIR}{j}.html")
                for h in hosts for j in range(spec.farm_pages)]
        homes = [_url(h, HOME_PATH) for h in hosts]
        for i, url in enumerate(urls):
            host = hosts[i // spec.farm_pages]
            picks = rng.sample(urls, min(spec.farm_links, len(urls)))
            targets = dict.fromkeys([*(homes if url in homes else [_url(host, HOME_PATH)]), *picks])
            targets.pop(url, None)
            self.add(Page(url=url, host=host, path=url[len(f"http://{host}") :],
                          title=self.title(rng, "best deals"), text=self.text(rng),
                          links=[Link(t, "great offer") for t in targets]))
        self.link_from_random_pages(
            rng, [homes[rng.randrange(len(homes))] for _ in range(spec.farm_entry_links)], "offers")
        self.web_fields["farm_hosts"] = set(hosts)

    def build_near_duplicates(self) -> None:
        spec = self.spec
        rng = self.rng("near-duplicates")
        candidates = [u for u in self.urls if not u.endswith(HOME_PATH)]
        size = spec.near_duplicate_size
        n = min(spec.near_duplicate_groups, len(candidates) // max(1, size))
        chosen = rng.sample(candidates, n * size)
        groups = []
        for g in range(n):
            members = chosen[g * size : (g + 1) * size]
            base = self.pages[members[0]].text.split(" ")
            for url in members[1:]:
                words = list(base)
                for _ in range(rng.randint(1, spec.near_duplicate_max_edits)):
                    pos = rng.randrange(len(words))
                    old = words[pos]
                    stop = "." if old.endswith(".") else ""
                    choices = [w for w in WORDS if w + stop != old and w.capitalize() + stop != old]
                    words[pos] = rng.choice(choices) + stop
                self.pages[url].text = " ".join(words)
            groups.append(members)
        self.web_fields["near_duplicate_groups"] = groups

    def build_ssrf_bait(self) -> None:
        rng = self.rng("ssrf")
        sources = self.safe_sources()
        for _ in range(self.spec.ssrf_pages):
            page = self.pages[sources[rng.randrange(len(sources))]]
            page.links.extend(Link(u, "internal") for u in SSRF_BAIT_URLS)
        self.web_fields["ssrf_urls"] = list(SSRF_BAIT_URLS)

    def build_bad_inputs(self) -> None:
        rng = self.rng("bad")
        self.robots[BAD_HOST] = None
        specials = {
            "/malformed.html": Behaviour.MALFORMED,
            "/wrong-charset.html": Behaviour.WRONG_CHARSET,
            "/unknown-charset.html": Behaviour.UNKNOWN_CHARSET,
            "/binary.html": Behaviour.BINARY,
            "/huge.html": Behaviour.HUGE_BODY,
            "/bomb.html": Behaviour.GZIP_BOMB,
            "/slow-drip.html": Behaviour.SLOW_DRIP,
            "/huge-headers.html": Behaviour.HUGE_HEADERS,
        }
        home = _url(BAD_HOST, HOME_PATH)
        endless = _endless_redirect_page(0)
        self.add(endless)
        links = [Link(_url(BAD_HOST, p), b.value) for p, b in specials.items()]
        links.append(Link(endless.url, "endless redirect"))
        self.add(Page(url=home, host=BAD_HOST, path=HOME_PATH, title="Bad inputs",
                      text=self.text(rng), links=links))
        for path, behaviour in specials.items():
            self.add(Page(url=_url(BAD_HOST, path), host=BAD_HOST, path=path,
                          title=f"Bad input: {behaviour.value}", text=self.text(rng),
                          links=[Link(home, "bad inputs")], behaviour=behaviour))
        self.hub.links.append(Link(home, "bad inputs"))
        filler, i = [BIG_ROBOTS_HEAD], 0
        size = len(BIG_ROBOTS_HEAD)
        while size < BIG_ROBOTS_BYTES:
            fmt = BIG_ROBOTS_RULE_LINE if i % BIG_ROBOTS_RULE_EVERY == 0 else BIG_ROBOTS_FILLER_LINE
            line = fmt.format(i)
            filler.append(line)
            size += len(line)
            i += 1
        paths = (HOME_PATH, "/p/1.html", "/private/1.html")
        self.add_special_host(GARBAGE_ROBOTS_HOST, paths, GARBAGE_ROBOTS)
        self.add_special_host(BIG_ROBOTS_HOST, paths, "".join(filler))
        self.web_fields["bad_hosts"] = {BAD_HOST}
        self.web_fields["trap_prefixes"] = [
            *self.web_fields.get("trap_prefixes", []),  # type: ignore[list-item]
            _url(BAD_HOST, ENDLESS_REDIRECT_DIR),
        ]

    def build(self) -> SyntheticWeb:
        spec = self.spec
        self.build_sites()
        if spec.robots:
            self.build_robots()
        self.build_slow_and_failing()
        seeds = self.seeds()
        if spec.redirects:
            self.build_redirects()
        if spec.trap:
            self.build_trap(seeds)
        if spec.farm:
            self.build_farm()
        if spec.near_duplicates:
            self.build_near_duplicates()
        if spec.ssrf_bait:
            self.build_ssrf_bait()
        if spec.bad_inputs:
            self.build_bad_inputs()
        for page in self.pages.values():
            self.robots.setdefault(page.host, None)
        return SyntheticWeb(
            spec=spec, pages=self.pages, robots=self.robots, seeds=seeds,
            site_hosts=self.site_hosts, **self.web_fields,  # type: ignore[arg-type]
        )
