"""The status page: a static HTML page whose own script (frontier/static/status.js, no
third-party code) reads ``/status`` every two seconds and draws it.

The page and its files are served from the package; nothing is built from data on the
server, and the script puts every value on the page as text. A Content-Security-Policy
allows scripts and styles from the daemon only, so even text that got past the script
as markup could not run.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

from aiohttp import web

STATIC_DIR = Path(__file__).resolve().parent / "static"
PAGE_FILE = "status.html"
STATIC_TYPES = {"status.js": "text/javascript", "status.css": "text/css"}
CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'; "
    "img-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'")
HEADERS = {"Content-Security-Policy": CONTENT_SECURITY_POLICY,
           "X-Content-Type-Options": "nosniff", "Referrer-Policy": "no-referrer",
           "Cache-Control": "no-cache"}


@cache
def _read(name: str) -> bytes:
    return (STATIC_DIR / name).read_bytes()


async def page(request: web.Request) -> web.Response:
    """GET /: the status page."""
    return web.Response(body=_read(PAGE_FILE), content_type="text/html", charset="utf-8",
                        headers=HEADERS)


async def static_file(request: web.Request) -> web.Response:
    """GET /static/{name}: the page's script and style sheet (nothing else)."""
    name = request.match_info["name"]
    if name not in STATIC_TYPES:
        raise web.HTTPNotFound()
    return web.Response(body=_read(name), content_type=STATIC_TYPES[name], charset="utf-8",
                        headers=HEADERS)


def add_routes(app: web.Application) -> None:
    """The page at ``/`` and its files under ``/static/``."""
    app.router.add_get("/", page)
    app.router.add_get("/static/{name}", static_file)
