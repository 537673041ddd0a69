"""The adversarial webs (synthweb/adversarial.py) and the ordering bench's scores.

Labels are checked against graph properties counted here by hand, doorways against the
real loopback server, the scores against networkx and a PageRank solved by hand.
"""

from __future__ import annotations

import hashlib
import json
import os
import statistics
import subprocess
import sys
from collections import Counter
from fractions import Fraction
from pathlib import Path
from typing import Any
from urllib.parse import urljoin, urlsplit

import aiohttp
import networkx as nx
import pytest
from publicsuffixlist import PublicSuffixList

from frontier.bench import ordering_bench as bench
from frontier.bench.ordering_crawl import crawl
from frontier.bench.ordering_measures import (
    budget_pages,
    count_in,
    fetched_value,
    first_position,
    gap_closed,
    omniscient_value,
    page_values,
    pagerank,
    share_in,
)
from frontier.cli import parser as cli_parser
from frontier.demo import DEMO_MIN_DELAY_S
from frontier.exceptions import ConfigError
from frontier.priority import url_host
from tests.servers import RedisServer
from synthweb import adversarial as adv
from synthweb.model import NAV_FANOUT
from synthweb.server import SyntheticServer

PSL = PublicSuffixList()
BUILT = [n for n in adv.FAMILY if n != adv.DEMO]
SPAM_WEBS = [n for n in BUILT if n != adv.HONEST_CLUSTER]


@pytest.fixture(scope="module")
def webs() -> dict[str, adv.LabelledWeb]:
    return {name: adv.generate(name, 1) for name in adv.FAMILY}


def digest(lw: adv.LabelledWeb) -> str:
    """A fingerprint of everything a web holds: pages, links, redirects, seeds, labels."""
    h = hashlib.sha256()
    for url, page in lw.web.pages.items():
        h.update(f"{url}|{page.status}|{page.location}|{page.title}|{page.text}".encode())
        h.update("|".join(f"{ln.url}>{ln.anchor}>{ln.nofollow}" for ln in page.links).encode())
    h.update(json.dumps([lw.web.seeds, sorted(lw.spam), sorted(lw.cluster),
                         list(lw.entries), lw.placement]).encode())
    return h.hexdigest()


def incoming(lw: adv.LabelledWeb) -> dict[str, list[str]]:
    """Source URLs of the links (and redirects) into each page."""
    into: dict[str, list[str]] = {}
    for src, dst in lw.web.edges():
        into.setdefault(dst, []).append(src)
    return into


def bfs_urls(lw: adv.LabelledWeb) -> list[str]:
    return [u for u, _ in adv.breadth_first(lw.web.pages, lw.web.seeds)]


# --- determinism ----------------------------------------------------------------------


@pytest.mark.parametrize("name", BUILT)
def test_same_seed_same_web_other_seed_other_seeds_and_entries(name: str) -> None:
    one, again, two = adv.generate(name, 1), adv.generate(name, 1), adv.generate(name, 2)
    assert digest(one) == digest(again)
    assert one.web.pages == again.web.pages
    assert digest(two) != digest(one)
    assert set(two.web.seeds) != set(one.web.seeds) or two.entries != one.entries
    if one.entries:
        assert {s for s, _ in two.entries} != {s for s, _ in one.entries}


def test_webs_do_not_depend_on_the_hash_seed() -> None:
    """Same web in a process with other string hashing (sets iterate in hash order)."""
    here = {name: digest(adv.generate(name, 3)) for name in BUILT}
    code = ("import json,sys; from tests.test_spam_webs import digest, BUILT; "
            "from synthweb import adversarial as adv; "
            "print(json.dumps({n: digest(adv.generate(n, 3)) for n in BUILT}))")
    for hash_seed in ("0", "12345"):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True, cwd=Path(__file__).parent.parent,
                             env={**os.environ, "PYTHONHASHSEED": hash_seed})
        assert json.loads(out.stdout) == here


def test_unknown_web_is_refused() -> None:
    with pytest.raises(KeyError, match="farm-near"):
        adv.generate("no-such-web", 1)


