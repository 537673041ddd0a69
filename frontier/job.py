"""A job's Redis connection, its stored settings, and its seeds.

With no Redis URL the job gets the embedded default: a private redis-server whose data
lives in the job's state folder. The daemon stores the settings with the job; workers
on any machine read them from there, so every process agrees on scope and politeness.
"""

from __future__ import annotations

import asyncio
import json
import socket
import time
from collections.abc import Iterable
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, AsyncIterator

from redis.asyncio.cluster import RedisCluster

from frontier.admission import Admission, Resolver, scope_from_settings
from frontier.embedded import REDIS_SUBDIR, START_TIMEOUT_S, EmbeddedRedis
from frontier.exceptions import (
    ConfigError, FolderInUse, RedisLaunchError, SluiceError, StoreUnavailable,
)
from frontier.folders import FolderLock, Owner, owner_redis_url, say_taken_over
from frontier.keys import Keys
from frontier.model import AdmitResult, Candidate
from frontier.redis_boundary import redis_boundary
from frontier.redis_client import connect, connect_auto
from frontier.settings import JobSettings, settings_from_dict
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning


@dataclass
class Job:
    """An open job: its store, admission and (when embedded) its private server."""

    settings: JobSettings
    store: FrontierStore
    admission: Admission
    server: EmbeddedRedis | None

    @property
    def redis(self) -> Any:
        return self.store.redis


def read_seeds(path: Path) -> list[str]:
    """One URL a line (blank lines and '#' comments skipped); each rejected line is
    reported on stderr with its number and reason (frontier/seeds.py)."""
    from frontier.seeds import read_seed_file, usable_seeds

    return usable_seeds(read_seed_file(path, label="--seeds"), f"--seeds {path}")


STATE_FIX = "stop it first, or use another state folder (--out or --state)"


@dataclass
class _Redis:
    """The job's Redis: a client, the embedded server this process started (if any) and
    whether sluice may tune the server (not one that a running crawl owns)."""

    client: Any
    server: EmbeddedRedis | None = None
    tune: bool = False


@asynccontextmanager
async def _redis_for(settings: JobSettings, *, attach: bool) -> AsyncIterator[_Redis]:
    """Connect to the job's Redis: the given URL, else the embedded server of the state
    folder. The state folder has one owner (frontier/folders.py): this process starts the
    server when the folder is free; with ``attach`` it uses a running owner's server
    instead, otherwise a busy folder is refused."""
    timeout = settings.redis.socket_timeout_s
    if settings.redis.url:
        client = await connect_auto(settings.redis.url, timeout_s=timeout)
        try:
            yield _Redis(client, tune=True)
        finally:
            await client.aclose()
        return
    state = Path(settings.state_dir)
    if attach and not (state / REDIS_SUBDIR).is_dir():
        raise ConfigError(f"state folder {state} holds no job (no {REDIS_SUBDIR}/ in it): pass "
                          "--state OUT/state of a crawl, or --redis URL")
    lock = FolderLock(state, label="state folder", fix=STATE_FIX)
    url = None
    try:
        say_taken_over(lock.folder, lock.take(wait_s=0) if attach else lock.take())
    except FolderInUse as busy:
        if not attach:
            raise
        url = _owners_redis(state, busy.owner)
    if url is not None:
        client = connect(url, timeout_s=timeout)
        try:
            yield _Redis(client)
        finally:
            await client.aclose()
        return
    try:
        server = EmbeddedRedis(state, config=redis_tuning(settings))
        server.start()
        try:
            lock.publish(redis_url=server.url)
            client = connect(server.url, timeout_s=timeout)
            try:
                yield _Redis(client, server)
            finally:
                await client.aclose()
        except SluiceError as exc:
            server.stop()
            if server.died:  # the cause of the failure: say that, not a lost connection
                raise RedisLaunchError(
                    f"the Redis server of {state} exited while in use (its log: "
                    f"{server.log_file}); run the same command again to resume from what "
                    "it saved") from exc
            raise
        finally:
            server.stop()
    finally:
        lock.release()


