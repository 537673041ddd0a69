"""Real Redis servers for tests: one standalone server or a 3-master cluster.

Both listen on free loopback ports (never the default 6379) and take the extra
server settings sluice needs as ``{"name": "value"}`` (passed as ``--name value``).

    server = RedisServer(tmp_path / "r", config={"maxmemory-policy": "noeviction"})
    server.start(); ...; server.restart(); ...; server.stop()

    cluster = RedisCluster(tmp_path / "c")
    cluster.start()
    redis.asyncio.cluster.RedisCluster.from_url(cluster.url)
    # or: RedisCluster(startup_nodes=[ClusterNode(h, p) for h, p in cluster.startup_nodes])
    cluster.stop()
"""

from __future__ import annotations

import random
import shutil
import socket
import subprocess
import tempfile
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


def _make_dir(directory: Path | None, prefix: str) -> tuple[Path, bool]:
    if directory is not None:
        return Path(directory), False
    return Path(tempfile.mkdtemp(prefix=prefix)), True


class _TestServers:
    """Shared lifecycle: a context manager that stops and removes its own folder."""

    dir: Path
    _owns_dir: bool

    def start(self) -> Self:
        raise NotImplementedError

    def stop(self) -> None:
        raise NotImplementedError

    def close(self) -> None:
        """Stop, and delete the folder if this object created it."""
        self.stop()
        if self._owns_dir:
            shutil.rmtree(self.dir, ignore_errors=True)

    def __enter__(self) -> Self:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


class RedisServer(_TestServers):
    """A standalone server for tests; ``restart()`` keeps its port, folder and AOF data."""

    def __init__(
        self,
        directory: Path | None = None,
        *,
        config: Mapping[str, str] | None = None,
        appendonly: bool = True,
        port: int | None = None,
    ) -> None:
        self.dir, self._owns_dir = _make_dir(directory, "sluice-redis-")
        self._process = RedisProcess(
            self.dir, port=port, appendonly=appendonly, extra_config=config
        )

    @property
    def port(self) -> int:
        return self._process.port

    @property
    def url(self) -> str:
        return f"redis://{LOOPBACK}:{self.port}/0"

    @property
    def pid(self) -> int | None:
        return self._process.pid

    @property
    def process(self) -> RedisProcess:
        return self._process

    def start(self) -> RedisServer:
        self._process.start()
        return self

    def stop(self) -> None:
        """Orderly shutdown (SIGTERM); the folder is kept so ``start()`` resumes the data."""
        self._process.stop()

    def kill(self) -> None:
        """SIGKILL, for failure tests."""
        self._process.kill()

    def restart(self) -> None:
        """Stop (if running) and start again on the same port and folder."""
        self._process.stop()
        self._process.start()



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


def _cluster_info(port: int) -> dict[str, str]:
    client = redis.Redis(
        host=LOOPBACK, port=port, decode_responses=True, retry=Retry(NoBackoff(), 0)
    )
    try:
        raw = client.execute_command("CLUSTER", "INFO")
    except redis.RedisError:
        return {}
    finally:
        client.close()
    if isinstance(raw, dict):
        return {str(k): str(v) for k, v in raw.items()}
    lines = raw.splitlines() if isinstance(raw, str) else []
    return dict(line.split(":", 1) for line in lines if ":" in line)


class RedisCluster(_TestServers):
    """Three cluster-mode masters with all 16384 slots assigned, on loopback."""

    def __init__(
        self,
        directory: Path | None = None,
        *,
        config: Mapping[str, str] | None = None,
        appendonly: bool = True,
        masters: int = CLUSTER_MASTERS,
    ) -> None:
        self.dir, self._owns_dir = _make_dir(directory, "sluice-cluster-")
        self._config = dict(config or {})
        self._appendonly = appendonly
        self._masters = masters
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

    def start(self) -> RedisCluster:
        binary = find_server_binary()
        taken: set[int] = set()
        try:
            for index in range(self._masters):
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
            [cli, "--cluster", "create", *addresses, "--cluster-replicas", "0", "--cluster-yes"],
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
        deadline = time.monotonic() + CLUSTER_READY_TIMEOUT_S
        while True:
            infos = [_cluster_info(port) for port in self.ports]
            if all(
                info.get("cluster_state") == "ok"
                and info.get("cluster_slots_assigned") == str(CLUSTER_SLOTS)
                and info.get("cluster_known_nodes") == str(self._masters)
                for info in infos
            ):
                return
            if time.monotonic() >= deadline:
                raise RedisLaunchError(f"cluster did not reach cluster_state:ok: {infos}")
            time.sleep(POLL_INTERVAL_S)

    def stop(self) -> None:
        for node in self.nodes:
            node.stop()
        self.nodes = []



# -- servers that need credentials or TLS ----------------------------------------------------

SECURE_START_TIMEOUT_S = 15.0
CERT_DAYS = "2"


