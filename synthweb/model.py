"""The synthetic web's data model: names, shape constants, vocabulary and page types.

Everything here is plain data shared by the generator modules (``sites``,
``specials``) and by ``graph.SyntheticWeb``; nothing here draws random numbers.
"""

from __future__ import annotations

import enum
import re
from dataclasses import dataclass
from typing import NamedTuple
from urllib.parse import urlsplit

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
#: ``WORDS`` capitalised, same order, for the first word of a sentence or title.
CAPITALISED_WORDS = tuple(w.capitalize() for w in WORDS)

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


def url_of(host: str, path: str) -> str:
    """The absolute ``http`` URL of ``path`` on ``host``."""
    return f"http://{host}{path}"


CALENDAR_RE = re.compile(r"^/calendar/(\d{4,})/(\d{2})$")
ENDLESS_RE = re.compile(r"^/endless-redirect/(\d+)$")


def calendar_path(year: int, month: int) -> str:
    """Path of one month page of the endless calendar."""
    return f"{CALENDAR_DIR}{year:04d}/{month:02d}"


def month_index(year: int, month: int) -> int:
    """Months since year 0: consecutive months get consecutive indexes."""
    return year * MONTHS + (month - 1)
