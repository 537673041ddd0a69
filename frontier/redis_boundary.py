"""The edge between sluice and redis-py: its errors become sluice errors, its replies text.

Every module that talks to Redis wraps its calls in :func:`redis_boundary`, so callers
catch sluice errors only (frontier/exceptions.py).
"""

from __future__ import annotations

import contextlib
from collections.abc import AsyncIterator
from typing import Any

from redis import exceptions as redis_errors

from frontier.exceptions import StoreError, StoreUnavailable


def reply_text(value: Any) -> str:
    """A Redis reply (bytes, or a value already decoded) as text."""
    return value.decode() if isinstance(value, bytes) else str(value)


def raised_inside_redis_client(exc: BaseException) -> bool:
    """True if ``exc`` was raised by code of the redis-py package (or the event loop's
    transport under it), not by sluice: during a Cluster failover redis-py's asyncio
    client can raise AttributeError or RuntimeError on a connection torn down under a
    command, where a ConnectionError was meant."""
    files = []
    tb = exc.__traceback__
    while tb is not None:
        files.append(tb.tb_frame.f_code.co_filename)
        tb = tb.tb_next
    if not files or not any("/redis/" in f for f in files):
        return False
    # raised in redis-py itself, or in the event loop's transport it was writing to
    # (uvloop's handles are Cython: their frames name .pyx files)
    return "/redis/" in files[-1] or "uvloop" in files[-1]


@contextlib.asynccontextmanager
async def redis_boundary(what: str) -> AsyncIterator[None]:
    """Translate redis-py errors into sluice errors."""
    try:
        yield
    except (redis_errors.ConnectionError, redis_errors.TimeoutError, OSError) as exc:
        raise StoreUnavailable(f"Redis unavailable during {what}: {exc}") from exc
    except redis_errors.RedisError as exc:
        raise StoreError(f"Redis error during {what}: {exc}") from exc
    except (AttributeError, RuntimeError) as exc:
        if not raised_inside_redis_client(exc):
            raise
        raise StoreUnavailable(
            f"Redis unavailable during {what} (connection torn down: {exc!r})") from exc
