"""``sluice bench ordering``: does sluice fetch important pages first?

Three synthetic webs (``workers.synthweb``): a plain one, one with a link farm, one with
an endless calendar. On each, the real frontier (FrontierStore on a private redis-server,
real admit / lease / complete scripts) crawls with simulated fetches: a leased URL's
out-links come from the web's graph, :func:`frontier.priority.distribute` prices them,
admission admits them. The job's defaults hold (16 partitions, leases taken 32 at a time,
one per host, priority settings) except: politeness delays are 0, the clock is injected,
and links to any host are followed.

Importance is PageRank (Page, Brin, Motwani & Winograd 1998) computed by networkx
(``networkx.pagerank``, alpha 0.85) on the static graph; farm pages are worth nothing (their
PageRank is manufactured). For each budget (a share of the reachable pages) the bench
reports the PageRank mass captured by sluice's fetch order, breadth-first order (FIFO
from the seeds), a random order and the omniscient order (highest true PageRank first),
and value = (sluice - bfs) / (omniscient - bfs). Prints JSON; draws a PNG.
"""

from __future__ import annotations

import asyncio
import json
import random
import tempfile
import time
from collections import deque
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import networkx as nx

from frontier.admission import Admission
from frontier.embedded import RedisProcess
from frontier.model import Candidate, Completion, Outcome
from frontier.priority import distribute
from frontier.redis_client import connect
from frontier.settings import JobSettings
from frontier.store import FrontierStore, redis_tuning
from frontier.urls import Scope, host_of
from workers.synthweb.graph import SyntheticWeb, WebSpec

BUDGETS = (0.05, 0.10, 0.20, 0.50)  # shares of the reachable pages
VALUE_GOAL = 0.5  # at the budgets below
VALUE_GOAL_BUDGETS = (0.05, 0.10, 0.20)
FARM_GOAL = 1 / 3  # sluice's farm share at most this times breadth-first's
TRAP_GOAL = 0.01  # trap pages at most this share of fetched pages
PAGERANK_ALPHA = 0.85  # Page et al. 1998
FETCH_CAP = 3  # stop after this many times the static page count (a trap guard)
PLOT_POINTS = 100
ORDERS = ("sluice", "bfs", "random", "omniscient")
DEFAULT_PLOT = Path("docs/ordering.png")
PAGERANK_IMPL = ["pagerank"]  # which networkx function ran (reported)


class Clock:
    """The injected clock: moves one millisecond per lease round."""

    def __init__(self) -> None:
        self.t = 1_000_000.0

    def __call__(self) -> float:
        return self.t


def webs(pages: int, hosts: int, seed: int) -> dict[str, WebSpec]:
    """The three webs: plain, with the link farm, with the endless calendar."""
    common: dict[str, Any] = dict(seed=seed, pages=pages, hosts=hosts, bad_inputs=False,
                                  ssrf_bait=False)
    return {
        "plain": WebSpec(**common, farm=False, trap=False),
        "farm": WebSpec(**common, farm=True, trap=False),
        "trap": WebSpec(**common, farm=False, trap=True),
    }


def out_links(web: SyntheticWeb, url: str) -> tuple[list[str], str | None]:
    """(links, redirect target) of a page; endless pages are generated on demand."""
    page = web.resolve(url)
    if page is None:
        return [], None
    return [link.url for link in page.links], page.location


def reference_pagerank(graph: nx.DiGraph, alpha: float = PAGERANK_ALPHA) -> dict[str, float]:
    """networkx's PageRank; its pure-Python variant if SciPy is not installed."""
    try:
        return dict(nx.pagerank(graph, alpha=alpha))
    except ModuleNotFoundError:  # networkx >= 3 needs SciPy for nx.pagerank
        from networkx.algorithms.link_analysis.pagerank_alg import _pagerank_python

        PAGERANK_IMPL[0] = "pure-Python pagerank (SciPy not installed)"
        return dict(_pagerank_python(graph, alpha=alpha))


def bfs_order(web: SyntheticWeb) -> list[str]:
    """Breadth-first (FIFO) fetch order from the seeds over the static graph."""
    seen = set(web.seeds)
    queue = deque(web.seeds)
    order = []
    while queue:
        url = queue.popleft()
        order.append(url)
        links, location = out_links(web, url)
        for dst in [*links, *([location] if location else [])]:
            if dst not in seen and dst in web.pages:
                seen.add(dst)
                queue.append(dst)
    return order


