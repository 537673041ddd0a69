"""Special hosts and hostile features of the synthetic web.

Each ``build_*`` function extends a ``SiteBuilder`` ``b`` whose ordinary sites exist:
robots rules and the RFC 9309 example hosts, slow and failing hosts, redirect chains
and a loop, the endless calendar, a link farm, near-duplicate pages, SSRF bait, bad
inputs and hosts with oversized or garbage robots.txt. Each draws from its own seeded
stream, so switching one feature off leaves the others unchanged.
"""

from __future__ import annotations

from collections.abc import Iterable

from synthweb.model import (
    BAD_HOST,
    BIG_ROBOTS_HOST,
    CALENDAR_DIR,
    CALENDAR_HOST,
    CALENDAR_MIN_YEAR,
    CALENDAR_START,
    CALENDAR_TEXT_WORDS,
    CRAWL_DELAYS,
    ENDLESS_REDIRECT_DIR,
    ENDLESS_REDIRECT_STATUS,
    ERROR_SHARE_OF_FAILING,
    FARM_DIR,
    FARM_HOST_FORMAT,
    GARBAGE_ROBOTS_HOST,
    GIF_TYPE,
    HOME_PATH,
    HTML_TYPE,
    LOOP_PATHS,
    LOOP_STATUS,
    MONTHS,
    REDIRECT_DIR,
    REDIRECT_STATUSES,
    RFC_EXAMPLE_HOST,
    RFC_LONGEST_MATCH_HOST,
    ROBOTS_SERVER_ERROR,
    SSRF_BAIT_URLS,
    WORDS,
    Behaviour,
    Link,
    Page,
    calendar_path,
    month_index,
    url_of,
)
from synthweb.robots_bodies import (
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
from synthweb.sites import SiteBuilder

# --- endless spaces ------------------------------------------------------------------


def calendar_page(year: int, month: int, extra_links: int, seeds: list[str]) -> Page:
    """One month of the endless calendar: links to both neighbours and a few others."""
    idx = month_index(year, month)
    links: list[Link] = []
    for label, other in (("previous month", idx - 1), ("next month", idx + 1)):
        y, m = divmod(other, MONTHS)
        if y >= CALENDAR_MIN_YEAR:
            links.append(Link(url_of(CALENDAR_HOST, calendar_path(y, m + 1)), label))
    links.append(Link(url_of(CALENDAR_HOST, HOME_PATH), "calendar"))
    links.append(Link(url_of(CALENDAR_HOST, "/about.html"), "about the calendar"))
    links.extend(Link(s, "elsewhere") for s in seeds[:extra_links])
    path = calendar_path(year, month)
    return Page(
        url=url_of(CALENDAR_HOST, path), host=CALENDAR_HOST, path=path,
        title=f"Calendar {year:04d}-{month:02d}",
        text=f"Nothing happens in {year:04d}-{month:02d}. " + " ".join(
            WORDS[(idx + i) % len(WORDS)] for i in range(CALENDAR_TEXT_WORDS)),
        links=links, trap=True,
    )


def endless_redirect_page(n: int) -> Page:
    """Hop ``n`` of a redirect chain that never ends."""
    path = f"{ENDLESS_REDIRECT_DIR}{n}"
    return Page(
        url=url_of(BAD_HOST, path), host=BAD_HOST, path=path, title="", text="", links=[],
        status=ENDLESS_REDIRECT_STATUS, behaviour=Behaviour.ENDLESS_REDIRECT,
        location=url_of(BAD_HOST, f"{ENDLESS_REDIRECT_DIR}{n + 1}"), trap=True,
    )


# --- special hosts and features ------------------------------------------------------


def build_robots(b: SiteBuilder) -> None:
    """robots.txt for a share of ordinary hosts (a few with Crawl-delay, a few 5xx).

    Also adds the RFC 9309 example hosts with the RFC's robots.txt bodies.
    """
    spec = b.spec
    rng = b.rng("robots")
    candidates = b.site_hosts[1:]
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
        b.robots[host] = ROBOTS_VARIANTS[rng.randrange(len(ROBOTS_VARIANTS))].format(delay=delay)
    for host in candidates[:n_err]:
        b.robots[host] = ROBOTS_SERVER_ERROR
    b.web_fields["crawl_delays"] = delays
    add_special_host(b, RFC_EXAMPLE_HOST, RFC_EXAMPLE_PATHS, RFC_9309_SIMPLE_EXAMPLE)
    add_special_host(
        b, RFC_LONGEST_MATCH_HOST, RFC_LONGEST_MATCH_PATHS, RFC_9309_LONGEST_MATCH_EXAMPLE)


def add_special_host(b: SiteBuilder, host: str, paths: Iterable[str], robots: str | None) -> None:
    """A small host whose home page links to all of ``paths``; linked from the hub."""
    rng = b.rng(host)
    b.robots[host] = robots
    paths = list(paths)
    home = url_of(host, HOME_PATH)
    for path in paths:
        url = url_of(host, path)
        gif = path.endswith(".gif")
        links = [] if gif else [Link(url_of(host, p), p) for p in paths if p != path]
        b.add(Page(
            url=url, host=host, path=path, title="" if gif else b.title(rng, host),
            text="" if gif else b.text(rng), links=links,
            behaviour=Behaviour.ASSET if gif else Behaviour.OK,
            content_type=GIF_TYPE if gif else HTML_TYPE,
        ))
    b.hub.links.append(Link(home, host))


def build_slow_and_failing(b: SiteBuilder) -> None:
    """Mark slow hosts; on failing hosts make a share of pages answer 500 or a flaky 503."""
    spec = b.spec
    if spec.slow_hosts:
        b.web_fields["slow_hosts"] = set(b.featured_hosts(b.rng("slow"), spec.slow_share))
    if spec.failing_hosts:
        rng = b.rng("failing")
        failing = set(b.featured_hosts(rng, spec.failing_share))
        b.web_fields["failing_hosts"] = failing
        for page in b.pages.values():
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


def build_redirects(b: SiteBuilder) -> None:
    """Redirect chains of mixed 3xx statuses to ordinary pages, and one two-page loop."""
    spec = b.spec
    rng = b.rng("redirects")
    for chain in range(spec.redirect_chains):
        host = b.site_hosts[rng.randrange(len(b.site_hosts))]
        target = b.urls[rng.randrange(len(b.urls))]
        hops = rng.randint(1, spec.max_redirect_hops)
        urls = [url_of(host, f"{REDIRECT_DIR}{chain}/{hop}") for hop in range(hops)] + [target]
        for hop in range(hops):
            b.add(Page(
                url=urls[hop], host=host, path=urls[hop][len(f"http://{host}") :],
                title="", text="", links=[],
                status=REDIRECT_STATUSES[(chain + hop) % len(REDIRECT_STATUSES)],
                behaviour=Behaviour.REDIRECT, location=urls[hop + 1],
            ))
        b.link_from_random_pages(rng, [urls[0]], "moved")
    host = b.site_hosts[rng.randrange(len(b.site_hosts))]
    loop = [url_of(host, p) for p in LOOP_PATHS]
    for i, path in enumerate(LOOP_PATHS):
        b.add(Page(
            url=loop[i], host=host, path=path, title="", text="", links=[],
            status=LOOP_STATUS, behaviour=Behaviour.REDIRECT, location=loop[(i + 1) % len(loop)],
        ))
    b.link_from_random_pages(rng, [loop[0]], "round and round")
    b.web_fields["redirect_loop"] = loop


def build_trap(b: SiteBuilder, seeds: list[str]) -> None:
    """The endless calendar: month pages within the horizon are static, the rest on demand."""
    spec = b.spec
    rng = b.rng("trap")
    b.robots[CALENDAR_HOST] = None
    start = month_index(*CALENDAR_START)
    first_month = url_of(CALENDAR_HOST, calendar_path(*CALENDAR_START))
    for idx in range(start - spec.trap_horizon_months, start + spec.trap_horizon_months + 1):
        y, m = divmod(idx, MONTHS)
        if y >= CALENDAR_MIN_YEAR:
            b.add(calendar_page(y, m + 1, spec.trap_extra_links, seeds))
    for path, links in ((HOME_PATH, [Link(first_month, "this month")]),
                        ("/about.html", [Link(url_of(CALENDAR_HOST, HOME_PATH), "calendar")])):
        b.add(Page(url=url_of(CALENDAR_HOST, path), host=CALENDAR_HOST, path=path,
                   title=b.title(rng, "calendar"), text=b.text(rng), links=links))
    b.hub.links.append(Link(url_of(CALENDAR_HOST, HOME_PATH), "calendar"))
    b.web_fields["trap_prefixes"] = [url_of(CALENDAR_HOST, CALENDAR_DIR)]


def build_farm(b: SiteBuilder) -> None:
    """A link farm: densely interlinked hosts reached by a few links from ordinary pages."""
    spec = b.spec
    rng = b.rng("farm")
    hosts = [FARM_HOST_FORMAT.format(i) for i in range(spec.farm_hosts)]
    urls = [url_of(h, HOME_PATH if j == 0 else f"{FARM_DIR}{j}.html")
            for h in hosts for j in range(spec.farm_pages)]
    homes = [url_of(h, HOME_PATH) for h in hosts]
    for i, url in enumerate(urls):
        host = hosts[i // spec.farm_pages]
        picks = rng.sample(urls, min(spec.farm_links, len(urls)))
        targets = dict.fromkeys([*(homes if url in homes else [url_of(host, HOME_PATH)]), *picks])
        targets.pop(url, None)
        b.add(Page(url=url, host=host, path=url[len(f"http://{host}") :],
                   title=b.title(rng, "best deals"), text=b.text(rng),
                   links=[Link(t, "great offer") for t in targets]))
    b.link_from_random_pages(
        rng, [homes[rng.randrange(len(homes))] for _ in range(spec.farm_entry_links)], "offers")
    b.web_fields["farm_hosts"] = set(hosts)


def build_near_duplicates(b: SiteBuilder) -> None:
    """Groups of pages whose texts differ from the first member by a word or two."""
    spec = b.spec
    rng = b.rng("near-duplicates")
    candidates = [u for u in b.urls if not u.endswith(HOME_PATH)]
    size = spec.near_duplicate_size
    n = min(spec.near_duplicate_groups, len(candidates) // max(1, size))
    chosen = rng.sample(candidates, n * size)
    groups = []
    for g in range(n):
        members = chosen[g * size : (g + 1) * size]
        base = b.pages[members[0]].text.split(" ")
        for url in members[1:]:
            words = list(base)
            for _ in range(rng.randint(1, spec.near_duplicate_max_edits)):
                pos = rng.randrange(len(words))
                old = words[pos]
                stop = "." if old.endswith(".") else ""
                choices = [w for w in WORDS if w + stop != old and w.capitalize() + stop != old]
                words[pos] = rng.choice(choices) + stop
            b.pages[url].text = " ".join(words)
        groups.append(members)
    b.web_fields["near_duplicate_groups"] = groups


def build_ssrf_bait(b: SiteBuilder) -> None:
    """Links from a few ordinary pages to internal addresses a crawler must refuse."""
    rng = b.rng("ssrf")
    sources = b.safe_sources()
    for _ in range(b.spec.ssrf_pages):
        page = b.pages[sources[rng.randrange(len(sources))]]
        page.links.extend(Link(u, "internal") for u in SSRF_BAIT_URLS)
    b.web_fields["ssrf_urls"] = list(SSRF_BAIT_URLS)


def build_bad_inputs(b: SiteBuilder) -> None:
    """The bad-input host with its endless redirect; hosts with huge or garbage robots.txt."""
    rng = b.rng("bad")
    b.robots[BAD_HOST] = None
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
    home = url_of(BAD_HOST, HOME_PATH)
    endless = endless_redirect_page(0)
    b.add(endless)
    links = [Link(url_of(BAD_HOST, p), kind.value) for p, kind in specials.items()]
    links.append(Link(endless.url, "endless redirect"))
    b.add(Page(url=home, host=BAD_HOST, path=HOME_PATH, title="Bad inputs",
               text=b.text(rng), links=links))
    for path, behaviour in specials.items():
        b.add(Page(url=url_of(BAD_HOST, path), host=BAD_HOST, path=path,
                   title=f"Bad input: {behaviour.value}", text=b.text(rng),
                   links=[Link(home, "bad inputs")], behaviour=behaviour))
    b.hub.links.append(Link(home, "bad inputs"))
    filler, i = [BIG_ROBOTS_HEAD], 0
    size = len(BIG_ROBOTS_HEAD)
    while size < BIG_ROBOTS_BYTES:
        fmt = BIG_ROBOTS_RULE_LINE if i % BIG_ROBOTS_RULE_EVERY == 0 else BIG_ROBOTS_FILLER_LINE
        line = fmt.format(i)
        filler.append(line)
        size += len(line)
        i += 1
    paths = (HOME_PATH, "/p/1.html", "/private/1.html")
    add_special_host(b, GARBAGE_ROBOTS_HOST, paths, GARBAGE_ROBOTS)
    add_special_host(b, BIG_ROBOTS_HOST, paths, "".join(filler))
    b.web_fields["bad_hosts"] = {BAD_HOST}
    b.web_fields["trap_prefixes"] = [
        *b.web_fields.get("trap_prefixes", []),  # type: ignore[list-item]
        url_of(BAD_HOST, ENDLESS_REDIRECT_DIR),
    ]
