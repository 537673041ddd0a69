"""Redis clients for the frontier: a standalone server or a Cluster, from one URL.

The frontier's scripts take hundreds of arguments per call. redis-py's asyncio
connection packs them in Python (about 3 microseconds an argument here); hiredis packs
them in C (about 0.15). :class:`FastConnection` swaps the packer and nothing else.
"""

from __future__ import annotations

import re
from typing import Any
from urllib.parse import SplitResult, parse_qsl, urlsplit

import hiredis
import redis.asyncio as aioredis
from redis.asyncio.cluster import RedisCluster
from redis.asyncio.connection import URL_QUERY_ARGUMENT_PARSERS, Connection, parse_url

from frontier.exceptions import ConfigError

TCP_SCHEMES = ("redis", "rediss", "redis+cluster")
URL_HINT = "write redis://HOST:PORT/DB, e.g. redis://10.0.0.5:6379/0 (a Cluster: redis+cluster://HOST:PORT)"
DATABASE = re.compile(r"^/?(\d{1,5})?/?$")


def _shown(url: str, parts: SplitResult | None = None) -> str:
    """The URL for a message, its password replaced by ***."""
    try:
        parts = parts or urlsplit(url)
        if parts.password:
            netloc = parts.netloc.replace(f":{parts.password}@", ":***@", 1)
            url = parts._replace(netloc=netloc).geturl()
    except ValueError:
        pass
    return repr(url[:200])


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
    unknown = sorted({name for name, _ in parse_qsl(parts.query, keep_blank_values=True)}
                     - set(URL_QUERY_ARGUMENT_PARSERS))
    if unknown:
        raise ConfigError(f"{label} {_shown(url, parts)}: unknown option(s) "
                          f"{', '.join(repr(n[:40]) for n in unknown[:3])} after '?'; known: "
                          f"{', '.join(sorted(URL_QUERY_ARGUMENT_PARSERS))}")
    plain = parts._replace(scheme="redis") if parts.scheme == "redis+cluster" else parts
    try:
        parse_url(plain.geturl())
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{label} {_shown(url, parts)}: {exc}") from None


class FastConnection(Connection):
    """An asyncio connection that packs commands with hiredis."""

    def pack_command(self, *args: Any) -> list[bytes]:
        first = args[0]
        if isinstance(first, str) and " " in first:
            args = tuple(first.split()) + args[1:]
        elif isinstance(first, bytes) and b" " in first:
            args = tuple(first.split()) + args[1:]
        return [hiredis.pack_command(args)]


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
        pool = aioredis.ConnectionPool.from_url(
            url, max_connections=max_connections, socket_timeout=timeout_s,
            socket_connect_timeout=timeout_s, connection_class=FastConnection,
        )
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
    client.nodes_manager.connection_kwargs["connection_class"] = FastConnection
    return client


async def connect_auto(url: str, **kw: Any) -> Any:
    """Like :func:`connect`, but detects a cluster-enabled server behind ``redis://``."""
    client = connect(url, **kw)
    if isinstance(client, RedisCluster):
        return client
    try:
        info = await client.info("cluster")
    except Exception:  # the caller's first real call reports connection errors
        return client
    if info.get("cluster_enabled"):
        await client.aclose()
        return _cluster(url, kw.get("max_connections", 512), kw.get("timeout_s", 10.0))
    return client
