"""A real Prometheus scrapes a running daemon and worker; what it stores is read back
through its HTTP API (prometheus.io, "HTTP API": /api/v1/query) with the crawl job's label,
and every query of the Grafana dashboard finds series in it.

The ``prometheus`` binary (and ``promtool``) come from Debian's ``prometheus`` package,
which deploy/prepare.sh installs when run as root. It listens on loopback and scrapes
loopback targets only. Two jobs share the Redis server and the Prometheus, the way two
crawls would share a monitoring stack.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import re
import shutil
import socket
import subprocess
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from frontier.daemon import Daemon, metrics_app, serve, serve_admin
from frontier.job import admit_seeds, open_job
from frontier.metrics import WorkerMetrics
from frontier.redis_client import connect
from frontier.settings import load_settings
from tests.servers import RedisServer
from workers.loop import Worker
from synthweb.graph import SyntheticWeb, WebSpec
from synthweb.server import SyntheticServer

ROOT = Path(__file__).resolve().parent.parent
DASHBOARD = ROOT / "deploy" / "grafana" / "sluice-dashboard.json"
SCRAPE_CONFIG = ROOT / "deploy" / "prometheus.yml"
UA = "sluice-test/0.1 (+http://operator.test/contact)"
CRAWLED, IDLE = "prom-crawled", "prom-idle"
MAX_PAGES = 400
SCRAPE_INTERVAL = "1s"
READY_TIMEOUT_S = 60.0
QUERY_TIMEOUT_S = 60.0
CRAWL_TIMEOUT_S = 120.0
METRIC = re.compile(r"\b(sluice_[a-z_]+)\b(\{[^}]*\})?")
JOB_FILTER = 'job="$job"'


def binary(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        pytest.fail(f"these tests need '{name}' from Debian's prometheus package "
                    "(deploy/prepare.sh installs it when run as root; otherwise "
                    "'sudo apt-get install prometheus')")
    return path


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def scrape_config(daemons: list[str], workers: list[str]) -> dict[str, Any]:
    """deploy/prometheus.yml's scrape configs, with loopback targets and a short interval
    (JSON is YAML, so Prometheus reads it as it is)."""
    return {
        "global": {"scrape_interval": SCRAPE_INTERVAL, "scrape_timeout": SCRAPE_INTERVAL,
                   "evaluation_interval": SCRAPE_INTERVAL},
        "scrape_configs": [
            {"job_name": "sluice-daemon", "honor_labels": True,
             "static_configs": [{"targets": daemons}]},
            {"job_name": "sluice-worker", "honor_labels": True,
             "static_configs": [{"targets": workers}]},
        ],
    }


async def query(http: aiohttp.ClientSession, prometheus: str, expr: str) -> list[dict[str, Any]]:
    async with http.get(f"{prometheus}/api/v1/query", params={"query": expr}) as r:
        body = await r.json()
    assert r.status == 200 and body["status"] == "success", (expr, body)
    result: list[dict[str, Any]] = body["data"]["result"]
    return result


async def query_until(http: aiohttp.ClientSession, prometheus: str, expr: str,
                      done: Any = bool) -> list[dict[str, Any]]:
    """Query until ``done(result)`` (new scrapes arrive every second)."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + QUERY_TIMEOUT_S
    while True:
        result = await query(http, prometheus, expr)
        if done(result) or loop.time() > deadline:
            return result
        await asyncio.sleep(0.5)


