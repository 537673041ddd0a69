"""The status page an operator keeps open, checked in a real browser.

A real crawl of the synthetic .test web on loopback with a real Redis, the daemon's admin
API serving the page, and Debian's headless Chromium (``chromium``, installed by
deploy/prepare.sh) loading it: what the page shows is read from the DOM the browser dumps
after its script ran. A screenshot is taken too; with ``SLUICE_SCREENSHOT_TO=PATH`` it is
copied to PATH (docs/status-page.png is made that way).

Smaller tests check what the page is built from: the ring of samples behind pages per
second, worker heartbeats, robots.txt outcomes and the bounded host table.
"""

from __future__ import annotations

import asyncio
import os
import shutil
import socket
import struct
import tempfile
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from prometheus_client import CollectorRegistry
from selectolax.lexbor import LexborHTMLParser as HTMLParser

from frontier.admin_auth import CSRF_HEADER, local_token_path
from frontier.budget import PageBudget
from frontier.daemon import Daemon, serve_admin
from frontier.host_table import read_hosts
from frontier.job import Job, admit_seeds, open_job
from frontier.metrics import FrontierMetrics, WorkerMetrics
from frontier.mirrors import MIRROR_REASON, MirrorHosts
from frontier.model import Candidate, Completion, Outcome
from frontier.redis_client import connect
from frontier.robots import RobotsFetchResult
from frontier.settings import load_settings
from frontier.status_board import StatusBoard
from frontier.store import FrontierStore
from frontier.urls import host_of
from frontier.worker_report import ROBOTS_FAILURES_KEPT, WorkerReport, read_robots, read_workers
from tests.conftest import Clock, StoreFactory
from tests.servers import RedisServer
from workers.loop import Worker
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import SyntheticServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
JOB = "status-demo"
MAX_PAGES = 300
CRAWL_TIMEOUT_S = 90.0
BROWSER_TIMEOUT_S = 90.0
VIRTUAL_TIME_MS = 4000  # the page's script gets this much (virtual) time to fetch and draw
WINDOW = (1280, 900)
# text a web server could put where the page shows names and reasons
HOSTILE = ('<script>document.title="owned"</script>'
           '<img src=x id=injected onerror="document.title=\'owned\'">')
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG (ISO/IEC 15948, RFC 2083 s.3.1)
MIRROR = "mirror-of-a-site.test"
MIRROR_ADMITTED, MIRROR_COMPARED, MIRROR_SHARED = 20, 12, 10  # 20: priority.host_budget_base


def chromium() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if path is None:
        pytest.fail("the status page tests need a headless browser: Debian's 'chromium' "
                    "package (deploy/prepare.sh installs it when run as root; otherwise "
                    "'sudo apt-get install chromium')")
    return path


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


async def run_chromium(url: str, *args: str) -> bytes:
    """Headless Chromium on ``url`` with ``args``; its standard output.

    Names resolve to nothing (only the loopback address is used) and Chromium's own
    background services are off, so the browser sends nothing beyond loopback.
    """
    profile = tempfile.mkdtemp(prefix="sluice-chromium-")
    proc = await asyncio.create_subprocess_exec(
        chromium(), "--headless", "--disable-gpu", "--no-sandbox", f"--user-data-dir={profile}",
        "--no-first-run", "--no-default-browser-check", "--disable-extensions",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        "--disable-domain-reliability", "--disable-client-side-phishing-detection",
        "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1", "--hide-scrollbars",
        f"--virtual-time-budget={VIRTUAL_TIME_MS}", *args, url,
        stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE)
    try:
        out, err = await asyncio.wait_for(proc.communicate(), BROWSER_TIMEOUT_S)
    except TimeoutError:
        proc.kill()
        await proc.wait()
        raise
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    assert proc.returncode == 0, err.decode(errors="replace")[-2000:]
    return out


async def dump_dom(url: str) -> HTMLParser:
    """The page's DOM once its script has drawn the status (tried a few times)."""
    for _ in range(3):
        tree = HTMLParser((await run_chromium(url, "--dump-dom")).decode())
        job = tree.css_first("#job")
        if job is not None and job.text() == JOB:
            return tree
    pytest.fail(f"the status page at {url} never showed its job")


