"""The admin HTTP API from the command line: ``sluice host|status|seeds --admin URL``.

The commands reach a running daemon (or ``sluice crawl --admin``) through its API rather
than Redis, so an operator needs the admin token and no Redis credentials. Requests that
change state carry ``Authorization: Bearer <token>`` and the ``X-Sluice-Admin`` header
(frontier/admin_auth.py); the token comes from ``--token-file``, ``SLUICE_ADMIN_TOKEN`` or
the state folder's ``admin-token`` file, and never appears in a message. Every failure
(refused token, refused input, nothing listening) is one :class:`SluiceError` line.
"""

from __future__ import annotations

import asyncio
import json
import os
from pathlib import Path
from types import TracebackType
from typing import Any
from urllib.parse import quote, urlsplit

import aiohttp
from yarl import URL

from frontier.admin_auth import CSRF_HEADER, TOKEN_ENV, local_token_path
from frontier.exceptions import ConfigError, SluiceError, StoreUnavailable
from frontier.model import STATES
from frontier.seeds import SeedList

API_HINT = "write the daemon's admin address, e.g. http://127.0.0.1:8700"
TOKEN_HINT = (f"pass --token-file FILE, set {TOKEN_ENV}, or pass --state with the crawl's "
              "state folder (it holds the admin-token file of a loopback API)")
REQUEST_TIMEOUT_S = 30.0
MAX_ERROR_CHARS = 300  # of an error text the API sends back
STATUS_KEYS = ("admitted", *STATES, "reasons", "balanced")  # what `sluice status` prints
REJECTED_KEYS = frozenset({"source", "line", "text", "reason"})  # RejectedSeed.as_dict()


def api_base(raw: str) -> URL:
    """The API's base URL from ``--admin``: ``http://HOST:PORT`` (``HOST:PORT`` alone
    means http). Credentials, queries and fragments are refused: the token goes in a
    header, never in a URL."""
    text = raw.strip()
    if "://" not in text:
        text = "http://" + text
    try:
        parts = urlsplit(text)
        port = parts.port
    except ValueError:
        raise ConfigError(f"--admin {raw[:80]!r}: not an address; {API_HINT}") from None
    if parts.scheme.lower() not in ("http", "https") or not parts.hostname:
        raise ConfigError(f"--admin {raw[:80]!r}: not an http:// address; {API_HINT}")
    if "@" in parts.netloc:
        raise ConfigError("--admin: a user or password in the address is not used; the admin "
                          f"token is read from a file or {TOKEN_ENV}; {API_HINT}")
    if parts.query or parts.fragment:
        raise ConfigError(f"--admin {raw[:80]!r}: no ?query or #fragment here; {API_HINT}")
    if port is None and parts.scheme.lower() == "http" and ":" not in parts.netloc:
        raise ConfigError(f"--admin {raw[:80]!r}: no port; {API_HINT}")
    return URL(f"{parts.scheme.lower()}://{parts.netloc}{parts.path.rstrip('/')}")


def _checked(token: str, origin: str) -> str:
    """A token usable in a header; errors name where it came from, never the token."""
    token = token.strip()
    if not token:
        raise ConfigError(f"admin token from {origin}: empty")
    if not token.isascii() or not token.isprintable() or any(c.isspace() for c in token):
        raise ConfigError(f"admin token from {origin}: not one word of printable ASCII")
    return token


def _read_token(path: Path, origin: str) -> str:
    try:
        return _checked(Path(path).read_text(encoding="utf-8"), origin)
    except OSError as exc:
        raise ConfigError(f"{origin}: cannot be read ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{origin}: not text") from None


def find_token(token_file: Path | None, state: Path | None) -> tuple[str | None, str]:
    """The admin token and where it came from: ``--token-file``, else the
    ``SLUICE_ADMIN_TOKEN`` variable, else ``STATE/admin-token`` (with ``--state``).
    ``(None, reason)`` when there is none."""
    if token_file is not None:
        return _read_token(token_file, f"--token-file {token_file}"), f"--token-file {token_file}"
    if os.environ.get(TOKEN_ENV):
        return _checked(os.environ[TOKEN_ENV], TOKEN_ENV), TOKEN_ENV
    if state is not None:
        path = local_token_path(state)
        if path.is_file():
            return _read_token(path, str(path)), str(path)
        return None, f"{path} does not exist"
    return None, "no token given"


