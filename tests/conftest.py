"""Shared fixtures: real Redis servers (one standalone, one 3-master Cluster) per session."""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable, Iterator
from typing import Any

import os

import pytest
from hypothesis import HealthCheck
from hypothesis import settings as hypothesis_settings
from redis.asyncio.cluster import RedisCluster as AsyncRedisCluster

from frontier.redis_client import connect
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from tests.servers import RedisCluster, RedisServer

TUNING = redis_tuning(JobSettings())

# Fuzz tests take their example counts from a profile: "ci" (the default) keeps the suite
# quick; HYPOTHESIS_PROFILE=fuzz runs 10,000 examples each (./test.sh -m fuzz).
FUZZ_EXAMPLES = {"ci": 100, "fuzz": 10_000}
for _name, _count in FUZZ_EXAMPLES.items():
    hypothesis_settings.register_profile(
        _name, max_examples=_count, deadline=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
hypothesis_settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture(scope="session")
def redis_server() -> Iterator[RedisServer]:
    server = RedisServer(config=TUNING, appendonly=False).start()
    yield server
    server.close()


@pytest.fixture(scope="session")
def redis_cluster() -> Iterator[RedisCluster]:
    cluster = RedisCluster(config=TUNING, appendonly=False).start()
    yield cluster
    cluster.close()


async def flushed_client(kind: str, request: pytest.FixtureRequest) -> Any:
    if kind == "single":
        server: RedisServer = request.getfixturevalue("redis_server")
        client: Any = connect(server.url)
        await client.flushall()
        return client
    cluster: RedisCluster = request.getfixturevalue("redis_cluster")
    client = connect(cluster.url.replace("redis://", "redis+cluster://"))
    await client.flushall(target_nodes=AsyncRedisCluster.PRIMARIES)
    return client


@pytest.fixture(params=["single", "cluster"])
async def redis_client(request: pytest.FixtureRequest) -> AsyncIterator[Any]:
    """A flushed client, once on the standalone server and once on the Cluster."""
    client = await flushed_client(request.param, request)
    yield client
    await client.aclose()


@pytest.fixture
async def single_client(request: pytest.FixtureRequest) -> AsyncIterator[Any]:
    client = await flushed_client("single", request)
    yield client
    await client.aclose()


class Clock:
    """A clock the tests move by hand (seconds)."""

    def __init__(self, start: float = 1_000_000.0) -> None:
        self.t = start

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds

    @property
    def ms(self) -> int:
        return int(self.t * 1000)


@pytest.fixture
def clock() -> Clock:
    return Clock()


StoreFactory = Callable[..., FrontierStore]


@pytest.fixture
def make_store(redis_client: Any, clock: Clock) -> StoreFactory:
    """Build a FrontierStore on the parametrised backend with settings overrides."""

    def build(**overrides: Any) -> FrontierStore:
        data: dict[str, Any] = {"name": "t", "store": {"partitions": 4}}
        for key, value in overrides.items():
            if isinstance(value, dict):
                data.setdefault(key, {}).update(value)
            else:
                data[key] = value
        return FrontierStore(redis_client, JobSettings.model_validate(data), clock=clock)

    return build


def pytest_configure(config: pytest.Config) -> None:
    """A fuzz run (HYPOTHESIS_PROFILE=fuzz, 10,000 examples a test) lifts the per-test
    time limit: one test may take minutes."""
    if os.environ.get("HYPOTHESIS_PROFILE") == "fuzz":
        config.option.timeout = 0
