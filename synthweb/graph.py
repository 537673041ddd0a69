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

The pieces live in sibling modules: ``model`` (names, constants, page types),
``robots_bodies`` (robots.txt texts), ``sites`` (ordinary sites and their link graph)
and ``specials`` (special hosts and hostile features). This module keeps every name
it has always offered, re-exported from those modules.
"""

from __future__ import annotations

import gc
from collections import deque
from collections.abc import Collection, Iterable, Iterator
from dataclasses import dataclass, field
from urllib.parse import urlsplit

from protego import Protego

from frontier.exceptions import ConfigError  # noqa: F401  (re-exported)
from synthweb import specials
from synthweb.model import (  # noqa: F401  (re-exported)
    BAD_HOST,
    BASE_HREF_SHARE,
    BIG_ROBOTS_HOST,
    CALENDAR_DIR,
    CALENDAR_HOST,
    CALENDAR_MIN_YEAR,
    CALENDAR_RE,
    CALENDAR_START,
    CALENDAR_TEXT_WORDS,
    CAPITALISED_WORDS,
    CRAWL_DELAYS,
    DRAWS_PER_LINK,
    ENDLESS_RE,
    ENDLESS_REDIRECT_DIR,
    ENDLESS_REDIRECT_STATUS,
    ERROR_SHARE_OF_FAILING,
    FARM_DIR,
    FARM_HOST_FORMAT,
    GARBAGE_ROBOTS_HOST,
    GIF_TYPE,
    HOME_LINK_SHARE,
    HOME_PATH,
    HTML_TYPE,
    LOOP_PATHS,
    LOOP_STATUS,
    META_NOFOLLOW_SHARE,
    MONTHS,
    NAV_FANOUT,
    NOFOLLOW_SHARE,
    PAGE_DIR,
    PRIVATE_DIR,
    PRIVATE_EVERY,
    PRIVATE_OFFSET,
    REDIRECT_DIR,
    REDIRECT_STATUSES,
    RFC_EXAMPLE_HOST,
    RFC_LONGEST_MATCH_HOST,
    ROBOTS_SERVER_ERROR,
    SENTENCES,
    SITE_HOST_FORMAT,
    SSRF_BAIT_URLS,
    TITLE_WORDS,
    TLD,
    WORDS,
    WORDS_PER_SENTENCE,
    Behaviour,
    Link,
    Page,
    WebSpec,
    calendar_path,
    host_of,
    month_index,
    url_of,
)
from synthweb.robots_bodies import (  # noqa: F401  (re-exported)
    BIG_ROBOTS_BYTES,
    BIG_ROBOTS_FILLER_LINE,
    BIG_ROBOTS_HEAD,
    BIG_ROBOTS_RULE_EVERY,
    BIG_ROBOTS_RULE_LINE,
    GARBAGE_ROBOTS,
    RFC_9309_LONGEST_MATCH_EXAMPLE,
    RFC_9309_SIMPLE_EXAMPLE,
    RFC_EXAMPLE_PATHS,
    RFC_LONGEST_MATCH_PATHS,
    ROBOTS_VARIANTS,
)
from synthweb.sites import SiteBuilder, host_sizes
from synthweb.specials import calendar_page, endless_redirect_page

# Former private names, kept so older imports keep working.
_url = url_of
_month_index = month_index
_host_sizes = host_sizes
_calendar_page = calendar_page
_endless_redirect_page = endless_redirect_page
_CALENDAR_RE = CALENDAR_RE
_ENDLESS_RE = ENDLESS_RE
_CAPITALISED = CAPITALISED_WORDS


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
    # URL -> (status, body, headers): files served as they are (synthweb/sitemaps.py)
    files: dict[str, tuple[int, bytes, dict[str, str]]] = field(default_factory=dict)
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
        if host == CALENDAR_HOST and (m := CALENDAR_RE.match(path)):
            year, month = int(m.group(1)), int(m.group(2))
            if year >= CALENDAR_MIN_YEAR and 1 <= month <= MONTHS:
                return calendar_page(year, month, self.spec.trap_extra_links, self.seeds)
        if host == BAD_HOST and (m := ENDLESS_RE.match(path)):
            return endless_redirect_page(int(m.group(1)))
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


# --- the build -----------------------------------------------------------------------


class _Builder(SiteBuilder):
    """Builds one SyntheticWeb: ordinary sites first, then each enabled feature."""

    def build(self) -> SyntheticWeb:
        """Run every enabled feature in a fixed order and assemble the web."""
        spec = self.spec
        self.build_sites()
        if spec.robots:
            specials.build_robots(self)
        specials.build_slow_and_failing(self)
        seeds = self.seeds()
        if spec.redirects:
            specials.build_redirects(self)
        if spec.trap:
            specials.build_trap(self, seeds)
        if spec.farm:
            specials.build_farm(self)
        if spec.near_duplicates:
            specials.build_near_duplicates(self)
        if spec.ssrf_bait:
            specials.build_ssrf_bait(self)
        if spec.bad_inputs:
            specials.build_bad_inputs(self)
        for page in self.pages.values():
            self.robots.setdefault(page.host, None)
        return SyntheticWeb(
            spec=spec, pages=self.pages, robots=self.robots, seeds=seeds,
            site_hosts=self.site_hosts, **self.web_fields,  # type: ignore[arg-type]
        )
