"""``sluice bench focus``: does a focused crawl fetch pages about its subject first?

On topical webs (``synthweb.topical``: invented sites about three invented subjects, with
off-topic sections and general portals; every page labelled with its subject) the real
frontier crawls with simulated fetches and clock, as ``sluice bench ordering`` does
(``frontier.bench.ordering_crawl``: a private redis-server, the job's store, admission,
priority and politeness, ``sluice demo``'s job settings). Each page's relevance is
computed from the text the worker would see (title, text and anchors of the served HTML)
by the job's relevance model (``frontier.focus``), and its links' cash steered by it,
as the worker does.

Orders compared, per web and seed:

* ``focused``: sluice with ``[focus]`` examples (5 example pages about the subject, 20
  background pages; new pages drawn like the web's, not pages of it);
* ``focused_terms``: sluice with ``[focus]`` terms only (the subject's first 10 words,
  weight 1; no background);
* ``link_importance``: sluice without ``[focus]`` (OPIC and its defences alone);
* ``bfs``: breadth-first from the seeds over the static graph.

Measure: harvest rate (Menczer, Pant & Srinivasan, ACM TOIT 2004: the share of fetched
pages that are relevant, here by the web's labels) in the first 5, 10, 20 and 50 % of the
budget, the budget being the web's reachable pages. Targets at 20 %: focused >= 2 x bfs
and >= 1.5 x link_importance, per web and seed and on the medians. Prints JSON lines
(one per web and seed, one with the medians per web, a summary) and draws
``docs/focus.png``.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import statistics
import sys
import tempfile
import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from frontier.bench.ordering_bench import bench_settings
from frontier.bench.ordering_crawl import CrawlResult, Timing, _Crawl, simulate
from frontier.focus import Focus, build_focus
from frontier.model import Candidate, Completion, Lease
from frontier.settings import FocusSettings, JobSettings
from synthweb.graph import SyntheticWeb
from synthweb.model import Page
from synthweb.topical import (
    TopicalWeb, generate, harvest, subject_terms, training_pages,
)

WEBS: tuple[tuple[str, tuple[int, ...]], ...] = (
    ("lanterns", (1, 2, 3)),
    ("tideclocks", (4, 5, 6)),
)
BUDGETS = (0.05, 0.10, 0.20, 0.50)
TARGET_BUDGET = 0.20
BFS_FACTOR = 2.0
IMPORTANCE_FACTOR = 1.5
ORDERS = ("focused", "focused_terms", "link_importance", "bfs")
CRAWLED = ("focused", "focused_terms", "link_importance")
PLOT_POINTS = 40
DEFAULT_PLOT = Path("docs/focus.png")
TIMING = "instant"
# A simulated crawl of a few thousand pages lasts a fraction of a simulated second: a
# 30 s probation or a 5 s gap between fetches of an untrusted host would keep nearly every
# host found through links out of the first 20 % whatever the order (docs/focus.md).
NO_WAITS = (("priority.probation_s", 0.0), ("priority.untrusted_delay_s", 0.0),
            ("priority.suspect_delay_s", 0.0))


def served_text(page: Page) -> str:
    """The words the worker scores: the title, then the body's visible text (the h1
    title, the text and the link anchors, as ``synthweb.server.render_page`` serves it)."""
    return " ".join([page.title, page.title, page.text, *(ln.anchor for ln in page.links)])


class _FocusedCrawl(_Crawl):
    """The simulated crawl, with each page's links steered by its relevance."""

    focus: Focus | None = None
    cpu_s: float = 0.0
    scored: int = 0

    def answer(self, lease: Lease) -> tuple[Completion, list[Candidate], list[tuple[str, str]]]:
        done, links, linked = super().answer(lease)
        page = self.web.resolve(lease.url)
        if self.focus is not None and links and page is not None and page.location is None:
            t = time.process_time()
            relevance = self.focus.relevance(served_text(page))
            links = self.focus.steer(links, relevance)
            self.cpu_s += time.process_time() - t
            self.scored += 1
        return done, links, linked


async def focused_crawl(web: SyntheticWeb, settings: JobSettings, limit: int, tmp: Path,
                        timing: Timing = Timing(), redis_url: str | None = None,
                        ) -> tuple[CrawlResult, float, int]:
    """``ordering_crawl.crawl`` with the job's focus: (result, CPU seconds spent on
    relevance, pages scored). On a private redis-server living in ``tmp``, or on the
    server at ``redis_url`` (flushed first)."""
    def make(*args: Any) -> _FocusedCrawl:
        sim = _FocusedCrawl(*args)
        sim.focus = build_focus(settings)
        return sim

    result, sim = await simulate(web, settings, limit, tmp, timing, redis_url, make)
    assert isinstance(sim, _FocusedCrawl)
    return result, sim.cpu_s, sim.scored


