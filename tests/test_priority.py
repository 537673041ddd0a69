"""OPIC importance, trap penalties and earned host budgets.

References:
- OPIC: Abiteboul, Preda & Cobena, "Adaptive On-Line Page Importance Computation",
  WWW 2003 (cash, history, the virtual page; importance (H[i] + C[i]) / (G + 1)).
- PageRank as computed by networkx (``networkx.pagerank``), the reference here.
- Per-host budgets from the number of other hosts linking in: Lee, Leonard, Wang &
  Loguinov, "IRLbot: Scaling to 6 Billion Pages and Beyond", WWW 2008.
The store tests run on a real redis-server and a real 3-master Cluster (conftest).
"""

from __future__ import annotations

import random

import networkx as nx
import pytest

from frontier.admission import Admission
from frontier.model import Candidate, Completion, Outcome
from frontier.priority import (
    DATE_PATH,
    DATE_QUERY,
    PATH_DEPTH,
    REPEATED_SEGMENT,
    SESSION_QUERY,
    URL_LENGTH,
    OpicLedger,
    distribute,
    round_robin,
    split_cash,
    trap_factor,
    trap_signs,
)
from frontier.settings import PrioritySettings
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import StoreFactory

A, B, C = "http://a.test/", "http://b.test/", "http://c.test/"
TRIANGLE = {A: [B, C], B: [C], C: [A]}  # A->B, A->C, B->C, C->A
VISITS = 6000  # OPIC's error shrinks like 1 / visits (Abiteboul et al. 2003, section 4)
OPIC_TOLERANCE = 2e-3


def networkx_pagerank(graph: dict[str, list[str]], alpha: float) -> dict[str, float]:
    """networkx's PageRank (its pure-Python variant when SciPy is not installed)."""
    g = nx.DiGraph()
    g.add_nodes_from(graph)
    g.add_edges_from((s, d) for s, targets in graph.items() for d in targets)
    try:
        return dict(nx.pagerank(g, alpha=alpha, tol=1e-12, max_iter=100_000))
    except ModuleNotFoundError:
        from networkx.algorithms.link_analysis.pagerank_alg import _pagerank_python

        return dict(_pagerank_python(g, alpha=alpha, tol=1e-12, max_iter=100_000))


def no_traps(**kw: float) -> PrioritySettings:
    return PrioritySettings(**kw)


# -- OPIC converges to PageRank ----------------------------------------------------------


@pytest.mark.parametrize("schedule", ["greedy", "round_robin"])
def test_opic_without_damping_converges_to_the_stationary_distribution(schedule: str) -> None:
    ledger = OpicLedger(TRIANGLE, no_traps(jump_share=0.0))
    ledger.run(VISITS, None if schedule == "greedy" else round_robin)
    got = ledger.importance()
    # Stationary distribution of the walk A->{B,C}, B->C, C->A solved by hand:
    # pi_A = pi_C, pi_B = pi_A / 2, pi_C = pi_A / 2 + pi_B  =>  (0.4, 0.2, 0.4).
    expected = {A: 0.4, B: 0.2, C: 0.4}
    # and networkx agrees with alpha -> 1 (no damping)
    nx_rank = networkx_pagerank(TRIANGLE, alpha=0.999999)
    for page, value in expected.items():
        assert nx_rank[page] == pytest.approx(value, abs=1e-5)
        assert got[page] == pytest.approx(value, abs=OPIC_TOLERANCE)


@pytest.mark.parametrize("schedule", ["greedy", "round_robin"])
def test_opic_with_jump_share_converges_to_pagerank_alpha_085(schedule: str) -> None:
    ledger = OpicLedger(TRIANGLE, no_traps(jump_share=0.15))
    ledger.run(VISITS, None if schedule == "greedy" else round_robin)
    got = ledger.importance()
    # networkx 3.6 pagerank(alpha=0.85) on this graph: A 0.387790, B 0.214811, C 0.397400
    literal = {A: 0.387790, B: 0.214811, C: 0.397400}
    nx_rank = networkx_pagerank(TRIANGLE, alpha=0.85)
    for page, value in literal.items():
        assert nx_rank[page] == pytest.approx(value, abs=1e-5)
        assert got[page] == pytest.approx(nx_rank[page], abs=OPIC_TOLERANCE)


