"""``sluice bench frontier``: admit, lease and complete a million URLs on the embedded Redis.

Prints one JSON object. Rates are medians over equal slices of each phase; the client
limit (pipelined EVALSHA of a trivial script from this same process) is measured in the
same run, before, between and after the phases (the median of the three), so the ratios
mean something on a noisy machine. Redis's own cost is given as
CPU time per URL (``INFO cpu``, user + system) and as commands per URL (``INFO
commandstats``: the commands the scripts call, each script call counted once too),
which a busy machine does not blur. ``--cluster`` runs the same phases on a 3-master
Redis Cluster on loopback (frontier/local_cluster.py) after the single server, in the
same run.
"""

from __future__ import annotations

import asyncio
import gc
import json
import random
import statistics
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any


from frontier.admission import Admission
from frontier.embedded import EmbeddedRedis
from frontier.redis_client import connect
from frontier.model import Candidate, Completion, Outcome
from frontier.settings import JobSettings
from frontier.store import FrontierStore
from frontier.store_tuning import redis_tuning
from frontier.urls import Scope

WORDS = ("news", "item", "page", "story", "archive", "doc", "view", "topic", "post", "entry")


def zipf_host_sizes(urls: int, hosts: int, exponent: float) -> list[int]:
    """Host sizes proportional to 1 / rank**exponent, summing to ``urls``, each >= 1."""
    weights = [1.0 / (rank**exponent) for rank in range(1, hosts + 1)]
    scale = (urls - hosts) / sum(weights)
    sizes = [1 + int(w * scale) for w in weights]
    sizes[0] += urls - sum(sizes)
    return sizes


def synthetic_urls(urls: int, hosts: int, exponent: float, seed: int) -> Iterator[Candidate]:
    """Deterministic URLs over invented ``.test`` hosts, shuffled across hosts."""
    rng = random.Random(seed)
    sizes = zipf_host_sizes(urls, hosts, exponent)
    order = [h for h, n in enumerate(sizes) for _ in range(n)]
    rng.shuffle(order)
    counters = [0] * hosts
    for h in order:
        i = counters[h]
        counters[h] += 1
        word = WORDS[i % len(WORDS)]
        url = f"http://www.site-{h:05d}.test/{word}/{i // 100}/{word}-{i}.html?ref={i % 7}"
        yield Candidate(url, depth=1, cash=rng.random() + 0.01)


async def client_limit(client: Any, seconds: float = 2.0, batch: int = 500) -> float:
    """Pipelined EVALSHA calls of a trivial script per second from this process."""
    script = client.register_script("return 1")
    await script(keys=["sluice:bench:{x}"], args=[])
    calls, start = 0, time.perf_counter()
    while time.perf_counter() - start < seconds:
        pipe = client.pipeline(transaction=False)
        for _ in range(batch):
            pipe.evalsha(script.sha, 1, "sluice:bench:{x}")
        await pipe.execute()
        calls += batch
    return calls / (time.perf_counter() - start)


async def redis_cpu_s(nodes: list[Any]) -> float:
    """CPU seconds the Redis servers have used (INFO cpu, summed over the nodes)."""
    total = 0.0
    for node in nodes:
        info = await node.info("cpu")
        total += float(info["used_cpu_user"]) + float(info["used_cpu_sys"])
    return total


async def redis_calls(nodes: list[Any]) -> int:
    """Commands the Redis servers have run (INFO commandstats, summed; ``info`` itself and
    the bench's own reads are a few hundred in a million)."""
    total = 0
    for node in nodes:
        for name, stats in (await node.info("commandstats")).items():
            if name.startswith("cmdstat_") and isinstance(stats, dict):
                total += int(stats["calls"])
    return total


async def hosts_with_queue(client: Any, store: FrontierStore) -> int:
    """Politeness keys that still have queued URLs."""
    total = 0
    for pk in store.keys.parts:
        total += int(await client.hlen(pk.prio))
    return total


async def memory_by_kind(nodes: list[Any], job: str) -> dict[str, int]:
    """MEMORY USAGE summed per key kind (seen buckets vs queue structures), over the nodes."""
    totals: dict[str, int] = {}
    for client in nodes:
        batch: list[tuple[str, str]] = []

        async def flush() -> None:
            pipe = client.pipeline(transaction=False)
            for key, _ in batch:
                pipe.memory_usage(key, samples=0)
            for (_, kind), used in zip(batch, await pipe.execute()):
                totals[kind] = totals.get(kind, 0) + int(used or 0)
            batch.clear()

        async for raw in client.scan_iter(match=f"sluice:{{{job}.*", count=5000):
            key = raw.decode()
            kind = key.split(":")[2]
            batch.append((key, "seen" if kind == "seen" else "queue"))
            if len(batch) >= 2000:
                await flush()
        if batch:
            await flush()
    return totals