def cell_texts(tree: HTMLParser, table_id: str) -> list[list[str]]:
    return [[td.text() for td in tr.css("td")] for tr in tree.css(f"#{table_id} tr")[1:]]


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (ISO/IEC 15948 s.11.2.2)."""
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    return width, height


# -- a crawl to look at ---------------------------------------------------------------------

@pytest.fixture(scope="module")
async def crawled(redis_server: RedisServer,
                  tmp_path_factory: pytest.TempPathFactory) -> AsyncIterator[dict[str, Any]]:
    """A crawl spent on its page budget with one host paused through the admin API, the
    daemon still serving; a screenshot taken; then text from a hostile server added."""
    tmp = tmp_path_factory.mktemp("status")
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    web = SyntheticWeb.generate(WebSpec(seed=5, hosts=10, pages=800, farm_hosts=2,
                                        farm_pages=5, trap_horizon_months=6))
    server = SyntheticServer(web, slow_delay=0.05, latency=0.002, drip_interval=0.2,
                             drip_duration=2.0)
    port = await server.start("127.0.0.1", 0)
    settings = load_settings(None, {
        "name": JOB, "seeds": list(web.seeds), "redis": {"url": redis_server.url},
        "state_dir": str(tmp / "state"), "scope": {"allow_hosts": ["*.test"]},
        "budget": {"max_pages": MAX_PAGES},
        "politeness": {"min_delay_s": 0.05, "response_time_factor": 0.0, "retry_backoff_s": 0.2},
        "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"], "concurrency": 16,
                  "total_timeout_s": 2.0, "read_timeout_s": 1.0},
        "lease": {"ttl_s": 30.0},
    })
    paused = host_of(web.seeds[1])
    try:
        async with open_job(settings) as job:
            await admit_seeds(job, settings.seeds)
            daemon = Daemon(job, CollectorRegistry(), stats_every_s=0.5)
            address = f"127.0.0.1:{free_port()}"
            runner = await serve_admin(daemon, address)
            stop = asyncio.Event()
            loops = asyncio.create_task(daemon.run(stop))
            base = f"http://{address}"
            token = local_token_path(settings.state_dir).read_text().strip()
            try:
                async with aiohttp.ClientSession() as http:
                    async with http.post(f"{base}/hosts/{paused}/pause",
                                         headers={"Authorization": f"Bearer {token}",
                                                  CSRF_HEADER: "1"}) as r:
                        assert r.status == 200, await r.text()
                    worker = Worker(job.store, job.admission, tmp / "out",
                                    metrics=WorkerMetrics(CollectorRegistry()), drain=True)
                    await asyncio.wait_for(worker.run(), CRAWL_TIMEOUT_S)
                    original = await add_mirror(job, web.seeds[0])
                    await asyncio.sleep(1.0)  # two more samples of the finished crawl
                    screenshot = tmp / "status-page.png"
                    await run_chromium(f"{base}/", f"--screenshot={screenshot}",
                                       f"--window-size={WINDOW[0]},{WINDOW[1]}")
                    await add_hostile_text(job)
                    async with http.get(f"{base}/status") as r:
                        assert r.status == 200
                        status = await r.json()
                    yield {"base": base, "status": status, "paused": paused, "worker": worker,
                           "screenshot": screenshot, "server": server, "job": job,
                           "original": original}
            finally:
                stop.set()
                await loops
                await runner.cleanup()
    finally:
        await server.stop()


async def add_mirror(job: Job, seed: str) -> str:
    """A host of the crawl's scope with ``MIRROR_ADMITTED`` URLs queued, of which
    ``MIRROR_COMPARED`` pages were compared and ``MIRROR_SHARED`` copy pages of the seed's
    host (the mirror script's evidence, recorded as the workers record it). Returns the
    seed's host, the one it copies."""
    original = host_of(seed)
    result = await job.admission.admit(
        [Candidate(f"http://{MIRROR}/p{i}.html", depth=1) for i in range(MIRROR_ADMITTED)])
    assert result.new == MIRROR_ADMITTED
    pages = [(MIRROR, f"http://{MIRROR}/p{i}.html",
              f"http://{original}/c{i}.html" if i < MIRROR_SHARED else None)
             for i in range(MIRROR_COMPARED)]
    assert await MirrorHosts(job.store).record(pages) == {MIRROR}
    return original


async def add_hostile_text(job: Job) -> None:
    """A URL that failed with a reason made of markup, and a worker on a machine whose
    name is markup."""
    (lease,) = await job.store.lease(1)
    await job.store.complete_many([Completion(lease, Outcome.FAILED, HOSTILE)])
    report = WorkerReport(job.store, WorkerMetrics(CollectorRegistry()), machine=HOSTILE)
    assert await report.beat(pages=0, in_flight=0)


# -- the page -------------------------------------------------------------------------------

async def test_status_json_describes_the_crawl(crawled: dict[str, Any]) -> None:
    s = crawled["status"]
    assert s["job"] == JOB
    assert s["fetched"] == MAX_PAGES  # drain stops once the budget is spent
    budget = s["budget"]
    assert (budget["max_pages"], budget["fetched"]) == (MAX_PAGES, MAX_PAGES)
    assert budget["fraction"] == 1.0
    assert s["balanced"] is True and s["accounted"] == s["admitted"]
    assert sum(s[k] for k in ("queued", "leased", "fetched", "failed", "excluded", "dead")) \
        == s["admitted"]
    assert s["rate"]["series"] and s["rate"]["pages_per_s"] is not None
    assert max(p["pages_per_s"] for p in s["rate"]["series"]) > 0
    ids = [w["id"] for w in s["workers"]]
    assert crawled["worker"].report.id in ids
    [row] = [r for r in s["hosts"]["controlled"] if r["host"] == crawled["paused"]]
    assert row["state"] == "paused" and row["controls"] == ["paused"] and row["fetched"] == 0
    busiest = [r["fetched"] for r in s["hosts"]["busiest"]]
    assert busiest == sorted(busiest, reverse=True) and len(busiest) <= 10
    assert {"outcome": "failed", "reason": HOSTILE, "total": 1, "recent": 1} in s["errors"]
    # the synthetic web serves robots.txt with rules, none (404) and 500 on some hosts
    # (RFC 9309 s.2.3.1: 2xx rules, 4xx allow all, 5xx disallow all)
    assert s["robots"]["policies"].get("rules", 0) > 0
    assert s["robots"]["policies"].get("allow_all", 0) > 0
    # the mirror host (frontier/scripts/mirror.lua: 10 of 12 pages shared >= 0.6 of them,
    # so a mirror; it may hold its 2 new pages + the slack; the rest of its queue is cut)
    limit = MIRROR_COMPARED - MIRROR_SHARED + load_settings(None, {}).dedupe.mirror_slack
    assert s["mirrors"] == {"count": 1, "hosts": [{
        "host": MIRROR, "mirror_of": crawled["original"], "pages": MIRROR_COMPARED,
        "copies": MIRROR_SHARED, "new_pages": MIRROR_COMPARED - MIRROR_SHARED,
        "share": MIRROR_SHARED / MIRROR_COMPARED, "limit": limit,
        "admitted": MIRROR_ADMITTED}]}
    assert s["reasons"][f"excluded:{MIRROR_REASON}"] == MIRROR_ADMITTED - limit


async def test_browser_shows_counts_budget_and_the_paused_host(crawled: dict[str, Any]) -> None:
    tree = await dump_dom(crawled["base"] + "/")
    s = crawled["status"]
    assert tree.css_first("title").text() == f"sluice · {JOB}"
    assert tree.css_first("#fetched").text() == str(MAX_PAGES)
    assert tree.css_first("#budget-text").text() == \
        f"{MAX_PAGES} of {MAX_PAGES} pages (100.0%): budget spent"
    assert "width: 100%" in (tree.css_first("#budget-fill").attributes.get("style") or "")
    assert tree.css_first("#balanced").text() == "balanced"  # words, not a Python bool
    counts = dict(cell_texts(tree, "counts"))
    for state in ("admitted", "queued", "fetched", "failed", "excluded", "dead"):
        assert counts[state] == f"{s[state]:,}", state
    assert [crawled["paused"], "paused"] == cell_texts(tree, "controlled")[0][:2]
    assert tree.css_first("#control-counts").text().startswith("1 paused")
    workers = cell_texts(tree, "workers")
    assert any(row[0] == crawled["worker"].report.id for row in workers)
    assert tree.css("#chart svg polyline"), "no pages/s line drawn"
    assert "live" in tree.css_first("#live").text()
    robots = dict(cell_texts(tree, "robots"))
    assert robots["rules (2xx)"] == f"{s['robots']['policies'].get('rules', 0):,}"


async def test_browser_shows_the_mirror_hosts(crawled: dict[str, Any]) -> None:
    tree = await dump_dom(crawled["base"] + "/")
    s = crawled["status"]
    header = [th.text() for th in tree.css("#mirrors th")]
    assert header == ["mirror host", "copies pages of", "pages compared", "shared", "share",
                      "may hold (URLs)", "admitted"]
    [row] = s["mirrors"]["hosts"]
    share = f"{round(100 * MIRROR_SHARED / MIRROR_COMPARED)}%"
    assert cell_texts(tree, "mirrors") == [[
        MIRROR, crawled["original"], str(MIRROR_COMPARED), str(MIRROR_SHARED), share,
        str(row["limit"]), str(MIRROR_ADMITTED)]]
    cut = s["reasons"][f"excluded:{MIRROR_REASON}"]
    assert cut > 0
    assert tree.css_first("#mirrors-note").text() == f"1 found · {cut} URLs cut as {MIRROR_REASON}"


async def test_text_from_the_web_is_shown_as_text(crawled: dict[str, Any]) -> None:
    """Markup in a reason or a name is shown as those characters, never parsed."""
    tree = await dump_dom(crawled["base"] + "/")
    assert HOSTILE in [row[1] for row in cell_texts(tree, "errors")]  # the reason
    assert HOSTILE in [row[1] for row in cell_texts(tree, "workers")]  # the machine
    assert tree.css("img") == [] and tree.css("#injected") == []
    assert [s.attributes.get("src") for s in tree.css("script")] == ["static/status.js"]
    assert tree.css_first("title").text() != "owned"


async def test_screenshot(crawled: dict[str, Any]) -> None:
    data = crawled["screenshot"].read_bytes()
    assert png_size(data) == WINDOW
    assert len(data) > 20_000  # a drawn page, not a blank one (common practice, no source)
    target = os.environ.get("SLUICE_SCREENSHOT_TO")
    if target:
        Path(target).write_bytes(data)


async def test_page_files_and_security_headers(crawled: dict[str, Any]) -> None:
    async with aiohttp.ClientSession() as http:
        async with http.get(crawled["base"] + "/") as r:
            assert r.status == 200 and r.content_type == "text/html"
            assert "script-src 'self'" in r.headers["Content-Security-Policy"]
            assert r.headers["X-Content-Type-Options"] == "nosniff"
        async with http.get(crawled["base"] + "/static/status.js") as r:
            assert r.status == 200 and r.content_type == "text/javascript"
            assert "textContent" in await r.text()
        for name in ("../daemon.py", "status.html", "nope.js"):
            async with http.get(crawled["base"] + "/static/" + name) as r:
                assert r.status == 404, name


# -- what the page is built from ------------------------------------------------------------

@pytest.fixture
async def plain_job(redis_server: RedisServer, tmp_path: Path) -> AsyncIterator[Job]:
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    settings = load_settings(None, {"name": "board", "redis": {"url": redis_server.url},
                                    "state_dir": str(tmp_path), "fetch": {"user_agent": UA},
                                    "store": {"partitions": 4}})
    async with open_job(settings) as job:
        yield job


async def test_pages_per_second_is_the_mean_over_the_window(plain_job: Job, clock: Clock) -> None:
    """Mean rate = pages fetched between two samples / seconds between them."""
    board = StatusBoard(plain_job, PageBudget(plain_job.redis, plain_job.store.keys, None),
                        clock=clock)
    assert board.pages_per_s() is None and board.series() == []
    for fetched in (0, 10, 30):
        board.record(fetched, {})
        clock.advance(2.0)
    assert board.pages_per_s(60.0) == 30 / 4
    assert [p["pages_per_s"] for p in board.series()] == [5.0, 10.0]
    assert [p["ago_s"] for p in board.series()] == [4.0, 2.0]
    clock.advance(100.0)
    board.record(30, {})
    assert board.pages_per_s(60.0) is None  # one sample in the window: no rate yet


async def test_recent_errors_are_those_since_the_window_began(plain_job: Job, clock: Clock) -> None:
    board = StatusBoard(plain_job, PageBudget(plain_job.redis, plain_job.store.keys, None),
                        clock=clock)
    board.record(0, {"failed:http_404": 5, "excluded:robots": 9})
    clock.advance(400.0)  # that sample falls out of the five-minute window
    board.record(0, {"failed:http_404": 7, "dead:timeout": 1})
    rows = board.errors({"failed:http_404": 8, "dead:timeout": 1, "excluded:robots": 9})
    assert rows == [{"outcome": "failed", "reason": "http_404", "total": 8, "recent": 1},
                    {"outcome": "dead", "reason": "timeout", "total": 1, "recent": 0}]


async def test_heartbeats_list_live_workers_and_expire(make_store: StoreFactory) -> None:
    store = make_store()
    ticks = Clock(0.0)
    steady = WorkerReport(store, WorkerMetrics(CollectorRegistry()), machine="a.test",
                          monotonic=ticks, every_s=5.0)
    brief = WorkerReport(store, WorkerMetrics(CollectorRegistry()), machine="b.test",
                         ttl_s=0.3)
    assert await steady.beat(pages=3, in_flight=2)
    assert not await steady.beat(pages=4, in_flight=2)  # not due yet
    ticks.advance(5.0)
    assert await steady.beat(pages=4, in_flight=1)
    assert await brief.beat(pages=1, in_flight=0)
    seen = {w["id"]: w for w in await read_workers(store.redis, store.keys)}
    assert set(seen) == {steady.id, brief.id}
    assert seen[steady.id]["pages"] == 4 and seen[steady.id]["machine"] == "a.test"
    assert steady.metrics.job == store.settings.name  # the report labels the metrics
    for _ in range(100):  # the short-lived record expires on the server (0.3 s)
        if brief.id not in {w["id"] for w in await read_workers(store.redis, store.keys)}:
            break
        await asyncio.sleep(0.05)
    assert [w["id"] for w in await read_workers(store.redis, store.keys)] == [steady.id]
    assert await store.redis.zcard(store.keys.workers) == 1  # and leaves the index


async def test_robots_outcomes_by_policy(make_store: StoreFactory) -> None:
    """RFC 9309 s.2.3.1: 2xx gives rules; 4xx "unavailable", allow all; 5xx and an
    unreachable server, disallow all (429 too: common practice, no source)."""
    store = make_store()
    registry = CollectorRegistry()
    report = WorkerReport(store, WorkerMetrics(registry))
    fetch_results = {"a": (200, None), "b": (404, None), "c": (503, None), "d": (429, None),
                     "e": (None, "connection refused")}

    async def fetch(url: str) -> RobotsFetchResult:
        status, error = fetch_results[url.split("//")[1].split(".")[0]]
        return RobotsFetchResult(status, b"", error)

    counted = report.robots_fetcher(fetch)
    for name in fetch_results:
        result = await counted(f"http://{name}.test/robots.txt")
        assert result.status == fetch_results[name][0]
    robots = await read_robots(store.redis, store.keys)
    assert robots["policies"] == {"rules": 1, "allow_all": 1, "disallow_all": 3}
    assert [(f["url"], f["status"], f["error"]) for f in robots["failures"]] == [
        ("http://e.test/robots.txt", None, "connection refused"),
        ("http://d.test/robots.txt", 429, None), ("http://c.test/robots.txt", 503, None)]
    assert registry.get_sample_value(
        "sluice_robots_fetches_total", {"job": store.settings.name, "policy": "disallow_all"}) == 3
    for i in range(ROBOTS_FAILURES_KEPT + 5):
        await report.record_robots(f"http://f{i}.test/robots.txt",
                                   RobotsFetchResult(500, b"", None))
    assert len((await read_robots(store.redis, store.keys))["failures"]) == ROBOTS_FAILURES_KEPT


async def test_host_table_ranks_and_stays_bounded(plain_job: Job) -> None:
    """Host n gets n + 1 pages fetched, each answered in n + 1 ms."""
    store: FrontierStore = plain_job.store
    hosts = [f"h{n:02d}.test" for n in range(12)]
    await plain_job.admission.admit(
        [Candidate(f"http://{h}/p{i}") for n, h in enumerate(hosts) for i in range(n + 1)])
    await store.control("h00.test", "pause")
    now = int(time.time() * 1000) + 1000
    while leases := await store.lease(50, now=now):
        await store.complete_many(
            [Completion(lease, Outcome.FETCHED, "http_200",
                        response_s=(hosts.index(lease.host) + 1) / 1000) for lease in leases],
            now=now)
        now += 60_000  # past every host's politeness gap
    table = await read_hosts(store, top=5)
    assert table.known == 12 and table.scanned == 12
    assert [r.host for r in table.busiest] == [f"h{n:02d}.test" for n in (11, 10, 9, 8, 7)]
    assert [r.fetched for r in table.busiest] == [12, 11, 10, 9, 8]
    assert [r.rt_ms for r in table.slowest] == [12, 11, 10, 9, 8]
    assert [(r.host, r.controls) for r in table.controlled] == [("h00.test", ["paused"])]
    small = await read_hosts(store, limit=4, top=5)
    assert small.known == 12 and small.scanned <= 4 + 1  # the paused host is always read
    assert len(small.busiest) <= 5
    controls = await read_hosts(store, limit=0)  # the metrics' read: controlled hosts only
    assert controls.known == 12 and controls.scanned == 1
    assert controls.control_counts == table.control_counts
    assert controls.control_counts["paused"] == 1


async def test_the_metrics_refresh_reads_only_controlled_hosts(plain_job: Job) -> None:
    # The stats loop refreshes the board's metrics every few seconds in the crawl's own
    # process: it reads the records of hosts under control, not of every host.
    store: FrontierStore = plain_job.store
    await plain_job.admission.admit([Candidate(f"http://h{n:02d}.test/") for n in range(30)])
    await store.control("h03.test", "pause")
    await store.control("h07.test", "block")
    registry = CollectorRegistry()
    metrics = FrontierMetrics(registry, "board")
    board = StatusBoard(plain_job, PageBudget(plain_job.redis, plain_job.store.keys, None),
                        metrics)

    async def hmgets() -> int:
        stats = await store.redis.info("commandstats")
        return int(stats.get("cmdstat_hmget", {}).get("calls", 0))

    before = await hmgets()
    await board.refresh(0, {})
    assert await hmgets() - before == 2
    assert registry.get_sample_value("sluice_hosts_known", {"job": "board"}) == 30
    assert registry.get_sample_value("sluice_hosts_controlled",
                                     {"job": "board", "control": "paused"}) == 1


async def test_an_unreadable_heartbeat_is_skipped(make_store: StoreFactory) -> None:
    store = make_store()
    report = WorkerReport(store, WorkerMetrics(CollectorRegistry()), machine="a.test")
    assert await report.beat(pages=1, in_flight=0)
    await store.redis.zadd(store.keys.workers, {"broken": 1})
    await store.redis.set(store.keys.worker("broken"), b"{not json")
    assert [w["id"] for w in await read_workers(store.redis, store.keys)] == [report.id]


async def test_status_answers_503_while_redis_is_down(tmp_path: Path) -> None:
    """RFC 9110 s.15.6.4: 503, the server cannot handle the request for now."""
    with RedisServer(tmp_path / "redis", appendonly=False) as redis_server:
        settings = load_settings(None, {"name": "down", "redis": {"url": redis_server.url},
                                        "state_dir": str(tmp_path / "state"),
                                        "fetch": {"user_agent": UA}})
        async with open_job(settings) as job:
            address = f"127.0.0.1:{free_port()}"
            runner = await serve_admin(Daemon(job, CollectorRegistry()), address)
            try:
                async with aiohttp.ClientSession() as http:
                    async with http.get(f"http://{address}/status") as r:
                        assert r.status == 200 and (await r.json())["job"] == "down"
                    redis_server.stop()
                    async with http.get(f"http://{address}/status") as r:
                        assert r.status == 503 and "error" in await r.json()
            finally:
                await runner.cleanup()
