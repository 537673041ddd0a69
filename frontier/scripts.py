"""Load the frontier's Lua scripts once per client.

Each script in ``frontier/scripts/`` is prefixed with ``_lib.lua`` (shared helpers) and
registered with redis-py, which calls it by SHA and reloads it on NOSCRIPT, so a flushed
script cache changes nothing.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache
from importlib import resources
from typing import Any

from redis.commands.core import AsyncScript

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
