"""Prometheus metrics. A registry is passed in; the global one is never used by library code.

Names follow the Prometheus conventions: one ``sluice_`` prefix, base units, ``_total``
on counters, and no label with unbounded values (no URLs, no hosts).
"""

from __future__ import annotations

from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

from frontier.model import STATES


class WorkerMetrics:
    """What a fetch worker counts."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.fetches = Counter(
            "sluice_fetches_total", "Leases ended, by outcome", ["outcome"], registry=registry)
        self.responses = Counter(
            "sluice_http_responses_total", "HTTP responses by status class", ["status_class"],
            registry=registry)
        self.bytes = Counter(
            "sluice_fetched_body_bytes_total", "Decoded body bytes fetched", registry=registry)
        self.duration = Histogram(
            "sluice_fetch_duration_seconds", "Time from request to last body byte",
            buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60),
            registry=registry)
        self.links = Counter(
            "sluice_links_discovered_total", "Links offered to the frontier", registry=registry)
        self.near_duplicates = Counter(
            "sluice_near_duplicates_total", "Pages found near-duplicate by SimHash",
            registry=registry)
        self.in_flight = Gauge(
            "sluice_worker_in_flight", "Leases this worker is working on", registry=registry)
        self.store_errors = Counter(
            "sluice_store_errors_total", "Frontier calls that failed and were retried",
            registry=registry)
        self._children: dict[tuple[int, str], Any] = {}  # labels() looks up under a lock

    def count_outcome(self, outcome: str) -> None:
        """One more lease ended with ``outcome``."""
        self._child(self.fetches, "outcome", outcome).inc()

    def count_response(self, status: int) -> None:
        """One more HTTP response with this status (counted by class: 2xx, 4xx...)."""
        self._child(self.responses, "status_class", f"{status // 100}xx").inc()

    def _child(self, metric: Any, label: str, value: str) -> Any:
        key = (id(metric), value)
        child = self._children.get(key)
        if child is None:
            child = self._children[key] = metric.labels(**{label: value})
        return child


class FrontierMetrics:
    """Gauges of the whole frontier, refreshed by the daemon's stats loop."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.urls = Gauge(
            "sluice_frontier_urls", "Admitted URLs by state", ["state"], registry=registry)
        self.admitted = Gauge(
            "sluice_frontier_admitted_urls", "URLs admitted in all", registry=registry)
        self.reaped = Counter(
            "sluice_leases_reaped_total", "Expired leases returned by the reaper", ["result"],
            registry=registry)

    def update(self, counts: dict[str, int]) -> None:
        self.admitted.set(counts.get("admitted", 0))
        for state in STATES:
            self.urls.labels(state=state).set(counts.get(state, 0))
