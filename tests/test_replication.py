"""Admits confirmed by replicas on a Redis Cluster (Redis WAIT on the writing connection).

Redis Cluster replicates asynchronously: a master killed after acknowledging a write may
lose it (Redis Cluster specification, "Write safety"). WAIT numreplicas timeout returns
the number of replicas that acknowledged the writes of the calling connection (Redis
command reference, WAIT).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import pytest
import redis

from frontier.exceptions import StoreUnavailable
from frontier.keys import partition_of
from frontier.redis_client import connect
from frontier.settings import JobSettings
from frontier.store import FrontierStore, PartitionBatch, QueuedUrl
from frontier.urls import fingerprint
from tests.faultkit import ReplicatedCluster


def one_url_batches(store: FrontierStore, url: str) -> dict[int, PartitionBatch]:
    host = url.split("/")[2]
    batch = PartitionBatch(hosts={host: [QueuedUrl(url, fingerprint(url), 1 << 20)]})
    return {partition_of(host, store.partitions): batch}


def store_on(client: Any, replicas: int, timeout_ms: int = 500) -> FrontierStore:
    settings = JobSettings.model_validate(
        {"name": "rep", "redis": {"wait_replicas": replicas, "wait_timeout_ms": timeout_ms}})
    return FrontierStore(client, settings)


def wait_for_replica_links(cluster: ReplicatedCluster, timeout_s: float = 30.0) -> None:
    """Every replica synced with its master (master_link_status:up, INFO replication)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        infos = [redis.Redis(port=n.port).info("replication") for n in cluster.nodes]
        if all(i.get("master_link_status") == "up" for i in infos if i["role"] == "slave"):
            return
        time.sleep(0.1)
    raise AssertionError("replicas did not sync")


async def test_an_admit_is_on_the_replica_when_it_returns(tmp_path: Path) -> None:
    with ReplicatedCluster(tmp_path / "c") as cluster:
        wait_for_replica_links(cluster)
        client = connect(cluster.url)
        try:
            store = store_on(client, replicas=1)
            for i in range(20):
                url = f"http://h{i}.test/page"
                result = await store.admit_batches(one_url_batches(store, url))
                assert result.new == 1
                # read the queue from the replica of the master that took the write
                host = f"h{i}.test"
                key = store.keys.part_for(host).hot(host)
                master = client.get_node_from_key(key)
                replica = next(n for n in cluster.nodes if n.port != master.port and
                               redis.Redis(port=n.port).info("replication").get("master_port")
                               == master.port)
                reader = redis.Redis(port=replica.port)
                reader.execute_command("READONLY")
                assert reader.zscore(key, url) is not None  # there already, no waiting
                reader.close()
        finally:
            await client.aclose()


async def test_without_replicas_the_admit_is_not_confirmed(redis_cluster: Any) -> None:
    client = connect(redis_cluster.url.replace("redis://", "redis+cluster://"))
    try:
        store = store_on(client, replicas=1, timeout_ms=50)
        with pytest.raises(StoreUnavailable, match="0 of 1 replicas"):
            await store.admit_batches(one_url_batches(store, "http://a.test/x"))
        assert (await store_on(client, replicas=0).admit_batches(
            one_url_batches(store, "http://b.test/y"))).new == 1  # off: as before
    finally:
        await client.aclose()
