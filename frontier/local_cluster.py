"""A Redis Cluster of a few masters on loopback, started from the redis-server binary:
for ``sluice bench frontier --cluster`` and for the tests (tests/servers.py; with
replicas, tests/faultkit.py).

    with LoopbackCluster(folder, config={...}) as cluster:
        client = connect("redis+cluster://" + cluster.address)
"""

from __future__ import annotations

import random
import shutil
import socket
import subprocess
import time
from collections.abc import Mapping
from pathlib import Path
from types import TracebackType
from typing import Self

import redis
from redis.backoff import NoBackoff
from redis.retry import Retry

from frontier.embedded import LOOPBACK, RedisProcess, find_server_binary
from frontier.exceptions import RedisLaunchError

CLUSTER_MASTERS = 3
CLUSTER_NODE_TIMEOUT_MS = 5000
CLUSTER_CONFIG_FILE = "nodes.conf"
CLUSTER_BUS_OFFSET = 10000  # the cluster bus listens on port + 10000 (Redis cluster spec)
CLUSTER_PORT_RANGE = (20000, 65535 - CLUSTER_BUS_OFFSET)
CLUSTER_PORT_ATTEMPTS = 200
CLUSTER_SLOTS = 16384
CLUSTER_READY_TIMEOUT_S = 30.0
CLUSTER_CREATE_TIMEOUT_S = 60.0
POLL_INTERVAL_S = 0.05
CLI_NAMES = ("redis-cli", "valkey-cli")