def _one_line(text: str) -> str:
    shown = " ".join("".join(c if c.isprintable() else " " for c in text).split())
    return shown if len(shown) <= MAX_ERROR_CHARS else shown[: MAX_ERROR_CHARS - 3] + "..."


class AdminClient:
    """A session with one admin API; use ``async with AdminClient(...) as api``."""

    def __init__(self, base: URL, token: str | None, token_origin: str = "",
                 *, timeout_s: float = REQUEST_TIMEOUT_S) -> None:
        self.base = base
        self._token = token
        self._origin = token_origin
        self._timeout = aiohttp.ClientTimeout(total=timeout_s)
        self._http: aiohttp.ClientSession | None = None

    async def __aenter__(self) -> AdminClient:
        self._http = aiohttp.ClientSession(timeout=self._timeout, trust_env=False)
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                        tb: TracebackType | None) -> None:
        if self._http is not None:
            await self._http.close()
            self._http = None

    # -- the API's routes ------------------------------------------------------------------

    async def status(self, job: str | None = None) -> dict[str, Any]:
        """GET /status, cut to what ``sluice status`` prints (URL counts by state);
        ``job``, if given, must be the job the API serves."""
        data = await self._call("GET", "/status")
        if not isinstance(data, dict) or any(k not in data for k in STATUS_KEYS):
            raise SluiceError(f"admin API at {self.base}: /status did not answer with URL "
                              "counts (is this a sluice admin API?)")
        self._same_job(job, data.get("job"))
        out = {k: data[k] for k in STATUS_KEYS}
        for key in ("mirrors", "revisits"):  # mirror hosts, revisits (an older API has none)
            if key in data:
                out[key] = data[key]
        return out

    async def check_job(self, job: str | None) -> None:
        """ConfigError unless the API serves ``job`` (None: any job)."""
        if job is not None:
            data = await self._call("GET", "/status")
            self._same_job(job, data.get("job") if isinstance(data, dict) else None)

    def _same_job(self, wanted: str | None, served: Any) -> None:
        if wanted is not None and served != wanted:
            shown = _one_line(str(served))
            raise ConfigError(f"the admin API at {self.base} serves job {shown!r}, "
                              f"not {wanted!r}: pass its --job, or the address of that job's "
                              "daemon")

    async def hosts(self, state: str | None = None) -> list[dict[str, Any]]:
        """GET /hosts[?state=...]: the hosts under control."""
        data = await self._call("GET", "/hosts", params={"state": state} if state else None)
        if not isinstance(data, list):
            raise SluiceError(f"admin API at {self.base}: /hosts did not answer with a list")
        return data

    async def control(self, host: str, action: str, value: str | None = None,
                      *, new: bool = False) -> dict[str, Any]:
        """POST /hosts/{host}/{action}: the host's fields after the change."""
        body: dict[str, Any] = {}
        if value is not None:
            body["value"] = value
        if new:
            body["new"] = True
        path = f"/hosts/{quote(host, safe='')}/{quote(action, safe='')}"
        data = await self._call("POST", path, body=body)
        if not isinstance(data, dict):
            raise SluiceError(f"admin API at {self.base}: the host control did not answer "
                              "with an object")
        return data

    async def add_seeds(self, seeds: SeedList) -> dict[str, Any]:
        """POST /seeds with the accepted seeds: ``{"added", "known", "rejected"}``, the
        seeds rejected here first, then those the job refused (named by their own source
        and line, as ``sluice seeds add`` names them on the Redis path)."""
        data = await self._call("POST", "/seeds", body={"urls": seeds.urls})
        if not isinstance(data, dict) or any(k not in data for k in ("added", "known", "rejected")):
            raise SluiceError(f"admin API at {self.base}: /seeds did not answer with a result")
        refused = []
        sent_count = len(seeds.accepted)
        for item in data["rejected"] if isinstance(data["rejected"], list) else [None]:
            if not isinstance(item, dict) or set(item) != REJECTED_KEYS:
                raise SluiceError(f"admin API at {self.base}: /seeds answered a rejected seed "
                                  "in a form this sluice does not know")
            line = item["line"]
            if item["source"] == "urls" and isinstance(line, int) and 0 < line <= sent_count:
                sent = seeds.accepted[line - 1]
                item = {**item, "source": sent.source, "line": sent.line}
            refused.append(item)
        return {"added": data["added"], "known": data["known"],
                "rejected": [r.as_dict() for r in seeds.rejected] + refused}

    # -- one request -----------------------------------------------------------------------

    def _headers(self, changes: bool) -> dict[str, str]:
        headers = {"Accept": "application/json"}
        if changes:
            if self._token is None:
                raise ConfigError(f"the admin API needs its token for a change ({self._origin}): "
                                  f"{TOKEN_HINT}")
            headers[CSRF_HEADER] = "1"
        if self._token is not None:
            headers["Authorization"] = f"Bearer {self._token}"
        return headers

    async def _call(self, method: str, path: str, *, params: dict[str, str] | None = None,
                    body: Any = None) -> Any:
        if self._http is None:
            raise RuntimeError("AdminClient used outside 'async with'")
        headers = self._headers(method != "GET")
        if body is not None:
            headers["Content-Type"] = "application/json"
        url = URL(str(self.base) + path, encoded=True)
        try:
            async with self._http.request(
                    method, url, params=params, headers=headers,
                    data=None if body is None else json.dumps(body),
                    allow_redirects=False) as resp:  # the token goes to this address only
                raw = await resp.read()
                status = resp.status
        except aiohttp.ClientConnectorError as exc:
            why = exc.os_error.strerror if exc.os_error and exc.os_error.strerror else str(exc)
            raise ConfigError(f"admin API at {self.base}: cannot connect ({_one_line(why)}); is "
                              "the daemon running with --admin HOST:PORT there?") from None
        except (TimeoutError, asyncio.TimeoutError):
            raise SluiceError(f"admin API at {self.base}: no answer within "
                              f"{self._timeout.total:g} s") from None
        except aiohttp.ClientError as exc:
            raise SluiceError(f"admin API at {self.base}: {_one_line(str(exc))}") from None
        return self._answer(status, raw)

    def _answer(self, status: int, raw: bytes) -> Any:
        """The JSON of a 200 answer; any other answer as one error line."""
        try:
            data = json.loads(raw.decode("utf-8")) if raw else None
        except (UnicodeDecodeError, ValueError):
            data = None
        if status == 200:
            if data is None:
                raise SluiceError(f"admin API at {self.base}: the answer is not JSON (is this a "
                                  "sluice admin API?)")
            return data
        error = data.get("error") if isinstance(data, dict) else None
        said = _one_line(str(error)) if error else f"HTTP {status}"
        if status == 401:
            if self._token is None:
                raise ConfigError(f"the admin API at {self.base} needs its token "
                                  f"({self._origin}): {TOKEN_HINT}")
            raise ConfigError(f"the admin API at {self.base} refused the token from "
                              f"{self._origin} (401: {said}); use the token the daemon was "
                              "started with")
        if status == 403:
            raise ConfigError(f"the admin API at {self.base} refused the request (403: {said})")
        if status == 503:
            raise StoreUnavailable(said)
        if 400 <= status < 500 and error:
            raise ConfigError(said)
        raise SluiceError(f"admin API at {self.base}: {said}"
                          + ("" if error else " (is this a sluice admin API?)"))


def client_for(admin: str, token_file: Path | None, state: Path | None) -> AdminClient:
    """The client ``--admin URL [--token-file FILE] [--state FOLDER]`` asks for."""
    token, origin = find_token(token_file, state)
    return AdminClient(api_base(admin), token, origin)
