"""``sluice bench frontier --instructions``: Redis's machine instructions per URL, counted.

CPU time per URL moves with whatever else the machine runs (two-fold swings were seen
between runs on a shared machine); instructions executed do not. This runs the frontier
bench's admit and one-at-a-time lease + complete phases against a redis-server under
valgrind's callgrind (which counts every instruction the server executes: Weidendorfer et
al., "A Tool Suite for Simulation Based Analysis of Memory Access Behavior", ICCS 2004)
and prints instructions per admitted URL and per leased and completed URL, without the
server's append-only file and (a second run) with it. Callgrind runs the server some
fifty times slower, so the sizes are small; the counts are exact for a given server
binary, and comparable between commits on the same binary.
"""

from __future__ import annotations

import asyncio
import json
import re
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

from frontier.admission import Admission
from frontier.embedded import LOOPBACK, find_server_binary, free_port
from frontier.exceptions import ConfigError
from frontier.redis_client import connect
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from frontier.urls import Scope

START_TIMEOUT_S = 60.0  # a server under valgrind takes seconds to answer its first ping
TOTALS = re.compile(r"^\s*([\d,]+)\s.*PROGRAM TOTALS", re.M)


def _tool(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        raise ConfigError(f"--instructions needs valgrind's {name} on the PATH "
                          "('apt-get install valgrind')")
    return path


def _control(pid: int, *flags: str) -> None:
    subprocess.run([_tool("callgrind_control"), *flags, str(pid)], check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def _total(dump: Path) -> int:
    """Instructions in one callgrind dump (callgrind_annotate's program totals)."""
    text = subprocess.run([_tool("callgrind_annotate"), str(dump)], check=True,
                          capture_output=True, text=True).stdout
    match = TOTALS.search(text)
    return int(match.group(1).replace(",", "")) if match else 0


async def _wait_ready(client: Any) -> None:
    deadline = time.monotonic() + START_TIMEOUT_S
    while True:
        try:
            await client.ping()
            return
        except Exception:  # noqa: BLE001 - not listening yet
            if time.monotonic() > deadline:
                raise
            await asyncio.sleep(0.2)


async def count(urls: int, hosts: int, lease_limit: int, exponent: float = 1.0,
                seed: int = 7, aof: bool = False) -> dict[str, Any]:
    """Admit ``urls`` URLs, lease and complete ``lease_limit`` of them one call at a time;
    the server's instructions per URL in each phase. ``aof``: with the append-only file
    on (every write a script makes is also formatted into the file, with fsync each
    second, as the embedded server runs); without, the scripts' and commands' own work."""
    from frontier.bench.frontier_bench import (
        admit_pipelined, bench_settings, drain_one_at_a_time, synthetic_urls)

    valgrind = _tool("valgrind")
    with tempfile.TemporaryDirectory() as tmp:
        state = Path(tmp)
        settings = bench_settings(urls, state)
        port = free_port()
        server_args = ["--port", str(port), "--bind", LOOPBACK, "--save", "",
                       "--appendonly", "yes" if aof else "no", "--dir", tmp]
        for key, value in redis_tuning(settings).items():
            server_args += [f"--{key}", value]
        out = state / "callgrind.out"
        proc = subprocess.Popen(
            [valgrind, "--tool=callgrind", "--instr-atstart=no",
             f"--callgrind-out-file={out}", find_server_binary(), *server_args],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        client = connect(f"redis://{LOOPBACK}:{port}/0", timeout_s=START_TIMEOUT_S)
        try:
            await _wait_ready(client)
            store = FrontierStore(client, settings)
            admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
            candidates = list(synthetic_urls(urls, hosts, exponent, seed))
            _control(proc.pid, "--instr=on")
            await admit_pipelined(admission, candidates)
            _control(proc.pid, "--dump=admit")
            # the frontier bench's one-at-a-time drain (its INFO calls around each step add
            # a few tens of instructions a URL)
            done = (await drain_one_at_a_time(store, [client], lease_limit))["done"]
            _control(proc.pid, "--dump=lease")
            _control(proc.pid, "--instr=off")
        finally:
            await client.aclose()
            proc.terminate()
            proc.wait(timeout=60)
        dumps = sorted(state.glob("callgrind.out.*"))
        if len(dumps) < 2:
            raise ConfigError(f"callgrind wrote {len(dumps)} dumps, expected 2")
        admit_total, lease_total = _total(dumps[0]), _total(dumps[1])
    return {
        "urls": urls, "hosts": hosts, "leased_and_completed": done,
        "server": subprocess.run([find_server_binary(), "--version"], capture_output=True,
                                 text=True).stdout.split(" sha")[0],
        "redis_instructions_per_admitted_url": round(admit_total / urls),
        "redis_instructions_per_leased_and_completed_url": round(lease_total / max(done, 1)),
    }


def main(urls: int, hosts: int, lease_limit: int) -> int:
    """The counts without the append-only file (comparable across commits: the scripts'
    own work), then the per-URL counts with it (as the embedded default runs)."""
    result = asyncio.run(count(urls, hosts, lease_limit))
    with_file = asyncio.run(count(urls, hosts, lease_limit, aof=True))
    for key in ("redis_instructions_per_admitted_url",
                "redis_instructions_per_leased_and_completed_url"):
        result[f"{key}_with_append_only_file"] = with_file[key]
    print(json.dumps(result, indent=2))
    return 0
