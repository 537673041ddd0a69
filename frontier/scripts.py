"""Load the frontier's Lua scripts once per client.

Each script in ``frontier/scripts/`` is prefixed with ``_lib.lua`` (shared helpers) and
registered with redis-py, which calls it by SHA and reloads it on NOSCRIPT, so a flushed
script cache changes nothing.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass
from functools import cache
from importlib import resources
from typing import Any

from redis.asyncio.cluster import RedisCluster
from redis.commands.core import AsyncScript
from redis.exceptions import NoScriptError

ScriptCall = tuple[AsyncScript, list[Any], list[Any]]

SCRIPT_NAMES = (
    "admit", "lease_pick", "lease_take", "unclaim", "complete", "reap", "control",
)


@cache
def script_source(name: str) -> str:
    """The full text sent to Redis for one script: shared helpers, then the script."""
    folder = resources.files("frontier") / "scripts"
    lib = (folder / "_lib.lua").read_text(encoding="utf-8")
    body = (folder / f"{name}.lua").read_text(encoding="utf-8")
    return f"{lib}\n{body}"


@dataclass(frozen=True)
class Scripts:
    """The registered scripts of one client."""

    admit: AsyncScript
    lease_pick: AsyncScript
    lease_take: AsyncScript
    unclaim: AsyncScript
    complete: AsyncScript
    reap: AsyncScript
    control: AsyncScript

    @classmethod
    def register(cls, client: Any) -> Scripts:
        return cls(**{name: client.register_script(script_source(name)) for name in SCRIPT_NAMES})


async def run_many(client: Any, calls: list[ScriptCall]) -> list[Any]:
    """Run script calls together: one pipeline on a single server, concurrent on a Cluster.

    A call refused with NOSCRIPT (a flushed script cache) did not run: it is run again
    through its script object, which loads the script first. Other errors are raised.
    """
    if not calls:
        return []
    if isinstance(client, RedisCluster):
        return list(await asyncio.gather(*(script(keys, args) for script, keys, args in calls)))
    pipe = client.pipeline(transaction=False)
    for script, keys, args in calls:
        pipe.evalsha(script.sha, len(keys), *keys, *args)
    results = list(await pipe.execute(raise_on_error=False))
    for i, (res, (script, keys, args)) in enumerate(zip(results, calls)):
        if isinstance(res, NoScriptError):
            results[i] = await script(keys, args)
        elif isinstance(res, Exception):
            raise res
    return results
