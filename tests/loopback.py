"""A hand-made site for a test: one aiohttp handler answering every GET on a free
loopback port (never another address)."""

from __future__ import annotations

from collections.abc import Awaitable, Callable

from aiohttp import web

Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]


async def start_site(handle: Handler) -> tuple[web.AppRunner, int]:
    """Serve ``handle`` for every path on 127.0.0.1; returns (runner, port). The caller
    ends it with ``await runner.cleanup()``."""
    app = web.Application()
    app.router.add_get("/{tail:.*}", handle)
    runner = web.AppRunner(app)
    await runner.setup()
    site = web.TCPSite(runner, "127.0.0.1", 0)
    await site.start()
    return runner, site._server.sockets[0].getsockname()[1]  # type: ignore[union-attr]