async def used_memory(nodes: list[Any]) -> int:
    total = 0
    for node in nodes:
        total += int((await node.info("memory"))["used_memory"])
    return total


SEGMENTS = 5  # admission is timed in equal segments; the median segment rate is reported
ADMIT_CHUNK = 10000  # candidates per admit call
ADMIT_IN_FLIGHT = 3  # admit calls Redis works on while Python prepares the next
LEASE_BATCH = 512
LEASERS = 4  # concurrent lease+complete loops, like workers sharing one process
TAIL_ROUNDS = 50  # stop the drain after this many rounds below a quarter of a full batch
BENCH_TIMEOUT_S = 300.0  # socket timeout of the bench's Cluster clients


async def admit_pipelined(admission: Admission, candidates: list[Candidate],
                          in_flight: int = ADMIT_IN_FLIGHT) -> None:
    """Prepare chunk i+1 in Python while Redis runs chunk i."""
    pending: set[asyncio.Task[Any]] = set()
    for start in range(0, len(candidates), ADMIT_CHUNK):
        batches = admission.prepare(candidates[start:start + ADMIT_CHUNK])
        pending.add(asyncio.create_task(admission.store.admit_batches(batches)))
        await asyncio.sleep(0)  # let the new task send its calls
        if len(pending) >= in_flight:
            finished, pending = await asyncio.wait(pending, return_when=asyncio.FIRST_COMPLETED)
            for task in finished:
                task.result()
    if pending:
        for task in await asyncio.gather(*pending):
            pass


async def drain_one_at_a_time(store: FrontierStore, nodes: list[Any], limit: int) -> dict[str, Any]:
    """Lease ``LEASERS`` batches, complete them, again, until ``limit`` URLs are done: one
    call at a time, so Redis's CPU for leasing and for completing can be told apart."""
    rates: list[float] = []
    done = thin_rounds = 0
    lease_cpu = complete_cpu = 0.0
    while thin_rounds < TAIL_ROUNDS and done < limit:
        s = time.perf_counter()
        r0 = await redis_cpu_s(nodes)
        got = await asyncio.gather(*(store.lease(LEASE_BATCH) for _ in range(LEASERS)))
        leases = [x for g in got for x in g]
        r1 = await redis_cpu_s(nodes)
        lease_cpu += r1 - r0
        if not leases:
            if (await store.counts()).queued == 0:
                break
            thin_rounds += 1
            continue
        await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases])
        complete_cpu += await redis_cpu_s(nodes) - r1
        done += len(leases)
        if len(leases) == LEASE_BATCH * LEASERS:
            rates.append(len(leases) / (time.perf_counter() - s))
        # the tail: few hosts left, one lease per host at a time (politeness, by design)
        thin_rounds = thin_rounds + 1 if len(leases) < LEASE_BATCH * LEASERS // 4 else 0
    return {"done": done, "rate": statistics.median(rates) if rates else 0.0,
            "lease_cpu": lease_cpu, "complete_cpu": complete_cpu}


async def drain_in_loops(store: FrontierStore, limit: int) -> dict[str, Any]:
    """``LEASERS`` loops, each leasing a batch and completing it, as a worker's lease loop
    and write-back run side by side: one loop's completion goes on while another leases
    (Python builds one call while Redis runs another). The rate is the median over windows
    of ``LEASERS`` full batches."""
    done = thin = 0
    stop = False
    marks: list[tuple[float, int]] = []  # (time, URLs done) after each full batch

    async def loop() -> None:
        nonlocal done, thin, stop
        while not stop:
            leases = await store.lease(LEASE_BATCH)
            if leases:
                await store.complete_many([Completion(x, Outcome.FETCHED) for x in leases])
                done += len(leases)
                if len(leases) == LEASE_BATCH:
                    marks.append((time.perf_counter(), done))
            elif (await store.counts()).queued == 0:
                stop = True
            thin = thin + 1 if len(leases) < LEASE_BATCH // 4 else 0
            stop = stop or done >= limit or thin >= TAIL_ROUNDS * LEASERS

    await asyncio.gather(*(loop() for _ in range(LEASERS)))
    rates = [(marks[i + LEASERS][1] - marks[i][1]) / (marks[i + LEASERS][0] - marks[i][0])
             for i in range(0, len(marks) - LEASERS, LEASERS)]
    return {"done": done, "rate": statistics.median(rates) if rates else 0.0,
            "windows": len(rates)}


