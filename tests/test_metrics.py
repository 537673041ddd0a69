"""Metric names follow the Prometheus naming conventions (prometheus.io, "Metric and label
naming"), and the Grafana dashboard only queries metrics that exist."""

from __future__ import annotations

import json
import re
from pathlib import Path

from prometheus_client import CollectorRegistry

from frontier.metrics import FrontierMetrics, WorkerMetrics

DASHBOARD = Path(__file__).resolve().parent.parent / "deploy" / "grafana" / "sluice-dashboard.json"
UNBOUNDED_LABELS = {"url", "host", "path", "domain"}


def registry() -> CollectorRegistry:
    reg = CollectorRegistry()
    WorkerMetrics(reg, "t")
    FrontierMetrics(reg, "t").update_budget(100)
    return reg


def test_names_follow_the_conventions() -> None:
    for family in registry().collect():
        assert family.name.startswith("sluice_")  # one application prefix
        if family.type == "histogram":
            assert family.name.endswith("_seconds")  # base units
        for sample in family.samples:
            assert not UNBOUNDED_LABELS & set(sample.labels)  # no unbounded label values
            assert sample.labels["job"] == "t"  # every series names its crawl job


_TYPE_LINE = re.compile(r"# TYPE (\S+) (\S+)")
_SAMPLE_LINE = re.compile(r"([a-zA-Z_:][a-zA-Z0-9_:]*)(?:\{[^}]*\})? \S+")


async def test_a_scrape_names_every_counter_sample_with_total() -> None:
    # What a scrape of /metrics returns, read as text (prometheus.io, "Exposition
    # formats", text format 0.0.4: a "# TYPE" line, then the samples of that metric):
    # a counter is named <name>_total and nothing else is ("Metric and label naming":
    # an accumulating count has the suffix "total").
    from aiohttp import ClientSession

    from frontier.daemon import metrics_app, serve

    reg = CollectorRegistry()
    WorkerMetrics(reg, "scraped").count_outcome("fetched")
    FrontierMetrics(reg, "scraped").update_budget(100)
    runner = await serve(metrics_app(reg), "127.0.0.1:0")
    try:
        port = runner.addresses[0][1]
        async with ClientSession() as session:
            async with session.get(f"http://127.0.0.1:{port}/metrics") as response:
                assert response.status == 200
                assert response.headers["Content-Type"].startswith("text/plain")
                text = await response.text()
    finally:
        await runner.cleanup()
    types = dict(_TYPE_LINE.findall(text))
    counters = {name for name, kind in types.items() if kind == "counter"}
    assert {"sluice_fetches_total", "sluice_warc_bytes_total"} <= counters
    for name in types:
        assert name.endswith("_total") == (name in counters), name
    samples = 0
    for line in text.splitlines():
        match = _SAMPLE_LINE.fullmatch(line)
        if line.startswith("#") or match is None:
            continue
        sample = match.group(1)
        family = max((n for n in types if sample.startswith(n)), key=len, default=None)
        assert family is not None, line  # every sample follows its "# TYPE" line
        if family in counters:
            assert sample == family, line
            samples += 1
    assert samples >= len(counters)
    assert 'sluice_fetches_total{job="scraped",outcome="fetched"} 1.0' in text


def test_dashboard_queries_existing_metrics() -> None:
    known = set()
    for family in registry().collect():
        known.add(family.name + ("_total" if family.type == "counter" else ""))
        known.update(s.name for s in family.samples)
    dash = json.loads(DASHBOARD.read_text())
    used = set()
    for panel in dash["panels"]:
        for target in panel["targets"]:
            used.update(re.findall(r"sluice_[a-z_]+", target["expr"]))
    assert used and used <= known | {n + "_bucket" for n in known}, used - known


def test_series_wait_for_the_job_and_carry_it() -> None:
    """No series leaves without the job label: a worker's metrics expose nothing until
    the worker names its job."""
    reg = CollectorRegistry()
    metrics = WorkerMetrics(reg)
    assert list(reg.collect()) == []
    metrics.bind_job("news")
    metrics.count_outcome("fetched")
    assert reg.get_sample_value("sluice_fetches_total", {"job": "news", "outcome": "fetched"}) == 1


def test_warc_bytes_are_the_bytes_of_the_files_written(tmp_path: Path) -> None:
    """The WARC byte counter equals the files' sizes on disk, and a closed file moved away
    keeps counting: a counter never goes down (prometheus.io, "Metric types")."""
    from datetime import UTC, datetime

    from workers.archive import WarcArchive

    reg = CollectorRegistry()
    metrics = WorkerMetrics(reg, "t")
    archive = WarcArchive(tmp_path / "a", software="t", operator=None, job="t")
    metrics.watch_archive(archive)

    def write() -> None:
        archive.write_exchange("http://a.test/", ("GET", "/", []), 200, "OK",
                               [("Content-Type", "text/html")], b"<p>hi</p>" * 100,
                               datetime.now(UTC))

    def counted() -> float | None:
        return reg.get_sample_value("sluice_warc_bytes_total", {"job": "t"})

    write()
    archive.close()
    first = archive.files[0].stat().st_size
    assert first > 0 and counted() == first
    archive.files[0].rename(tmp_path / "shipped.warc.gz")
    assert counted() == first
    write()
    archive.close()
    assert counted() == first + archive.files[1].stat().st_size
