"""Topical webs: invented sites about three invented subjects, with off-topic regions.

``generate(subject, seed)`` returns a :class:`TopicalWeb`: a ``SyntheticWeb`` (served by
``synthweb.server`` like any other), the subject of every page (``labels``; None: off
topic) and the subject the crawl is about. Same subject and seed, same web. The default
demo web (``synthweb.graph``) is untouched: this is a variant of its own.

The subjects are crafts of an invented coast, each with a vocabulary of plain English
words of its own (``SUBJECTS``); every page also carries filler words from the invented
vocabulary (``synthweb.model.WORDS``), and off-topic pages carry the general words of
town life (``GENERAL``). A page's text mixes its subject's words at a density drawn per
page; off-topic pages now and then mention a subject's word (noise).

The shape (sizes: common practice, no source; chosen so that a few thousand pages crawl
in seconds):

* ``FOCUS_HOSTS`` small sites about the crawl's subject and ``OTHER_HOSTS`` about each of
  the other two; a ``SECTION_SHARE`` of every such site's pages is off topic (its shop,
  notices and events: off-topic regions linked from on-topic pages);
* ``GENERAL_HOSTS`` general portals with Zipf sizes, most of the pages; an
  ``ARTICLE_SHARE`` of their pages is about one of the subjects;
* links: a site tree on every host (``NAV_FANOUT`` children a page, half the pages back
  to the home page), plus ``CROSS_LINKS`` links to other hosts' pages. Pages link to
  their own subject with probability ``LOCALITY`` (topical locality, Davison, SIGIR 2000:
  linked pages are much more likely to share a topic), otherwise to the general web,
  where targets are chosen by preferential attachment (in-degree + 1), so the portals
  collect the most links;
* seeds: ``SUBJECT_SEEDS`` home pages of the subject's sites and ``PORTAL_SEEDS`` of the
  biggest portals, as an operator starting from a directory would give.
"""

from __future__ import annotations

import random
from collections.abc import Iterable
from dataclasses import dataclass

from synthweb.adversarial import breadth_first
from synthweb.graph import SyntheticWeb
from synthweb.model import HOME_PATH, NAV_FANOUT, PAGE_DIR, WORDS, Link, Page, WebSpec, url_of
from synthweb.sites import host_sizes

SUBJECTS: dict[str, tuple[str, ...]] = {
    # keeping moth lanterns: glass lamps that lure night moths for counting
    "lanterns": (
        "lantern", "moth", "wick", "glow", "ember", "brass", "chimney", "flame", "lure",
        "nocturnal", "wingspan", "trap", "lamplight", "dusk", "oil", "globe", "filament",
        "antenna", "pupa", "caterpillar", "hawkmoth", "luring", "lampwick", "soot",
        "reflector", "shade", "flicker", "nightwatch", "tally", "specimen", "mothing",
        "lampglass", "beacon", "tallow", "candle", "gauze", "netting", "jar", "counting",
        "wings",
    ),
    # tide clocks: mechanical clocks that follow the tides of the invented coast
    "tideclocks": (
        "tide", "clock", "pendulum", "gear", "escapement", "flood", "ebb", "spring", "neap",
        "lunar", "dial", "hand", "cog", "ratchet", "mainspring", "harbour", "almanac",
        "highwater", "lowwater", "mooring", "winding", "chime", "balance", "arbor",
        "pinion", "movement", "regulator", "gauge", "sounding", "fathom", "quay", "berth",
        "tidal", "bezel", "clockmaker", "verge", "tick", "synodic", "slack", "surge",
    ),
    # salt glass: glass blown from the salt flats' sand
    "saltglass": (
        "salt", "glass", "furnace", "blowpipe", "kiln", "sand", "flux", "molten", "bead",
        "crucible", "annealing", "punty", "marver", "gather", "cullet", "brine", "crystal",
        "shard", "vessel", "tint", "frit", "batch", "glazier", "bubble", "seed", "lehr",
        "tongs", "jack", "paddle", "clear", "opal", "iridescent", "pane", "bottle", "goblet",
        "flats", "evaporation", "pans", "glassblower", "cane",
    ),
}
GENERAL: tuple[str, ...] = (
    "weather", "council", "market", "road", "bus", "school", "holiday", "garden", "recipe",
    "football", "concert", "ticket", "price", "sale", "rent", "flat", "job", "meeting",
    "library", "museum", "cinema", "bakery", "cafe", "parking", "traffic", "rain", "sunny",
    "family", "news", "event", "club", "team", "match", "score", "shop", "opening", "hours",
    "delivery", "order", "contact", "address", "phone", "map", "route", "train", "station",
    "hotel", "room", "booking", "menu", "dinner", "lunch", "breakfast", "music", "film",
    "book", "author", "festival", "parade", "election", "tax", "repair", "plumbing",
    "furniture", "clothes", "shoes", "sports", "swimming", "park", "playground", "doctor",
    "pharmacy", "bank", "loan", "insurance", "car", "bike", "dog", "cat", "pet", "vet",
)
SECTION_KINDS = ("shop", "notices", "events", "contact")