def bench_settings(urls: int, state: Path) -> JobSettings:
    return JobSettings.model_validate({
        "name": "bench", "state_dir": str(state),
        "store": {"partitions": 16, "expected_urls": urls},
        "budget": {"max_pages_per_host": None},
        "priority": {"host_budget_base": 0},  # no earned budgets: every URL is queued
        "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
        "lease": {"ttl_s": 3600},
    })


async def run(urls: int, hosts: int, exponent: float, seed: int, state: Path,
              aof: bool = True, lease_limit: int | None = None) -> dict[str, Any]:
    """The phases on the embedded Redis (one server, one core)."""
    settings = bench_settings(urls, state)
    config = redis_tuning(settings)
    if not aof:  # the embedded default keeps an append-only file; this measures without it
        config["appendonly"] = "no"
    server = EmbeddedRedis(state, config=config)
    server.start()
    client = connect(server.url)
    try:
        limit = await client_limit(client)
        result = await phases(client, [client], settings, urls, hosts, exponent, seed, limit,
                              lease_limit)
        return {"append_only_file": aof, **result}
    finally:
        await client.aclose()
        server.stop()


async def run_cluster(urls: int, hosts: int, exponent: float, seed: int, state: Path,
                      limit: float, aof: bool = True,
                      lease_limit: int | None = None) -> dict[str, Any]:
    """The same phases on a 3-master Redis Cluster on loopback (each master its own
    process: on this machine they share its cores with the bench)."""
    from frontier.local_cluster import LoopbackCluster

    settings = bench_settings(urls, state)
    with LoopbackCluster(state / "cluster", config=redis_tuning(settings),
                         appendonly=aof) as cluster:
        # a loaded machine can hold a reply back for seconds: a client that timed out tears
        # down a connection its other calls share, so wait as long as the bench may
        client = connect("redis+cluster://" + cluster.url.split("://", 1)[1],
                         timeout_s=BENCH_TIMEOUT_S)
        nodes = [connect(f"redis://{host}:{port}", timeout_s=BENCH_TIMEOUT_S)
                 for host, port in cluster.startup_nodes]
        try:
            # one admit at a time: redis-py's Cluster client tore down connections under
            # several large admits at once ("'NoneType' object has no attribute
            # 'writelines'", 500k URLs, three in flight)
            result = await phases(client, nodes, settings, urls, hosts, exponent, seed, limit,
                                  lease_limit, in_flight=1, remeasure=False)
            return {"masters": len(nodes), "append_only_file": aof, **result}
        finally:
            await client.aclose()
            for node in nodes:
                await node.aclose()


