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
    WorkerMetrics(reg)
    FrontierMetrics(reg)
    return reg


def test_names_follow_the_conventions() -> None:
    for family in registry().collect():
        assert family.name.startswith("sluice_")  # one application prefix
        if family.type == "counter":  # exposed with _total (the client keeps the base name)
            assert not family.name.endswith("_total")
        if family.type == "histogram":
            assert family.name.endswith("_seconds")  # base units
        for sample in family.samples:
            assert not UNBOUNDED_LABELS & set(sample.labels)  # no unbounded label values


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
