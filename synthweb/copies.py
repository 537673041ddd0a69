"""A synthetic web with copied hosts: "print" hosts serving byte-identical copies of an
original site's pages and "mirror" hosts serving near copies of them.

The base is the plain synthetic web (``WebSpec`` with every special feature off: no
robots files, traps, farms or near-duplicate groups, so the copies made here are the
only copies). Each copy host copies ``copies_per_host`` pages of one original site,
whose texts become ``words`` invented words long:

- a print copy is served with the original's bytes (the same payload digest);
- a mirror copy has ``changed_words`` words of the text changed (a date or a counter
  would change so) and the original's title and link texts; its links go to its own
  host's copies of the pages it copies (a mirror links within itself), and the link the
  original has to this copy goes instead to a page of an "annex" host that nothing else
  links to (so that page is found only through the near copy).

Each original links to its print copy and to its mirror copy, so a print copy is
always found after its original. The default demo web is not changed by any of this.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field

from synthweb.graph import SyntheticWeb
from synthweb.model import CAPITALISED_WORDS, HOME_PATH, WORDS, Link, Page, WebSpec, url_of
from synthweb.server import SyntheticServer, render_page
from synthweb.sites import SiteBuilder

PRINT_HOST_FORMAT = "print-{:02d}.test"
MIRROR_HOST_FORMAT = "mirror-{:02d}.test"
ANNEX_HOST_FORMAT = "annex-{:02d}.test"
PLAIN = {name: False for name in (
    "robots", "slow_hosts", "failing_hosts", "redirects", "trap", "farm", "near_duplicates",
    "ssrf_bait", "bad_inputs")}


@dataclass(frozen=True)
class CopySpec:
    """Everything that determines a web with copies. Same spec, same web."""

    seed: int = 1
    hosts: int = 20  # ordinary sites
    pages: int = 600  # ordinary pages
    print_hosts: int = 2
    mirror_hosts: int = 2
    copies_per_host: int = 25
    words: int = 400  # words of an original's text
    changed_words: int = 2  # words a mirror copy changes


@dataclass
class CopyWeb:
    """The web and the truth about its copies."""

    spec: CopySpec
    web: SyntheticWeb
    original_of: dict[str, str] = field(default_factory=dict)  # copy URL -> original URL
    exact: set[str] = field(default_factory=set)  # print copies
    near: set[str] = field(default_factory=set)  # mirror copies
    only_through: dict[str, str] = field(default_factory=dict)  # mirror copy -> annex page
    copied_host: dict[str, str] = field(default_factory=dict)  # copy host -> original host
    print_bodies: dict[str, bytes] = field(default_factory=dict)  # print URL -> bytes

    @property
    def print_hosts(self) -> set[str]:
        return {h for h in self.copied_host if h.startswith("print-")}

    @property
    def mirror_hosts(self) -> set[str]:
        return {h for h in self.copied_host if h.startswith("mirror-")}


def _long_text(rng: random.Random, words: int) -> str:
    """``words`` invented words in one paragraph."""
    raw = rng.randbytes(words)
    return " ".join([CAPITALISED_WORDS[raw[0]], *(WORDS[b] for b in raw[1:])]) + "."


def _changed(text: str, rng: random.Random, count: int) -> str:
    """``text`` with ``count`` words (not the first) replaced by numbers, as a date or a
    counter would change."""
    words = text.split(" ")
    for pos in rng.sample(range(1, len(words) - 1), count):
        words[pos] = str(rng.randrange(1000, 10**6))
    return " ".join(words)


def copy_web(spec: CopySpec | None = None) -> CopyWeb:
    """Build the plain web and add the print, mirror and annex hosts."""
    spec = spec or CopySpec()
    web = SyntheticWeb.generate(WebSpec(seed=spec.seed, hosts=spec.hosts, pages=spec.pages,
                                        **PLAIN))
    rng = random.Random(f"{spec.seed}:copies")
    out = CopyWeb(spec, web)
    by_host: dict[str, list[str]] = {}  # pages a crawl reaches whose links it follows
    for url in sorted(web.reachable(honour_nofollow=True)):
        page = web.pages[url]
        if page.path != HOME_PATH and not page.meta_nofollow:
            by_host.setdefault(page.host, []).append(url)
    big = sorted(by_host, key=lambda h: (-len(by_host[h]), h))
    kinds = ["print"] * spec.print_hosts + ["mirror"] * spec.mirror_hosts
    if len(big) < len(kinds) or len(by_host[big[len(kinds) - 1]]) < spec.copies_per_host:
        raise ValueError("the plain web has too few big sites for these copies")
    plans = []
    counters = {"print": 0, "mirror": 0}
    for kind, original_host in zip(kinds, big):
        number = counters[kind]
        counters[kind] += 1
        host = (PRINT_HOST_FORMAT if kind == "print" else MIRROR_HOST_FORMAT).format(number)
        chosen = sorted(rng.sample(by_host[original_host], spec.copies_per_host))
        out.copied_host[host] = original_host
        plans.append((kind, host, number, chosen))
        for url in chosen:
            web.pages[url].text = _long_text(rng, spec.words)
    # the originals link to their copies first, so the copies copy the final originals
    for kind, host, _, chosen in plans:
        for url in chosen:
            page = web.pages[url]
            page.links.append(Link(url_of(host, page.path), f"{kind} copy"))
    for kind, host, number, chosen in plans:
        web.robots[host] = None
        mapped = {url: url_of(host, web.pages[url].path) for url in chosen}
        for url in chosen:
            original = web.pages[url]
            copy_url = mapped[url]
            out.original_of[copy_url] = url
            if kind == "print":
                out.exact.add(copy_url)
                out.print_bodies[copy_url] = render_page(original)
                web.pages[copy_url] = Page(url=copy_url, host=host, path=original.path,
                                           title=original.title, text=original.text,
                                           links=list(original.links))
                continue
            annex = ANNEX_HOST_FORMAT.format(number)
            web.robots[annex] = None
            only = url_of(annex, f"/only{len(out.only_through)}.html")
            out.only_through[copy_url] = only
            out.near.add(copy_url)
            links = []
            for link in original.links:
                if link.url == copy_url:  # its own link goes to the annex page instead
                    links.append(Link(only, link.anchor))
                else:
                    links.append(Link(mapped.get(link.url, link.url), link.anchor, link.nofollow))
            web.pages[copy_url] = Page(
                url=copy_url, host=host, path=original.path, title=original.title,
                text=_changed(original.text, rng, spec.changed_words), links=links)
            web.pages[only] = Page(url=only, host=annex, path=only[len(f"http://{annex}"):],
                                   title=f"Only {number}", text=SiteBuilder.text(rng),
                                   links=[])
    return out


class CopyServer(SyntheticServer):
    """Serves a :class:`CopyWeb`: print copies answer with their original's bytes."""

    def __init__(self, copies: CopyWeb, **options: float) -> None:
        super().__init__(copies.web, **options)  # type: ignore[arg-type]
        self._html_cache.update(copies.print_bodies)