FOCUS_HOSTS = 60
OTHER_HOSTS = 15  # per other subject
GENERAL_HOSTS = 40
GENERAL_PAGES = 1800
SITE_PAGES = (5, 25)  # pages of a subject's site, uniform in this range
SECTION_SHARE = 0.25  # of a subject site's pages: off topic
ARTICLE_SHARE = 0.03  # of a portal's pages: about a subject
LOCALITY = 0.6  # a page's cross-host link stays on its own subject
GENERAL_TO_SUBJECT = 0.1  # an off-topic page's cross-host link goes to some subject's page
CROSS_LINKS = (1, 5)  # cross-host links a page, uniform
HOME_LINK_SHARE = 0.5
WORDS_PER_PAGE = (60, 140)
DENSITY = (0.12, 0.4)  # share of a subject page's words from its subject
GENERAL_DENSITY = 0.3  # share of an off-topic page's words that are general words
MENTION_SHARE = 0.2  # off-topic pages that mention a subject's word once or twice
SUBJECT_SEEDS = 3
PORTAL_SEEDS = 2
ZIPF = 1.0
TRAINING_EXAMPLES = 5
TRAINING_BACKGROUND = 20


@dataclass
class TopicalWeb:
    """A web whose pages are labelled with their subject."""

    subject: str  # the subject the crawl is about
    seed: int
    web: SyntheticWeb
    labels: dict[str, str | None]  # URL -> subject (None: off topic)

    @property
    def seeds(self) -> list[str]:
        return self.web.seeds

    def on_topic(self) -> frozenset[str]:
        """URLs about the crawl's subject."""
        return frozenset(u for u, s in self.labels.items() if s == self.subject)

    def reachable_order(self) -> list[str]:
        """Breadth-first order from the seeds over the static graph."""
        return [u for u, _ in breadth_first(self.web.pages, self.web.seeds)]


class _Text:
    """Page texts and titles from the vocabularies, one seeded stream."""

    def __init__(self, rng: random.Random) -> None:
        self.rng = rng

    def words(self, subject: str | None, mention: bool = False) -> list[str]:
        r = self.rng
        n = r.randint(*WORDS_PER_PAGE)
        density = r.uniform(*DENSITY) if subject else 0.0
        vocab = SUBJECTS[subject] if subject else ()
        out = []
        for _ in range(n):
            x = r.random()
            if x < density:  # Zipf-like within the subject: low ranks more often
                out.append(vocab[min(int(r.paretovariate(1.2)) - 1, len(vocab) - 1)])
            elif x < density + GENERAL_DENSITY * (1 - density):
                out.append(GENERAL[r.randrange(len(GENERAL))])
            else:
                out.append(WORDS[r.randrange(len(WORDS))])
        if mention and not subject:
            other = SUBJECTS[r.choice(sorted(SUBJECTS))]
            for _ in range(r.randint(1, 2)):
                out.insert(r.randrange(len(out) + 1), other[r.randrange(len(other))])
        return out

    def page(self, subject: str | None, mention: bool = False) -> tuple[str, str]:
        """(title, text) of a page about ``subject`` (None: off topic)."""
        ws = self.words(subject, mention)
        title = " ".join(w.capitalize() for w in ws[:3])
        sentences = [" ".join(ws[i:i + 10]) for i in range(0, len(ws), 10)]
        return title, " ".join(s.capitalize() + "." for s in sentences)


def _host_names(rng: random.Random, count: int) -> list[str]:
    names: list[str] = []
    used: set[str] = set()
    while len(names) < count:
        name = WORDS[rng.randrange(len(WORDS))] + WORDS[rng.randrange(len(WORDS))]
        if name not in used:
            used.add(name)
            names.append(f"{name}.test")
    return names