async def phases(client: Any, nodes: list[Any], settings: JobSettings, urls: int, hosts: int,
                 exponent: float, seed: int, limit: float,
                 lease_limit: int | None = None,
                 in_flight: int = ADMIT_IN_FLIGHT, remeasure: bool = True) -> dict[str, Any]:
    """Admit ``urls`` URLs, then lease and complete them (the first ``lease_limit`` only,
    when given); the figures of both phases. The client limit is measured again after
    each phase (``remeasure``) and the ratios use the median of the three."""
    store = FrontierStore(client, settings)
    partitions = store.partitions
    admission = Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))
    base_mem = await used_memory(nodes)

    candidates = list(synthetic_urls(urls, hosts, exponent, seed))
    gc.freeze()  # the million input objects are bench data: keep the collector off them
    mean_len = statistics.fmean(len(c.url) for c in candidates)
    segment_rates: list[float] = []
    cpu0, redis0, calls0 = time.process_time(), await redis_cpu_s(nodes), await redis_calls(nodes)
    t0 = time.perf_counter()
    segment = max(1, len(candidates) // SEGMENTS)
    for start in range(0, len(candidates), segment):
        s = time.perf_counter()
        await admit_pipelined(admission, candidates[start:start + segment], in_flight)
        segment_rates.append(min(segment, len(candidates) - start) / (time.perf_counter() - s))
    admit_total_s = time.perf_counter() - t0
    admit_py_cpu = time.process_time() - cpu0
    admit_redis_cpu = await redis_cpu_s(nodes) - redis0
    admit_calls = await redis_calls(nodes) - calls0
    del candidates
    gc.unfreeze()
    counts = await store.counts()
    mem = await memory_by_kind(nodes, settings.name)
    used_mem = await used_memory(nodes) - base_mem

    limits = [limit]
    if remeasure:  # the limit moves with the machine's load: measured again between phases
        limits.append(await client_limit(client))
    # one at a time first (the four leases, then their completion: Redis's cost of each
    # apart), then as workers run, four loops each leasing and completing in turn
    limit_all = lease_limit if lease_limit is not None else counts.queued
    one_limit = limit_all // 3
    cpu1, redis1, calls1 = time.process_time(), await redis_cpu_s(nodes), await redis_calls(nodes)
    t1 = time.perf_counter()
    one = await drain_one_at_a_time(store, nodes, one_limit)
    loops = await drain_in_loops(store, limit_all - one["done"])
    done = one["done"] + loops["done"]
    one_done = max(one["done"], 1)
    lease_total_s = time.perf_counter() - t1
    lease_py_cpu = time.process_time() - cpu1
    lease_redis_cpu = await redis_cpu_s(nodes) - redis1
    lease_calls = await redis_calls(nodes) - calls1
    if remeasure:
        limits.append(await client_limit(client))
    limit = statistics.median(limits)
    final = await store.counts()
    return {
        "urls": urls, "hosts": hosts, "zipf_exponent": exponent, "partitions": partitions,
        "rank_spread": settings.lease.rank_spread,
        "admit_urls_per_s": round(statistics.median(segment_rates)),
        "admit_urls_per_s_overall": round(urls / admit_total_s),
        "lease_complete_urls_per_s": round(loops["rate"]),
        "lease_complete_windows": loops["windows"],
        "lease_complete_urls_per_s_one_at_a_time": round(one["rate"]),
        "lease_complete_urls_per_s_overall_drain": round(done / lease_total_s),
        "client_limit_ops_per_s": round(limit),
        "client_limit_runs": [round(x) for x in limits],
        "admit_ratio_to_client_limit": round(statistics.median(segment_rates) / limit, 2),
        "lease_complete_ratio_to_client_limit": round(loops["rate"] / limit, 2),
        "lease_complete_one_at_a_time_ratio_to_client_limit": round(one["rate"] / limit, 2),
        "cpu_us_per_admitted_url": {"redis": round(admit_redis_cpu / urls * 1e6, 1),
                                    "python": round(admit_py_cpu / urls * 1e6, 1)},
        "cpu_us_per_leased_and_completed_url": {
            "redis": round(lease_redis_cpu / max(done, 1) * 1e6, 1),
            "redis_lease_one_at_a_time": round(one["lease_cpu"] / one_done * 1e6, 1),
            "redis_complete_one_at_a_time": round(one["complete_cpu"] / one_done * 1e6, 1),
            "python": round(lease_py_cpu / max(done, 1) * 1e6, 1)},
        "redis_commands_per_admitted_url": round(admit_calls / urls, 2),
        "redis_commands_per_leased_and_completed_url": round(lease_calls / max(done, 1), 2),
        "mean_url_length": round(mean_len, 1),
        "bytes_per_queued_url": round(mem.get("queue", 0) / counts.queued, 1),
        "bytes_per_seen_url": round(mem.get("seen", 0) / counts.admitted, 2),
        "bytes_per_url_used_memory": round(used_mem / counts.admitted, 1),
        "queued": counts.queued, "fetched": final.fetched,
        "drained_share": round(final.fetched / counts.queued, 3),
        "hosts_left_at_stop": await hosts_with_queue(client, store),
        "balanced": final.balanced,
    }


def main(urls: int = 1_000_000, hosts: int = 10_000, exponent: float = 1.0, seed: int = 7,
         aof: bool = True, cluster: bool = False, lease_limit: int | None = None) -> int:
    with tempfile.TemporaryDirectory(prefix="sluice-bench-") as tmp:
        (Path(tmp) / "server").mkdir()
        result = asyncio.run(run(urls, hosts, exponent, seed, Path(tmp) / "server", aof,
                                 lease_limit))
        if cluster:
            result = {"server": result, "cluster": asyncio.run(run_cluster(
                urls, hosts, exponent, seed, Path(tmp), result["client_limit_ops_per_s"], aof,
                lease_limit))}
            result["cluster_to_server"] = {
                k: round(result["cluster"][k] / max(result["server"][k], 1), 2)
                for k in ("admit_urls_per_s", "lease_complete_urls_per_s")}
    print(json.dumps(result, indent=2))
    return 0
