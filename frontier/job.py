"""A job's Redis connection, its stored settings, and its seeds.

With no Redis URL the job gets the embedded default: a private redis-server whose data
lives in the job's state folder. The daemon stores the settings with the job; workers
on any machine read them from there, so every process agrees on scope and politeness.
"""

from __future__ import annotations

import json
import socket
from collections.abc import Iterable
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, AsyncIterator

from redis.asyncio.cluster import RedisCluster

from frontier.admission import Admission, Resolver, scope_from_settings
from frontier.embedded import EmbeddedRedis
from frontier.exceptions import ConfigError, SluiceError
from frontier.keys import Keys
from frontier.model import AdmitResult, Candidate
from frontier.redis_client import connect, connect_auto
from frontier.settings import JobSettings, settings_from_dict
from frontier.store import FrontierStore, redis_boundary, redis_tuning


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
    """One URL a line; blank lines and '#' comments skipped."""
    try:
        lines = Path(path).read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise ConfigError(f"seeds file {path}: {exc}") from exc
    return [ln.strip() for ln in lines if ln.strip() and not ln.lstrip().startswith("#")]


async def _client(settings: JobSettings) -> tuple[Any, EmbeddedRedis | None]:
    if settings.redis.url:
        return await connect_auto(settings.redis.url, timeout_s=settings.redis.socket_timeout_s), None
    server = EmbeddedRedis(settings.state_dir, config=redis_tuning(settings))
    server.start()
    return connect(server.url, timeout_s=settings.redis.socket_timeout_s), server


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
        raise ConfigError(f"no job named {name!r} in this Redis (start it with 'sluice daemon')")
    return settings_from_dict(json.loads(raw))


@asynccontextmanager
async def open_job(settings: JobSettings, *, stored: bool = False) -> AsyncIterator[Job]:
    """Connect (or start the embedded server), tune it, and store or load the settings.

    ``stored=True`` reads the job's settings from Redis (workers); otherwise the given
    settings are stored with the job, keeping the layout it was created with.
    """
    client, server = await _client(settings)
    try:
        if stored:
            settings = await load_settings(client, settings.name)
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
        if server is None:
            await store.tune_server()
        admission = Admission(store, scope_from_settings(settings, settings.seeds),
                              resolver=address_resolver(settings))
        yield Job(settings, store, admission, server)
    finally:
        await client.aclose()
        if server is not None:
            server.stop()


def address_resolver(settings: JobSettings) -> Resolver | None:
    """For the 'ip' politeness key: a host's first address, through the address guard."""
    if settings.politeness.key != "ip":
        return None
    from workers.guard import GuardedResolver, parse_host_map

    guard = GuardedResolver(parse_host_map(settings.fetch.map_hosts),
                            allow_private=settings.fetch.allow_private)

    async def resolve(host: str) -> str | None:
        try:
            answers = await guard.resolve(host, 0, socket.AF_UNSPEC)
        except (SluiceError, OSError):
            return None  # refused or unknown: the fetch will say why; the host keys itself
        return str(answers[0]["host"]) if answers else None

    return resolve


async def admit_seeds(job: Job, seeds: Iterable[str]) -> AdmitResult:
    """Admit seeds at depth 0 with the seed cash (dedupe makes a second run a no-op)."""
    cash = job.settings.priority.seed_cash
    return await job.admission.admit([Candidate(u, depth=0, cash=cash) for u in seeds])