@pytest.fixture(scope="module")
async def scraped(redis_server: RedisServer,
                  tmp_path_factory: pytest.TempPathFactory) -> AsyncIterator[dict[str, Any]]:
    """Job CRAWLED: a daemon and a worker that crawls until its budget is spent. Job
    IDLE: a daemon with its seeds only. Prometheus scrapes all three every second."""
    prometheus_bin = binary("prometheus")
    tmp = tmp_path_factory.mktemp("prometheus")
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    web = SyntheticWeb.generate(WebSpec(seed=11, hosts=12, pages=900, farm_hosts=2,
                                        farm_pages=5, trap_horizon_months=6))
    site = SyntheticServer(web, slow_delay=0.05, latency=0.002, drip_interval=0.2,
                           drip_duration=2.0)
    port = await site.start("127.0.0.1", 0)

    def settings(name: str) -> Any:
        return load_settings(None, {
            "name": name, "seeds": list(web.seeds), "redis": {"url": redis_server.url},
            "state_dir": str(tmp / name), "scope": {"allow_hosts": ["*.test"]},
            "budget": {"max_pages": MAX_PAGES},
            "politeness": {"min_delay_s": 0.1, "response_time_factor": 0.0,
                           "retry_backoff_s": 0.2},
            "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                      "concurrency": 16, "total_timeout_s": 2.0, "read_timeout_s": 1.0},
        })

    async with contextlib.AsyncExitStack() as stack:
        stack.push_async_callback(site.stop)
        crawled = await stack.enter_async_context(open_job(settings(CRAWLED)))
        idle = await stack.enter_async_context(open_job(settings(IDLE)))
        stop = asyncio.Event()
        addresses: dict[str, str] = {}
        loops = []
        for job in (crawled, idle):
            await admit_seeds(job, job.settings.seeds)
            daemon = Daemon(job, CollectorRegistry(), stats_every_s=0.5)
            addresses[job.settings.name] = f"127.0.0.1:{free_port()}"
            runner = await serve_admin(daemon, addresses[job.settings.name])
            stack.push_async_callback(runner.cleanup)
            loops.append(asyncio.create_task(daemon.run(stop)))
        registry = CollectorRegistry()
        worker = Worker(crawled.store, crawled.admission, tmp / "out",
                        metrics=WorkerMetrics(registry), drain=True)
        worker_address = f"127.0.0.1:{free_port()}"
        runner = await serve(metrics_app(registry), worker_address)
        stack.push_async_callback(runner.cleanup)

        config = tmp / "prometheus.json"
        config.write_text(json.dumps(scrape_config(list(addresses.values()), [worker_address])))
        prom_address = f"127.0.0.1:{free_port()}"
        with (tmp / "prometheus.log").open("wb") as log:  # the child keeps its own copy
            proc = subprocess.Popen(
                [prometheus_bin, f"--config.file={config}",
                 f"--storage.tsdb.path={tmp / 'tsdb'}", f"--web.listen-address={prom_address}",
                 "--log.level=warn"], stdout=subprocess.DEVNULL, stderr=log)

        def stop_prometheus() -> None:
            proc.terminate()
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()

        stack.callback(stop_prometheus)
        prometheus = f"http://{prom_address}"
        async with aiohttp.ClientSession() as http:
            await wait_ready(http, prometheus, proc, tmp / "prometheus.log")
            await asyncio.wait_for(worker.run(), CRAWL_TIMEOUT_S)
            try:
                yield {"http": http, "prometheus": prometheus, "daemon": addresses[CRAWLED],
                       "worker": worker_address, "jobs": {CRAWLED: crawled, IDLE: idle}}
            finally:
                stop.set()
                await asyncio.gather(*loops)


async def wait_ready(http: aiohttp.ClientSession, prometheus: str, proc: subprocess.Popen[bytes],
                     log: Path) -> None:
    loop = asyncio.get_running_loop()
    deadline = loop.time() + READY_TIMEOUT_S
    while loop.time() < deadline:
        assert proc.poll() is None, f"prometheus exited: {log.read_text()[-2000:]}"
        with contextlib.suppress(aiohttp.ClientError):
            async with http.get(f"{prometheus}/-/ready") as r:
                if r.status == 200:
                    return
        await asyncio.sleep(0.2)
    pytest.fail(f"prometheus not ready after {READY_TIMEOUT_S} s: {log.read_text()[-2000:]}")