def test_opic_dangling_pages_feed_the_jump_pool_like_networkx() -> None:
    # networkx spreads a dangling node's rank uniformly (dangling=None), which is what
    # the virtual page does with the cash a dangling page hands to the pool.
    graph = {A: [B, C], B: [], C: [A, B], "http://d.test/": [A]}
    ledger = OpicLedger(graph, no_traps(jump_share=0.15))
    ledger.run(4 * VISITS, round_robin)
    got = ledger.importance()
    nx_rank = networkx_pagerank(graph, alpha=0.85)
    for page in graph:
        assert got[page] == pytest.approx(nx_rank[page], abs=OPIC_TOLERANCE)


def test_opic_on_a_random_graph_tracks_networkx() -> None:
    rng = random.Random(5)
    pages = [f"http://h{i}.test/" for i in range(12)]
    graph = {p: rng.sample([q for q in pages if q != p], rng.randint(1, 4)) for p in pages}
    ledger = OpicLedger(graph, no_traps(jump_share=0.15))
    ledger.run(20 * VISITS)
    got = ledger.importance()
    nx_rank = networkx_pagerank(graph, alpha=0.85)
    for page in pages:
        assert got[page] == pytest.approx(nx_rank[page], abs=OPIC_TOLERANCE)


def test_cash_is_never_created_by_a_split() -> None:
    # OPIC keeps the total cash constant (Abiteboul et al. 2003, section 3): a page hands
    # on at most its own cash; here (1 - jump_share) of it, less any trap penalty.
    s = no_traps(jump_share=0.15)
    rng = random.Random(9)
    for _ in range(200):
        links = [f"http://h{rng.randrange(5)}.test/{rng.randrange(50)}" for _ in range(rng.randrange(1, 40))]
        shares = split_cash("http://h0.test/src", 2.5, links, s)
        assert sum(shares.values()) <= 0.85 * 2.5 + 1e-12
        assert len(shares) == len(set(links) - {"http://h0.test/src"})


# -- link weights and trap penalties -------------------------------------------------------


def test_cross_host_links_outweigh_same_host_links() -> None:
    # cross_host_weight: a link to another host counts this much more (common practice,
    # no source: links within a site are mostly navigation)
    s = no_traps(jump_share=0.15, cross_host_weight=4.0, jump_floor=0.0)
    found = distribute("http://a.test/p", 1.0, 2,
                       [("http://a.test/x", "x"), ("http://b.test/y", "y"), ("http://a.test/x", "again")], s)
    by_url = {c.url: c for c in found}
    assert set(by_url) == {"http://a.test/x", "http://b.test/y"}  # duplicates count once
    assert by_url["http://b.test/y"].credit == pytest.approx(4 * by_url["http://a.test/x"].credit)
    assert sum(c.credit for c in found) == pytest.approx(0.85)  # 1 - jump_share
    assert all(c.depth == 3 and c.source_host == "a.test" for c in found)


def test_links_to_fetched_pages_take_their_share_but_make_no_candidate() -> None:
    # OPIC (Abiteboul et al. 2003): a page's cash is split over all its out-links; the
    # share of a page that is not fetched again is lost, not given to the others.
    s = no_traps(jump_share=0.15, cross_host_weight=4.0, jump_floor=0.0)
    links = [("http://a.test/x", "x"), ("http://b.test/y", "y"), ("http://c.test/z", "z")]
    every = {c.url: c for c in distribute("http://a.test/p", 1.0, 2, links, s)}
    some = distribute("http://a.test/p", 1.0, 2, links, s, known={"http://b.test/y"})
    assert [c.url for c in some] == ["http://a.test/x", "http://c.test/z"]
    assert all(c == every[c.url] for c in some)  # the same shares as with nothing known
    assert sum(c.credit for c in some) == pytest.approx(0.85 * 5 / 9)  # b's 4/9 is lost


def test_dangling_page_hands_everything_to_the_pool() -> None:
    assert distribute("http://a.test/p", 1.0, 0, [], no_traps()) == []
    assert distribute("http://a.test/p", 1.0, 0, [("http://a.test/p", "self")], no_traps()) == []


def test_new_urls_start_with_the_jump_floor() -> None:
    s = no_traps(jump_floor=0.01)
    (c,) = distribute("http://a.test/", 1.0, 0, [("http://b.test/", "b")], s)
    assert c.cash == pytest.approx(c.credit + 0.01)