async def sluice_order(
    web: SyntheticWeb, settings: JobSettings, tmp: Path
) -> tuple[list[str], dict[str, int]]:
    """The order in which the real frontier fetches the web, and its exclusion reasons."""
    server = RedisProcess(tmp / "redis", appendonly=False, extra_config=redis_tuning(settings))
    server.start()
    client = connect(server.url)
    clock = Clock()
    try:
        store = FrontierStore(client, settings, clock=clock)
        admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
        prio = settings.priority
        await admission.admit([Candidate(u, depth=0, cash=prio.seed_cash) for u in web.seeds])
        order: list[str] = []
        cap = FETCH_CAP * len(web.pages)
        while len(order) < cap:
            leases = await store.lease(settings.lease.batch)
            if not leases:
                break
            found: list[Candidate] = []
            for lease in leases:
                order.append(lease.url)
                links, location = out_links(web, lease.url)
                if location is not None:  # a redirect hands on all its cash, as the worker does
                    found.append(Candidate(location, depth=lease.depth + 1, cash=lease.cash,
                                           credit=lease.cash, source_host=lease.host,
                                           hops=lease.hops + 1))
                found += distribute(lease.url, lease.cash, lease.depth,
                                    [(u, "") for u in links], prio)
            await admission.admit(found)
            await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases])
            clock.t += 0.001
        counts = await store.counts()
        return order, counts.reasons
    finally:
        await client.aclose()
        server.stop()


def cumulative(order: Iterable[str], value: dict[str, float], total: float) -> list[float]:
    """Share of the total value captured after 0, 1, 2, ... fetches."""
    out, got = [0.0], 0.0
    for url in order:
        got += value.get(url, 0.0)
        out.append(got / total)
    return out


def captured(curve: list[float], k: int) -> float:
    return curve[min(k, len(curve) - 1)]


def share(order: list[str], k: int, test: Any) -> float:
    head = order[:k]
    return sum(1 for u in head if test(u)) / max(1, len(head))


def first_at(order: list[str], test: Any, reachable: int) -> float | None:
    """Where (as a share of the reachable pages) the first page passing ``test`` is fetched."""
    for i, url in enumerate(order):
        if test(url):
            return round(i / reachable, 4)
    return None


def evaluate(web: SyntheticWeb, sluice: list[str], seed: int) -> dict[str, Any]:
    """Mass captured per budget and order, value, farm and trap shares."""
    graph = nx.DiGraph()
    graph.add_nodes_from(web.pages)
    graph.add_edges_from(web.edges())
    rank = reference_pagerank(graph)
    farm = web.farm_hosts
    value = {u: (0.0 if host_of(u) in farm else r) for u, r in rank.items()}
    reachable = bfs_order(web)  # also the breadth-first order
    total = sum(value[u] for u in reachable)
    rng = random.Random(seed)
    shuffled = list(reachable)
    rng.shuffle(shuffled)
    orders = {
        "sluice": sluice,
        "bfs": reachable,
        "random": shuffled,
        "omniscient": sorted(reachable, key=lambda u: -value[u]),
    }

    def is_farm(url: str) -> bool:
        return host_of(url) in farm

    sums = {name: cumulative(o, value, total) for name, o in orders.items()}
    budgets: dict[str, Any] = {}
    for b in BUDGETS:
        k = max(1, round(b * len(reachable)))
        mass = {name: round(captured(sums[name], k), 4) for name in orders}
        gap = mass["omniscient"] - mass["bfs"]
        budgets[f"{round(b * 100)}%"] = {
            "pages": k,
            "mass": mass,
            "value": round((mass["sluice"] - mass["bfs"]) / gap, 3) if gap > 0 else None,
            "farm_share": {"sluice": round(share(sluice, k, is_farm), 4),
                           "bfs": round(share(reachable, k, is_farm), 4),
                           "random": round(share(shuffled, k, is_farm), 4)},
            "farm_pages_fetched": {"sluice": sum(1 for u in sluice[:k] if is_farm(u)),
                                   "bfs": sum(1 for u in reachable[:k] if is_farm(u))},
            "trap_share": {"sluice": round(share(sluice, k, web.is_trap), 4),
                           "bfs": round(share(reachable, k, web.is_trap), 4)},
        }
    curves = {name: [captured(sums[name], round(i / PLOT_POINTS * len(reachable)))
                     for i in range(1, PLOT_POINTS + 1)] for name in orders}
    return {
        "pages": len(web.pages),
        "reachable": len(reachable),
        "farm_pages": sum(1 for u in web.pages if is_farm(u)),
        "farm_pagerank_mass": round(sum(r for u, r in rank.items() if is_farm(u)), 4),
        "fetched": len(sluice),
        "reachable_fetched": len(set(sluice) & set(reachable)),
        "trap_share_all_fetched": round(share(sluice, len(sluice), web.is_trap), 4),
        "farm_share_all_fetched": round(share(sluice, len(sluice), is_farm), 4),
        "first_farm_fetch_at": {name: first_at(o, is_farm, len(reachable))
                                for name, o in orders.items() if farm},
        "budgets": budgets,
        "_curves": curves,
    }


