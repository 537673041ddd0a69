"""``sluice bench dedupe``: SimHash fingerprints of 8 KB pages per second, and the
near-duplicate index's lookups and inserts per second on a private Redis server.

The limit beside each figure is measured in the same run: for fingerprinting, the
MurmurHash3 calls alone (the page's bytes hashed in one call, and its shingles hashed
one by one, which SimHash over word shingles cannot avoid); for the index, pipelined
calls of a trivial script from this process (``frontier_bench.client_limit``).
"""

from __future__ import annotations

import asyncio
import json
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import mmh3

from frontier.bench.frontier_bench import client_limit, redis_cpu_s
from frontier import simhash
from frontier.embedded import EmbeddedRedis
from frontier.keys import Keys
from frontier.redis_client import connect
from frontier.simhash import (
    SHINGLE_WORDS,
    Fingerprint,
    NearDuplicateIndex,
    _ascii_shingles,
    _sketch,
    simhash64,
)

PAGE_BYTES = 8192
BATCH = 64
ROUNDS = 3
"""Alternating passes of SimHash (numpy), the floor and SimHash (pure Python); medians."""
"""Pages per match_pages call (a worker's write-back batch is of this order)."""


def synthetic_pages(count: int, seed: int = 5) -> list[str]:
    """``count`` ASCII texts of exactly 8 KB from an invented vocabulary."""
    rng = random.Random(seed)
    vocabulary = ["".join(rng.choice("bdfgklmnprstvz") + rng.choice("aeiou")
                          for _ in range(rng.randint(1, 4))) for _ in range(5000)]
    pages = []
    for _ in range(count):
        words: list[str] = []
        size = 0
        while size < PAGE_BYTES:
            word = rng.choice(vocabulary)
            words.append(word)
            size += len(word) + 1
        pages.append(" ".join(words)[:PAGE_BYTES])
    return pages


def rate(fn: Any, items: list[Any]) -> float:
    """Items per second of ``fn`` over ``items`` (one pass, wall clock)."""
    start = time.perf_counter()
    for item in items:
        fn(item)
    return len(items) / (time.perf_counter() - start)


def fingerprint_figures(pages: list[str]) -> dict[str, Any]:
    """SimHash + sketch per second, the hashing alone, and the steps in between."""
    encoded = [p.encode() for p in pages]
    shingled = [_ascii_shingles(p, SHINGLE_WORDS) for p in pages]
    rate(simhash64, pages[:200])  # warm caches (bit masks, allocator)
    numpy = simhash._np
    runs: dict[str, list[float]] = {"fast": [], "floor": [], "pure": []}
    try:  # alternated, medians of ROUNDS: a shared machine's load moves between passes
        for _ in range(ROUNDS):
            simhash._np = numpy
            runs["fast"].append(rate(simhash64, pages))
            runs["floor"].append(rate(lambda p: b"".join(
                map(mmh3.hash_bytes, _ascii_shingles(p, SHINGLE_WORDS))), pages))
            simhash._np = None  # the pure-Python path, for comparison
            runs["pure"].append(rate(simhash64, pages))
    finally:
        simhash._np = numpy
    fast, floor, pure = (statistics.median(runs[k]) for k in ("fast", "floor", "pure"))
    return {
        "page_bytes": PAGE_BYTES,
        "pages": len(pages),
        "rounds": ROUNDS,
        "shingles_per_page": round(sum(map(len, shingled)) / len(shingled)),
        "numpy": None if numpy is None else numpy.__version__,
        "simhash64_pages_per_s": round(fast),
        "simhash64_pure_python_pages_per_s": round(pure),
        "ratio_to_split_shingle_hash_limit": round(fast / floor, 3),
        "limit_mmh3_page_bytes_pages_per_s": round(rate(mmh3.hash_bytes, encoded)),
        "limit_mmh3_each_shingle_pages_per_s": round(
            rate(lambda s: b"".join(map(mmh3.hash_bytes, s)), shingled)),
        "split_and_shingle_pages_per_s": round(
            rate(lambda p: _ascii_shingles(p, SHINGLE_WORDS), pages)),
        # the floor of SimHash over word shingles in this process: split, shingle, hash
        # each shingle; counting the bits and the sketch come on top
        "limit_split_shingle_hash_pages_per_s": round(floor),
        "sketch_pages_per_s": round(rate(_sketch, [
            b"".join(map(mmh3.hash_bytes, s)) for s in shingled])),
    }


def synthetic_fingerprints(count: int, copies: float, seed: int = 9) -> list[Fingerprint]:
    """Random fingerprints with sketches; a share of them near copies of earlier ones."""
    rng = random.Random(seed)
    out: list[Fingerprint] = []
    for _ in range(count):
        if out and rng.random() < copies:
            base = rng.choice(out)
            flipped = int(base)
            for bit in rng.sample(range(64), rng.randint(0, 6)):
                flipped ^= 1 << bit
            out.append(Fingerprint(flipped, base.sketch))
        else:
            values = sorted(rng.getrandbits(32) for _ in range(64))
            out.append(Fingerprint(rng.getrandbits(64),
                                   b"".join(v.to_bytes(4, "little") for v in values)))
    return out


async def index_figures(fingerprints: list[Any], state: Path,
                        **options: Any) -> dict[str, Any]:
    """match_pages (look up, confirm, store) per second on a private redis-server;
    ``options`` go to the index (``sketch_k=None``: Manku's k + 1 tables alone)."""
    server = EmbeddedRedis(state, config={"appendonly": "no"})
    server.start()
    client = connect(server.url)
    try:
        limit = await client_limit(client)
        keys = Keys("bench", 4)
        index = NearDuplicateIndex(client, keys.near_dup, page_key=keys.near_dup_page,
                                   **options)
        base_mem = int((await client.info("memory"))["used_memory"])
        cpu0 = await redis_cpu_s(client)
        matched = 0
        start = time.perf_counter()
        for i in range(0, len(fingerprints), BATCH):
            batch = fingerprints[i:i + BATCH]
            found = await index.match_pages(batch, [f"http://bench.test/{i + j}"
                                                    for j in range(len(batch))])
            matched += sum(m is not None for m in found)
        elapsed = time.perf_counter() - start
        used = int((await client.info("memory"))["used_memory"]) - base_mem
        return {
            "fingerprints": len(fingerprints),
            "batch": BATCH,
            "tables": len(index.tables),
            "lookups_and_inserts_per_s": round(len(fingerprints) / elapsed),
            "matched": matched,
            "redis_cpu_share": round((await redis_cpu_s(client) - cpu0) / elapsed, 2),
            "memory_bytes_per_fingerprint": round(used / len(fingerprints)),
            "limit_trivial_script_calls_per_s": round(limit),
        }
    finally:
        await client.aclose()
        server.stop()


def main(pages: int = 5000, fingerprints: int = 100_000) -> int:
    """Print the figures as JSON."""
    out: dict[str, Any] = {"fingerprint": fingerprint_figures(synthetic_pages(pages))}
    sample = synthetic_fingerprints(fingerprints, copies=0.1)
    with tempfile.TemporaryDirectory(prefix="sluice-dedupe-") as state:
        out["index"] = asyncio.run(index_figures(sample, Path(state)))
    with tempfile.TemporaryDirectory(prefix="sluice-dedupe-") as state:  # for comparison
        out["index_k3_without_sketch"] = asyncio.run(index_figures(
            [int(fp) for fp in sample], Path(state), sketch_k=None))
    json.dump(out, sys.stdout, indent=2)
    print()
    return 0
