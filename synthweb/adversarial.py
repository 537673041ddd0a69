"""Adversarial webs: link spam of several shapes on an ordinary synthetic web, labelled.

``generate(name, seed)`` returns a :class:`LabelledWeb`: the web, its crawl seeds, the
URLs that are spam (worth nothing when a crawl order is scored) and the URLs of an honest
dense cluster (worth their PageRank: a spam defence must not mistake them for a farm).
The seed number varies the ordinary graph, the crawl seeds and which pages link into
the spam. Same name and seed, same web.

The family (``FAMILY``):

* ``farm-near``: a farm of many separately registered domains, densely interlinked,
  linked from the crawl seeds and from pages one link away from them;
* ``farm-far``: the same farm, linked only from pages far from the seeds (the last
  fifth of a breadth-first crawl);
* ``subdomain-farm``: one registrable domain with many host names under it, densely
  interlinked, linked from near the seeds;
* ``link-ring``: mid-sized sites that look ordinary (site trees, text, links out) but
  link to each other's pages on every page; linked from near the seeds;
* ``doorways``: ordinary-looking pages that answer 301/302 into a farm (on hosts of
  their own and planted on ordinary hosts); the farm has no other way in;
* ``honest-cluster``: a university, one registrable domain with a host per department,
  departments linking to each other, linked from many ordinary hosts; no spam;
* ``demo``: the web ``sluice demo`` crawls (``WebSpec(seed=42, hosts=60, pages=3000)``,
  seed number ignored); its ``farm-NNN.test`` hosts are the spam.

Every web but ``honest-cluster`` and ``demo`` also holds a small honest cluster of
separately registered sites (a town's shops and clubs linking to each other). Host
names are invented words for spam and honest hosts alike, so no name tells them apart.
Sizes are common practice, no source: a few thousand pages, so that the whole family
crawls in minutes.
"""

from __future__ import annotations

import random
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass

from synthweb.graph import SyntheticWeb
from synthweb.model import (
    HOME_PATH,
    NAV_FANOUT,
    PAGE_DIR,
    WORDS,
    Behaviour,
    Link,
    Page,
    WebSpec,
    url_of,
)
from synthweb.sites import SiteBuilder

FARM_NEAR = "farm-near"
FARM_FAR = "farm-far"
SUBDOMAIN_FARM = "subdomain-farm"
LINK_RING = "link-ring"
DOORWAYS = "doorways"
HONEST_CLUSTER = "honest-cluster"
DEMO = "demo"
FAMILY: tuple[str, ...] = (
    FARM_NEAR, FARM_FAR, SUBDOMAIN_FARM, LINK_RING, DOORWAYS, HONEST_CLUSTER, DEMO)

NEAR = "near"  # entry links on the seeds and on pages one link from them
FAR = "far"  # entry links on pages in the last FAR_SHARE of breadth-first order

# the ordinary web
BASE_HOSTS = 40
BASE_PAGES = 2400
SEED_COUNT = 5
SEED_POOL = 12  # crawl seeds: home pages drawn from this many biggest hosts
POPULAR_HOSTS = 10  # spam links out to these hosts' home pages to look ordinary
# links into the spam
ENTRY_LINKS = 15
ENTRY_ON_SEEDS = 5
FAR_SHARE = 0.2
# spam shapes
FARM_DOMAINS = 10
FARM_PAGES = 60
FARM_LINKS = 20  # links from each farm page to random farm pages
CAMOUFLAGE_LINKS = 2  # links from each spam page to popular honest pages
SUBDOMAIN_HOSTS = 40
SUBDOMAIN_PAGES = 15
SUBDOMAIN_LINKS = 12
RING_SITES = 12
RING_PAGES = 40
RING_LINKS = 4  # links from each ring page to pages of other ring sites
DOORWAY_HOSTS = 6
DOORWAYS_PER_HOST = 3
PLANTED_DOORWAYS = 6  # doorways planted on the ordinary hosts of entry pages
DOORWAY_FARM_PAGES = 50
DOORWAY_STATUSES = (301, 302)
# honest clusters
TOWN_SITES = 12
TOWN_PAGES = 12
TOWN_LINKS = 2  # links from each town page to pages of other town sites
TOWN_INLINKS = 150  # links from ordinary pages into the town's sites
TOWN_INLINK_HOSTS = 20  # ... on this many distinct ordinary hosts
UNI_DEPARTMENTS = 15
UNI_PAGES = 20
UNI_LINKS = 3
UNI_INLINKS = 320
UNI_INLINK_HOSTS = 30
UNI_WWW = "www"

