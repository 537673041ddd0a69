"""Who may change a running crawl through the admin HTTP API.

Every request that changes state (any method but GET, HEAD and OPTIONS) must carry
``Authorization: Bearer <token>``, compared in constant time, and must be one a web page
cannot forge across sites: a JSON body or the ``X-Sluice-Admin`` header (a cross-site
form post can send neither without a CORS preflight, which this API never grants), and
no ``Origin`` other than the API's own. Every request, reads included, must name the API
in its ``Host`` header: its own address, localhost, or a configured name (a guard against
DNS rebinding). A refused request gets 401 or 403 and changes nothing.

The token comes from ``SLUICE_ADMIN_TOKEN`` or ``admin.token_file``; without either, an
API on a loopback address makes a random one and keeps it in the state folder
(``admin-token``, mode 0600), where the commands on the same machine find it. An API on
any other address refuses to start without a token.
"""

from __future__ import annotations

import hmac
import ipaddress
import os
import secrets
from collections.abc import Awaitable, Callable
from pathlib import Path

from aiohttp import web

from frontier.exceptions import ConfigError
from frontier.settings import JobSettings

TOKEN_ENV = "SLUICE_ADMIN_TOKEN"
TOKEN_FILE_NAME = "admin-token"
TOKEN_BYTES = 32
MIN_TOKEN_CHARS = 16
CSRF_HEADER = "X-Sluice-Admin"
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
LOOPBACK_NAMES = ("localhost", "127.0.0.1", "[::1]")

Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]


def split_address(address: str) -> tuple[str, int]:
    """HOST:PORT (HOST may be empty, or a bracketed IPv6 literal) -> (host, port)."""
    host, sep, port = address.rpartition(":")
    if not sep or not port.isdigit() or not 0 < int(port) < 65536:
        raise ConfigError(f"admin address {address!r}: expected HOST:PORT, e.g. 127.0.0.1:8700")
    return host.strip("[]") or "127.0.0.1", int(port)


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _valid(token: str, origin: str) -> str:
    token = token.strip()
    if len(token) < MIN_TOKEN_CHARS or not token.isascii() or not token.isprintable():
        raise ConfigError(f"admin token from {origin}: use at least {MIN_TOKEN_CHARS} printable "
                          "ASCII characters (e.g. the output of 'openssl rand -hex 32')")
    return token


def configured_token(settings: JobSettings) -> str | None:
    """The operator's token: ``SLUICE_ADMIN_TOKEN``, else ``admin.token_file``, else None."""
    if os.environ.get(TOKEN_ENV):
        return _valid(os.environ[TOKEN_ENV], TOKEN_ENV)
    path = settings.admin.token_file
    if path is None:
        return None
    try:
        return _valid(Path(path).read_text(encoding="utf-8"), str(path))
    except OSError as exc:
        raise ConfigError(f"admin.token_file {path}: {exc.strerror or exc}") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"admin.token_file {path}: not text") from exc


def local_token_path(state_dir: Path) -> Path:
    return Path(state_dir) / TOKEN_FILE_NAME


def local_token(state_dir: Path) -> str:
    """The token kept in a state folder, made (mode 0600) when there is none."""
    path = local_token_path(state_dir)
    try:
        return _valid(path.read_text(encoding="utf-8"), str(path))
    except (OSError, ConfigError):
        pass
    path.parent.mkdir(parents=True, exist_ok=True)
    token = secrets.token_hex(TOKEN_BYTES)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as out:
        out.write(token + "\n")
    return token


def token_for(settings: JobSettings, address: str) -> str:
    """The token an API listening on ``address`` requires; refuses a non-loopback
    address without one the operator chose."""
    host, _ = split_address(address)
    token = configured_token(settings)
    if token is not None:
        return token
    if not is_loopback(host):
        raise ConfigError(
            f"the admin API on {address} is reachable from other machines and needs a token: "
            f"set {TOKEN_ENV} or admin.token_file (or listen on 127.0.0.1)")
    return local_token(settings.state_dir)


def allowed_host_headers(address: str, extra: tuple[str, ...] = ()) -> frozenset[str]:
    """Host header names the API answers to besides IP literals (lower case, with and
    without its port): localhost on a loopback address, and the configured names."""
    host, port = split_address(address)
    names = {f"[{host}]" if ":" in host else host}
    if is_loopback(host):
        names |= set(LOOPBACK_NAMES)
    names |= {n.lower() for n in extra}
    return frozenset(names | {f"{n}:{port}" for n in names})


def host_allowed(header: str, names: frozenset[str]) -> bool:
    """A Host header naming the API, or an IP literal (DNS rebinding needs a name)."""
    value = header.lower()
    if value in names:
        return True
    host = value.rsplit(":", 1)[0] if value.count(":") == 1 or "]:" in value else value
    try:
        ipaddress.ip_address(host.strip("[]"))
    except ValueError:
        return False
    return True


def bearer_matches(header: str, expected: bytes) -> bool:
    """True if an Authorization header is ``Bearer <expected>`` (RFC 6750 s.2.1; the
    scheme's case does not matter), compared in constant time."""
    scheme, _, given = header.strip().partition(" ")
    return scheme.lower() == "bearer" and hmac.compare_digest(
        given.strip().encode("utf-8", "surrogateescape"), expected)


def _refuse(status: type[web.HTTPException], why: str) -> web.HTTPException:
    return status(text=f'{{"error": "{why}"}}', content_type="application/json")


def admin_guard(token: str, hosts: frozenset[str]) -> Callable[[web.Request, Handler], Awaitable[web.StreamResponse]]:
    """aiohttp middleware enforcing the rules in this module's docstring."""
    expected = token.encode("ascii")

    @web.middleware
    async def guard(request: web.Request, handler: Handler) -> web.StreamResponse:
        if not host_allowed(request.host, hosts):
            raise _refuse(web.HTTPForbidden, "unknown Host header")
        if request.method in SAFE_METHODS:
            return await handler(request)
        origin = request.headers.get("Origin")
        if origin is not None and origin.split("://", 1)[-1].lower() != request.host.lower():
            raise _refuse(web.HTTPForbidden, "cross-site request refused")
        if request.content_type != "application/json" and CSRF_HEADER not in request.headers:
            raise _refuse(web.HTTPForbidden,
                          f"send a JSON body or the {CSRF_HEADER} header")
        if not bearer_matches(request.headers.get("Authorization", ""), expected):
            raise web.HTTPUnauthorized(
                text='{"error": "missing or wrong admin token"}', content_type="application/json",
                headers={"WWW-Authenticate": 'Bearer realm="sluice"'})
        return await handler(request)

    return guard
