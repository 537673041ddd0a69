"""Redis clients for the frontier: a standalone server or a Cluster, from one URL.

The frontier's scripts take hundreds of arguments per call. redis-py's asyncio
connection packs them in Python (about 3 microseconds an argument here); hiredis packs
them in C (about 0.15). :class:`FastConnection` swaps the packer and nothing else.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any
from urllib.parse import SplitResult, parse_qsl, quote, urlsplit

import hiredis
import redis.asyncio as aioredis
from redis.asyncio.cluster import RedisCluster
from redis.asyncio.connection import (
    URL_QUERY_ARGUMENT_PARSERS, Connection, SSLConnection, parse_url,
)
from redis.exceptions import AuthenticationError
from redis.exceptions import ConnectionError as RedisConnectionError

from frontier.exceptions import ConfigError

TCP_SCHEMES = ("redis", "rediss", "redis+cluster")
URL_HINT = "write redis://HOST:PORT/DB, e.g. redis://10.0.0.5:6379/0 (a Cluster: redis+cluster://HOST:PORT)"
DATABASE = re.compile(r"^/?(\d{1,5})?/?$")
# TLS options a rediss:// URL may carry after '?' (redis-py hands them to its SSL
# connection as text; the others of that class are parsed values, already known)
TLS_FILE_OPTIONS = {"ssl_ca_certs": "file", "ssl_certfile": "file", "ssl_keyfile": "file",
                    "ssl_ca_path": "folder"}
TLS_TEXT_OPTIONS = {"ssl_cert_reqs": ("none", "optional", "required"), "ssl_ciphers": ()}
SECRET_OPTION = re.compile(r"pass|secret|token|key", re.IGNORECASE)
HIDDEN = "***"


def redacted(url: str) -> str:
    """``url`` with its password (and any secret-looking ``?name=value``) as ***, for
    messages, banners and anything stored."""
    try:
        parts = urlsplit(url)
        if parts.password:
            netloc = parts.netloc.replace(f":{parts.password}@", f":{HIDDEN}@", 1)
            parts = parts._replace(netloc=netloc)
        if parts.query and SECRET_OPTION.search(parts.query):
            pairs = [(name, HIDDEN if SECRET_OPTION.search(name) and name != "ssl_keyfile"
                      else value) for name, value in parse_qsl(parts.query, keep_blank_values=True)]
            parts = parts._replace(query="&".join(f"{quote(n, safe='')}={quote(v, safe='/*')}"
                                                  for n, v in pairs))
        return parts.geturl()
    except ValueError:
        return url.split("@", 1)[-1] if "@" in url else url


def _shown(url: str, parts: SplitResult | None = None) -> str:
    """The URL for a message, its password replaced by ***."""
    return repr(redacted(url)[:200])


def check_redis_url(url: str, label: str = "redis.url") -> str:
    """``url`` when it names one Redis server (or Cluster) completely, else ConfigError
    naming ``label`` and the fix. Nothing here falls back to a server that was not named:
    ``redis://`` with no host is refused rather than read as localhost:6379."""
    if not url or not url.strip():
        raise ConfigError(f"{label}: empty; {URL_HINT}")
    if any(ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F for ch in url):
        raise ConfigError(f"{label} {_shown(url)}: has spaces or control characters; {URL_HINT}")
    try:
        parts = urlsplit(url)
    except ValueError as exc:
        raise ConfigError(f"{label} {_shown(url)}: not a URL ({exc}); {URL_HINT}") from None
    scheme = parts.scheme.lower()
    if scheme == "unix":
        if not parts.path or parts.path == "/":
            raise ConfigError(f"{label} {_shown(url, parts)}: no socket path; write "
                              "unix:///path/to/redis.sock")
    elif scheme not in TCP_SCHEMES:
        raise ConfigError(f"{label} {_shown(url, parts)}: not a redis:// URL; {URL_HINT}")
    else:
        try:
            host, port = parts.hostname, parts.port
        except ValueError:
            raise ConfigError(f"{label} {_shown(url, parts)}: the port is not a number from "
                              f"1 to 65535; {URL_HINT}") from None
        if not host:
            raise ConfigError(f"{label} {_shown(url, parts)}: no host (sluice does not guess "
                              f"one); {URL_HINT}")
        if port == 0:
            raise ConfigError(f"{label} {_shown(url, parts)}: port 0; {URL_HINT}")
        database = DATABASE.match(parts.path)
        if database is None:
            raise ConfigError(f"{label} {_shown(url, parts)}: the database after the port "
                              f"is not a number; {URL_HINT}")
        if scheme == "redis+cluster" and int(database.group(1) or 0) != 0:
            raise ConfigError(f"{label} {_shown(url, parts)}: a Redis Cluster has database 0 "
                              "only; write redis+cluster://HOST:PORT")
    if parts.fragment:
        raise ConfigError(f"{label} {_shown(url, parts)}: has a #fragment; {URL_HINT}")
    if "%" in (parts.hostname or ""):
        raise ConfigError(f"{label} {_shown(url, parts)}: the host has %-escapes; {URL_HINT}")
    _check_options(url, parts, label)
    return url


