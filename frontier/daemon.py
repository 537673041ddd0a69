"""The scheduler daemon: reaper, stats, and the admin HTTP API (status, metrics, host controls).

Its loops are owned by one lifecycle: started together, stopped together and awaited.
A loop ends when its stop event is set, not on cancellation alone: redis-py (8.1 here)
can absorb a cancellation that lands inside a command, and a loop that relied on it
then ran on forever after the crawl was over.
"""

from __future__ import annotations

import asyncio
import json
import logging
from typing import Any

from aiohttp import web
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST

from frontier.admin_auth import admin_guard, allowed_host_headers, token_for
from frontier.budget import PageBudget
from frontier.exceptions import SluiceError, StoreUnavailable
from frontier.job import Job
from frontier.metrics import FrontierMetrics
from frontier.store import HOST_ACTIONS

log = logging.getLogger(__name__)


async def wait_or_timeout(event: asyncio.Event, seconds: float) -> bool:
    """Wait until ``event`` is set or ``seconds`` pass; True if it was set."""
    try:
        await asyncio.wait_for(event.wait(), seconds)
    except TimeoutError:
        return False
    return True

REAP_EVERY_S = 1.0
STATS_EVERY_S = 2.0


class Daemon:
    """Background duties of one job."""

    def __init__(self, job: Job, registry: CollectorRegistry) -> None:
        self.job = job
        self.registry = registry
        self.metrics = FrontierMetrics(registry)
        self.budget = PageBudget(job.redis, job.store.keys, job.settings.budget.max_pages)
        self.last_counts: dict[str, Any] = {}
        self._budget_seen: tuple[int, int] | None = None

    async def reap_once(self) -> None:
        for result, n in (await self.job.store.reap()).items():
            self.metrics.reaped.labels(result=result).inc(n)

    async def stats_once(self) -> dict[str, Any]:
        counts = await self.job.store.counts()
        data = counts.as_dict()
        data["balanced"] = counts.balanced
        self.metrics.update({k: v for k, v in data.items() if isinstance(v, int)})
        await self._reconcile_budget(counts.fetched + counts.leased)
        self.last_counts = data
        return data

    async def _reconcile_budget(self, expected: int) -> None:
        """Fix the page-budget counter: up at once; down only when it sat still twice.

        Workers reserve slots just before leasing, so a counter above fetched + leased
        is normal for a moment; one that stays put while nothing moves was leaked by a
        worker that died holding slots.
        """
        used = await self.budget.used()
        if used is None:
            return
        if used < expected:
            await self.budget.reconcile(expected)
        elif used > expected and self._budget_seen == (used, expected):
            await self.budget.reconcile(expected)
        self._budget_seen = (used, expected)

    @staticmethod
    async def _every(seconds: float, step: Any, stop: asyncio.Event) -> None:
        """Run ``step`` every ``seconds`` until ``stop`` is set."""
        while not stop.is_set():
            try:
                await step()
            except StoreUnavailable as exc:
                log.warning("frontier unavailable: %s", exc)
            await wait_or_timeout(stop, seconds)

    async def run(self, stop: asyncio.Event) -> None:
        """Run the loops until ``stop`` is set; then every loop is stopped and awaited."""
        tasks = [asyncio.create_task(self._every(REAP_EVERY_S, self.reap_once, stop)),
                 asyncio.create_task(self._every(STATS_EVERY_S, self.stats_once, stop))]
        try:
            await stop.wait()
        finally:
            stop.set()  # the loops end on it even if a cancellation below is absorbed
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)

    # -- admin API ------------------------------------------------------------------------

    def app(self, middlewares: tuple[Any, ...] = ()) -> web.Application:
        """The admin API; :func:`serve_admin` serves it behind the admin guard."""
        app = web.Application(middlewares=middlewares)
        app.router.add_get("/", self._status_page)
        app.router.add_get("/status", self._status)
        app.router.add_get("/metrics", self._metrics)
        app.router.add_get("/hosts/{host}", self._host)
        app.router.add_post("/hosts/{host}/{action}", self._control)
        return app

    async def _status(self, request: web.Request) -> web.Response:
        return web.json_response(await self.stats_once())

    async def _metrics(self, request: web.Request) -> web.Response:
        return web.Response(body=generate_latest(self.registry),
                            headers={"Content-Type": CONTENT_TYPE_LATEST})

    async def _host(self, request: web.Request) -> web.Response:
        return web.json_response(await self.job.store.host_info(request.match_info["host"]))

    async def _control(self, request: web.Request) -> web.Response:
        host, action = request.match_info["host"], request.match_info["action"]
        if action not in HOST_ACTIONS:
            raise web.HTTPBadRequest(text=f"action must be one of {', '.join(HOST_ACTIONS)}")
        raw = request.query.get("value")
        try:
            value = float(raw) if raw is not None else None
            state = await self.job.store.control(host, action, value)
        except (ValueError, SluiceError) as exc:
            raise web.HTTPBadRequest(text=str(exc)) from exc
        return web.json_response({"host": host, "action": action, "state": state})

    async def _status_page(self, request: web.Request) -> web.Response:
        data = await self.stats_once()
        rows = "".join(f"<tr><td>{k}</td><td>{v}</td></tr>"
                       for k, v in data.items() if k != "reasons")
        reasons = "".join(f"<tr><td>{k}</td><td>{v}</td></tr>" for k, v in data["reasons"].items())
        html = (f"<!doctype html><title>sluice: {self.job.settings.name}</title>"
                f"<h1>sluice job {self.job.settings.name}</h1><table>{rows}</table>"
                f"<h2>Reasons</h2><table>{reasons}</table>"
                f"<p><a href='/metrics'>metrics</a> · <a href='/status'>JSON</a></p>")
        return web.Response(text=html, content_type="text/html")


async def serve(app: web.Application, address: str) -> web.AppRunner:
    """Start an aiohttp app on HOST:PORT; the caller cleans the runner up."""
    host, _, port = address.rpartition(":")
    runner = web.AppRunner(app, access_log=None)
    await runner.setup()
    await web.TCPSite(runner, host or "127.0.0.1", int(port)).start()
    return runner


async def serve_admin(daemon: Daemon, address: str) -> web.AppRunner:
    """Serve the daemon's admin API on HOST:PORT behind the admin guard
    (frontier/admin_auth.py: token for changes, no cross-site posts, Host checked)."""
    settings = daemon.job.settings
    token = token_for(settings, address)
    guard = admin_guard(token, allowed_host_headers(address, settings.admin.allowed_hosts))
    return await serve(daemon.app((guard,)), address)


def metrics_app(registry: CollectorRegistry) -> web.Application:
    """A /metrics-only app for workers."""

    async def metrics(request: web.Request) -> web.Response:
        return web.Response(body=generate_latest(registry),
                            headers={"Content-Type": CONTENT_TYPE_LATEST})

    app = web.Application()
    app.router.add_get("/metrics", metrics)
    return app


def dumps(data: Any) -> str:
    return json.dumps(data, indent=2, sort_keys=True)
