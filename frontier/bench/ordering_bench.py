"""``sluice bench ordering``: does sluice fetch valuable pages first and spam last?

The webs are the adversarial family of ``synthweb.adversarial`` (link farms near
and far from the seeds, a farm of many subdomains, a link-exchange ring, doorways that
redirect into a farm, an honest dense cluster, and the web ``sluice demo`` crawls). On
each, the real frontier crawls with simulated fetches and clock
(``frontier.bench.ordering_crawl``): the store, admission, priority and politeness rules
of a job with ``sluice demo``'s settings (``--timing instant``: politeness delays 0).

The order is scored (``frontier.bench.ordering_measures``) against breadth-first (FIFO
from the seeds over the static graph, links in page order: the webs place their spam
entry links on the seeds and next to them where they say "near", so breadth-first meets
the spam early there), a random order, and the omniscient order, at budgets of 5, 10, 20,
40 and 50 % of the reachable pages: spam share of the fetches, value captured (PageRank,
networkx, alpha 0.85, spam worth 0), gap closed, and the honest cluster's pages in the
first 40 %. Targets a spam defence must meet (``targets``) are checked per web and on
the medians over the seeds. ``demo-live`` runs the real ``sluice demo`` (real worker,
real loopback HTTP) and counts its farm pages.

Prints JSON lines: one object per web and seed, one with the medians per web when
several seeds ran, and a summary. A table goes to stderr.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import random
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from frontier.bench.ordering_crawl import CrawlResult, Timing, crawl
from frontier.bench.ordering_measures import (
    PAGERANK_ALPHA,
    PAGERANK_IMPL,
    budget_pages,
    count_in,
    fetched_value,
    first_position,
    gap_closed,
    omniscient_value,
    page_values,
    share_in,
)
from frontier.demo import DEMO_MIN_DELAY_S, DEMO_USER_AGENT
from frontier.exceptions import ConfigError
from frontier.priority import url_host
from frontier.settings import JobSettings
from synthweb.adversarial import DEMO, FAMILY, LabelledWeb, breadth_first, generate

DEMO_LIVE = "demo-live"
WEBS: tuple[str, ...] = (*FAMILY, DEMO_LIVE)
DEFAULT_SEEDS = (1, 2, 3)
BUDGETS = (0.05, 0.10, 0.20, 0.40, 0.50)  # shares of the reachable pages
ORDERS = ("sluice", "bfs", "random")
# targets a spam defence must meet
SPAM_BUDGETS = (0.20, 0.40)  # at these budgets ...
SPAM_FACTOR = 1 / 3  # ... sluice's spam share at most this times breadth-first's
GAP_BUDGET = 0.20
GAP_GOAL = 0.5  # gap closed at GAP_BUDGET at least this
CLUSTER_BUDGET = 0.40  # the honest cluster's pages in this first share: at least bfs's
DEMO_BUDGET = 2000  # `sluice demo`'s page budget (its --max-pages default)
DEMO_SPAM_GOAL = 0.02  # farm pages at most this share of the demo's fetched pages
# `sluice demo`'s job (frontier/demo.py): politeness, fetch slots, lease time, budgets
DEMO_CONCURRENCY = 64
DEMO_RETRY_BACKOFF_S = 2.0
DEMO_LEASE_TTL_S = 30.0
DEMO_MAX_PAGES_PER_HOST = 200
DEMO_SPEC_ARGS = ("--hosts", "60", "--pages", "3000", "--max-pages", str(DEMO_BUDGET))
TIMINGS = ("polite", "instant")
PLOT_POINTS = 50
DEFAULT_PLOT = Path("docs/ordering.png")


# --- settings ------------------------------------------------------------------------


def bench_settings(web: str, timing: str = "polite",
                   overrides: dict[str, Any] | None = None) -> JobSettings:
    """``sluice demo``'s job settings (its page budget and host cap on the demo web only);
    ``instant`` timing sets politeness delays to 0 and leases a batch at a time."""
    raw: dict[str, Any] = {
        "name": "ordering",
        "scope": {"allow_hosts": ["*.test"]},
        "politeness": {"min_delay_s": DEMO_MIN_DELAY_S, "retry_backoff_s": DEMO_RETRY_BACKOFF_S},
        "fetch": {"user_agent": DEMO_USER_AGENT, "concurrency": DEMO_CONCURRENCY},
        "lease": {"ttl_s": DEMO_LEASE_TTL_S},
    }
    if web == DEMO:
        raw["budget"] = {"max_pages": DEMO_BUDGET, "max_pages_per_host": DEMO_MAX_PAGES_PER_HOST}
    if timing == "instant":
        raw["politeness"].update(min_delay_s=0.0, response_time_factor=0.0)
        raw["fetch"]["concurrency"] = JobSettings().lease.batch
    for dotted, value in (overrides or {}).items():
        *path, last = dotted.split(".")
        node = raw
        for part in path:
            node = node.setdefault(part, {})
        node[last] = value
    try:
        return JobSettings.model_validate(raw)
    except ValidationError as exc:
        raise ConfigError(f"--set: {exc}") from None


def parse_override(text: str) -> tuple[str, Any]:
    """``section.name=value`` (value read as JSON, else as a string)."""
    name, sep, value = text.partition("=")
    if not sep or "." not in name:
        raise ConfigError(f"--set {text!r}: expected section.name=value")
    try:
        return name.strip(), json.loads(value)
    except json.JSONDecodeError:
        return name.strip(), value


# --- scoring -------------------------------------------------------------------------


def score(lw: LabelledWeb, order: Sequence[str], seed: int) -> dict[str, Any]:
    """Spam share, value, gap closed and cluster pages of ``order`` against the baselines."""
    web = lw.web
    bfs = [u for u, _ in breadth_first(web.pages, web.seeds)]
    reachable = len(bfs)
    value = page_values(web.pages, web.edges(), lw.spam)
    total = sum(value[u] for u in bfs)
    shuffled = list(bfs)
    random.Random(seed).shuffle(shuffled)
    orders = {"sluice": order, "bfs": bfs, "random": shuffled}
    budgets: dict[str, Any] = {}
    for b in BUDGETS:
        k = budget_pages(b, reachable)
        mass = {n: fetched_value(o, value, k) / total for n, o in orders.items()}
        mass["omniscient"] = omniscient_value(value, bfs, k) / total
        budgets[label(b)] = {
            "pages": k,
            "farm_share": {n: round(share_in(o, k, lw.farm), 4) for n, o in orders.items()},
            "spam_share": {n: round(share_in(o, k, lw.spam), 4) for n, o in orders.items()},
            "value": {n: round(v, 4) for n, v in mass.items()},
            "gap_closed": _round(gap_closed(mass["sluice"], mass["bfs"], mass["omniscient"]), 3),
        }
    k = budget_pages(CLUSTER_BUDGET, reachable)
    best = sorted(bfs, key=lambda u: -value[u])
    out: dict[str, Any] = {
        "web": lw.name, "seed": lw.seed, "pages": len(web.pages), "reachable": reachable,
        "spam_pages": len(lw.spam), "farm_pages": len(lw.farm), "cluster_pages": len(lw.cluster),
        "spam_entry_links": len(lw.entries), "entry_placement": lw.placement or None,
        "fetched": len(order),
        "budgets": budgets,
        f"cluster_pages_in_first_{label(CLUSTER_BUDGET)}": {
            **{n: count_in(o, k, lw.cluster) for n, o in orders.items()},
            "omniscient": count_in(best, k, lw.cluster),
        },
        "first_spam_fetch_at": {
            n: _round(p / reachable if (p := first_position(o, lw.spam)) is not None else None, 4)
            for n, o in orders.items()},
    }
    if lw.name == DEMO:
        head = order[:DEMO_BUDGET]
        out["demo_budget"] = {"pages": DEMO_BUDGET, "fetched": len(head),
                              "spam_pages": count_in(head, DEMO_BUDGET, lw.spam),
                              "spam_share": round(share_in(head, DEMO_BUDGET, lw.spam), 4),
                              "trap_pages": sum(1 for u in head if web.is_trap(u))}
    out["targets"] = targets(out)
    return out


def targets(res: dict[str, Any]) -> dict[str, Any]:
    """The targets a spam defence must meet, pass or fail, for one result (or medians)."""
    out: dict[str, Any] = {}
    for b in SPAM_BUDGETS:
        s = res["budgets"][label(b)]["farm_share"]
        out[f"farm_share_{label(b)}_at_most_third_of_bfs"] = (
            s["sluice"] is not None and s["bfs"] is not None
            and s["sluice"] <= SPAM_FACTOR * s["bfs"] + 1e-12)
    gap = res["budgets"][label(GAP_BUDGET)]["gap_closed"]
    out[f"gap_closed_{label(GAP_BUDGET)}_at_least_{GAP_GOAL}"] = gap is not None and gap >= GAP_GOAL
    if res["cluster_pages"]:
        c = res[f"cluster_pages_in_first_{label(CLUSTER_BUDGET)}"]
        out[f"cluster_pages_{label(CLUSTER_BUDGET)}_at_least_bfs"] = c["sluice"] >= c["bfs"]
    if "demo_budget" in res:
        out["demo_spam_share_at_most_2%"] = res["demo_budget"]["spam_share"] <= DEMO_SPAM_GOAL
    out["pass"] = all(out.values())
    return out


def label(share: float) -> str:
    return f"{round(share * 100)}%"


def _round(x: float | None, digits: int) -> float | None:
    return None if x is None else round(x, digits)


def median_tree(trees: list[Any]) -> Any:
    """Medians of matching numbers in a list of equally shaped JSON trees; other leaves
    are kept if all equal, else listed."""
    first = trees[0]
    if isinstance(first, dict):
        return {k: median_tree([t[k] for t in trees]) for k in first}
    if isinstance(first, bool) or not all(isinstance(t, (int, float)) or t is None for t in trees):
        return first if all(t == first for t in trees) else trees
    numbers = [t for t in trees if t is not None]
    if not numbers:
        return None
    m = statistics.median(numbers)
    return round(m, 4) if isinstance(m, float) else m


def medians(results: list[dict[str, Any]]) -> dict[str, Any]:
    """One web's results over seeds: medians, and the targets checked on them."""
    keep = [{k: v for k, v in r.items() if k not in ("targets", "seconds", "excluded", "seed")}
            for r in results]
    out: dict[str, Any] = median_tree(keep)
    out["seed"] = "median of " + ", ".join(str(r["seed"]) for r in results)
    out["targets"] = targets(out)
    out["targets_per_seed"] = {str(r["seed"]): r["targets"]["pass"] for r in results}
    return out