def dashboard_exprs() -> list[str]:
    dash = json.loads(DASHBOARD.read_text())
    return [t["expr"] for panel in dash["panels"] for t in panel["targets"]]


# -- the tests ------------------------------------------------------------------------------

async def test_fetch_rate_read_back_with_the_job_label(scraped: dict[str, Any]) -> None:
    http, prometheus = scraped["http"], scraped["prometheus"]
    expr = f'rate(sluice_fetches_total{{job="{CRAWLED}",outcome="fetched"}}[1m])'
    result = await query_until(http, prometheus, expr,
                               lambda r: r and float(r[0]["value"][1]) > 0)
    assert len(result) == 1, result
    labels = result[0]["metric"]
    assert float(result[0]["value"][1]) > 0
    # honor_labels: the exposed job label is kept, not renamed to exported_job
    assert labels["job"] == CRAWLED and "exported_job" not in labels
    assert labels["instance"] == scraped["worker"]
    # every fetch series in the store names its crawl job
    every = await query(http, prometheus, "sluice_fetches_total")
    assert every and {r["metric"]["job"] for r in every} == {CRAWLED}


async def test_two_jobs_stay_apart(scraped: dict[str, Any]) -> None:
    http, prometheus = scraped["http"], scraped["prometheus"]
    jobs = scraped["jobs"]
    expected = {name: (await job.store.counts()).admitted for name, job in jobs.items()}
    assert expected[CRAWLED] > expected[IDLE] > 0
    result = await query_until(
        http, prometheus, "sluice_frontier_admitted_urls",
        lambda r: {x["metric"]["job"]: int(float(x["value"][1])) for x in r} == expected)
    assert {r["metric"]["job"]: int(float(r["value"][1])) for r in result} == expected


def test_dashboard_filters_every_query_on_the_job_variable() -> None:
    dash = json.loads(DASHBOARD.read_text())
    variables = {v["name"]: v for v in dash["templating"]["list"]}
    assert "label_values(sluice_frontier_admitted_urls, job)" in json.dumps(variables["job"])
    exprs = dashboard_exprs()
    assert exprs
    for expr in exprs:
        selectors = METRIC.findall(expr)
        assert selectors, expr
        for name, labels in selectors:
            assert JOB_FILTER in labels, f"{name} in {expr!r} is not filtered on the job"


async def test_every_dashboard_query_finds_series(scraped: dict[str, Any]) -> None:
    """Each series a query names is in a real scrape, and each query, with the job
    variable set, returns series from Prometheus."""
    http, prometheus = scraped["http"], scraped["prometheus"]
    scraped_names: set[str] = set()
    for address in (scraped["daemon"], scraped["worker"]):
        async with http.get(f"http://{address}/metrics") as r:
            assert r.status == 200
            text = await r.text()
        for family in text_string_to_metric_families(text):
            for sample in family.samples:
                scraped_names.add(sample.name)
                assert sample.labels.get("job") == CRAWLED, sample
    for expr in dashboard_exprs():
        for name, _ in METRIC.findall(expr):
            assert name in scraped_names, f"{name} (in {expr!r}) is in no scrape"
        concrete = expr.replace("$job", CRAWLED)
        result = await query_until(http, prometheus, concrete)
        assert result, f"no series for {concrete!r}"


def test_shipped_scrape_config_is_valid_and_keeps_the_job_label() -> None:
    promtool = binary("promtool")
    run = subprocess.run([promtool, "check", "config", str(SCRAPE_CONFIG)],
                         capture_output=True, text=True, timeout=60)
    assert run.returncode == 0, run.stdout + run.stderr
    text = SCRAPE_CONFIG.read_text()
    jobs = re.findall(r"^\s*- job_name:", text, re.M)
    assert jobs and len(re.findall(r"^\s*honor_labels: true\s*$", text, re.M)) == len(jobs)