DEMO_SPEC = WebSpec(seed=42, hosts=60, pages=3000)  # frontier/demo.py with the CLI defaults


@dataclass
class LabelledWeb:
    """A web with ground truth for scoring a crawl order."""

    name: str
    seed: int
    web: SyntheticWeb
    spam: frozenset[str]  # URLs worth nothing (farm pages, doorways, ring pages)
    cluster: frozenset[str]  # URLs of the honest dense cluster
    entries: tuple[tuple[str, str], ...]  # (honest page, spam URL) links into the spam
    placement: str  # NEAR, FAR, or "" (no spam, or as the demo web has it)
    doorways: frozenset[str] = frozenset()  # spam URLs that lead into a farm, not in it

    @property
    def farm(self) -> frozenset[str]:
        """The spam a defence must keep out of the budget: every spam URL but the
        doorways (a doorway is an ordinary URL until it answers, so any order fetches
        those it meets; what it must not do is follow them into the farm)."""
        return self.spam - self.doorways

    @property
    def seeds(self) -> list[str]:
        return self.web.seeds


def generate(name: str, seed: int) -> LabelledWeb:
    """The family's web ``name`` for seed number ``seed``."""
    if name == DEMO:
        return _demo()
    builders = {
        FARM_NEAR: lambda b: b.many_domain_farm(NEAR),
        FARM_FAR: lambda b: b.many_domain_farm(FAR),
        SUBDOMAIN_FARM: lambda b: b.subdomain_farm(),
        LINK_RING: lambda b: b.link_ring(),
        DOORWAYS: lambda b: b.doorways(),
        HONEST_CLUSTER: lambda b: b.university(),
    }
    if name not in builders:
        raise KeyError(f"no web named {name!r}; the family: {', '.join(FAMILY)}")
    b = _FamilyBuilder(seed)
    b.build_sites()
    b.choose_seeds()
    if name != HONEST_CLUSTER:
        b.town()
    builders[name](b)
    return b.finish(name)


def _demo() -> LabelledWeb:
    web = SyntheticWeb.generate(DEMO_SPEC)
    spam = frozenset(u for u, p in web.pages.items() if p.host in web.farm_hosts)
    entries = tuple((u, link.url) for u, p in web.pages.items() if u not in spam
                    for link in p.links if link.url in spam)
    return LabelledWeb(DEMO, DEMO_SPEC.seed, web, spam, frozenset(), entries, "")


def breadth_first(pages: dict[str, Page], seeds: Iterable[str]) -> list[tuple[str, int]]:
    """(URL, link depth) in breadth-first order from ``seeds`` over links and redirects."""
    start = [s for s in seeds if s in pages]
    depth = dict.fromkeys(start, 0)
    queue = deque(start)
    out = []
    while queue:
        url = queue.popleft()
        out.append((url, depth[url]))
        page = pages[url]
        targets = [link.url for link in page.links]
        if page.location is not None:
            targets.append(page.location)
        for t in targets:
            if t not in depth and t in pages:
                depth[t] = depth[url] + 1
                queue.append(t)
    return out


class _HostNames:
    """Invented, distinct host labels: two words of the synthetic vocabulary."""

    def __init__(self, rng: random.Random) -> None:
        self.rng = rng
        self.used: set[str] = set()

    def label(self) -> str:
        while True:
            name = WORDS[self.rng.randrange(len(WORDS))] + WORDS[self.rng.randrange(len(WORDS))]
            if name not in self.used:
                self.used.add(name)
                return name

    def domain(self) -> str:
        """A registrable domain of its own: ``label.test``."""
        return f"{self.label()}.test"