# --- running -------------------------------------------------------------------------


async def run_web(name: str, seed: int, tmp: Path, timing: str,
                  overrides: dict[str, Any]) -> tuple[dict[str, Any], LabelledWeb, CrawlResult]:
    """Generate, crawl and score one web."""
    t0 = time.perf_counter()
    lw = generate(name, seed)
    reachable = len(breadth_first(lw.web.pages, lw.web.seeds))
    limit = budget_pages(max(BUDGETS), reachable)
    if name == DEMO:
        limit = max(limit, DEMO_BUDGET)
    t1 = time.perf_counter()
    result = await crawl(lw.web, bench_settings(name, timing, overrides), limit,
                         tmp / f"{name}-{seed}", Timing())
    t2 = time.perf_counter()
    res = score(lw, result.order, seed)
    res["requests"] = result.requests
    res["simulated_crawl_s"] = result.seconds
    res["excluded"] = {k: v for k, v in result.reasons.items() if k.startswith("excluded")}
    res["seconds"] = {"generate": round(t1 - t0, 2), "crawl": round(t2 - t1, 2),
                      "score": round(time.perf_counter() - t2, 2)}
    return res, lw, result


def run_demo_live(tmp: Path) -> dict[str, Any]:
    """Run the real ``sluice demo`` (defaults) and count farm pages among its fetches."""
    lw = generate(DEMO, 0)
    out = tmp / "demo-live"
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "frontier.cli", "demo", "--out", str(out), "--quiet",
         *DEMO_SPEC_ARGS], capture_output=True, text=True, check=False)
    seconds = round(time.perf_counter() - t0, 1)
    if proc.returncode != 0:
        return {"web": DEMO_LIVE, "error": proc.stderr.strip()[-2000:], "seconds": seconds}
    fetched = []
    with (out / "fetches.jsonl").open(encoding="utf-8") as log:
        for line in log:
            row = json.loads(line)
            if row.get("outcome") == "fetched":
                fetched.append(row["url"])
    farm = sum(1 for u in fetched if url_host(u) in lw.web.farm_hosts)
    first = first_position(fetched, lw.spam)
    share = farm / len(fetched) if fetched else 0.0
    return {"web": DEMO_LIVE, "command": "sluice demo " + " ".join(DEMO_SPEC_ARGS),
            "pages_fetched": len(fetched), "farm_pages": farm, "farm_share": round(share, 4),
            "first_farm_fetch": first,
            "targets": {"demo_spam_share_at_most_2%": share <= DEMO_SPAM_GOAL,
                        "pass": share <= DEMO_SPAM_GOAL},
            "seconds": seconds}


