"""The frontier's side of operator controls: the control script's call and the list of
hosts under control.

:class:`HostControls` is part of :class:`frontier.store.FrontierStore` (``store.control``,
``store.host_known``, ``store.controlled_hosts``). Operator input is validated before it
gets here, by frontier/controls.py.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable
from typing import Any

from redis import exceptions as redis_errors

from frontier.controls import MAX_BOOST, MIN_BOOST, echo
from frontier.exceptions import StoreError
from frontier.keys import Keys
from frontier.redis_boundary import redis_boundary, reply_text
from frontier.scripts import Scripts
from frontier.settings import JobSettings

CONTROL_REFUSED = "control refused:"  # how the control script starts a refusal


def _encodable(text: str) -> bool:
    """True if ``text`` can be sent to Redis (UTF-8: no lone surrogates)."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _in_control_state(row: dict[str, Any], which: str) -> bool:
    """Whether a host-list row is paused, blocked, boosted or delayed (``which``)."""
    if which in ("paused", "blocked"):
        return bool(row["state"] == which)
    if which == "boosted":
        return bool(row["boost"] != 1.0)
    return bool(which == "delayed" and row["delay_s"] > 0)


def _control_value(action: str, value: Any) -> str:
    """A control value as the control script reads it: a delay in whole ms, a boost as
    given. Values that are not finite pass as text for the script to refuse."""
    if value is None:
        return ""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise StoreError(f"host control refused: {action} value {echo(value)} is not a number")
    try:
        number = float(value)
    except OverflowError:
        number = math.inf if value > 0 else -math.inf
    if action == "delay" and math.isfinite(number) and abs(number) < 1e12:
        return str(round(number * 1000))
    return repr(number)


class HostControls:
    """Operator controls of a frontier store (a base of FrontierStore, which sets these)."""

    redis: Any
    settings: JobSettings
    keys: Keys
    scripts: Scripts
    _now: Callable[[int | None], int]  # the store's time in ms: ``now``, or its clock's

    async def control(self, host: str, action: str, value: float | None = None,
                      now: int | None = None, *, create: bool = True) -> str:
        """Apply an operator's action (one of ``HOST_ACTIONS``) to one politeness key;
        returns its state. ``value``: the boost multiplier, or the delay in seconds.

        The control script checks every argument before its first write and refuses with
        nothing changed (StoreError): an unknown action, a value that is missing, not
        finite or out of range, an odd key, or (``create=False``) a key the frontier has
        no record of. Operator input is validated before this by frontier.controls.
        """
        for text in (host, action):
            if not isinstance(text, str) or not _encodable(text):
                raise StoreError(f"host control refused: {echo(text)} is not text")
        pk = self.keys.part_for(host)
        pol = self.settings.politeness
        keys = [pk.counts, pk.reasons, pk.due, pk.ready, pk.prio, pk.touched, pk.hosts,
                pk.controlled, pk.host(host), pk.hot(host), pk.cold(host), pk.held_hot(host),
                pk.held_cold(host)]
        args = [self._now(now), host, action, _control_value(action, value),
                self.settings.store.hot_capacity, 1 if create else 0, repr(MIN_BOOST),
                repr(MAX_BOOST), int(pol.max_delay_s * 1000), int(pol.min_delay_s * 1000),
                repr(float(pol.response_time_factor)), int(pol.max_delay_s * 1000),
                repr(self.settings.priority.suspect_penalty)]
        try:
            async with redis_boundary("control"):
                state = await self.scripts.control(keys, args)
        except StoreError as exc:
            cause = exc.__cause__
            if isinstance(cause, redis_errors.ResponseError) and str(cause).startswith(
                    CONTROL_REFUSED):
                raise StoreError(f"host {echo(host)}: {cause}") from None
            raise
        return reply_text(state)

    async def host_known(self, host: str) -> bool:
        """True if the frontier has a record of this politeness key (found by admission,
        or made by an operator's control). Records are never removed."""
        if not _encodable(host):
            return False
        async with redis_boundary("host info"):
            return bool(await self.redis.exists(self.keys.part_for(host).host(host)))

    async def controlled_hosts(self, which: str | None = None) -> list[dict[str, Any]]:
        """The hosts under operator control (paused, blocked, boosted or delayed), by name;
        ``which`` (one of those four words) keeps the hosts in that state."""
        async with redis_boundary("host list"):
            members = await asyncio.gather(
                *(self.redis.smembers(pk.controlled) for pk in self.keys.parts))
            hosts = sorted(reply_text(h) for row in members for h in row)
            rows = await asyncio.gather(*(self._control_row(h) for h in hosts))
        return [r for r in rows if which is None or _in_control_state(r, which)]

    async def _control_row(self, host: str) -> dict[str, Any]:
        pk = self.keys.part_for(host)
        state, boost, delay, held = await self.redis.hmget(
            pk.host(host), "state", "boost", "delay_ms", "held")
        queued = await self.redis.zcard(pk.hot(host)) + await self.redis.llen(pk.cold(host))
        due = await self.redis.zscore(pk.due, host)
        return {"host": host, "state": reply_text(state) if state is not None else None,
                "boost": float(boost or 1), "delay_s": int(delay or 0) / 1000,
                "queued": queued, "held": int(held or 0),
                "due_ms": None if due is None else int(due)}