class TlsFiles:
    """A throwaway CA and a server certificate for 127.0.0.1 (and localhost), made with the
    ``openssl`` command line: ``ca``, ``cert`` and ``key`` are PEM files in ``folder``."""

    def __init__(self, folder: Path) -> None:
        self.folder = Path(folder)
        self.ca = self.folder / "ca.crt"
        self.cert = self.folder / "server.crt"
        self.key = self.folder / "server.key"

    def make(self) -> TlsFiles:
        self.folder.mkdir(parents=True, exist_ok=True)
        ca_key, csr = self.folder / "ca.key", self.folder / "server.csr"
        ext = self.folder / "server.ext"
        ext.write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n"
                       "basicConstraints=CA:FALSE\n"
                       "keyUsage=digitalSignature,keyEncipherment\n"
                       "extendedKeyUsage=serverAuth\n")
        ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
        self._openssl("req", "-x509", *ec, "-keyout", str(ca_key), "-out", str(self.ca),
                      "-days", CERT_DAYS, "-subj", "/CN=sluice test CA")
        self._openssl("req", *ec, "-keyout", str(self.key), "-out", str(csr),
                      "-subj", "/CN=127.0.0.1")
        self._openssl("x509", "-req", "-in", str(csr), "-CA", str(self.ca),
                      "-CAkey", str(ca_key), "-CAcreateserial", "-out", str(self.cert),
                      "-days", CERT_DAYS, "-extfile", str(ext))
        return self

    @staticmethod
    def _openssl(*args: str) -> None:
        openssl = shutil.which("openssl")
        if openssl is None:
            raise RedisLaunchError("no openssl command to make test certificates")
        result = subprocess.run([openssl, *args], capture_output=True, text=True,
                                timeout=60, check=False)
        if result.returncode != 0:
            raise RedisLaunchError(f"openssl {args[0]} failed: {result.stderr.strip()}")


class SecureRedisServer(_TestServers):
    """A standalone server on a free loopback port that wants a password
    (``requirepass``), an ACL user (the default user switched off), and/or TLS only
    (``--port 0``: no plain-text port at all).

        SecureRedisServer(tmp_path / "r", password="pw").start().url
        SecureRedisServer(tmp_path / "r", user="crawler", password="pw").start().url
        SecureRedisServer(tmp_path / "r", tls=TlsFiles(tmp_path / "tls").make()).start().url
    """

    def __init__(self, directory: Path | None = None, *, password: str | None = None,
                 user: str | None = None, tls: TlsFiles | None = None,
                 config: Mapping[str, str] | None = None) -> None:
        if user is not None and password is None:
            raise ValueError("an ACL user needs a password")
        self.dir, self._owns_dir = _make_dir(directory, "sluice-secure-redis-")
        self.password, self.user, self.tls = password, user, tls
        self._config = dict(config or {})
        self._proc: subprocess.Popen[bytes] | None = None
        self._port: int | None = None

    @property
    def port(self) -> int:
        if self._port is None:
            raise RedisLaunchError("the server has not been started")
        return self._port

    @property
    def log_file(self) -> Path:
        return self.dir / "redis.log"

    def url_with(self, password: str | None) -> str:
        """The server's URL carrying ``password`` (and the user, if any)."""
        scheme = "rediss" if self.tls else "redis"
        auth = ""
        if password is not None:
            auth = f"{self.user or ''}:{password}@"
        query = f"?ssl_ca_certs={self.tls.ca}" if self.tls else ""
        return f"{scheme}://{auth}{LOOPBACK}:{self.port}/0{query}"

    @property
    def url(self) -> str:
        return self.url_with(self.password)

    def _args(self, binary: str) -> list[str]:
        args = [binary, "--daemonize", "no", "--bind", LOOPBACK, "--protected-mode", "yes",
                "--dir", str(self.dir.resolve()), "--logfile", str(self.log_file.resolve()),
                "--save", "", "--appendonly", "no"]
        if self.tls is not None:
            args += ["--port", "0", "--tls-port", str(self.port),
                     "--tls-cert-file", str(self.tls.cert), "--tls-key-file", str(self.tls.key),
                     "--tls-ca-cert-file", str(self.tls.ca), "--tls-auth-clients", "no"]
        else:
            args += ["--port", str(self.port)]
        if self.user is not None:
            args += ["--user", "default", "off",
                     "--user", self.user, "on", f">{self.password}", "~*", "&*", "+@all"]
        elif self.password is not None:
            args += ["--requirepass", self.password]
        for name, value in self._config.items():
            args += [f"--{name}", value]
        return args

    def _client(self) -> redis.Redis:
        extra: dict[str, object] = {}
        if self.tls is not None:
            extra = {"ssl": True, "ssl_ca_certs": str(self.tls.ca)}
        return redis.Redis(host=LOOPBACK, port=self.port, username=self.user,
                           password=self.password, socket_timeout=0.5,
                           socket_connect_timeout=0.5, retry=Retry(NoBackoff(), 0), **extra)

    def start(self) -> SecureRedisServer:
        from frontier.embedded import free_port

        if self._proc is not None and self._proc.poll() is None:
            return self  # already running (``with server.start():`` starts once)
        self.dir.mkdir(parents=True, exist_ok=True)
        self._port = free_port()
        with open(self.log_file, "ab") as log:
            self._proc = subprocess.Popen(self._args(find_server_binary()),
                                          stdin=subprocess.DEVNULL, stdout=log,
                                          stderr=subprocess.STDOUT, cwd=self.dir)
        deadline = time.monotonic() + SECURE_START_TIMEOUT_S
        while True:
            if self._proc.poll() is not None:
                self._proc = None
                raise RedisLaunchError(f"redis-server exited at start; its log:\n"
                                       f"{self.log_file.read_text(errors='replace')[-2000:]}")
            client = self._client()
            try:
                if client.ping():
                    return self
            except redis.RedisError:
                pass
            finally:
                client.close()
            if time.monotonic() >= deadline:
                self.stop()
                raise RedisLaunchError("redis-server did not answer PING; its log:\n"
                                       f"{self.log_file.read_text(errors='replace')[-2000:]}")
            time.sleep(POLL_INTERVAL_S)

    def client(self) -> redis.Redis:
        """A synchronous client with the right credentials (for checks in tests)."""
        return self._client()

    def stop(self) -> None:
        proc = self._proc
        if proc is None:
            return
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        self._proc = None