def plot_xs() -> list[float]:
    """Budgets the plot shows, in % of the reachable pages, up to the largest budget."""
    return [i / PLOT_POINTS * max(BUDGETS) * 100 for i in range(1, PLOT_POINTS + 1)]


def curves(lw: LabelledWeb, order: Sequence[str]) -> dict[str, list[float]]:
    """Value captured and spam share against fetches, for the plot."""
    web = lw.web
    bfs = [u for u, _ in breadth_first(web.pages, web.seeds)]
    value = page_values(web.pages, web.edges(), lw.spam)
    total = sum(value[u] for u in bfs)
    ks = [budget_pages(x / 100, len(bfs)) for x in plot_xs()]
    return {
        "value_sluice": [fetched_value(order, value, k) / total for k in ks],
        "value_bfs": [fetched_value(bfs, value, k) / total for k in ks],
        "value_omniscient": [omniscient_value(value, bfs, k) / total for k in ks],
        "spam_sluice": [share_in(order, k, lw.spam) for k in ks],
        "spam_bfs": [share_in(bfs, k, lw.spam) for k in ks],
    }


def plot(panels: dict[str, dict[str, list[float]]], path: Path) -> None:
    """Value captured (top) and spam share (bottom) against pages fetched, per web."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(panels)
    fig, axes = plt.subplots(2, n, figsize=(3.2 * n, 6), sharex=True, squeeze=False)
    xs = plot_xs()
    for col, (name, c) in enumerate(panels.items()):
        top, bottom = axes[0][col], axes[1][col]
        for key, style in (("value_sluice", "-"), ("value_bfs", "--"), ("value_omniscient", ":")):
            top.plot(xs, c[key], style, label=key.split("_")[1])
        for key, style in (("spam_sluice", "-"), ("spam_bfs", "--")):
            bottom.plot(xs, c[key], style, label=key.split("_")[1])
        top.set_title(name, fontsize=9)
        bottom.set_xlabel("pages fetched (% of reachable)", fontsize=8)
        for ax in (top, bottom):
            ax.grid(alpha=0.3)
            for b in BUDGETS:
                ax.axvline(b * 100, color="0.85", linewidth=0.8, zorder=0)
    axes[0][0].set_ylabel("PageRank value captured (spam = 0)", fontsize=8)
    axes[1][0].set_ylabel("spam share of fetches so far", fontsize=8)
    axes[0][0].legend(loc="lower right", fontsize=7)
    axes[1][0].legend(loc="upper right", fontsize=7)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    plt.close(fig)


def table_row(res: dict[str, Any]) -> str:
    if "budgets" not in res:
        return (f"{res['web']:<15} {'live':>6}  farm {res.get('farm_pages')}/"
                f"{res.get('pages_fetched')} = {res.get('farm_share')}  "
                f"{'PASS' if res.get('targets', {}).get('pass') else 'FAIL'}")
    b20, b40 = res["budgets"]["20%"], res["budgets"]["40%"]
    c = res[f"cluster_pages_in_first_{label(CLUSTER_BUDGET)}"]
    demo = f" demo2000 {res['demo_budget']['spam_share']:.3f}" if "demo_budget" in res else ""
    gap = b20["gap_closed"]
    doors = ""  # spam with the doorways, where they differ from the farm
    if res.get("farm_pages") != res["spam_pages"]:
        doors = f" all-spam20 {b20['spam_share']['sluice']:.3f}/{b20['spam_share']['bfs']:.3f}"
    return (f"{res['web']:<15} {str(res['seed']).replace('median of ', 'med '):>6}  "
            f"farm20 {b20['farm_share']['sluice']:.3f}/{b20['farm_share']['bfs']:.3f}  "
            f"farm40 {b40['farm_share']['sluice']:.3f}/{b40['farm_share']['bfs']:.3f}  "
            f"gap20 {'-' if gap is None else f'{gap:.2f}'}  "
            f"cluster40 {c['sluice']}/{c['bfs']}{demo}{doors}  "
            f"{'PASS' if res['targets']['pass'] else 'FAIL'}")


def main(webs: Iterable[str] | None = None, seeds: Iterable[int] | None = None,
         timing: str = "polite", overrides: dict[str, Any] | None = None,
         plot_path: Path | None = None) -> int:
    """Run the bench on ``webs`` (default: all) and ``seeds`` (default 1, 2, 3); print JSON
    lines. The plot (value and spam share per web, first seed) is drawn when ``plot_path``
    is given, and to docs/ordering.png when every web runs."""
    names = list(webs or WEBS)
    unknown = [n for n in names if n not in WEBS]
    if unknown:
        raise ConfigError(f"--web: no web named {', '.join(unknown)}; "
                          f"choose from {', '.join(WEBS)}")
    seed_list = list(seeds or DEFAULT_SEEDS)
    overrides = overrides or {}
    bench_settings(DEMO, timing, overrides)  # a bad --set fails before anything runs
    if plot_path is None and set(names) >= set(FAMILY):
        plot_path = DEFAULT_PLOT
    start = time.perf_counter()
    summary: dict[str, Any] = {}
    panels: dict[str, dict[str, list[float]]] = {}

    def emit(res: dict[str, Any]) -> None:
        print(json.dumps(res), flush=True)
        print(table_row(res), file=sys.stderr, flush=True)

    with tempfile.TemporaryDirectory(prefix="sluice-ordering-") as tmp:
        for name in names:
            if name == DEMO_LIVE:
                res = run_demo_live(Path(tmp))
                emit(res)
                summary[name] = res.get("targets", {}).get("pass", False)
                continue
            per_seed = []
            for seed in ([0] if name == DEMO else seed_list):
                res, lw, result = asyncio.run(run_web(name, seed, Path(tmp), timing, overrides))
                emit(res)
                per_seed.append(res)
                if plot_path is not None and name not in panels:
                    panels[name] = curves(lw, result.order)
            if len(per_seed) > 1:
                res = medians(per_seed)
                emit(res)
            summary[name] = res["targets"]["pass"]
    if plot_path is not None and panels:
        plot(panels, plot_path)
    print(json.dumps({
        "summary": {"pass": summary, "all_pass": all(summary.values())},
        "seeds": seed_list, "timing": timing, "overrides": overrides,
        "settings": {name: _settings_report(bench_settings(name, timing, overrides))
                     for name in ("farm-near", DEMO)},
        "pagerank": f"{PAGERANK_IMPL[0]}, alpha {PAGERANK_ALPHA}",
        "plot": str(plot_path) if plot_path is not None and panels else None,
        "seconds": round(time.perf_counter() - start, 1),
    }), flush=True)
    return 0


def _settings_report(s: JobSettings) -> dict[str, Any]:
    return {"priority": s.priority.model_dump(), "politeness_min_delay_s": s.politeness.min_delay_s,
            "politeness_key": s.politeness.key, "concurrency": s.fetch.concurrency,
            "lease_batch": s.lease.batch, "max_pages_per_host": s.budget.max_pages_per_host}


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The bench's flags (shared by ``sluice bench ordering`` and ``python -m``)."""
    p.add_argument("--web", action="append", choices=WEBS, metavar="NAME",
                   help=f"a web to run (repeatable; default all): {', '.join(WEBS)}")
    p.add_argument("--seed", action="append", type=int, metavar="N",
                   help="a seed number (repeatable; default 1, 2, 3; the demo web has its own)")
    p.add_argument("--timing", choices=TIMINGS, default="polite",
                   help="polite: sluice demo's politeness on a simulated clock (default); "
                   "instant: delays 0")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.NAME=VALUE",
                   help="a job setting for the crawl, e.g. priority.jump_floor=1e-4")
    p.add_argument("--plot", type=Path, metavar="PNG",
                   help="draw the plot here (default docs/ordering.png when every web runs)")


def cli(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m frontier.bench.ordering_bench",
                                description=__doc__.split("\n\n")[0] if __doc__ else None)
    add_arguments(p)
    a = p.parse_args(argv)
    return main(a.web, a.seed, a.timing, dict(parse_override(s) for s in a.set), a.plot)


if __name__ == "__main__":
    raise SystemExit(cli())
