"""``sluice demo``: serve the synthetic .test web on loopback and crawl it on the embedded Redis."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from frontier.process import run as run_loop
from frontier.settings import load_settings

DEMO_USER_AGENT = "sluice-demo/0.1 (+http://operator.test/contact)"
DEMO_MIN_DELAY_S = 0.2  # the synthetic web is ours; real sites get the 1 s default or more
DEMO_SLOW_DELAY_S = 0.2
DEMO_DRIP_S = 3.0  # the slow-drip page stops after this long


async def _demo(out: Path, hosts: int, pages: int, max_pages: int, quiet: bool,
                sitemaps: bool = False, sitemap_urls: tuple[str, ...] = ()) -> dict[str, Any]:
    from frontier.runner import crawl as run_crawl
    from synthweb.graph import SyntheticWeb, WebSpec
    from synthweb.server import SyntheticServer

    web = SyntheticWeb.generate(WebSpec(seed=42, hosts=hosts, pages=pages))
    if sitemaps:  # the sitemap variant (synthweb/sitemaps.py); off: the web is unchanged
        from synthweb.sitemaps import add_sitemaps
        sitemap_urls += (add_sitemaps(web).operator_sitemap,)
    server = SyntheticServer(web, slow_delay=DEMO_SLOW_DELAY_S, drip_duration=DEMO_DRIP_S)
    port = await server.start("127.0.0.1", 0)
    try:
        out.mkdir(parents=True, exist_ok=True)
        (out / "seeds.txt").write_text("\n".join(web.seeds) + "\n", encoding="utf-8")
        settings = load_settings(None, {
            "name": "demo",
            "seeds": list(web.seeds),
            "sitemaps": {"urls": list(sitemap_urls)},
            "state_dir": str(out / "state"),
            "scope": {"allow_hosts": ["*.test"]},
            "budget": {"max_pages": max_pages, "max_pages_per_host": 200},
            "politeness": {"min_delay_s": DEMO_MIN_DELAY_S, "retry_backoff_s": 2.0},
            "fetch": {"user_agent": DEMO_USER_AGENT, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                      "concurrency": 64, "total_timeout_s": 10.0, "read_timeout_s": 5.0},
            "lease": {"ttl_s": 30.0},
        })
        summary = await run_crawl(settings, out, quiet=quiet)
        summary["synthetic_web"] = {"port": port, "requests": len(server.log),
                                    "max_concurrency_per_host": max(
                                        server.max_concurrency_per_host().values(), default=0)}
        return summary
    finally:
        await server.stop()


def run_demo(out: Path, *, hosts: int, pages: int, max_pages: int, quiet: bool = False,
             sitemaps: bool = False, sitemap_urls: tuple[str, ...] = ()) -> int:
    summary = run_loop(_demo(out, hosts, pages, max_pages, quiet, sitemaps, sitemap_urls))
    print(json.dumps(summary, indent=2))
    warcs = sorted((out / "warc").glob("*.warc.gz"))
    print(f"\nWARC files: {len(warcs)} under {out / 'warc'}")
    print(f"fetch log:  {out / 'fetches.jsonl'}")
    return 0
