"""Load the frontier's Lua scripts once per client.

Each script in ``frontier/scripts/`` is prefixed with ``_lib.lua`` (shared helpers) and
registered with redis-py, which calls it by SHA and reloads it on NOSCRIPT, so a flushed
script cache changes nothing.
"""

from __future__ import annotations

import asyncio
import weakref
from dataclasses import dataclass
from functools import cache
from importlib import resources
from typing import Any

from redis.asyncio.cluster import RedisCluster
from redis.commands.core import AsyncScript
from redis.exceptions import NoScriptError, RedisError, ResponseError

from frontier.exceptions import StoreUnavailable

ScriptCall = tuple[AsyncScript, list[Any], list[Any]]

SCRIPT_NAMES = (
    "admit", "lease_pick", "lease_take", "complete", "reap", "control", "extend",
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
    complete: AsyncScript
    reap: AsyncScript
    control: AsyncScript
    extend: AsyncScript

    @classmethod
    def register(cls, client: Any) -> Scripts:
        return cls(**{name: client.register_script(script_source(name)) for name in SCRIPT_NAMES})


async def run_many(client: Any, calls: list[ScriptCall]) -> list[Any]:
    """Run script calls together: one pipeline on a single server, concurrent on a Cluster.

    A call refused with NOSCRIPT (a flushed script cache) did not run: it is run again
    through its script object, which loads the script first. Other errors are raised.
    """
    results = await run_settled(client, calls)
    for res in results:
        if isinstance(res, Exception):
            raise res
    return results


async def run_settled(client: Any, calls: list[ScriptCall]) -> list[Any]:
    """Like :func:`run_many`, but a call's error takes its place in the results."""
    if not calls:
        return []
    if isinstance(client, RedisCluster):
        await _loaded_on_cluster(client, [script for script, _, _ in calls])
        return list(await asyncio.gather(*(script(keys, args) for script, keys, args in calls),
                                         return_exceptions=True))
    results = await _pipelined(client, calls)
    for i, (res, (script, keys, args)) in enumerate(zip(results, calls)):
        if isinstance(res, NoScriptError):
            try:
                results[i] = await script(keys, args)
            except RedisError as exc:
                results[i] = exc
    return results


_cluster_loaded: weakref.WeakKeyDictionary[Any, set[str]] = weakref.WeakKeyDictionary()


async def _loaded_on_cluster(client: Any, scripts: list[Any]) -> None:
    """Load scripts on every master of a Cluster before their first calls from ``client``.
    Calls made at once that each met NOSCRIPT and reloaded their script made redis-py
    8.1's Cluster client write on a connection it was reconnecting ('NoneType' object
    has no attribute 'writelines'); loaded beforehand, none meets it. (A master that
    joins later is loaded by the NOSCRIPT fallback, one call at a time.)"""
    done = _cluster_loaded.setdefault(client, set())
    for script in scripts:
        if script.sha not in done:
            await client.script_load(script.script)  # SCRIPT LOAD goes to every primary
            done.add(script.sha)


async def run_replicated(client: Any, calls: list[ScriptCall], replicas: int,
                         timeout_ms: int) -> list[Any]:
    """Run script calls on a Cluster and return once ``replicas`` replicas of every master
    written to have the writes (Redis WAIT, sent on the connection that made them: WAIT
    waits for the writes of its own connection). Redis replicates asynchronously, so
    without it a master killed right after an admit may take the admitted links with
    it while the page that found them is already completed on another master.

    A master that cannot confirm in time, or a call refused (MOVED after a failover),
    raises StoreUnavailable: the caller keeps its batch and runs it again (admits are
    idempotent: URL-seen counts the second one as duplicates).
    """
    if not isinstance(client, RedisCluster) or replicas <= 0:
        return await run_many(client, calls)
    await client.initialize()  # the slot map (a no-op once known)
    by_node: dict[str, tuple[Any, list[int]]] = {}
    for i, (_, keys, _args) in enumerate(calls):
        node = client.get_node_from_key(keys[0])
        by_node.setdefault(node.name, (node, []))[1].append(i)
    results: list[Any] = [None] * len(calls)

    async def on_node(node: Any, idx: list[int]) -> None:
        conn = node.acquire_connection()
        try:
            packed = [("EVALSHA", calls[i][0].sha, len(calls[i][1]), *calls[i][1], *calls[i][2])
                      for i in idx]
            await conn.send_packed_command(conn.pack_commands(
                [*packed, ("WAIT", replicas, timeout_ms)]))
            replies = []
            for _ in range(len(idx) + 1):
                try:
                    replies.append(await conn.read_response())
                except ResponseError as exc:
                    replies.append(exc)
        except BaseException:
            await conn.disconnect()
            raise
        finally:
            node.release(conn)
        acked = replies[-1]
        wrote = any(not isinstance(r, ResponseError) for r in replies[:-1])
        for i, reply in zip(idx, replies):
            if isinstance(reply, NoScriptError):  # not run: load it, then run it again
                await client.script_load(calls[i][0].script)
                reply = (await run_replicated(client, [calls[i]], replicas, timeout_ms))[0]
            elif isinstance(reply, ResponseError):
                raise StoreUnavailable(f"Redis Cluster refused a write on {node.name}: {reply}")
            results[i] = reply
        if wrote and isinstance(acked, int) and acked < replicas:
            raise StoreUnavailable(f"{node.name}: {acked} of {replicas} replicas confirmed "
                                   f"the writes within {timeout_ms} ms")

    try:
        outcomes = await asyncio.gather(*(on_node(node, idx) for node, idx in by_node.values()),
                                        return_exceptions=True)
        for outcome in outcomes:  # every node's call has ended; the first error is raised
            if isinstance(outcome, BaseException):
                raise outcome
    except (StoreUnavailable, RedisError, OSError) as exc:
        # a master gone or slots moved (failover): learn the new slot map for the retry
        try:
            await client.nodes_manager.initialize()
        except (RedisError, OSError):
            pass  # still failing over: the next retry asks again
        if isinstance(exc, StoreUnavailable):
            raise
        raise StoreUnavailable(f"Redis Cluster unavailable: {exc}") from exc
    return results


async def _pipelined(client: Any, calls: list[ScriptCall]) -> list[Any]:
    """EVALSHA every call in one write, then read every reply (a call's error in its place).

    What a redis-py pipeline does, without its per-call bookkeeping: that saved about a
    quarter of the CPU time of a round trip here (37 of 150 us for four calls).
    """
    pool = client.connection_pool
    conn = await pool.get_connection()
    try:
        await conn.send_packed_command(conn.pack_commands(
            [("EVALSHA", script.sha, len(keys), *keys, *args) for script, keys, args in calls]))
        results: list[Any] = []
        for _ in calls:
            try:
                results.append(await conn.read_response())
            except ResponseError as exc:  # this call failed; the connection is still in step
                results.append(exc)
    except BaseException:
        await conn.disconnect()  # replies may be left unread: never reuse it as it is
        raise
    finally:
        await pool.release(conn)
    return results


class CallBatcher:
    """Script calls made close together go to Redis in one round trip.

    A call waits at most ``linger_s`` for company (0: until the event loop's current turn
    ends, which gathers the calls of tasks started together). Each caller gets its own
    result or error; a connection error reaches every caller of the batch.
    """

    def __init__(self, client: Any, linger_s: float = 0.0) -> None:
        self._client = client
        self._linger_s = linger_s
        self._queue: list[tuple[ScriptCall, asyncio.Future[Any]]] = []
        self._sending: set[asyncio.Task[None]] = set()

    def run(self, script: AsyncScript, keys: list[Any], args: list[Any]) -> asyncio.Future[Any]:
        """Queue one call; await the returned future for its result."""
        loop = asyncio.get_running_loop()
        if not self._queue:
            if self._linger_s > 0:
                loop.call_later(self._linger_s, self._send)
            else:
                loop.call_soon(self._send)
        future: asyncio.Future[Any] = loop.create_future()
        self._queue.append(((script, keys, args), future))
        return future

    def _send(self) -> None:
        batch, self._queue = self._queue, []
        task = asyncio.ensure_future(self._deliver(batch))
        self._sending.add(task)
        task.add_done_callback(self._sending.discard)

    async def _deliver(self, batch: list[tuple[ScriptCall, asyncio.Future[Any]]]) -> None:
        try:
            results = await run_settled(self._client, [call for call, _ in batch])
        except Exception as exc:  # the round trip itself failed: every caller hears it
            results = [exc] * len(batch)
        for (_, future), res in zip(batch, results):
            if future.done():  # its caller gave up (cancelled)
                continue
            if isinstance(res, BaseException):
                future.set_exception(res)
            else:
                future.set_result(res)