def _check_options(url: str, parts: SplitResult, label: str) -> None:
    """Options after ``?`` as redis-py reads them: known names with valid values only
    (an unknown name would fail at the first connection instead)."""
    options = parse_qsl(parts.query, keep_blank_values=True)
    tls = parts.scheme.lower() == "rediss"
    known = set(URL_QUERY_ARGUMENT_PARSERS) | (set(TLS_FILE_OPTIONS) | set(TLS_TEXT_OPTIONS)
                                               if tls else set())
    unknown = sorted({name for name, _ in options} - known)
    if not tls and any(name.startswith("ssl_") for name, _ in options):
        raise ConfigError(f"{label} {_shown(url, parts)}: ssl_ options go with rediss:// (Redis "
                          "over TLS); write rediss://HOST:PORT/0?ssl_ca_certs=/path/to/ca.crt")
    if unknown:
        raise ConfigError(f"{label} {_shown(url, parts)}: unknown option(s) "
                          f"{', '.join(repr(n[:40]) for n in unknown[:3])} after '?'; known: "
                          f"{', '.join(sorted(URL_QUERY_ARGUMENT_PARSERS))}")
    for name, value in options:
        _check_tls_option(url, parts, label, name, value)
    plain = parts._replace(scheme="redis") if parts.scheme == "redis+cluster" else parts
    try:
        parse_url(plain.geturl())
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{label} {_shown(url, parts)}: {exc}") from None


def _check_tls_option(url: str, parts: SplitResult, label: str, name: str, value: str) -> None:
    """A TLS file must exist (else the first connection fails with a bare OSError); a
    choice must be one redis-py knows."""
    kind = TLS_FILE_OPTIONS.get(name)
    if kind is not None:
        path = Path(value)
        if not (path.is_dir() if kind == "folder" else path.is_file()):
            raise ConfigError(f"{label} {_shown(url, parts)}: {name}: no such {kind} {value!r}")
    choices = TLS_TEXT_OPTIONS.get(name)
    if choices and value not in choices:
        raise ConfigError(f"{label} {_shown(url, parts)}: {name} is one of "
                          f"{', '.join(choices)}")


def _pack(args: tuple[Any, ...]) -> list[bytes]:
    first = args[0]
    if isinstance(first, str) and " " in first:
        args = tuple(first.split()) + args[1:]
    elif isinstance(first, bytes) and b" " in first:
        args = tuple(first.split()) + args[1:]
    return [hiredis.pack_command(args)]


class FastConnection(Connection):
    """An asyncio connection that packs commands with hiredis."""

    def pack_command(self, *args: Any) -> list[bytes]:
        return _pack(args)