@pytest.mark.parametrize(("url", "sign"), [
    ("http://a.test/" + "/".join(f"d{i}" for i in range(9)), PATH_DEPTH),
    ("http://a.test/p?x=" + "y" * 200, URL_LENGTH),
    ("http://a.test/docs/api/docs/api/page", REPEATED_SEGMENT),
    ("http://a.test/shop?sessionid=4", SESSION_QUERY),
    ("http://a.test/shop?s=0123456789abcdef0123", SESSION_QUERY),
    ("http://a.test/cart;jsessionid=A1B2C3", SESSION_QUERY),
    ("http://a.test/events?date=2024-01-31", DATE_QUERY),
    ("http://a.test/events?when=20240131", DATE_QUERY),
    ("http://a.test/calendar/2024/01", DATE_PATH),
    ("http://a.test/archive/2024-01-31", DATE_PATH),
])
def test_trap_signs(url: str, sign: str) -> None:
    # trap shapes: common practice, no source (endless calendars, session ids in URLs,
    # relative-link loops repeating a path segment, ever deeper or longer URLs)
    s = no_traps(trap_depth=8, trap_length=200, trap_penalty=0.05)
    assert sign in trap_signs(url, s)
    (c,) = distribute("http://b.test/", 1.0, 0, [(url, "")], s.model_copy(update={"jump_floor": 0.0}))
    signs = len(trap_signs(url, s))
    assert c.credit == pytest.approx(0.85 * 0.05**signs)
    assert trap_factor(url, s) == pytest.approx(0.05**signs)


@pytest.mark.parametrize("url", [
    "http://a.test/",
    "http://a.test/p/12.html",
    "http://a.test/2024/01/a-post-about-things",  # a dated article is not a calendar page
    "http://a.test/search?q=kalo&page=2",
    "http://a.test/2024/01/01/post",  # numbers may repeat
])
def test_ordinary_urls_have_no_trap_sign(url: str) -> None:
    assert trap_signs(url, no_traps()) == []
    assert trap_factor(url, no_traps()) == 1.0


# -- the frontier follows the cash ------------------------------------------------------------


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


async def test_lease_order_follows_opic_cash(make_store: StoreFactory) -> None:
    # OPIC crawls the page with the most cash first (Abiteboul et al. 2003, section 3)
    store = make_store(store={"partitions": 1},
                       politeness={"min_delay_s": 0.0, "response_time_factor": 0.0},
                       # b.test's trust from the seed's host (0.85 / 20) is above this
                       # threshold: no link-spam priority factor, cash alone orders the leases
                       priority={"jump_floor": 0.0, "cross_host_weight": 4.0,
                                 "trust_threshold": 0.04})
    adm = admission(store)
    prio = store.settings.priority
    await adm.admit([Candidate("http://a.test/", depth=0, cash=prio.seed_cash)])
    (seed,) = await store.lease(1)
    found = distribute(seed.url, seed.cash, seed.depth,
                       [("http://a.test/x", ""), ("http://a.test/y", ""), ("http://b.test/z", "")], prio)
    await adm.admit(found)
    await store.complete(Completion(seed, Outcome.FETCHED))
    expected = {c.url: c.cash for c in found}
    # a second page links to y: y gains credit while it waits and overtakes x
    more = distribute("http://c.test/", 1.0, 0, [("http://a.test/y", "")], prio)
    await adm.admit(more)
    expected["http://a.test/y"] += more[0].credit
    order = []
    for _ in range(3):
        (lease,) = await store.lease(1)
        order.append(lease.url)
        assert lease.cash == pytest.approx(expected[lease.url], abs=2e-6)  # micro-unit scores
        await store.complete(Completion(lease, Outcome.FETCHED))
    assert order == sorted(expected, key=lambda u: -expected[u])
    assert order == ["http://a.test/y", "http://b.test/z", "http://a.test/x"]


# -- earned host budgets -------------------------------------------------------------------------


def candidates(host: str, n: int, source: str | None, depth: int = 1) -> list[Candidate]:
    return [Candidate(f"http://{host}/{i}", depth=depth, source_host=source) for i in range(n)]


async def test_host_budget_grows_with_distinct_linking_hosts(make_store: StoreFactory) -> None:
    # IRLbot (Lee et al. 2008): a host's budget grows with its in-degree from other hosts
    store = make_store(budget={"max_pages_per_host": None},
                       priority={"host_budget_base": 2, "host_budget_per_linking_host": 3})
    adm = admission(store)
    res = await adm.admit(candidates("t.test", 12, "t.test"))  # links within the host
    assert (res.new, res.excluded) == (2, 10)
    counts = await store.counts()
    assert counts.reasons["excluded:host_link_budget"] == 10 and counts.balanced
    res = await adm.admit(candidates("t.test", 12, "x.test"))  # one other host: 2 + 3
    assert res.new == 3  # refused URLs were not remembered: offered again, admitted now
    res = await adm.admit(candidates("t.test", 12, "x.test"))  # the same host again: no growth
    assert res.new == 0
    res = await adm.admit(candidates("t.test", 6, "y.test") + candidates("t.test", 12, "z.test"))
    assert res.new == 6  # 2 + 3 x 3 linking hosts = 11 in all
    info = await store.host_info("t.test")
    assert int(info["admitted"]) == 11 and info["queued"] == 11
    counts = await store.counts()
    assert counts.balanced