def _owners_redis(state: Path, owner: Any) -> str:
    """The Redis address a running owner of ``state`` published (it may still be starting)."""
    if isinstance(owner, Owner) and owner.host and not owner.on_this_host:
        raise FolderInUse(f"state folder {state} belongs to {owner.describe()}, another "
                          "machine: run this there, or keep the job in a shared Redis "
                          "(--redis)", owner)
    current, url = owner_redis_url(state, START_TIMEOUT_S)
    if url is not None:
        return url
    if current is None:
        raise FolderInUse(f"state folder {state}: its owner stopped just now; run the "
                          "command again", owner)
    raise FolderInUse(f"state folder {state} is in use by {current.describe()}, whose Redis "
                      f"did not come up within {START_TIMEOUT_S:.0f} s; try again in a moment",
                      current)


async def save_settings(client: Any, settings: JobSettings) -> None:
    keys = Keys(settings.name, 1)  # the settings key does not depend on the layout
    async with redis_boundary("save job"):
        await client.set(keys.settings, json.dumps(settings.public_dict()))
        await client.sadd(Keys.job_index(), settings.name)


async def load_settings(client: Any, name: str) -> JobSettings:
    """Settings stored with a job by its daemon."""
    async with redis_boundary("load job"):
        raw = await client.get(Keys(name, 1).settings)
    if raw is None:
        async with redis_boundary("load job"):
            names = sorted(n.decode() if isinstance(n, bytes) else str(n)
                           for n in await client.smembers(Keys.job_index()))
        here = (f"jobs here: {', '.join(names)}; pass one with --job" if names else
                "start it with 'sluice crawl' or 'sluice daemon'")
        raise ConfigError(f"no job named {name!r} in this Redis ({here})")
    return settings_from_dict(json.loads(raw))


@asynccontextmanager
async def open_job(settings: JobSettings, *, stored: bool = False) -> AsyncIterator[Job]:
    """Connect (or start the embedded server), tune it, and store or load the settings.

    ``stored=True`` reads the job's settings from Redis (workers); otherwise the given
    settings are stored with the job, keeping the layout it was created with.
    """
    async with _redis_for(settings, attach=stored) as redis:
        client = redis.client
        if stored:  # the job's settings, reached the way this process reached them
            settings = (await load_settings(client, settings.name)).model_copy(
                update={"redis": settings.redis})
        else:
            try:
                existing = await load_settings(client, settings.name)
            except ConfigError:
                existing = None
            settings = settings.laid_out(
                cluster=isinstance(client, RedisCluster),
                partitions=existing.store.partitions if existing is not None else None)
            if existing is not None and existing.store != settings.store:
                raise ConfigError(
                    f"job {settings.name!r} exists with store layout {existing.store}; "
                    "partitions and buckets are fixed when a job is created")
            await save_settings(client, settings)
        store = FrontierStore(client, settings)
        await store.sync_clock()  # leases and schedules on the server's clock
        if redis.tune:
            await store.tune_server()
        admission = Admission(store, scope_from_settings(settings, settings.seeds),
                              resolver=address_resolver(settings))
        yield Job(settings, store, admission, redis.server)


def address_resolver(settings: JobSettings) -> Resolver | None:
    """For the 'ip' politeness key: a host's first address, through the address guard."""
    if settings.politeness.key != "ip":
        return None
    from frontier.guard import GuardedResolver, parse_host_map

    guard = GuardedResolver(parse_host_map(settings.fetch.map_hosts),
                            allow_private=settings.fetch.allow_private)

    async def resolve(host: str) -> str | None:
        try:
            answers = await guard.resolve(host, 0, socket.AF_UNSPEC)
        except (SluiceError, OSError):
            return None  # refused or unknown: the fetch will say why; the host keys itself
        return str(answers[0]["host"]) if answers else None

    return resolve


SEED_RETRY_S = 0.5
SEED_PATIENCE_S = 60.0  # how long seeds wait for a Redis that is restarting or failing over


async def admit_seeds(job: Job, seeds: Iterable[str]) -> AdmitResult:
    """Admit seeds at depth 0 with the seed cash (dedupe makes a second run a no-op).

    A Redis that is unavailable for a while (restarting, failing over, replicas not yet
    confirming) is waited for up to ``SEED_PATIENCE_S``; admits are idempotent. The job's
    own embedded server, once it has exited, is not waited for."""
    cash = job.settings.priority.seed_cash
    candidates = [Candidate(u, depth=0, cash=cash) for u in seeds]
    deadline = time.monotonic() + SEED_PATIENCE_S
    while True:
        try:
            return await job.admission.admit(candidates)
        except StoreUnavailable:
            gone = job.server is not None and not job.server.is_running()
            if gone or time.monotonic() > deadline:
                raise
            await asyncio.sleep(SEED_RETRY_S)