# --- labels: every web --------------------------------------------------------------


@pytest.mark.parametrize("name", adv.FAMILY)
def test_labels_name_real_pages_and_never_both(name: str, webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[name]
    assert lw.spam <= lw.web.pages.keys()
    assert lw.cluster <= lw.web.pages.keys()
    assert not lw.spam & lw.cluster
    assert all(src not in lw.spam and dst in lw.spam for src, dst in lw.entries)
    reachable = set(bfs_urls(lw))
    assert lw.spam <= reachable and lw.cluster <= reachable


@pytest.mark.parametrize("name", BUILT)
def test_host_names_do_not_tell_spam_from_honest(name: str,
                                                 webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[name]
    assert all(h.endswith(".test") and h.count(".") in (1, 2) for h in lw.web.hosts)
    spam_hosts = {url_host(u) for u in lw.spam}
    honest_hosts = {url_host(u) for u in lw.web.pages if u not in lw.spam}
    for hosts in (spam_hosts, honest_hosts):  # the same alphabet of invented labels
        assert all(set(h.removesuffix(".test")) <= set("abcdefghijklmnopqrstuvwxyz.")
                   for h in hosts)
    assert not any(word in h for h in spam_hosts for word in ("farm", "spam", "ring", "door"))


@pytest.mark.parametrize("name", SPAM_WEBS)
def test_spam_hosts_are_linked_mostly_by_spam(name: str,
                                              webs: dict[str, adv.LabelledWeb]) -> None:
    """A farm's (or ring's) pages get their links from each other: of the links into a
    spam host from other hosts, at least 90 % come from spam pages; the honest links in
    are exactly the recorded entries. (Doorway hosts are the way in: they are left out.)"""
    lw = webs[name]
    into = incoming(lw)
    honest_in = sorted((src, dst) for dst in lw.spam for src in into.get(dst, [])
                       if src not in lw.spam)
    assert honest_in == sorted(lw.entries)
    doorway_hosts = {p.host for p in lw.web.pages.values() if p.location is not None}
    hosts = {url_host(u) for u in lw.spam} & lw.web.farm_hosts - doorway_hosts
    assert len(hosts) >= adv.FARM_DOMAINS
    for host in hosts:
        sources = [src for u in lw.spam if url_host(u) == host for src in into.get(u, [])
                   if url_host(src) != host]
        assert sum(1 for s in sources if s in lw.spam) >= 0.9 * len(sources)


# --- labels: each shape --------------------------------------------------------------


def test_near_farm_is_linked_from_every_seed_and_pages_next_to_them(
        webs: dict[str, adv.LabelledWeb]) -> None:
    for name in (adv.FARM_NEAR, adv.SUBDOMAIN_FARM, adv.LINK_RING, adv.DOORWAYS):
        lw = webs[name]
        depth = dict(adv.breadth_first(lw.web.pages, lw.web.seeds))
        sources = [s for s, _ in lw.entries]
        assert set(lw.web.seeds) <= set(sources), name
        assert all(depth[s] <= 1 for s in sources), name
        assert len(lw.entries) == adv.ENTRY_LINKS
        # breadth-first meets the spam among its first 1 % of fetches
        order = bfs_urls(lw)
        first = first_position(order, lw.spam)
        assert first is not None and first < 0.01 * len(order), name


def test_far_farm_is_linked_only_from_the_last_fifth_of_breadth_first(
        webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[adv.FARM_FAR]
    honest = {u: p for u, p in lw.web.pages.items() if u not in lw.spam}
    order = [u for u, _ in adv.breadth_first(honest, lw.web.seeds) if u not in lw.cluster]
    tail = set(order[int(len(order) * (1 - adv.FAR_SHARE)):])
    assert all(s in tail for s, _ in lw.entries)
    assert not set(lw.web.seeds) & {s for s, _ in lw.entries}
    full = bfs_urls(lw)
    first = first_position(full, lw.spam)
    assert first is not None
    honest_before = sum(1 for u in full[:first] if u not in lw.spam)
    assert honest_before >= (1 - adv.FAR_SHARE) * len(order)


def test_many_domain_farm_is_separately_registered_domains(
        webs: dict[str, adv.LabelledWeb]) -> None:
    """Each farm host is a registrable domain of its own (Public Suffix List)."""
    for name in (adv.FARM_NEAR, adv.FARM_FAR):
        hosts = {url_host(u) for u in webs[name].spam}
        assert len(hosts) == adv.FARM_DOMAINS
        assert {PSL.privatesuffix(h) for h in hosts} == hosts
        assert len(webs[name].spam) == adv.FARM_DOMAINS * adv.FARM_PAGES


def test_subdomain_farm_is_many_hosts_under_one_registrable_domain(
        webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[adv.SUBDOMAIN_FARM]
    hosts = {url_host(u) for u in lw.spam}
    assert len(hosts) == adv.SUBDOMAIN_HOSTS
    assert len({PSL.privatesuffix(h) for h in hosts}) == 1
    assert all(h.count(".") == 2 for h in hosts)
    honest = {url_host(u) for u in lw.web.pages if u not in lw.spam}
    assert not {PSL.privatesuffix(h) for h in honest} & {PSL.privatesuffix(h) for h in hosts}


def test_link_ring_sites_look_ordinary_and_link_to_each_other(
        webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[adv.LINK_RING]
    pages = lw.web.pages
    ring_hosts = sorted({url_host(u) for u in lw.spam})
    assert len(ring_hosts) == adv.RING_SITES
    for u in lw.spam:
        page = pages[u]
        assert page.status == 200 and len(page.text.split()) >= 18  # three sentences at least
        other_ring = [ln for ln in page.links if ln.url in lw.spam and url_host(ln.url) != page.host]
        assert len(other_ring) >= adv.RING_LINKS
        assert any(ln.url not in lw.spam for ln in page.links)  # links out to honest pages
    for host in ring_hosts:  # a site tree under one home page, like the ordinary sites
        home = f"http://{host}/"
        own = [ln.url for ln in pages[home].links if url_host(ln.url) == host]
        assert len(own) == min(NAV_FANOUT, adv.RING_PAGES - 1)
        assert sum(1 for u in lw.spam if url_host(u) == host) == adv.RING_PAGES


def test_doorways_are_the_only_way_into_their_farm(webs: dict[str, adv.LabelledWeb]) -> None:
    lw = webs[adv.DOORWAYS]
    pages = lw.web.pages
    doorways = [u for u in lw.spam if pages[u].location is not None]
    assert len(doorways) == adv.DOORWAY_HOSTS * adv.DOORWAYS_PER_HOST + adv.PLANTED_DOORWAYS
    assert all(pages[u].status in (301, 302) for u in doorways)
    doorway_hosts = {url_host(u) for u in doorways} & lw.web.farm_hosts
    assert len(doorway_hosts) == adv.DOORWAY_HOSTS
    farm_hosts = lw.web.farm_hosts - doorway_hosts
    assert len(farm_hosts) == adv.FARM_DOMAINS
    farm = [u for u in lw.spam if url_host(u) in farm_hosts]
    assert len(farm) == adv.FARM_DOMAINS * adv.DOORWAY_FARM_PAGES
    into = incoming(lw)
    for u in farm:  # links from the farm itself and redirects from doorways, nothing else
        assert all(s in lw.spam for s in into.get(u, [])), u
    assert {pages[u].location for u in doorways} <= set(farm)
    # planted doorways sit on ordinary hosts next to honest pages
    planted = [u for u in doorways if url_host(u) not in lw.web.farm_hosts]
    assert len(planted) == adv.PLANTED_DOORWAYS
    assert all(any(p.host == url_host(u) and v not in lw.spam for v, p in pages.items())
               for u in planted)


def test_the_farm_is_the_spam_but_the_doorways(webs: dict[str, adv.LabelledWeb]) -> None:
    """The spam share the targets hold a crawl to counts the farm: the doorways (their
    hosts' pages and the planted ones) are spam that any order fetches when it meets them;
    following them into the farm is what a defence must avoid. Elsewhere farm == spam."""
    for name, lw in webs.items():
        if name != adv.DOORWAYS:
            assert lw.farm == lw.spam and not lw.doorways
    lw = webs[adv.DOORWAYS]
    pages = lw.web.pages
    redirects = {u for u in lw.spam if pages[u].location is not None}
    homes = {u for u in lw.spam if pages[u].location is None
             and any(ln.url in redirects for ln in pages[u].links)}
    assert len(homes) == adv.DOORWAY_HOSTS
    assert lw.doorways == redirects | homes and lw.doorways <= lw.spam
    assert len(lw.farm) == adv.FARM_DOMAINS * adv.DOORWAY_FARM_PAGES
    assert all(pages[u].location is None for u in lw.farm)


async def test_doorways_answer_3xx_into_the_farm_over_loopback(
        webs: dict[str, adv.LabelledWeb]) -> None:
    """Served by the real server: each doorway answers 301 or 302 whose Location
    (resolved against the request URL, RFC 9110 section 10.2.2 and RFC 3986 section 5)
    is a farm page that answers 200."""
    lw = webs[adv.DOORWAYS]
    doorways = sorted(u for u in lw.spam if lw.web.pages[u].location is not None)
    async with SyntheticServer(lw.web) as server, aiohttp.ClientSession() as session:
        async def get(url: str) -> tuple[int, str | None]:
            parts = urlsplit(url)
            async with session.get(f"http://127.0.0.1:{server.port}{parts.path}",
                                   headers={"Host": parts.netloc}, allow_redirects=False) as r:
                await r.read()
                return r.status, r.headers.get("Location")

        for url in doorways:
            status, location = await get(url)
            assert status in (301, 302), url
            assert location is not None
            target = urljoin(url, location)
            assert target in lw.spam and lw.web.pages[target].location is None
            assert url_host(target) in lw.web.farm_hosts
            assert (await get(target))[0] == 200
        statuses = Counter([(await get(u))[0] for u in doorways])
        assert set(statuses) == {301, 302}


def test_honest_clusters_are_dense_linked_from_many_hosts_and_valuable(
        webs: dict[str, adv.LabelledWeb]) -> None:
    """The cluster's sites link to each other, many distinct ordinary hosts link in
    (unlike a farm: at most ENTRY_LINKS honest pages), and its median page has a higher
    PageRank (networkx) than the median ordinary page."""
    for name, sites, hosts_in in ((adv.FARM_NEAR, adv.TOWN_SITES, adv.TOWN_INLINK_HOSTS),
                                  (adv.HONEST_CLUSTER, adv.UNI_DEPARTMENTS + 1,
                                   adv.UNI_INLINK_HOSTS)):
        lw = webs[name]
        cluster_hosts = {url_host(u) for u in lw.cluster}
        assert len(cluster_hosts) == sites
        into = incoming(lw)
        outside = {url_host(s) for u in lw.cluster for s in into.get(u, [])
                   if s not in lw.cluster and s not in lw.spam}
        assert len(outside) >= hosts_in
        for u in lw.cluster:
            page = lw.web.pages[u]
            assert page.status == 200 and page.text
            assert any(ln.url in lw.cluster and url_host(ln.url) != page.host
                       for ln in page.links), u
        rank = pagerank(_graph(lw))
        ordinary = [r for u, r in rank.items() if u not in lw.cluster and u not in lw.spam]
        assert statistics.median(rank[u] for u in lw.cluster) > statistics.median(ordinary)
    uni = {url_host(u) for u in webs[adv.HONEST_CLUSTER].cluster}
    assert len({PSL.privatesuffix(h) for h in uni}) == 1  # the subdomain farm's shape
    assert not webs[adv.HONEST_CLUSTER].spam


def test_demo_web_is_the_demo_and_its_farm_is_the_spam(
        webs: dict[str, adv.LabelledWeb]) -> None:
    """The demo case is `sluice demo` with its CLI defaults (frontier/cli.py)."""
    a = cli_parser().parse_args(["demo"])
    assert (adv.DEMO_SPEC.hosts, adv.DEMO_SPEC.pages) == (a.hosts, a.pages)
    assert bench.DEMO_BUDGET == a.max_pages
    lw = webs[adv.DEMO]
    farm = {u for u, p in lw.web.pages.items() if p.host.startswith("farm-")}
    assert lw.spam == farm and len(farm) == adv.DEMO_SPEC.farm_hosts * adv.DEMO_SPEC.farm_pages
    assert not lw.cluster


def _graph(lw: adv.LabelledWeb) -> nx.DiGraph:
    g = nx.DiGraph()
    g.add_nodes_from(lw.web.pages)
    g.add_edges_from(lw.web.edges())
    return g


# --- scores on a graph solved by hand -----------------------------------------------

A, B, C = "http://a.test/", "http://b.test/", "http://c.test/"
TRIANGLE = [(A, B), (A, C), (B, C), (C, A)]


def triangle_pagerank() -> dict[str, float]:
    """PageRank of A->B, A->C, B->C, C->A with alpha 0.85, solved by hand (Page, Brin,
    Motwani & Winograd 1998: PR(p) = (1 - alpha)/N + alpha * sum PR(q)/outdeg(q)):
    B = 1/20 + 17/40 A; C = 1/20 + 17/40 A + 17/20 B = 37/400 + 629/800 A;
    A = 1/20 + 17/20 C, so A = (1/20 + 17/20 * 37/400) / (1 - 17/20 * 629/800)."""
    a = (Fraction(1, 20) + Fraction(17, 20) * Fraction(37, 400)) / (
        1 - Fraction(17, 20) * Fraction(629, 800))
    b = Fraction(1, 20) + Fraction(17, 40) * a
    c = Fraction(37, 400) + Fraction(629, 800) * a
    assert a + b + c == 1
    return {A: float(a), B: float(b), C: float(c)}


def test_pagerank_matches_the_hand_solution_and_networkx() -> None:
    hand = triangle_pagerank()
    assert hand[A] == pytest.approx(0.387790, abs=1e-6)  # networkx 3.6 gives these
    g = nx.DiGraph(TRIANGLE)
    ours = page_values([A, B, C], TRIANGLE, spam=())
    for u in (A, B, C):
        assert ours[u] == pytest.approx(hand[u], abs=1e-5)
        assert ours[u] == pytest.approx(pagerank(g)[u], abs=1e-9)


def test_dangling_page_jumps_uniformly_as_networkx_does() -> None:
    """A->B with B dangling: networkx spreads B's rank over all pages. By hand:
    A = 3/40 + 17/40 B, B = 3/40 + 17/20 A + 17/40 B, so B = 37/57, A = 20/57."""
    values = page_values([A, B], [(A, B)], spam=())
    assert values[A] == pytest.approx(20 / 57, abs=1e-5)
    assert values[B] == pytest.approx(37 / 57, abs=1e-5)


def test_spam_pages_pass_rank_on_but_are_worth_nothing() -> None:
    """With C spam: C's value is 0, A and B keep the PageRank of the whole graph."""
    hand = triangle_pagerank()
    v = page_values([A, B, C], TRIANGLE, spam={C})
    assert v[C] == 0.0
    assert v[A] == pytest.approx(hand[A], abs=1e-5) and v[B] == pytest.approx(hand[B], abs=1e-5)


def test_value_captured_omniscient_and_gap_closed_by_hand() -> None:
    """Value captured by an order at a budget of k pages and the omniscient best set
    (Cho, Garcia-Molina & Page, "Efficient Crawling Through URL Ordering", WWW 1998;
    Baeza-Yates et al., "Crawling a Country", WWW 2005: cumulative PageRank against
    pages fetched, omniscient order for reference; from memory). Gap closed is our ratio
    (ours - bfs) / (omniscient - bfs)."""
    hand = triangle_pagerank()
    v = page_values([A, B, C], TRIANGLE, spam={C})
    assert fetched_value([C, A, B], v, 1) == 0.0
    assert fetched_value([C, A, B], v, 2) == pytest.approx(hand[A], abs=1e-5)
    assert fetched_value([C, C, A], v, 3) == pytest.approx(hand[A], abs=1e-5)  # once each
    assert omniscient_value(v, [A, B, C], 1) == pytest.approx(hand[A], abs=1e-5)
    assert omniscient_value(v, [A, B, C], 2) == pytest.approx(hand[A] + hand[B], abs=1e-5)
    assert omniscient_value(v, [A, B, C], 3) == omniscient_value(v, [A, B, C], 2)
    bfs = fetched_value([B, C, A], v, 2)  # B then spam C
    best = omniscient_value(v, [A, B, C], 2)
    ours = fetched_value([A, C, B], v, 2)
    assert gap_closed(ours, bfs, best) == pytest.approx((hand[A] - hand[B]) / hand[A], abs=1e-4)
    assert gap_closed(0.6, 0.4, 0.8) == pytest.approx(0.5)
    assert gap_closed(0.3, 0.4, 0.8) == pytest.approx(-0.25)
    assert gap_closed(0.5, 0.5, 0.5) is None


def test_shares_counts_and_budgets_by_hand() -> None:
    order = ["s1", "h1", "s2", "h2", "h3"]
    spam = {"s1", "s2", "s3"}
    assert share_in(order, 2, spam) == 0.5
    assert share_in(order, 5, spam) == 0.4
    assert share_in(order, 50, spam) == 0.4  # a short order: share of what it fetched
    assert share_in([], 5, spam) == 0.0
    assert count_in(order, 3, spam) == 2
    assert first_position(order, {"h2"}) == 3 and first_position(order, {"x"}) is None
    assert budget_pages(0.2, 3144) == 629 and budget_pages(0.05, 10) == 1
    assert budget_pages(0.001, 10) == 1


# --- targets and medians --------------------------------------------------------------


def result(spam20: tuple[float, float], spam40: tuple[float, float], gap: float | None,
           cluster: tuple[int, int], cluster_pages: int = 10) -> dict[str, Any]:
    def b(s: tuple[float, float]) -> dict[str, Any]:
        share = {"sluice": s[0], "bfs": s[1], "random": 0.2}
        return {"farm_share": share, "spam_share": share, "gap_closed": gap}
    return {"budgets": {"20%": b(spam20), "40%": b(spam40)}, "cluster_pages": cluster_pages,
            "cluster_pages_in_first_40%": {"sluice": cluster[0], "bfs": cluster[1]}}


def test_targets_pass_and_fail_where_they_should() -> None:
    ok = bench.targets(result((0.06, 0.19), (0.1, 0.3), 0.5, (5, 5)))
    assert ok["pass"]
    assert not bench.targets(result((0.07, 0.19), (0.1, 0.3), 0.5, (5, 5)))["pass"]
    assert not bench.targets(result((0.06, 0.19), (0.11, 0.3), 0.5, (5, 5)))["pass"]
    assert not bench.targets(result((0.06, 0.19), (0.1, 0.3), 0.49, (5, 5)))["pass"]
    assert not bench.targets(result((0.06, 0.19), (0.1, 0.3), None, (5, 5)))["pass"]
    assert not bench.targets(result((0.06, 0.19), (0.1, 0.3), 0.5, (4, 5)))["pass"]
    far = bench.targets(result((0.0, 0.0), (0.0, 0.0), 0.6, (5, 5)))
    assert far["pass"]  # breadth-first never met the spam, and neither did sluice
    assert not bench.targets(result((0.001, 0.0), (0.0, 0.0), 0.6, (5, 5)))["pass"]
    no_cluster = bench.targets(result((0.0, 0.1), (0.0, 0.1), 0.6, (0, 9), cluster_pages=0))
    assert no_cluster["pass"] and "cluster_pages_40%_at_least_bfs" not in no_cluster
    demo = result((0.0, 0.1), (0.0, 0.1), 0.6, (0, 0), 0) | {"demo_budget": {"spam_share": 0.021}}
    assert not bench.targets(demo)["pass"]


def test_medians_over_seeds() -> None:
    rows = [result((0.1, 0.3), (0.2, 0.3), g, (c, 3)) | {"seed": s, "web": "w"}
            for s, g, c in ((1, 0.2, 9), (2, 0.9, 1), (3, None, 4))]
    for row in rows:
        row["targets"] = bench.targets(row)
    med = bench.medians(rows)
    assert med["budgets"]["20%"]["gap_closed"] == pytest.approx(0.55)  # None left out
    assert med["cluster_pages_in_first_40%"]["sluice"] == 4
    assert med["web"] == "w" and med["seed"] == "median of 1, 2, 3"
    assert med["targets_per_seed"] == {"1": False, "2": False, "3": False}


def test_overrides_reach_the_settings_and_bad_ones_are_refused() -> None:
    name, value = bench.parse_override("priority.jump_floor=1e-4")
    s = bench.bench_settings(adv.FARM_NEAR, "polite", {name: value})
    assert s.priority.jump_floor == 1e-4
    assert s.politeness.min_delay_s == DEMO_MIN_DELAY_S
    assert bench.bench_settings(adv.DEMO).budget.max_pages_per_host == 200
    assert bench.bench_settings(adv.FARM_NEAR, "instant").politeness.min_delay_s == 0.0
    with pytest.raises(ConfigError):
        bench.parse_override("jump_floor")
    with pytest.raises(ConfigError):
        bench.bench_settings(adv.FARM_NEAR, "polite", {"priority.no_such_setting": 1})


# --- the simulated crawl on a real Redis ----------------------------------------------


async def test_simulated_crawl_is_polite_and_fetches_each_page_once(
        redis_server: RedisServer, tmp_path: Path) -> None:
    """On a real redis-server: the seeds go first, no URL twice, only pages of the web,
    and no host fetched again sooner than the job's min delay (politeness.min_delay_s)."""
    lw = adv.generate(adv.DOORWAYS, 1)
    # without the new hosts' probation, which holds the farm behind the doorways back
    settings = bench.bench_settings(adv.DOORWAYS, overrides={"priority.probation_s": 0.0})
    limit = 600
    result = await crawl(lw.web, settings, limit, tmp_path, redis_url=redis_server.url)
    order = result.order
    assert len(order) == limit and len(set(order)) == limit
    assert set(order[: len(lw.web.seeds)]) == set(lw.web.seeds)
    assert set(order) <= lw.web.pages.keys()
    last: dict[str, float] = {}
    for url, at in zip(order, result.started):
        host = url_host(url)
        if host in last:
            assert at - last[host] >= settings.politeness.min_delay_s - 1e-9, url
        last[host] = at
    # a doorway fetched means its farm page was offered: redirects are followed
    fetched = set(order)
    followed = [lw.web.pages[u].location for u in order if lw.web.pages[u].location]
    assert followed and any(t in fetched for t in followed)


def test_bench_prints_one_object_per_web_and_seed_and_a_summary(
        capsys: pytest.CaptureFixture[str]) -> None:
    assert bench.main([adv.HONEST_CLUSTER], [1, 2], timing="instant") == 0
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert [x.get("seed") for x in lines[:3]] == [1, 2, "median of 1, 2"]
    for row in lines[:2]:
        assert set(row["budgets"]) == {"5%", "10%", "20%", "40%", "50%"}
        assert row["fetched"] == row["budgets"]["50%"]["pages"]
        for b in row["budgets"].values():
            v = b["value"]
            assert v["omniscient"] >= max(v["sluice"], v["bfs"], v["random"]) - 1e-9
        assert row["targets"]["pass"] in (True, False)
    assert lines[3]["summary"]["pass"] == {adv.HONEST_CLUSTER: lines[2]["targets"]["pass"]}


def test_unknown_web_is_refused_by_the_bench() -> None:
    with pytest.raises(ConfigError, match="no web named"):
        bench.main(["nope"])
