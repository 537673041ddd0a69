"""Prometheus metrics. A registry is passed in; the global one is never used by library code.

Names follow the Prometheus conventions: one ``sluice_`` prefix, base units, ``_total``
on counters, and no label with unbounded values (no URLs, no hosts: the status page
shows the busiest and slowest hosts instead).

Every series carries a ``job`` label naming the crawl job, so that the series of two
jobs scraped by one Prometheus stay apart. The label is added when the metrics are
collected (a constant label), so the worker's hot path counts on plain metrics.
Prometheus sets a ``job`` label of its own from the scrape config; scrape configs keep
ours with ``honor_labels: true`` (deploy/prometheus.yml).
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any, Protocol

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.core import CounterMetricFamily, Metric

from frontier.model import STATES, AdmitResult, Outcome
from frontier.robots_rules import STATE_ALLOW_ALL, STATE_DISALLOW_ALL, STATE_RULES

JOB_LABEL = "job"
ROBOTS_POLICIES = (STATE_RULES, STATE_ALLOW_ALL, STATE_DISALLOW_ALL)  # RFC 9309 s.2.3.1
STATUS_CLASSES = ("1xx", "2xx", "3xx", "4xx", "5xx")
ADMIT_RESULTS = ("new", "duplicate", "excluded")
LOST_STATUSES = ("expired", "not_held")  # the complete script's refusals
REAP_RESULTS = ("requeued", "dead", "excluded")
HOST_CONTROLS = ("paused", "blocked", "boosted", "delayed")


class JobLabelled:
    """A collector that exposes its metrics with ``job="<name>"`` on every sample.

    It exposes nothing until the job is known (``job`` is None): a series without the
    label would mix with other jobs' series.
    """

    def __init__(self, job: str | None) -> None:
        self.job = job
        self.metrics: list[Any] = []

    def add(self, metric: Any) -> Any:
        self.metrics.append(metric)
        return metric

    def describe(self) -> Iterator[Metric]:
        for metric in self.metrics:
            yield from metric.describe()

    def collect(self) -> Iterator[Metric]:
        job = self.job
        if job is None:
            return
        for metric in self.metrics:
            for family in metric.collect():
                labelled = Metric(family.name, family.documentation, family.type, family.unit)
                labelled.samples = [s._replace(labels={JOB_LABEL: job, **s.labels})
                                    for s in family.samples]
                yield labelled


class Archive(Protocol):
    """What :class:`WarcBytes` reads of a WARC writer (workers/archive.py)."""

    files: list[Path]

    @property
    def current_path(self) -> Path | None: ...


class WarcBytes:
    """A counter of WARC bytes written, read from the sizes of the archives' files.

    A closed file's size is final and read once; only open files are looked at again. A
    file moved away after closing keeps counting with the size it was last seen with.
    """

    name = "sluice_warc_bytes"
    documentation = "Bytes of WARC files written (gzip members, as on disk)"

    def __init__(self) -> None:
        self.archives: list[Archive] = []
        self._sizes: dict[Path, int] = {}
        self._final: set[Path] = set()

    def watch(self, archive: Archive) -> None:
        self.archives.append(archive)

    def total(self) -> int:
        for archive in self.archives:
            current = archive.current_path
            for path in list(archive.files):
                if path in self._final:
                    continue
                try:
                    size = os.stat(path).st_size
                except OSError:
                    size = 0
                self._sizes[path] = max(self._sizes.get(path, 0), size)
                if path != current:
                    self._final.add(path)
        return sum(self._sizes.values())

    def describe(self) -> Iterable[Metric]:
        return [CounterMetricFamily(self.name, self.documentation)]

    def collect(self) -> Iterable[Metric]:
        return [CounterMetricFamily(self.name, self.documentation, value=self.total())]


class WorkerMetrics:
    """What a fetch worker counts. ``job`` may come later, from the worker (:meth:`bind_job`)."""

    def __init__(self, registry: CollectorRegistry, job: str | None = None) -> None:
        self._exposed = out = JobLabelled(job)
        self.fetches = out.add(Counter(
            "sluice_fetches_total", "Leases ended, by outcome", ["outcome"], registry=None))
        self.responses = out.add(Counter(
            "sluice_http_responses_total", "HTTP responses by status class", ["status_class"],
            registry=None))
        self.bytes = out.add(Counter(
            "sluice_fetched_body_bytes_total", "Decoded body bytes fetched", registry=None))
        self.duration = out.add(Histogram(
            "sluice_fetch_duration_seconds", "Time from request to last body byte",
            buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60),
            registry=None))
        self.links = out.add(Counter(
            "sluice_links_discovered_total", "Links offered to the frontier", registry=None))
        self.admissions = out.add(Counter(
            "sluice_admissions_total",
            "Links offered to the frontier by what admission did: new, duplicate (seen "
            "before) or excluded (scope, host budget, blocked host)", ["result"], registry=None))
        self.near_duplicates = out.add(Counter(
            "sluice_near_duplicates_total", "Pages found near-duplicate by SimHash",
            registry=None))
        self.exact_duplicates = out.add(Counter(
            "sluice_exact_duplicates_total", "Pages whose payload was captured before under "
            "another URL (written as revisit records)", registry=None))
        self.in_flight = out.add(Gauge(
            "sluice_worker_in_flight", "Leases this worker is working on", registry=None))
        self.store_errors = out.add(Counter(
            "sluice_store_errors_total", "Frontier calls that failed and were retried",
            registry=None))
        self.robots_fetches = out.add(Counter(
            "sluice_robots_fetches_total",
            "robots.txt fetches by the policy the outcome stands for (RFC 9309 s.2.3.1): "
            "rules (2xx), allow_all (4xx), disallow_all (5xx, 429, unreachable)", ["policy"],
            registry=None))
        self.robots_refusals = out.add(Counter(
            "sluice_robots_refused_urls_total",
            "Leased URLs not fetched: robots.txt disallows them",
            registry=None))
        self.leases_lost = out.add(Counter(
            "sluice_leases_lost_total",
            "Leases that expired before this worker finished them; the frontier refused the "
            "completion (expired: past its expiry; not_held: reaped and handed out again)",
            ["status"], registry=None))
        self.warc_bytes = out.add(WarcBytes())
        registry.register(out)
        self._children: dict[tuple[int, str], Any] = {}  # labels() looks up under a lock
        for family, label, values in (
                (self.fetches, "outcome", [o.value for o in Outcome]),
                (self.responses, "status_class", STATUS_CLASSES),
                (self.admissions, "result", ADMIT_RESULTS),
                (self.robots_fetches, "policy", ROBOTS_POLICIES),
                (self.leases_lost, "status", LOST_STATUSES)):
            for value in values:  # series exist at 0 before the first event
                self._child(family, label, value)

    @property
    def job(self) -> str | None:
        return self._exposed.job

    def bind_job(self, job: str) -> None:
        """Label every series with this job (a worker calls it with its job's name)."""
        self._exposed.job = job

    def count_outcome(self, outcome: str, reason: str | None = None) -> None:
        """One more lease ended with ``outcome`` (and ``reason``)."""
        self._child(self.fetches, "outcome", outcome).inc()
        if reason == "robots" and outcome == Outcome.EXCLUDED:
            self.robots_refusals.inc()

    def count_response(self, status: int) -> None:
        """One more HTTP response with this status (counted by class: 2xx, 4xx...)."""
        self._child(self.responses, "status_class", f"{status // 100}xx").inc()

    def count_admitted(self, result: AdmitResult) -> None:
        """What admission did with one batch of links."""
        for label, n in (("new", result.new), ("duplicate", result.duplicates),
                         ("excluded", result.excluded)):
            if n:
                self._child(self.admissions, "result", label).inc(n)

    def count_robots(self, policy: str) -> None:
        """One more robots.txt fetch, by the policy it stands for."""
        self._child(self.robots_fetches, "policy", policy).inc()

    def count_lost(self, status: str) -> None:
        """One more completion refused: the lease had expired (``status``)."""
        self._child(self.leases_lost, "status", status).inc()

    def watch_archive(self, archive: Archive) -> None:
        """Count the bytes of this WARC writer's files."""
        self.warc_bytes.watch(archive)

    def _child(self, metric: Any, label: str, value: str) -> Any:
        key = (id(metric), value)
        child = self._children.get(key)
        if child is None:
            child = self._children[key] = metric.labels(**{label: value})
        return child


class FrontierMetrics:
    """Gauges of the whole frontier, refreshed by the daemon's stats loop."""

    def __init__(self, registry: CollectorRegistry, job: str | None = None) -> None:
        self._exposed = out = JobLabelled(job)
        self.urls = out.add(Gauge(
            "sluice_frontier_urls", "Admitted URLs by state", ["state"], registry=None))
        self.admitted = out.add(Gauge(
            "sluice_frontier_admitted_urls", "URLs admitted in all", registry=None))
        self.reaped = out.add(Counter(
            "sluice_leases_reaped_total",
            "Expired leases returned by the reaper, by what became of their URL", ["result"],
            registry=None))
        self.budget = Gauge(  # exposed once the job is known to have a budget
            "sluice_page_budget", "The job's page budget (budget.max_pages); absent when unlimited",
            registry=None)
        self.workers = out.add(Gauge(
            "sluice_workers_seen", "Workers whose heartbeat has not expired", registry=None))
        self.hosts = out.add(Gauge(
            "sluice_hosts_known", "Politeness keys (hosts) the frontier has a record of",
            registry=None))
        self.mirrors = out.add(Gauge(
            "sluice_mirror_hosts", "Hosts found to be mirrors of other hosts (their pages "
            "mostly copies), their budgets cut", registry=None))
        self.mirror_cut = out.add(Gauge(
            "sluice_mirror_excluded_urls", "URLs excluded because their host is a mirror "
            "(reason mirror_host)", registry=None))
        self.revisit_pages = out.add(Gauge(
            "sluice_revisit_pages", "Pages kept fresh by revisits: tracked, due (their time "
            "has come) and fresh (estimated unchanged since their last fetch)", ["state"],
            registry=None))
        self.revisit_freshness = out.add(Gauge(
            "sluice_revisit_freshness", "Estimated freshness of the revisited collection "
            "(0..1, from each sampled page's estimated change rate)", registry=None))
        self.controlled = out.add(Gauge(
            "sluice_hosts_controlled",
            "Hosts under operator control, by control (paused, blocked, boosted, delayed); "
            "from the hosts the status page read", ["control"], registry=None))
        registry.register(out)
        for state in STATES:
            self.urls.labels(state=state)
        for result in REAP_RESULTS:
            self.reaped.labels(result=result)
        for control in HOST_CONTROLS:
            self.controlled.labels(control=control)

    @property
    def job(self) -> str | None:
        return self._exposed.job

    def update(self, counts: dict[str, int]) -> None:
        self.admitted.set(counts.get("admitted", 0))
        for state in STATES:
            self.urls.labels(state=state).set(counts.get(state, 0))

    def update_budget(self, max_pages: int | None) -> None:
        """The page budget; an unlimited job has no such series."""
        if max_pages is None:
            return
        if self.budget not in self._exposed.metrics:
            self._exposed.add(self.budget)
        self.budget.set(max_pages)

    def update_mirrors(self, hosts: int, excluded: int) -> None:
        """Mirror hosts found, and the URLs excluded for it."""
        self.mirrors.set(hosts)
        self.mirror_cut.set(excluded)

    def update_revisits(self, figures: dict[str, Any]) -> None:
        """Revisit figures (frontier/revisit_store.py read_revisits)."""
        for state in ("tracked", "due", "fresh"):
            if figures.get(state) is not None:
                self.revisit_pages.labels(state=state).set(figures[state])
        if figures.get("freshness") is not None:
            self.revisit_freshness.set(figures["freshness"])

    def update_board(self, workers: int, hosts_known: int, controlled: dict[str, int]) -> None:
        """Figures the status board read: live workers, known hosts, hosts under control."""
        self.workers.set(workers)
        self.hosts.set(hosts_known)
        for control in HOST_CONTROLS:
            self.controlled.labels(control=control).set(controlled.get(control, 0))