def focus_settings(tw: TopicalWeb, folder: Path, kind: str) -> FocusSettings:
    """The ``[focus]`` of an order: example files written to ``folder``, or terms."""
    if kind == "focused_terms":
        return FocusSettings(terms=subject_terms(tw.subject))
    examples, background = training_pages(tw.subject, tw.seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths: dict[str, list[Path]] = {"examples": [], "background": []}
    for what, texts in (("examples", examples), ("background", background)):
        for i, text in enumerate(texts):
            path = folder / f"{what}-{i}.txt"
            path.write_text(text, encoding="utf-8")
            paths[what].append(path)
    return FocusSettings(examples=tuple(paths["examples"]),
                         background=tuple(paths["background"]))


def job_settings(focus: FocusSettings | None) -> JobSettings:
    """``sluice demo``'s job with ``--timing instant`` (politeness delays 0, a batch of 32
    fetch slots: the slots, not the hosts' delays, bound the crawl, as in a crawl of many
    more hosts than slots) and the link-spam defences' waits off (``NO_WAITS``; the
    topical webs hold no spam), for every order alike; ``focus`` as given."""
    base = bench_settings("topical", TIMING, dict(NO_WAITS))
    return base.model_copy(update={"focus": focus})


def label(share: float) -> str:
    return f"{round(share * 100)}%"


def score(tw: TopicalWeb, orders: dict[str, Sequence[str]], reachable: int) -> dict[str, Any]:
    """Harvest rates of the orders at the budgets, and the targets."""
    out: dict[str, Any] = {}
    for b in BUDGETS:
        k = max(1, round(b * reachable))
        out[label(b)] = {"pages": k, **{n: _round(harvest(o, tw.labels, tw.subject, k))
                                         for n, o in orders.items()}}
    return out


def targets(budgets: dict[str, Any]) -> dict[str, bool]:
    h = budgets[label(TARGET_BUDGET)]
    out = {
        f"focused_{label(TARGET_BUDGET)}_at_least_{BFS_FACTOR:g}x_bfs":
            h["focused"] >= BFS_FACTOR * h["bfs"],
        f"focused_{label(TARGET_BUDGET)}_at_least_{IMPORTANCE_FACTOR:g}x_link_importance":
            h["focused"] >= IMPORTANCE_FACTOR * h["link_importance"],
    }
    out["pass"] = all(out.values())
    return out


def _round(x: float | None) -> float | None:
    return None if x is None else round(x, 4)


async def run_web(subject: str, seed: int, tmp: Path) -> tuple[dict[str, Any], dict[str, list[float]]]:
    """Crawl one web with every order; the JSON result and the plot's curves."""
    started = time.perf_counter()
    tw = generate(subject, seed)
    bfs = tw.reachable_order()
    reachable = len(bfs)
    limit = round(max(BUDGETS) * reachable)
    orders: dict[str, Sequence[str]] = {}
    cpu: dict[str, Any] = {}
    for kind in CRAWLED:
        focus = None if kind == "link_importance" else focus_settings(tw, tmp / kind, kind)
        result, cpu_s, scored = await focused_crawl(tw.web, job_settings(focus), limit,
                                                    tmp / f"{kind}-run")
        orders[kind] = result.order
        if scored:
            cpu[kind] = {"pages_scored": scored,
                         "us_per_page": round(cpu_s / scored * 1e6, 1)}
    orders["bfs"] = bfs[:limit]
    model = build_focus(job_settings(focus_settings(tw, tmp / "focused", "focused")))
    assert model is not None
    budgets = score(tw, orders, reachable)
    res = {
        "web": f"topical-{subject}", "subject": subject, "seed": seed,
        "pages": len(tw.web.pages), "reachable": reachable,
        "on_topic_pages": len(tw.on_topic()),
        "on_topic_share": round(len(tw.on_topic()) / reachable, 4),
        "seeds": tw.seeds, "fetched": {n: len(o) for n, o in orders.items()},
        "harvest_rate": budgets, "relevance_cpu_in_crawl": cpu,
        "relevance_cpu_per_page": cpu_figures(tw, model),
        "targets": targets(budgets),
        "seconds": round(time.perf_counter() - started, 1),
    }
    xs = [limit * (i + 1) / PLOT_POINTS for i in range(PLOT_POINTS)]
    curves = {n: [harvest(o, tw.labels, subject, max(1, round(x))) or 0.0 for x in xs]
              for n, o in orders.items()}
    curves["x"] = [x / reachable for x in xs]
    return res, curves


CPU_PAGES = 300
CPU_BIG_REPEAT = 8  # a page's text repeated 8 times: about 5.6 KB of HTML


def cpu_figures(tw: TopicalWeb, focus: Focus) -> dict[str, Any]:
    """Per-page CPU of relevance against what the worker already spends on every page:
    parsing the served HTML (``workers.parser.parse_html``) and its SimHash (median of
    ``CPU_PAGES`` pages, as served and with the text repeated 8 times)."""
    from synthweb.server import render_page
    from frontier.simhash import simhash64
    from workers.parser import parse_html

    out: dict[str, Any] = {}
    pages = list(tw.web.pages.values())[:CPU_PAGES]
    for name, repeat in (("served", 1), ("text_x8", CPU_BIG_REPEAT)):
        parse, sim, rel, size = [], [], [], []
        for page in pages:
            if repeat > 1:
                page = Page(url=page.url, host=page.host, path=page.path, title=page.title,
                            text=" ".join([page.text] * repeat), links=page.links)
            body = render_page(page)
            t0 = time.perf_counter()
            parsed = parse_html(body, page.url)
            t1 = time.perf_counter()
            simhash64(parsed.text)
            t2 = time.perf_counter()
            focus.relevance(f"{parsed.title} {parsed.text}")
            t3 = time.perf_counter()
            parse.append(t1 - t0)
            sim.append(t2 - t1)
            rel.append(t3 - t2)
            size.append(len(body))
        base = statistics.median(parse) + statistics.median(sim)
        out[name] = {
            "html_bytes": round(statistics.median(size)),
            "relevance_us": round(statistics.median(rel) * 1e6, 1),
            "parse_us": round(statistics.median(parse) * 1e6, 1),
            "simhash_us": round(statistics.median(sim) * 1e6, 1),
            "relevance_over_parse_and_simhash": round(statistics.median(rel) / base, 3),
        }
    return out


def medians(results: list[dict[str, Any]]) -> dict[str, Any]:
    budgets = {}
    for b in BUDGETS:
        key = label(b)
        budgets[key] = {n: _round(statistics.median(r["harvest_rate"][key][n] for r in results))
                        for n in ORDERS}
    return {"web": results[0]["web"], "seeds": [r["seed"] for r in results],
            "median_harvest_rate": budgets, "targets": targets(budgets)}


def plot(panels: dict[str, dict[str, list[float]]], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = sorted({name.split(" ")[0] for name in panels})
    cols = max(sum(1 for n in panels if n.split(" ")[0] == r) for r in rows)
    fig, axes = plt.subplots(len(rows), cols, figsize=(4.6 * cols, 3.6 * len(rows)),
                             squeeze=False)
    styles = {"focused": "-", "focused_terms": "--", "link_importance": "-.", "bfs": ":"}
    places = []
    for r, row in enumerate(rows):
        places += [axes[r][c] for c, n in enumerate(n for n in panels if n.split(" ")[0] == row)]
    ordered = [n for row in rows for n in panels if n.split(" ")[0] == row]
    for ax, name in zip(places, ordered):
        curves = panels[name]
        for n in ORDERS:
            ax.plot([x * 100 for x in curves["x"]], curves[n], styles[n], label=n)
        ax.axvline(TARGET_BUDGET * 100, color="grey", linewidth=0.5)
        ax.set_title(name)
        ax.set_xlabel("budget: % of reachable pages fetched", fontsize=8)
        ax.set_ylabel("harvest rate (share on topic)", fontsize=8)
        ax.set_ylim(0, 1.05)
        ax.legend(fontsize=8)
    fig.suptitle("sluice bench focus: harvest rate over the first half of the crawl")
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(webs: Iterable[tuple[str, Sequence[int]]] = WEBS, plot_path: Path | None = DEFAULT_PLOT) -> int:
    """Run the bench; exit code 0 when every target is met on the medians."""
    everything: list[dict[str, Any]] = []
    panels: dict[str, dict[str, list[float]]] = {}
    ok = True
    with tempfile.TemporaryDirectory(prefix="sluice-focus-") as tmp:
        for subject, seeds in webs:
            results = []
            for seed in seeds:
                res, curves = asyncio.run(run_web(subject, seed, Path(tmp) / f"{subject}-{seed}"))
                print(json.dumps(res), flush=True)
                _table(res)
                results.append(res)
                panels[f"topical-{subject} (seed {seed})"] = curves
            med = medians(results)
            print(json.dumps(med), flush=True)
            ok = ok and med["targets"]["pass"]
            everything.append(med)
    if plot_path is not None and panels:
        plot(panels, plot_path)
    print(json.dumps({"summary": {m["web"]: m["targets"] for m in everything},
                      "all_targets_met": ok, "plot": str(plot_path) if plot_path else None}))
    return 0 if ok else 1


def _table(res: dict[str, Any]) -> None:
    h = res["harvest_rate"]
    row = " ".join(f"{b}: " + "/".join(f"{h[b][n]:.2f}" for n in ORDERS) for b in h)
    print(f"{res['web']} seed {res['seed']} ({'/'.join(ORDERS)}): {row}", file=sys.stderr)


def cli(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--plot", type=Path, default=DEFAULT_PLOT)
    a = p.parse_args(argv)
    return main(plot_path=a.plot)


if __name__ == "__main__":
    sys.exit(cli())
