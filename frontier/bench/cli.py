"""``sluice bench``: the benches' flags, and which bench each name runs."""

from __future__ import annotations

import argparse
from pathlib import Path

from frontier.cli_types import positive


def add_bench_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """The ``bench`` command, added to the ``sluice`` command's subcommands."""
    b = sub.add_parser("bench", help="benchmarks that print JSON")
    b.add_argument("what", choices=["frontier", "crawl", "ordering", "dedupe", "focus", "revisit"])
    b.add_argument("--urls", type=int, help="URLs (frontier) or pages (crawl, dedupe)")
    b.add_argument("--hosts", type=int)
    b.add_argument("--profile", action="store_true",
                   help="crawl: also run a profiled crawl and print where the time goes")
    b.add_argument("--no-aof", action="store_true",
                   help="frontier: run the embedded Redis without its append-only file")
    b.add_argument("--cluster", action="store_true",
                   help="frontier: also run on a 3-master Redis Cluster on loopback")
    b.add_argument("--instructions", action="store_true",
                   help="frontier: count Redis's instructions per URL under valgrind "
                   "without and with the append-only file (small sizes; the same on a busy "
                   "machine)")
    b.add_argument("--lease-urls", type=positive(int), metavar="N",
                   help="frontier: lease and complete at most N URLs (default: drain)")
    b.add_argument("--processes", type=_process_counts, default=(1,), metavar="N[,N...]",
                   help="crawl: worker process counts to measure, e.g. 1,2 (default 1)")
    b.add_argument("--web", action="append", metavar="NAME",
                   help="ordering: a web to run (repeatable; default all): farm-near, farm-far, "
                   "subdomain-farm, link-ring, doorways, honest-cluster, demo, demo-live")
    b.add_argument("--seed", action="append", type=int, metavar="N",
                   help="ordering: a seed number (repeatable; default 1, 2, 3)")
    b.add_argument("--timing", choices=["polite", "instant"], default="polite",
                   help="ordering: sluice demo's politeness on a simulated clock (default), "
                   "or delays 0")
    b.add_argument("--set", action="append", default=[], metavar="SECTION.NAME=VALUE",
                   help="ordering: a job setting for the crawl, e.g. priority.jump_floor=1e-4")
    b.add_argument("--plot", type=Path, metavar="PNG",
                   help="ordering: draw the plot here (default docs/ordering.png when every "
                   "web runs); focus: default docs/focus.png")
    b.set_defaults(func=cmd_bench)


def cmd_bench(a: argparse.Namespace) -> int:
    if a.what == "frontier":
        if a.instructions:
            from frontier.bench.redis_instructions import main as instructions_main
            return instructions_main(urls=a.urls or 60_000, hosts=a.hosts or 3_000,
                                     lease_limit=a.lease_urls or 16_000)
        from frontier.bench.frontier_bench import main as frontier_main
        return frontier_main(urls=a.urls or 1_000_000, hosts=a.hosts or 10_000, aof=not a.no_aof,
                             cluster=a.cluster, lease_limit=a.lease_urls)
    if a.what == "crawl":
        from frontier.bench.crawl_bench import main as crawl_main
        return crawl_main(pages=a.urls or 10_000, profile=a.profile, processes=a.processes)
    if a.what == "dedupe":
        from frontier.bench.dedupe_bench import main as dedupe_main
        return dedupe_main(pages=a.urls or 5000)
    if a.what == "focus":
        from frontier.bench.focus_bench import DEFAULT_PLOT as FOCUS_PLOT
        from frontier.bench.focus_bench import main as focus_main
        return focus_main(plot_path=a.plot or FOCUS_PLOT)
    if a.what == "revisit":
        from frontier.bench.revisit_bench import main as revisit_main
        return revisit_main(seeds=a.seed)
    from frontier.bench.ordering_bench import main as ordering_main
    from frontier.bench.ordering_bench import parse_override
    return ordering_main(a.web, a.seed, a.timing, dict(parse_override(s) for s in a.set),
                         a.plot)


def _process_counts(text: str) -> tuple[int, ...]:
    """An argparse type: comma-separated process counts, each 1 to 64."""
    try:
        counts = tuple(int(part) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a list of numbers like 1,2") from None
    if not counts or any(not 1 <= c <= 64 for c in counts):
        raise argparse.ArgumentTypeError(f"each count must be 1 to 64, got {text}")
    return counts
