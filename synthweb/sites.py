"""Ordinary sites of the synthetic web: Zipf host sizes and the preferential link graph.

``SiteBuilder`` holds the state of one build; ``specials`` adds the hostile hosts
and features to it, and ``graph`` turns it into a ``SyntheticWeb``.
"""

from __future__ import annotations

import random

from synthweb.model import (
    BASE_HREF_SHARE,
    CAPITALISED_WORDS,
    DRAWS_PER_LINK,
    HOME_LINK_SHARE,
    HOME_PATH,
    META_NOFOLLOW_SHARE,
    NAV_FANOUT,
    NOFOLLOW_SHARE,
    PAGE_DIR,
    PRIVATE_DIR,
    PRIVATE_EVERY,
    PRIVATE_OFFSET,
    ROBOTS_SERVER_ERROR,
    SENTENCES,
    SITE_HOST_FORMAT,
    TITLE_WORDS,
    WORDS,
    WORDS_PER_SENTENCE,
    Link,
    Page,
    WebSpec,
    url_of,
)


def host_sizes(total: int, hosts: int, exponent: float) -> list[int]:
    """Zipf host sizes: at least one page each, summing to ``total``."""
    weights = [1.0 / (rank**exponent) for rank in range(1, hosts + 1)]
    scale = (total - hosts) / sum(weights)
    sizes = [1 + int(w * scale) for w in weights]
    for i in range(total - sum(sizes)):  # hand out the rounding remainder to the top
        sizes[i % hosts] += 1
    return sizes


class SiteBuilder:
    """Builds the ordinary sites of one web; each feature draws from its own seeded stream.

    The special hosts (``specials``) extend the same builder state afterwards.
    """

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
        """An independent random stream for one feature, fixed by the seed."""
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
            out.append(" ".join([CAPITALISED_WORDS[chunk[0]], *[WORDS[b] for b in chunk[1:]]]) + ".")
        return " ".join(out)

    @staticmethod
    def title(rng: random.Random, suffix: str) -> str:
        """Two invented capitalised words and ``suffix``."""
        raw = rng.randbytes(TITLE_WORDS)
        return " ".join(CAPITALISED_WORDS[b] for b in raw) + f" {suffix}"

    def add(self, page: Page) -> Page:
        """Store ``page`` under its URL."""
        self.pages[page.url] = page
        return page

    # -- ordinary sites --
    def build_sites(self) -> None:
        """Ordinary hosts with Zipf sizes: URLs, titles, texts, links and page looks."""
        spec = self.spec
        rng = self.rng("sites")
        sizes = host_sizes(spec.pages, spec.hosts, spec.zipf_exponent)
        for h, (host, size) in enumerate(zip(self.site_hosts, sizes)):
            self.host_first.append(len(self.urls))
            for local in range(size):
                if local == 0:
                    path = HOME_PATH
                elif local % PRIVATE_EVERY == PRIVATE_OFFSET:
                    path = f"{PRIVATE_DIR}{local}.html"
                else:
                    path = f"{PAGE_DIR}{local}.html"
                self.urls.append(url_of(host, path))
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
                links=links[pid], base_href=url_of(host, HOME_PATH) if with_base else None,
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
        return self.pages[url_of(self.site_hosts[0], HOME_PATH)]

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
