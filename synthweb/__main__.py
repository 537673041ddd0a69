"""Serve a synthetic web on loopback: ``python -m synthweb --port N --seed S``."""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import sys
from collections.abc import Sequence

from frontier.exceptions import SluiceError
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import DEFAULT_SLOW_DELAY, SyntheticServer

DEFAULT_BIND = "127.0.0.1"
EXIT_USAGE = 2
FEATURES = (
    "robots", "slow_hosts", "failing_hosts", "redirects", "trap", "farm",
    "near_duplicates", "ssrf_bait", "bad_inputs",
)


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    """Command-line options."""
    defaults = WebSpec()
    parser = argparse.ArgumentParser(
        prog="python -m synthweb",
        description="Serve an invented, seeded web of .test hosts on a loopback port.",
    )
    parser.add_argument("--bind", default=DEFAULT_BIND, help="loopback address to listen on")
    parser.add_argument("--port", type=int, default=0, help="port (0: any free port)")
    parser.add_argument("--seed", type=int, default=defaults.seed)
    parser.add_argument("--hosts", type=int, default=defaults.hosts, help="ordinary hosts")
    parser.add_argument("--pages", type=int, default=defaults.pages, help="ordinary pages")
    parser.add_argument("--zipf", type=float, default=defaults.zipf_exponent,
                        help="host size exponent (0: every host the same size)")
    parser.add_argument("--slow-delay", type=float, default=DEFAULT_SLOW_DELAY,
                        help="seconds added to each response of a slow host")
    parser.add_argument("--plain", action="store_true",
                        help="ordinary sites only: no robots, traps, farms or bad inputs")
    parser.add_argument("--prerender", action="store_true",
                        help="render every ordinary page before listening (for benchmarks)")
    return parser.parse_args(argv)


async def serve(args: argparse.Namespace) -> None:
    """Generate the web, listen, print the port and seeds, then serve until cancelled."""
    switches = {name: False for name in FEATURES} if args.plain else {}
    spec = WebSpec(seed=args.seed, hosts=args.hosts, pages=args.pages,
                   zipf_exponent=args.zipf, **switches)
    server = SyntheticServer(SyntheticWeb.generate(spec), slow_delay=args.slow_delay)
    if args.prerender:
        server.prerender()
    port = await server.start(args.bind, args.port)
    try:
        print(f"port {port}", flush=True)
        for url in server.web.seeds:
            print(url, flush=True)
        await asyncio.Event().wait()
    finally:
        await server.stop()


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point; returns the exit status."""
    try:
        with contextlib.suppress(KeyboardInterrupt):
            asyncio.run(serve(parse_args(argv)))
    except SluiceError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    return 0


if __name__ == "__main__":
    sys.exit(main())