def _port_free(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        try:
            sock.bind((LOOPBACK, port))
        except OSError:
            return False
    return True


def cluster_port(taken: set[int]) -> int:
    """A free port whose cluster-bus companion (port + 10000) is free as well."""
    low, high = CLUSTER_PORT_RANGE
    for _ in range(CLUSTER_PORT_ATTEMPTS):
        port = random.randrange(low, high)
        near = {port, port + CLUSTER_BUS_OFFSET}
        if near & taken or any(p + CLUSTER_BUS_OFFSET in near for p in taken):
            continue
        if _port_free(port) and _port_free(port + CLUSTER_BUS_OFFSET):
            return port
    raise RedisLaunchError("no free port pair for a cluster node on loopback")


def find_cli_binary(server_binary: str) -> str:
    """redis-cli / valkey-cli, next to the server binary or on PATH."""
    folder = Path(server_binary).parent
    for name in CLI_NAMES:
        beside = folder / name
        if beside.is_file():
            return str(beside)
    for name in CLI_NAMES:
        found = shutil.which(name)
        if found:
            return found
    raise RedisLaunchError("no redis-cli or valkey-cli found to create the cluster")


def cluster_info(port: int, *, timeout_s: float | None = None) -> dict[str, str]:
    """``CLUSTER INFO`` of the node on ``port`` (empty when it does not answer)."""
    return _info_fields(port, ("CLUSTER", "INFO"), timeout_s)


def replication_info(port: int, *, timeout_s: float | None = None) -> dict[str, str]:
    """``INFO replication`` of the node on ``port``: its role, and a master's
    ``connected_slaves`` or a replica's ``master_port`` and ``master_link_status`` (empty
    when it does not answer)."""
    return _info_fields(port, ("INFO", "replication"), timeout_s)


def _info_fields(port: int, command: tuple[str, ...], timeout_s: float | None) -> dict[str, str]:
    """A ``field:value`` reply of the node on ``port`` as text (``timeout_s``: how long a
    reply may take; None waits)."""
    client = redis.Redis(
        host=LOOPBACK, port=port, decode_responses=True, retry=Retry(NoBackoff(), 0),
        socket_timeout=timeout_s,
    )
    try:
        raw = client.execute_command(*command)
    except redis.RedisError:
        return {}
    finally:
        client.close()
    if isinstance(raw, dict):
        return {str(k): str(v) for k, v in raw.items()}
    lines = raw.splitlines() if isinstance(raw, str) else []
    return dict(line.split(":", 1) for line in lines if ":" in line)


class LoopbackCluster:
    """``masters`` cluster-mode masters with all 16384 slots assigned, on loopback, their
    data in ``directory``; with ``replicas``, that many replicas of each master as well
    (``redis-cli --cluster create --cluster-replicas``), started once every one is synced."""

    READY_TIMEOUT_S = CLUSTER_READY_TIMEOUT_S  # how long start() waits for cluster_state:ok

    def __init__(
        self,
        directory: Path,
        *,
        config: Mapping[str, str] | None = None,
        appendonly: bool = True,
        masters: int = CLUSTER_MASTERS,
        replicas: int = 0,
    ) -> None:
        self.dir = Path(directory)
        self._config = dict(config or {})
        self._appendonly = appendonly
        self._masters = masters
        self._replicas = replicas
        self.nodes: list[RedisProcess] = []

    @property
    def ports(self) -> list[int]:
        return [node.port for node in self.nodes]

    @property
    def startup_nodes(self) -> list[tuple[str, int]]:
        """``(host, port)`` of every master, for ``ClusterNode(host, port)``."""
        return [(LOOPBACK, port) for port in self.ports]

    @property
    def url(self) -> str:
        return f"redis://{LOOPBACK}:{self.ports[0]}"

    def start(self) -> Self:
        binary = find_server_binary()
        taken: set[int] = set()
        try:
            for index in range(self._masters * (1 + self._replicas)):
                port = cluster_port(taken)
                taken.add(port)
                node = RedisProcess(
                    self.dir / f"node{index}",
                    port=port,
                    appendonly=self._appendonly,
                    binary=binary,
                    extra_config={
                        "cluster-enabled": "yes",
                        "cluster-config-file": CLUSTER_CONFIG_FILE,
                        "cluster-node-timeout": str(CLUSTER_NODE_TIMEOUT_MS),
                        **self._config,
                    },
                )
                self.nodes.append(node)
                node.start()
            self._create(find_cli_binary(binary))
            self._wait_ok()
        except BaseException:
            self.stop()
            raise
        return self

    def _create(self, cli: str) -> None:
        addresses = [f"{LOOPBACK}:{port}" for port in self.ports]
        result = subprocess.run(
            [cli, "--cluster", "create", *addresses,
             "--cluster-replicas", str(self._replicas), "--cluster-yes"],
            capture_output=True,
            text=True,
            timeout=CLUSTER_CREATE_TIMEOUT_S,
            check=False,
        )
        if result.returncode != 0:
            raise RedisLaunchError(
                f"cluster create failed ({result.returncode}):\n{result.stdout}\n{result.stderr}"
            )

    def _wait_ok(self) -> None:
        deadline = time.monotonic() + self.READY_TIMEOUT_S
        while True:
            infos = [cluster_info(port) for port in self.ports]
            if all(
                info.get("cluster_state") == "ok"
                and info.get("cluster_slots_assigned") == str(CLUSTER_SLOTS)
                and info.get("cluster_known_nodes") == str(len(self.nodes))
                for info in infos
            ) and self._replicas_synced():
                return
            if time.monotonic() >= deadline:
                raise RedisLaunchError(f"cluster did not reach cluster_state:ok: {infos}")
            time.sleep(POLL_INTERVAL_S)

    def _replicas_synced(self) -> bool:
        """Every master has its replicas attached and every replica has synced with its
        master (``master_link_status:up``); true at once without replicas."""
        if not self._replicas:
            return True
        roles = [replication_info(port) for port in self.ports]
        masters = [r for r in roles if r.get("role") == "master"]
        return (len(masters) == self._masters
                and all(r.get("connected_slaves") == str(self._replicas) for r in masters)
                and all(r.get("master_link_status") == "up"
                        for r in roles if r.get("role") == "slave"))

    def stop(self) -> None:
        for node in self.nodes:
            node.stop()
        self.nodes = []

    def __enter__(self) -> Self:
        return self.start()

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.stop()