class FastSSLConnection(SSLConnection):
    """The same over TLS (``rediss://``)."""

    def pack_command(self, *args: Any) -> list[bytes]:
        return _pack(args)


def _fast(kind: Any) -> Any:
    """The hiredis-packing class for the connection class redis-py chose from a URL (TCP,
    or TLS for rediss://); any other (a unix socket) as it is."""
    if kind is None or kind is Connection:
        return FastConnection
    return FastSSLConnection if kind is SSLConnection else kind


def connect(url: str, *, max_connections: int = 512, timeout_s: float = 10.0) -> Any:
    """A client for ``redis://host:port/db`` or ``redis+cluster://host:port`` (a Cluster).

    A plain ``redis://`` URL that points at a cluster-enabled server also yields a
    Cluster client.
    """
    check_redis_url(url)
    if url.lower().startswith("redis+cluster://"):
        return _cluster("redis://" + url.split("://", 1)[1], max_connections, timeout_s)
    # room for every concurrent fetch task to hold a connection (a blocking pool would wait
    # instead, but its lock costs ~60 us a call here)
    try:
        options = parse_url(url)  # what ConnectionPool.from_url reads, the URL's options winning
        options["connection_class"] = _fast(options.get("connection_class"))  # TLS stays TLS
        pool = aioredis.ConnectionPool(**{
            "max_connections": max_connections, "socket_timeout": timeout_s,
            "socket_connect_timeout": timeout_s, **options})
    except (ValueError, TypeError) as exc:  # redis-py's reading of the URL's options
        raise ConfigError(f"redis.url {_shown(url)}: {exc}; {URL_HINT}") from None
    return aioredis.Redis.from_pool(pool)  # the client owns the pool: aclose() closes it


def _cluster(url: str, max_connections: int, timeout_s: float) -> Any:
    try:
        client = RedisCluster.from_url(
            url, max_connections=max_connections, socket_timeout=timeout_s,
            socket_connect_timeout=timeout_s,
        )
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"redis.url {_shown(url)}: {exc}; {URL_HINT}") from None
    kwargs = client.nodes_manager.connection_kwargs
    kwargs["connection_class"] = _fast(kwargs.get("connection_class"))  # TLS stays TLS
    return client


async def connect_auto(url: str, **kw: Any) -> Any:
    """Like :func:`connect`, but detects a cluster-enabled server behind ``redis://``."""
    client = connect(url, **kw)
    if isinstance(client, RedisCluster):
        return client
    try:
        info = await client.info("cluster")
    except AuthenticationError as exc:
        await client.aclose()
        raise ConfigError(f"redis.url {_shown(url)}: {_login_refused(url, exc)}") from None
    except RedisConnectionError as exc:
        if "CERTIFICATE_VERIFY_FAILED" not in str(exc):
            return client  # the caller's first real call reports it
        await client.aclose()
        raise ConfigError(f"redis.url {_shown(url)}: the server's TLS certificate is not "
                          "trusted; name the CA that signed it: rediss://HOST:PORT/0?"
                          "ssl_ca_certs=/path/to/ca.crt") from None
    except Exception:  # the caller's first real call reports connection errors
        return client
    if info.get("cluster_enabled"):
        await client.aclose()
        return _cluster(url, kw.get("max_connections", 512), kw.get("timeout_s", 10.0))
    return client


def _login_refused(url: str, exc: Exception) -> str:
    """Why the server refused us, and the fix (never the password itself)."""
    try:
        parts = urlsplit(url)
        given = parts.password is not None or bool(parts.username)
    except ValueError:
        given = False
    if not given:
        scheme = url.split("://", 1)[0].lower()
        return (f"the server wants a password: write {scheme}://:PASSWORD@HOST:PORT/0 (an ACL "
                f"user: {scheme}://USER:PASSWORD@HOST:PORT/0)")
    return (f"the server refused the user name or password in the URL "
            f"({' '.join(str(exc).split())[:120]})")