class _FamilyBuilder(SiteBuilder):
    """The ordinary web with invented host names, plus one spam shape and a cluster."""

    def __init__(self, seed: int) -> None:
        super().__init__(WebSpec(
            seed=seed, hosts=BASE_HOSTS, pages=BASE_PAGES, seed_count=SEED_COUNT,
            robots=False, slow_hosts=False, failing_hosts=False, redirects=False, trap=False,
            farm=False, near_duplicates=False, ssrf_bait=False, bad_inputs=False))
        self.names = _HostNames(self.rng("names"))
        self.site_hosts = [self.names.domain() for _ in range(BASE_HOSTS)]
        self.crawl_seeds: list[str] = []
        self.spam: list[str] = []
        self.doorway_urls: list[str] = []  # doorway hosts' pages and planted doorways
        self.cluster: list[str] = []
        self.entries: list[tuple[str, str]] = []
        self.placement = ""
        self.extra_hosts = 0  # numbers the added sites' titles after the ordinary ones

    # -- the ordinary web --
    def homes(self) -> list[str]:
        """Home pages of the ordinary hosts, biggest host first."""
        return [url_of(h, HOME_PATH) for h in self.site_hosts]

    def choose_seeds(self) -> None:
        rng = self.rng("crawl-seeds")
        self.crawl_seeds = rng.sample(self.homes()[:SEED_POOL], SEED_COUNT)

    def popular(self) -> list[str]:
        return self.homes()[:POPULAR_HOSTS]

    def ordinary_order(self) -> list[tuple[str, int]]:
        """Breadth-first order over the web built so far (before the spam)."""
        return breadth_first(self.pages, self.crawl_seeds)

    # -- sites --
    def add_site(self, host: str, size: int, rng: random.Random) -> list[str]:
        """A site of ``size`` pages: home, a tree of pages (NAV_FANOUT children each), text."""
        n = self.extra_hosts
        self.extra_hosts += 1
        urls = [url_of(host, HOME_PATH if i == 0 else f"{PAGE_DIR}{i}.html") for i in range(size)]
        for i, url in enumerate(urls):
            kids = range(i * NAV_FANOUT + 1, min((i + 1) * NAV_FANOUT + 1, size))
            self.add(Page(url=url, host=host, path=url[len(f"http://{host}"):],
                          title=self.title(rng, f"{BASE_HOSTS + n}.{i}"), text=self.text(rng),
                          links=[]))
            targets = [urls[k] for k in kids] + ([urls[0]] if i else [])
            self.link(url, targets)
        return urls

    def link(self, source: str, targets: Iterable[str]) -> None:
        """Append links from ``source`` to ``targets`` (no self-links, no repeats)."""
        page = self.pages[source]
        have = {link.url for link in page.links}
        for t in targets:
            if t != source and t not in have:
                have.add(t)
                page.links.append(Link(t, self.pages[t].title if t in self.pages else t))

    def interlink(self, sites: list[list[str]], per_page: int, outside: int,
                  rng: random.Random, *, others_only: bool = False) -> None:
        """Each page links to ``per_page`` random pages of the group (of other sites if
        ``others_only``) and ``outside`` popular ordinary pages; homes link to all homes."""
        homes = [s[0] for s in sites]
        everything = [u for s in sites for u in s]
        popular = self.popular()
        for k, site in enumerate(sites):
            pool = [u for j, s in enumerate(sites) if j != k for u in s] if others_only else everything
            for url in site:
                picks = rng.sample(pool, min(per_page, len(pool)))
                self.link(url, [*(homes if url == site[0] else []), *picks,
                                *rng.sample(popular, outside)])

    def entry_sources(self, placement: str, count: int, rng: random.Random) -> list[str]:
        """Ordinary pages that will link into the spam."""
        cluster = set(self.cluster)
        order = [(u, d) for u, d in self.ordinary_order() if u not in cluster]
        if placement == NEAR:
            on_seeds = [self.crawl_seeds[i % len(self.crawl_seeds)] for i in range(ENTRY_ON_SEEDS)]
            near = [u for u, d in order if d == 1]
            if len(near) < count - ENTRY_ON_SEEDS:  # a sparse start: take the next ring too
                near = [u for u, d in order if 1 <= d <= 2]
            return on_seeds + rng.sample(near, count - ENTRY_ON_SEEDS)
        tail = [u for u, _ in order[int(len(order) * (1 - FAR_SHARE)):]]
        return rng.sample(tail, count)

    def add_entries(self, placement: str, targets: list[str], rng: random.Random) -> None:
        self.placement = placement
        for source, target in zip(self.entry_sources(placement, len(targets), rng), targets):
            self.link(source, [target])
            self.entries.append((source, target))

    def inlinks_from_many_hosts(self, targets: list[str], hosts: int,
                                rng: random.Random) -> None:
        """Links to ``targets`` (in turn) from ``hosts`` distinct ordinary hosts: each
        host's first link from its home page or a page its home page links to (a
        prominent link), the others from any of its pages."""
        chosen = rng.sample(range(BASE_HOSTS), hosts)
        for k, target in enumerate(targets):
            h = chosen[k % hosts]
            first, end = self.host_first[h], self.host_first[h + 1]
            last = min(end, first + NAV_FANOUT + 1) if k < hosts else end
            self.link(self.urls[rng.randrange(first, last)], [target])

    # -- spam shapes --
    def farm(self, hosts: list[str], size: int, links: int, rng: random.Random) -> list[list[str]]:
        sites = [self.add_site(h, size, rng) for h in hosts]
        self.interlink(sites, links, CAMOUFLAGE_LINKS, rng)
        self.spam += [u for s in sites for u in s]
        return sites

    def many_domain_farm(self, placement: str) -> None:
        rng = self.rng("farm")
        sites = self.farm([self.names.domain() for _ in range(FARM_DOMAINS)], FARM_PAGES,
                          FARM_LINKS, rng)
        homes = [s[0] for s in sites]
        self.add_entries(placement, [rng.choice(homes) for _ in range(ENTRY_LINKS)], rng)

    def subdomain_farm(self) -> None:
        rng = self.rng("subdomain-farm")
        domain = self.names.domain()
        hosts = [f"{self.names.label()}.{domain}" for _ in range(SUBDOMAIN_HOSTS)]
        sites = self.farm(hosts, SUBDOMAIN_PAGES, SUBDOMAIN_LINKS, rng)
        homes = [s[0] for s in sites]
        self.add_entries(NEAR, [rng.choice(homes) for _ in range(ENTRY_LINKS)], rng)

    def link_ring(self) -> None:
        rng = self.rng("link-ring")
        sites = [self.add_site(self.names.domain(), RING_PAGES, rng) for _ in range(RING_SITES)]
        self.interlink(sites, RING_LINKS, CAMOUFLAGE_LINKS, rng, others_only=True)
        self.spam += [u for s in sites for u in s]
        homes = [s[0] for s in sites]
        self.add_entries(NEAR, [rng.choice(homes) for _ in range(ENTRY_LINKS)], rng)

    def doorways(self) -> None:
        rng = self.rng("doorways")
        sites = self.farm([self.names.domain() for _ in range(FARM_DOMAINS)],
                          DOORWAY_FARM_PAGES, FARM_LINKS, rng)
        farm = [u for s in sites for u in s]
        homes = [s[0] for s in sites]
        door_homes: list[str] = []
        doorways: list[str] = []
        for _ in range(DOORWAY_HOSTS):  # hosts of their own: a home page and doorways
            host = self.names.domain()
            home = self.add_site(host, 1, rng)[0]
            paths = [f"{PAGE_DIR}{i}.html" for i in range(1, DOORWAYS_PER_HOST + 1)]
            mine = [self.redirect(host, p, self.farm_target(rng, homes, farm)) for p in paths]
            self.link(home, [*mine, *rng.sample(self.popular(), CAMOUFLAGE_LINKS)])
            self.spam += [home, *mine]
            self.doorway_urls += [home, *mine]
            door_homes.append(home)
            doorways += mine
        sources = self.entry_sources(NEAR, ENTRY_LINKS, rng)
        self.placement = NEAR
        # every doorway host's home page is linked, then doorways themselves
        linked = door_homes + [rng.choice(doorways)
                               for _ in range(ENTRY_LINKS - PLANTED_DOORWAYS - DOORWAY_HOSTS)]
        for k, source in enumerate(sources):
            if k < PLANTED_DOORWAYS:  # planted on the entry page's own (ordinary) host
                host = self.pages[source].host
                path = f"{PAGE_DIR}{self.next_free(host)}.html"
                target = self.redirect(host, path, self.farm_target(rng, homes, farm))
                self.spam.append(target)
                self.doorway_urls.append(target)
            else:
                target = linked[k - PLANTED_DOORWAYS]
            self.link(source, [target])
            self.entries.append((source, target))

    @staticmethod
    def farm_target(rng: random.Random, homes: list[str], farm: list[str]) -> str:
        return rng.choice(homes) if rng.random() < 0.5 else rng.choice(farm)

    def redirect(self, host: str, path: str, location: str) -> str:
        url = url_of(host, path)
        status = DOORWAY_STATUSES[len(self.spam) % len(DOORWAY_STATUSES)]
        self.add(Page(url=url, host=host, path=path, title="", text="", links=[],
                      status=status, behaviour=Behaviour.REDIRECT, location=location))
        return url

    def next_free(self, host: str) -> int:
        """A page number not yet used on ``host``."""
        n = 1
        while url_of(host, f"{PAGE_DIR}{n}.html") in self.pages:
            n += 1
        return n

    # -- honest clusters --
    def town(self) -> None:
        """Shops and clubs of one town: separate domains that link to each other."""
        rng = self.rng("town")
        sites = [self.add_site(self.names.domain(), TOWN_PAGES, rng) for _ in range(TOWN_SITES)]
        self.interlink(sites, TOWN_LINKS, 1, rng, others_only=True)
        self.cluster += [u for s in sites for u in s]
        everything = [u for s in sites for u in s]
        targets = [s[0] for s in sites] + rng.sample(everything, TOWN_INLINKS - TOWN_SITES)
        self.inlinks_from_many_hosts(targets, TOWN_INLINK_HOSTS, rng)

    def university(self) -> None:
        """One registrable domain, a host per department: dense, honest, linked from many hosts."""
        rng = self.rng("university")
        domain = self.names.domain()
        hosts = [f"{UNI_WWW}.{domain}"] + [f"{self.names.label()}.{domain}"
                                           for _ in range(UNI_DEPARTMENTS)]
        sites = [self.add_site(h, UNI_PAGES, rng) for h in hosts]
        www = sites[0][0]
        for site in sites[1:]:
            for url in site:
                self.link(url, [www])
        self.interlink(sites, UNI_LINKS, 1, rng, others_only=True)
        self.cluster += [u for s in sites for u in s]
        everything = [u for s in sites for u in s]
        targets = [www if k % 3 == 0 else rng.choice(sites)[0] if k % 3 == 1
                   else rng.choice(everything) for k in range(UNI_INLINKS)]
        self.inlinks_from_many_hosts(targets, UNI_INLINK_HOSTS, rng)

    # -- the result --
    def finish(self, name: str) -> LabelledWeb:
        for page in self.pages.values():
            self.robots.setdefault(page.host, None)
        spam = frozenset(self.spam)
        hosts: dict[str, bool] = {}
        for url, page in self.pages.items():
            hosts[page.host] = hosts.get(page.host, True) and url in spam
        web = SyntheticWeb(spec=self.spec, pages=self.pages, robots=self.robots,
                           seeds=list(self.crawl_seeds), site_hosts=list(self.site_hosts),
                           farm_hosts={h for h, all_spam in hosts.items() if all_spam})
        return LabelledWeb(name, self.spec.seed, web, spam, frozenset(self.cluster),
                           tuple(self.entries), self.placement, frozenset(self.doorway_urls))
