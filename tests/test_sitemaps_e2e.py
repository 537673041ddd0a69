"""End-to-end: a real `sluice crawl` process crawls the synthetic web's sitemap variant over
loopback against a real redis-server. Judged from the server's request log, the fetch log
and the WARC files.

Protocol rules checked here are the sitemaps.org protocol 0.9 (quoted from memory):
robots.txt ``Sitemap:`` lines; sitemap index files; gzip; the location rule and cross
submits through robots.txt.
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from warcio.archiveiterator import ArchiveIterator

from frontier.urls import canonicalize
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import SyntheticServer
from synthweb.sitemaps import SitemapPlan, add_sitemaps
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
HOST_BUDGET = 60
CRAWL_TIMEOUT_S = 240

JOB = """
name = "sitemaps-e2e"
[scope]
allow_hosts = ["*.test"]
[budget]
max_pages_per_host = {budget}
# this web checks sitemaps; the link-spam slow lanes (probation, untrusted and suspect
# gaps: tests/test_spam_signals.py checks them) would stretch it to minutes
[priority]
untrusted_delay_s = 0.0
suspect_delay_s = 0.0
probation_s = 0.0
host_budget_base = 0
[politeness]
min_delay_s = 0.05
response_time_factor = 0.0
retry_backoff_s = 0.2
[fetch]
user_agent = "{ua}"
map_hosts = ["*.test=127.0.0.1:{port}"]
concurrency = 32
total_timeout_s = 8.0
read_timeout_s = 5.0
[lease]
ttl_s = 30.0
"""


@pytest.fixture(scope="module")
def crawl(tmp_path_factory: pytest.TempPathFactory, redis_server: RedisServer) -> dict[str, Any]:
    out = tmp_path_factory.mktemp("sitemaps-crawl")
    web = SyntheticWeb.generate(WebSpec(seed=3, hosts=10, pages=150, farm_hosts=2,
                                        farm_pages=3, trap_horizon_months=6))
    plan = add_sitemaps(web)

    async def run() -> dict[str, Any]:
        from frontier.redis_client import connect

        client = connect(redis_server.url)
        await client.flushall()
        await client.aclose()
        server = SyntheticServer(web, slow_delay=0.05, latency=0.002, drip_interval=0.2,
                                 drip_duration=10.0)
        port = await server.start("127.0.0.1", 0)
        job = out / "job.toml"
        job.write_text(JOB.format(budget=HOST_BUDGET, ua=UA, port=port), encoding="utf-8")
        seeds = out / "seeds.txt"
        seeds.write_text("\n".join(web.seeds) + "\n", encoding="utf-8")
        sluice = Path(sys.executable).with_name("sluice")
        try:
            proc = await asyncio.create_subprocess_exec(
                str(sluice), "crawl", "--config", str(job), "--seeds", str(seeds),
                "--redis", redis_server.url, "--out", str(out / "out"), "--processes", "1",
                "--quiet", "--sitemap", plan.operator_sitemap,
                stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE,
                env={**os.environ, "PYTHONUNBUFFERED": "1"})
            stdout, stderr = await asyncio.wait_for(proc.communicate(), CRAWL_TIMEOUT_S)
        finally:
            await server.stop()
        assert proc.returncode == 0, stderr.decode()[-3000:]
        return {"summary": json.loads(stdout), "log": list(server.log)}

    result = asyncio.run(run())
    lines = [json.loads(line) for line in
             (out / "out" / "fetches.jsonl").read_text(encoding="utf-8").splitlines()]
    return {**result, "web": web, "plan": plan, "lines": lines, "out": out / "out"}


def requested(crawl: dict[str, Any]) -> Counter[str]:
    return Counter(canonicalize(f"http://{r.host}{r.path}") for r in crawl["log"])


def test_crawl_balanced_and_drained(crawl: dict[str, Any]) -> None:
    s = crawl["summary"]
    assert s["balanced"] and s["queued"] == 0 and s["leased"] == 0


def test_pages_reachable_only_through_sitemaps_are_fetched(crawl: dict[str, Any]) -> None:
    """robots.txt Sitemap: lines (plain XML, a .gz file, an index with a plain and a
    Content-Encoding child, a cross submit) and --sitemap (a text sitemap) lead to pages
    no link reaches."""
    plan: SitemapPlan = crawl["plan"]
    got = requested(crawl)
    expected = {canonicalize(u) for u in plan.hidden | plan.operator_pages}
    assert expected and not expected - set(got), sorted(expected - set(got))
    fetched = {line["url"] for line in crawl["lines"] if line["outcome"] == "fetched"}
    assert not expected - fetched


def test_location_rule_and_hostile_sitemap_urls_not_fetched(crawl: dict[str, Any]) -> None:
    """sitemaps.org 0.9 (from memory): a sitemap lists only URLs of its own host under its
    own directory, unless the listed host's robots.txt names it; URLs only a refused
    (entity-bomb) sitemap lists are never requested."""
    plan: SitemapPlan = crawl["plan"]
    got = requested(crawl)
    never = {canonicalize(u) for u in plan.refused | plan.unlisted}
    assert never and not never & set(got), sorted(never & set(got))


def test_each_sitemap_fetched_once_with_its_reason(crawl: dict[str, Any]) -> None:
    """Every sitemap ends in one fetch-log line with the expected reason; the index that
    lists itself is fetched once; the entity bomb ends failed (sitemap_xml_refused)."""
    plan: SitemapPlan = crawl["plan"]
    got = requested(crawl)
    by_url = {}
    for line in crawl["lines"]:
        if "#sitemap" in line["url"]:
            by_url.setdefault(line["url"].split("#", 1)[0], []).append(line)
    for url, reason in plan.sitemaps.items():
        assert got[url] == 1, (url, got[url])
        lines = by_url[url]
        assert len(lines) == 1, lines
        assert lines[0]["reason"] == reason, (url, lines[0])
        assert lines[0]["outcome"] == ("failed" if "refused" in reason else "fetched")


def test_sitemaps_archived_under_their_own_urls(crawl: dict[str, Any]) -> None:
    """A sitemap's response record is under its real URL (no kind mark), as warcio reads it."""
    plan: SitemapPlan = crawl["plan"]
    targets = set()
    for path in sorted((crawl["out"] / "warc").glob("*.warc.gz")):
        with path.open("rb") as fh:
            for record in ArchiveIterator(fh):
                if record.rec_type == "response":
                    targets.add(record.rec_headers.get_header("WARC-Target-URI"))
    assert set(plan.sitemaps) <= targets
    assert not any("#sitemap" in t for t in targets)
