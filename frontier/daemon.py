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
from frontier import controls
from frontier.exceptions import ConfigError, SluiceError, StoreUnavailable, UrlError
from frontier.job import Job
from frontier.metrics import FrontierMetrics
from frontier import status_page
from frontier.status_board import StatusBoard

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

    def __init__(self, job: Job, registry: CollectorRegistry, *,
                 stats_every_s: float = STATS_EVERY_S) -> None:
        self.job = job
        self.registry = registry
        self.stats_every_s = stats_every_s
        self.metrics = FrontierMetrics(registry, job.settings.name)
        self.budget = PageBudget(job.redis, job.store.keys, job.settings.budget.max_pages)
        self.board = StatusBoard(job, self.budget, self.metrics)
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

    async def observe(self) -> None:
        """The stats loop's step: :meth:`stats_once`, then a sample for the status board."""
        data = await self.stats_once()
        try:
            await self.board.refresh(data["fetched"], data["reasons"])
        except SluiceError as exc:  # the board waits for the next step; the loop goes on
            log.warning("status board not refreshed: %s", exc)

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
                 asyncio.create_task(self._every(self.stats_every_s, self.observe, stop))]
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
        status_page.add_routes(app)
        app.router.add_get("/status", self._status)
        app.router.add_get("/metrics", self._metrics)
        app.router.add_get("/hosts", self._hosts)
        app.router.add_get("/hosts/{host}", self._host)
        app.router.add_post("/hosts/{host}/{action}", self._control)
        app.router.add_post("/seeds", self._seeds)
        return app

    async def _seeds(self, request: web.Request) -> web.Response:
        """POST /seeds {"urls": [...]}: add seeds in the job's scope; each rejected one
        comes back with its position, text and reason (frontier/seeds.py)."""
        from frontier.seeds import add_seeds, seeds_from_json
        try:
            try:
                body = await request.json()
            except ValueError:
                raise ConfigError("the request body is not JSON") from None
            return web.json_response(await add_seeds(self.job, seeds_from_json(body)))
        except SluiceError as exc:
            return error_response(exc)

    async def _status(self, request: web.Request) -> web.Response:
        """GET /status: what the status page shows (frontier/status_board.py), as JSON."""
        try:
            return web.json_response(await self.board.snapshot())
        except SluiceError as exc:
            return error_response(exc)

    async def _metrics(self, request: web.Request) -> web.Response:
        return web.Response(body=generate_latest(self.registry),
                            headers={"Content-Type": CONTENT_TYPE_LATEST})

    async def _hosts(self, request: web.Request) -> web.Response:
        """GET /hosts[?state=paused|blocked|boosted|delayed]: the hosts under control."""
        try:
            which = controls.list_filter(request.query.get("state"))
            return web.json_response(await self.job.store.controlled_hosts(which))
        except SluiceError as exc:
            return error_response(exc)

    async def _host(self, request: web.Request) -> web.Response:
        """GET /hosts/{host}: one host's stored fields (404 if the frontier has none)."""
        store = self.job.store
        try:
            key = controls.lookup_key(store.settings, request.match_info["host"])
            if not await store.host_known(key):
                return web.json_response(
                    {"error": f"unknown host {controls.echo(key)}"}, status=404)
            return web.json_response({"host": key, **await store.host_info(key)})
        except SluiceError as exc:
            return error_response(exc)

    async def _control(self, request: web.Request) -> web.Response:
        """POST /hosts/{host}/{action}[?value=V][&new=1] (or value and new in a JSON body)."""
        store = self.job.store
        try:
            fields = await control_fields(request)
            command = controls.host_command(
                store.settings, request.match_info["host"], request.match_info["action"],
                fields.get("value"), new=fields.get("new", False))
            return web.json_response(await controls.apply(store, command))
        except SluiceError as exc:
            return error_response(exc)


async def control_fields(request: web.Request) -> dict[str, Any]:
    """``value`` and ``new`` of a control request: from the query, or a JSON object body."""
    fields: dict[str, Any] = {k: request.query[k] for k in ("value", "new") if k in request.query}
    if request.can_read_body and request.content_type == "application/json":
        try:
            body = await request.json()
        except ValueError:
            raise ConfigError("the request body is not JSON") from None
        if not isinstance(body, dict) or set(body) - {"value", "new"}:
            raise ConfigError('the request body is a JSON object with "value" and "new" only')
        fields.update(body)
    return fields


def error_response(exc: SluiceError) -> web.Response:
    """A JSON error of one line: 400 for refused input, 503 while Redis is unavailable."""
    status = 400 if isinstance(exc, (ConfigError, UrlError)) else (
        503 if isinstance(exc, StoreUnavailable) else 500)
    return web.json_response({"error": " ".join(str(exc).split())}, status=status)


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
