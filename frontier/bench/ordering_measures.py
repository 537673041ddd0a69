"""Scores of a crawl order against a web's ground truth.

* **Value** of a fetched set: the sum of the PageRank of its pages, spam pages counted
  as worth nothing. PageRank: Page, Brin, Motwani & Winograd, "The PageRank Citation
  Ranking" (1998), computed by ``networkx.pagerank`` with alpha 0.85 over the whole
  graph (spam pages included: they pass rank on; only their own value is set to 0).
* **Omniscient** value at a budget of k pages: the k most valuable pages (the best set
  any order could fetch). Scoring crawl orders by the PageRank they capture against
  budget is the measure of Cho, Garcia-Molina & Page, "Efficient Crawling Through URL
  Ordering" (WWW 1998) and of Baeza-Yates, Castillo, Marin & Rodriguez, "Crawling a
  Country: Better Strategies than Breadth-First for Web Page Ordering" (WWW 2005).
* **Gap closed**: (ours - breadth-first) / (omniscient - breadth-first).
* **Spam share**: spam pages among the first k fetches.
"""

from __future__ import annotations

import heapq
from collections.abc import Collection, Iterable, Sequence

import networkx as nx

PAGERANK_ALPHA = 0.85  # Page et al. 1998
PAGERANK_IMPL = ["networkx.pagerank"]  # which networkx function ran (reported)


def pagerank(graph: nx.DiGraph, alpha: float = PAGERANK_ALPHA) -> dict[str, float]:
    """``networkx.pagerank``; networkx's own pure-Python variant when SciPy is missing
    (networkx >= 3 needs SciPy for ``nx.pagerank``; both compute the same power iteration)."""
    try:
        return dict(nx.pagerank(graph, alpha=alpha))
    except ModuleNotFoundError:
        from networkx.algorithms.link_analysis.pagerank_alg import _pagerank_python

        PAGERANK_IMPL[0] = "networkx pure-Python pagerank (SciPy not installed)"
        return dict(_pagerank_python(graph, alpha=alpha))


def page_values(pages: Iterable[str], edges: Iterable[tuple[str, str]],
                spam: Collection[str], alpha: float = PAGERANK_ALPHA) -> dict[str, float]:
    """Each page's value: its PageRank over the whole graph, 0 for spam pages."""
    graph = nx.DiGraph()
    graph.add_nodes_from(pages)
    graph.add_edges_from(edges)
    return {u: 0.0 if u in spam else r for u, r in pagerank(graph, alpha).items()}


def budget_pages(share: float, reachable: int) -> int:
    """A budget given as a share of the reachable pages, in pages (at least one)."""
    return max(1, round(share * reachable))


def head(order: Sequence[str], k: int) -> Sequence[str]:
    """The first ``k`` fetches (all of them if the order is shorter)."""
    return order[:k]


def fetched_value(order: Sequence[str], value: dict[str, float], k: int) -> float:
    """Value of the pages among the first ``k`` fetches (each URL counted once)."""
    return sum(value.get(u, 0.0) for u in dict.fromkeys(head(order, k)))


def omniscient_value(value: dict[str, float], candidates: Iterable[str], k: int) -> float:
    """The most value any ``k`` of ``candidates`` hold: the best possible set at budget k."""
    return sum(heapq.nlargest(k, (value.get(u, 0.0) for u in candidates)))


def gap_closed(ours: float, bfs: float, best: float) -> float | None:
    """Share of the gap between breadth-first and omniscient that ``ours`` closes
    (negative: worse than breadth-first); None when there is no gap."""
    gap = best - bfs
    return (ours - bfs) / gap if gap > 0 else None


def count_in(order: Sequence[str], k: int, members: Collection[str]) -> int:
    """How many of the first ``k`` fetches are in ``members``."""
    return sum(1 for u in head(order, k) if u in members)


def share_in(order: Sequence[str], k: int, members: Collection[str]) -> float:
    """Share of the first ``k`` fetches that are in ``members`` (0 for an empty order)."""
    fetched = head(order, k)
    return count_in(order, k, members) / len(fetched) if fetched else 0.0


def first_position(order: Sequence[str], members: Collection[str]) -> int | None:
    """Index of the first fetch in ``members`` (None if there is none)."""
    return next((i for i, u in enumerate(order) if u in members), None)
