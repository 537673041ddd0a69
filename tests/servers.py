"""Real Redis servers for tests: one standalone server or a 3-master cluster (the cluster
starter itself is frontier/local_cluster.py, which the frontier bench uses too).

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

import shutil
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
from frontier.local_cluster import (  # noqa: F401 - the tests' names for them
    CLUSTER_CONFIG_FILE, CLUSTER_MASTERS, CLUSTER_SLOTS, LoopbackCluster, cluster_port,
    find_cli_binary,
)

POLL_INTERVAL_S = 0.05


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



class RedisCluster(_TestServers, LoopbackCluster):
    """Three cluster-mode masters with all 16384 slots assigned, on loopback
    (frontier/local_cluster.py), in a folder of their own unless one is given."""

    def __init__(
        self,
        directory: Path | None = None,
        *,
        config: Mapping[str, str] | None = None,
        appendonly: bool = True,
        masters: int = CLUSTER_MASTERS,
    ) -> None:
        folder, self._owns_dir = _make_dir(directory, "sluice-cluster-")
        LoopbackCluster.__init__(self, folder, config=config, appendonly=appendonly,
                                 masters=masters)

    def start(self) -> RedisCluster:
        LoopbackCluster.start(self)
        return self

    def stop(self) -> None:
        LoopbackCluster.stop(self)


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