async def test_a_link_to_a_fetched_page_still_counts_its_linking_host(
        make_store: StoreFactory) -> None:
    # A worker offers a link to a page it already fetched as a link between hosts only:
    # the URL is not looked up again, but the target host gains the linking host (IRLbot,
    # Lee et al. 2008: the budget counts distinct hosts linking in, whatever the page).
    store = make_store(budget={"max_pages_per_host": None},
                       priority={"host_budget_base": 2, "host_budget_per_linking_host": 3})
    adm = admission(store)
    res = await adm.admit(candidates("t.test", 6, "t.test"))
    assert (res.new, res.excluded) == (2, 4)
    res = await adm.admit([], linked=[("x.test", "http://t.test/0")])  # t.test/0 was fetched
    assert (res.new, res.credited, res.excluded, res.duplicates) == (0, 0, 0, 0)
    counts = await store.counts()
    assert counts.queued == 2 and counts.balanced  # nothing queued, nothing counted
    res = await adm.admit(candidates("t.test", 6, "t.test"))  # within the host: no growth
    assert res.new == 3  # 2 + 3 x 1 linking host: x.test counted
    res = await adm.admit([], linked=[("t.test", "http://t.test/1")])  # within the host
    res = await adm.admit(candidates("t.test", 9, "t.test"))
    assert res.new == 0  # still 5: a host does not link itself up


async def test_absolute_budget_caps_the_earned_one(make_store: StoreFactory) -> None:
    store = make_store(budget={"max_pages_per_host": 4},
                       priority={"host_budget_base": 2, "host_budget_per_linking_host": 3})
    adm = admission(store)
    res = await adm.admit(candidates("t.test", 10, "x.test"))  # earned 5, absolute 4
    assert (res.new, res.excluded) == (4, 6)
    res = await adm.admit(candidates("t.test", 10, "y.test"))
    assert res.new == 0 and res.duplicates == 10  # beyond the absolute cap: remembered, final
    counts = await store.counts()
    assert counts.reasons["excluded:host_budget"] == 6 and counts.balanced


async def test_seed_hosts_have_only_the_absolute_budget(make_store: StoreFactory) -> None:
    # the operator vouches for a seed's host: a crawl of one site must not stop at the
    # earned budget (common practice, no source). A host reached by a redirect from a seed
    # is one depth further and earns its budget like any other host.
    store = make_store(budget={"max_pages_per_host": 8},
                       priority={"host_budget_base": 2, "host_budget_per_linking_host": 3})
    adm = admission(store)
    res = await adm.admit(candidates("s.test", 1, None, depth=0)
                          + [Candidate("http://www.s.test/", depth=1, source_host="s.test",
                                       hops=1)])
    assert res.new == 2
    res = await adm.admit(candidates("s.test", 12, "s.test") + candidates("www.s.test", 12, "s.test"))
    # s.test/0 is the seed itself; 7 more fit on it under the absolute cap of 8; www.s.test
    # earned 2 + 3 x 1 linking host = 5, the redirect target already holds one of them
    assert (res.new, res.excluded, res.duplicates) == (7 + 4, 4 + 8, 1)
    counts = await store.counts()
    assert counts.reasons["excluded:host_budget"] == 4
    assert counts.reasons["excluded:host_link_budget"] == 8 and counts.balanced


async def test_link_farm_budget_is_bounded_by_its_own_size(make_store: StoreFactory) -> None:
    # A farm of k hosts all linking to each other earns each host k - 1 linking hosts, no
    # more: many pages or many links from one host count once. The farm's budget grows
    # only with the number of hosts it runs (the cost IRLbot relies on).
    base, per, k = 2, 3, 5
    store = make_store(budget={"max_pages_per_host": None},
                       priority={"host_budget_base": base, "host_budget_per_linking_host": per})
    adm = admission(store)
    farm = [f"farm-{i}.test" for i in range(k)]
    offered = []
    for src in farm:
        for page in range(10):  # every farm page links to 30 pages of every other farm host
            for dst in farm:
                if dst != src:
                    offered += [Candidate(f"http://{dst}/{page}-{j}", depth=2, source_host=src)
                                for j in range(30)]
    await adm.admit(offered)
    for host in farm:
        info = await store.host_info(host)
        assert int(info["admitted"]) == base + per * (k - 1)