def goals(results: dict[str, Any]) -> dict[str, bool]:
    value_ok = farm_ok = trap_ok = True
    for res in results.values():
        for name, b in res["budgets"].items():
            if float(name.rstrip("%")) / 100 in VALUE_GOAL_BUDGETS:
                value_ok &= b["value"] is not None and b["value"] >= VALUE_GOAL
            if res["farm_pages"]:
                farm_ok &= b["farm_share"]["sluice"] <= FARM_GOAL * b["farm_share"]["bfs"]
        trap_ok &= res["trap_share_all_fetched"] <= TRAP_GOAL
    return {
        "value_at_least_0.5_at_5_10_20_percent": value_ok,
        "farm_share_at_most_a_third_of_bfs_at_every_budget": farm_ok,
        "trap_share_of_fetched_at_most_1_percent": trap_ok,
    }


def plot(results: dict[str, Any], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(results), figsize=(5 * len(results), 4), sharey=True)
    xs = [i / PLOT_POINTS * 100 for i in range(1, PLOT_POINTS + 1)]
    for ax, (name, res) in zip(axes, results.items()):
        for order in ORDERS:
            ax.plot(xs, res["_curves"][order], label=order)
        for b in BUDGETS:
            ax.axvline(b * 100, color="0.85", linewidth=0.8, zorder=0)
        ax.set_title(f"{name} web ({res['reachable']} reachable pages)")
        ax.set_xlabel("pages fetched (% of reachable)")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("PageRank mass captured (farm pages count 0)")
    axes[0].legend(loc="lower right")
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def bench_settings(pages: int, priority: dict[str, Any] | None = None) -> JobSettings:
    return JobSettings.model_validate({
        "priority": priority or {},
        "name": "ordering",
        "scope": {"allow_all_hosts": True},
        # the Cluster default, as when the figures in docs/priority.md were measured (one
        # server's default, 4, orders within 0.01 of it: docs/priority.md)
        "store": {"expected_urls": max(1000, 4 * pages), "partitions": 16},
        "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
        "lease": {"ttl_s": 3600.0},
    })


async def run(pages: int, hosts: int, seed: int, tmp: Path,
              priority: dict[str, Any] | None = None, only: Iterable[str] | None = None,
              ) -> dict[str, Any]:
    settings = bench_settings(pages, priority)
    results: dict[str, Any] = {}
    for name, spec in webs(pages, hosts, seed).items():
        if only is not None and name not in only:
            continue
        t0 = time.perf_counter()
        web = SyntheticWeb.generate(spec)
        t1 = time.perf_counter()
        order, reasons = await sluice_order(web, settings, tmp / name)
        t2 = time.perf_counter()
        res = evaluate(web, order, seed)
        res["excluded"] = reasons
        res["seconds"] = {"generate": round(t1 - t0, 1), "crawl": round(t2 - t1, 1),
                          "evaluate": round(time.perf_counter() - t2, 1)}
        results[name] = res
    return results


def main(pages: int = 20000, hosts: int = 200, seed: int = 11, out: Path | None = None) -> int:
    """Run the bench, print JSON, write the plot (default docs/ordering.png)."""
    start = time.perf_counter()
    settings = bench_settings(pages)
    with tempfile.TemporaryDirectory(prefix="sluice-ordering-") as tmp:
        results = asyncio.run(run(pages, hosts, seed, Path(tmp)))
    target = out or DEFAULT_PLOT
    plot(results, target)
    report = {
        "pages": pages, "hosts": hosts, "seed": seed,
        "lease_batch": settings.lease.batch, "partitions": settings.store.partitions,
        "pagerank": f"networkx {nx.__version__} {PAGERANK_IMPL[0]}, alpha {PAGERANK_ALPHA}",
        "priority": settings.priority.model_dump(),
        "webs": {name: {k: v for k, v in res.items() if not k.startswith("_")}
                 for name, res in results.items()},
        "goals": goals(results),
        "plot": str(target),
        "seconds": round(time.perf_counter() - start, 1),
    }
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