def generate(subject: str, seed: int) -> TopicalWeb:
    """The topical web about ``subject`` (a key of ``SUBJECTS``) for ``seed``."""
    if subject not in SUBJECTS:
        raise KeyError(f"no subject {subject!r}; the subjects: {', '.join(SUBJECTS)}")
    rng = random.Random(f"topical:{subject}:{seed}")
    text = _Text(random.Random(f"topical-text:{subject}:{seed}"))
    others = [s for s in SUBJECTS if s != subject]
    kinds: list[str | None] = ([subject] * FOCUS_HOSTS
                               + [s for s in others for _ in range(OTHER_HOSTS)]
                               + [None] * GENERAL_HOSTS)
    hosts = _host_names(rng, len(kinds))
    portal_sizes = host_sizes(GENERAL_PAGES, GENERAL_HOSTS, ZIPF)
    pages: dict[str, Page] = {}
    labels: dict[str, str | None] = {}
    by_host: dict[str, list[str]] = {}
    portals = iter(portal_sizes)
    for host, kind in zip(hosts, kinds):
        size = rng.randint(*SITE_PAGES) if kind else next(portals)
        urls = [url_of(host, HOME_PATH if i == 0 else f"{PAGE_DIR}{i}.html") for i in range(size)]
        by_host[host] = urls
        for i, url in enumerate(urls):
            if kind is not None:  # a subject's site: home on topic, some sections off
                label = kind if i == 0 or rng.random() >= SECTION_SHARE else None
            else:
                label = rng.choice(sorted(SUBJECTS)) if i and rng.random() < ARTICLE_SHARE else None
            title, body = text.page(label, mention=rng.random() < MENTION_SHARE)
            if label is None and kind is not None:
                title = f"{rng.choice(SECTION_KINDS).capitalize()} {title}"
            labels[url] = label
            pages[url] = Page(url=url, host=host, path=url[len(f"http://{host}"):],
                              title=title, text=body, links=[])
    _link(pages, labels, by_host, rng)
    subject_homes = [by_host[h][0] for h, k in zip(hosts, kinds) if k == subject]
    portal_homes = [by_host[h][0] for h, k in zip(hosts, kinds) if k is None]
    seeds = rng.sample(subject_homes, SUBJECT_SEEDS) + portal_homes[:PORTAL_SEEDS]
    spec = WebSpec(seed=seed, hosts=len(hosts), pages=len(pages), robots=False,
                   slow_hosts=False, failing_hosts=False, redirects=False, trap=False,
                   farm=False, near_duplicates=False, ssrf_bait=False, bad_inputs=False)
    web = SyntheticWeb(spec=spec, pages=pages, robots=dict.fromkeys(hosts), seeds=seeds,
                       site_hosts=hosts)
    return TopicalWeb(subject, seed, web, labels)


def _link(pages: dict[str, Page], labels: dict[str, str | None],
          by_host: dict[str, list[str]], rng: random.Random) -> None:
    """Site trees, then cross-host links with topical locality and preferential
    attachment among the general pages."""
    by_subject: dict[str | None, list[str]] = {}
    for url, label in labels.items():
        by_subject.setdefault(label, []).append(url)
    general_pool = list(by_subject.get(None, []))  # grows with in-links: preferential
    subjects = sorted(SUBJECTS)
    for host, urls in by_host.items():
        for i, url in enumerate(urls):
            page = pages[url]
            have: dict[str, None] = {}
            for k in range(i * NAV_FANOUT + 1, min((i + 1) * NAV_FANOUT + 1, len(urls))):
                have[urls[k]] = None
            if i and rng.random() < HOME_LINK_SHARE:
                have[urls[0]] = None
            label = labels[url]
            for _ in range(rng.randint(*CROSS_LINKS)):
                if label is not None and rng.random() < LOCALITY:
                    pool = by_subject[label]
                elif label is None and rng.random() < GENERAL_TO_SUBJECT:
                    pool = by_subject.get(rng.choice(subjects)) or general_pool
                else:
                    pool = general_pool
                target = pool[rng.randrange(len(pool))]
                if pages[target].host == host or target in have:
                    continue
                have[target] = None
                if labels[target] is None:
                    general_pool.append(target)
            page.links = [Link(t, pages[t].title) for t in have]


def training_pages(subject: str, seed: int, examples: int = TRAINING_EXAMPLES,
                   background: int = TRAINING_BACKGROUND) -> tuple[list[str], list[str]]:
    """(example texts, background texts) for a focus on ``subject``: new pages drawn like
    the web's (not pages of it), the background off topic and about the other subjects."""
    text = _Text(random.Random(f"topical-training:{subject}:{seed}"))
    others = [s for s in SUBJECTS if s != subject]
    ex = [" ".join(text.page(subject)) for _ in range(examples)]
    kinds: list[str | None] = [None] * (background - len(others)) + others
    bg = [" ".join(text.page(k, mention=True)) for k in kinds]
    return ex, bg


def subject_terms(subject: str, count: int = 10) -> dict[str, float]:
    """A term list an operator might write: the subject's first words, weight 1."""
    return dict.fromkeys(SUBJECTS[subject][:count], 1.0)


def harvest(order: Iterable[str], labels: dict[str, str | None], subject: str,
            pages: int) -> float | None:
    """Share of the first ``pages`` fetched URLs that are about ``subject`` (Menczer,
    Pant & Srinivasan 2004's harvest rate); None if nothing was fetched."""
    head = list(order)[:pages]
    if not head:
        return None
    return sum(1 for u in head if labels.get(u) == subject) / len(head)
