"""Tests for frontier.simhash: SimHash properties, pigeonhole blocks, Redis index."""

from __future__ import annotations

import itertools
import math
import random
import shutil
import socket
import statistics
import subprocess
import threading
import uuid
from collections import Counter
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import mmh3
import pytest
import redis
import redis.asyncio as aioredis
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.exceptions import StoreUnavailable
from frontier.simhash import (
    FP_BITS,
    NearDuplicateIndex,
    block_widths,
    hamming,
    shingles,
    simhash64,
    split_blocks,
    to_signed,
    to_unsigned,
)

U64 = st.integers(min_value=0, max_value=(1 << 64) - 1)
RESERVED_REDIS_PORT = 6379


def reference_simhash(text: str, width: int = 3) -> int:
    """Charikar (2002) SimHash written out bit by bit: the oracle."""
    sums = [0] * FP_BITS
    for feature in shingles(text, width):
        h = mmh3.hash64(feature, 0, signed=False)[0]
        for i in range(FP_BITS):
            sums[i] += 1 if h >> i & 1 else -1
    return sum(1 << i for i in range(FP_BITS) if sums[i] > 0)


def random_words(rng: random.Random, n: int) -> list[str]:
    return [f"t{rng.randrange(10**9)}" for _ in range(n)]


def flip(fp: int, positions: tuple[int, ...] | list[int]) -> int:
    for p in positions:
        fp ^= 1 << p
    return fp


# --- SimHash itself -----------------------------------------------------------------


@given(words=st.lists(st.sampled_from(["tide", "harbor", "gull", "Rope", "knot", "é", "42"]),
                      max_size=60),
       width=st.integers(min_value=1, max_value=4))
@settings(max_examples=200, deadline=None)
def test_simhash_matches_bitwise_definition(words: list[str], width: int) -> None:
    # Charikar 2002 s.3 / Manku et al. 2007 s.2: bit i is the sign of the sum of
    # +-1 contributions of every feature's hash bit i. Repeated words make ties.
    text = " ".join(words)
    fp = simhash64(text, shingle_words=width)
    assert fp == reference_simhash(text, width)
    assert 0 <= fp < 1 << 64


@given(text=st.text(alphabet=st.characters(max_codepoint=127), max_size=300),
       width=st.integers(min_value=1, max_value=4))
@settings(max_examples=300, deadline=None)
def test_ascii_text_matches_bitwise_definition(text: str, width: int) -> None:
    # ASCII text takes a faster word split; the oracle splits with the \w+ regex
    # (Python re: \w on ASCII is [A-Za-z0-9_]). Any punctuation, digits, controls.
    assert simhash64(text, shingle_words=width) == reference_simhash(text, width)


@given(text=st.text(max_size=400), width=st.integers(min_value=1, max_value=4))
@settings(max_examples=200, deadline=None)
def test_numpy_and_pure_python_paths_agree(text: str, width: int) -> None:
    # With numpy the bit planes are counted and the MIN_s sketch (Broder 1997) sorted in
    # compiled code; the fingerprint and the sketch must be the very same bits as the
    # pure-Python path's (the bitwise oracle above checks that one), odd text included.
    import frontier.simhash as sh

    if sh._np is None:
        pytest.fail("numpy is not importable here: the fast path is not exercised")
    fast = simhash64(text, shingle_words=width)
    saved, sh._np = sh._np, None
    try:
        slow = simhash64(text, shingle_words=width)
    finally:
        sh._np = saved
    assert (int(fast), fast.sketch) == (int(slow), slow.sketch)
    assert fast == reference_simhash(text, width)


def test_simhash_is_unsigned_and_covers_high_bit() -> None:
    # Unsigned 64-bit result: over many texts the top bit is set about half the time.
    rng = random.Random(11)
    fps = [simhash64(" ".join(random_words(rng, 50))) for _ in range(400)]
    assert all(0 <= fp < 1 << 64 for fp in fps)
    high = sum(fp >> 63 for fp in fps)
    assert 140 < high < 260  # Bin(400, 1/2): mean 200, sd 10; 6 sd either side.


def test_features_are_lowercased_words() -> None:
    # Features are word shingles; case, punctuation and spacing are not words.
    a = "The tide, at HARBOR gate -- rose early!"
    b = "the   tide at harbor\ngate rose (early)"
    assert simhash64(a) == simhash64(b)
    assert simhash64("") == 0 == simhash64("  ,;  ")


def test_hamming_is_popcount_of_xor() -> None:
    # Hamming distance = number of differing bit positions.
    assert hamming(0, (1 << 64) - 1) == 64
    assert hamming(0b1011, 0b0110) == 3
    assert hamming(to_signed(1 << 63), 1 << 63) == 0


@given(U64)
def test_signed_round_trip(fp: int) -> None:
    # Two's complement: the signed 64-bit value with the same bit pattern.
    signed = to_signed(fp)
    assert -(1 << 63) <= signed < 1 << 63
    assert to_unsigned(signed) == fp
    assert signed.to_bytes(8, "big", signed=True) == fp.to_bytes(8, "big")


def _unit(v: list[float]) -> list[float]:
    norm = math.sqrt(sum(x * x for x in v))
    return [x / norm for x in v]


def _dot(a: list[float], b: list[float]) -> float:
    return sum(x * y for x, y in zip(a, b, strict=True))


def test_random_hyperplane_agreement_is_one_minus_theta_over_pi() -> None:
    # Charikar 2002, s.3 (after Goemans & Williamson 1995): for a random
    # hyperplane r, Pr[sign(r.u) == sign(r.v)] = 1 - theta(u, v)/pi.
    # With n independent hyperplanes the observed fraction has standard error
    # sqrt(p(1-p)/n) (binomial); we allow 5 standard errors.
    rng = random.Random(2002)
    dim, planes = 16, 4000
    hyperplanes = [[rng.gauss(0.0, 1.0) for _ in range(dim)] for _ in range(planes)]
    for theta in (0.05, 0.3, 0.8, math.pi / 2, 2.2, 3.0):
        u = _unit([rng.gauss(0.0, 1.0) for _ in range(dim)])
        w = [rng.gauss(0.0, 1.0) for _ in range(dim)]
        along = _dot(w, u)
        w = _unit([wi - along * ui for wi, ui in zip(w, u, strict=True)])
        v = [math.cos(theta) * ui + math.sin(theta) * wi for ui, wi in zip(u, w, strict=True)]
        assert math.isclose(_dot(u, v), math.cos(theta), abs_tol=1e-9)
        agree = sum((_dot(r, u) > 0) == (_dot(r, v) > 0) for r in hyperplanes) / planes
        expected = 1 - theta / math.pi
        tolerance = 5 * math.sqrt(expected * (1 - expected) / planes)
        assert abs(agree - expected) <= tolerance, (theta, agree, expected)


def _cosine(a: list[str], b: list[str]) -> float:
    ca, cb = Counter(a), Counter(b)
    dot = sum(ca[k] * cb[k] for k in ca)
    return dot / math.sqrt(sum(x * x for x in ca.values()) * sum(x * x for x in cb.values()))


@pytest.mark.parametrize("replaced_share", [0.02, 0.1, 0.3, 0.6, 1.0])
def test_simhash_bit_agreement_follows_charikar(replaced_share: float) -> None:
    # Charikar 2002 s.3: SimHash is a random-hyperplane hash of the feature
    # vector, so the expected share of agreeing bits is 1 - theta/pi, theta the
    # angle between the shingle-count vectors. The +-1 hyperplanes are
    # Rademacher rather than Gaussian; with ~300 features the sums are close to
    # normal (central limit theorem). Texts of 301 words give 299 shingles, an
    # odd count, so no coordinate sum is ever 0 (no ties). Tolerance: 5 binomial
    # standard errors over pairs x 64 bits.
    rng = random.Random(int(replaced_share * 1000))
    pairs, words = 200, 301
    observed, predicted = [], []
    for _ in range(pairs):
        a = random_words(rng, words)
        b = list(a)
        for i in rng.sample(range(words), int(words * replaced_share)):
            b[i] = f"u{rng.randrange(10**9)}"
        text_a, text_b = " ".join(a), " ".join(b)
        theta = math.acos(min(1.0, _cosine(shingles(text_a), shingles(text_b))))
        predicted.append(1 - theta / math.pi)
        observed.append(1 - hamming(simhash64(text_a), simhash64(text_b)) / FP_BITS)
    p = statistics.mean(predicted)
    tolerance = 5 * math.sqrt(p * (1 - p) / (pairs * FP_BITS))
    assert abs(statistics.mean(observed) - p) <= tolerance


def _binomial_cdf(n: int, p: float, k: int) -> float:
    return sum(math.comb(n, i) * p**i * (1 - p) ** (n - i) for i in range(k + 1))


@pytest.mark.parametrize(("width", "words"), [(3, 200), (1, 200), (3, 2000)])
def test_one_changed_word_distance(width: int, words: int) -> None:
    # Charikar 2002 s.3: each bit differs with probability theta/pi, so the
    # distance is close to Binomial(64, theta/pi). Changing one word of N
    # changes `width` of the N - width + 1 shingles, cos = 1 - width/(N-width+1).
    # For 3-word shingles in 200 words theta/pi = 0.055: a distance <= 3 holds
    # for only ~52% of such pairs; in 2000 words, for ~97%. The observed share
    # must match the binomial within 5 standard errors.
    rng = random.Random(width * 7919 + words)
    trials = 150
    within = 0
    distances = []
    for _ in range(trials):
        a = random_words(rng, words)
        b = list(a)
        b[rng.randrange(words)] = "changed"
        d = hamming(simhash64(" ".join(a), shingle_words=width),
                    simhash64(" ".join(b), shingle_words=width))
        distances.append(d)
        within += d <= 3
    features = words - width + 1
    theta = math.acos((features - width) / features)
    p_within = _binomial_cdf(FP_BITS, theta / math.pi, 3)
    tolerance = 5 * math.sqrt(p_within * (1 - p_within) / trials)
    assert abs(within / trials - p_within) <= tolerance, (within / trials, p_within)
    assert statistics.median(distances) <= 4


def test_unrelated_texts_are_far_apart() -> None:
    # Independent texts: every bit agrees with probability 1/2 (theta = pi/2),
    # distance ~ Binomial(64, 1/2); Pr[d <= 10] < 1e-7, so 300 pairs all > 10.
    assert _binomial_cdf(FP_BITS, 0.5, 10) < 1e-7
    rng = random.Random(99)
    distances = [
        hamming(simhash64(" ".join(random_words(rng, 200))),
                simhash64(" ".join(random_words(rng, 200))))
        for _ in range(300)
    ]
    assert min(distances) > 10
    assert abs(statistics.mean(distances) - 32) < 1.5  # sd of the mean = 4/sqrt(300)


# --- pigeonhole blocks -----------------------------------------------------------------


def test_block_widths_sum_to_64_and_differ_by_at_most_one() -> None:
    for blocks in range(1, 65):
        widths = block_widths(blocks)
        assert sum(widths) == FP_BITS and len(widths) == blocks
        assert max(widths) - min(widths) <= 1
    assert block_widths(4) == [16, 16, 16, 16]  # Manku et al. 2007 s.3.1.1, k = 3


def _share_block(a: int, b: int, widths: list[int]) -> bool:
    pairs = zip(split_blocks(a, widths), split_blocks(b, widths), strict=True)
    return any(x == y for x, y in pairs)


def test_split_blocks_reassembles_fingerprint() -> None:
    rng = random.Random(5)
    for blocks in (1, 3, 4, 5, 7):
        widths = block_widths(blocks)
        for _ in range(50):
            fp = rng.getrandbits(64)
            value = 0
            for width, part in zip(widths, split_blocks(fp, widths), strict=True):
                assert 0 <= part < 1 << width
                value = value << width | part
            assert value == fp


def test_pigeonhole_exhaustive_for_k3() -> None:
    # Manku, Jain & Das Sarma 2007 s.3.1.1: with k+1 = 4 blocks, fingerprints
    # within distance 3 agree on at least one block. Every flip pattern of 1-3
    # bits (64 + 2016 + 41664 patterns) is checked against a random fingerprint.
    widths = block_widths(4)
    fp = random.Random(2007).getrandbits(64)
    for r in (1, 2, 3):
        for positions in itertools.combinations(range(FP_BITS), r):
            assert _share_block(fp, flip(fp, positions), widths)


@given(fp=U64, k=st.integers(min_value=0, max_value=10), data=st.data())
@settings(max_examples=500, deadline=None)
def test_pigeonhole_any_k(fp: int, k: int, data: st.DataObject) -> None:
    # Pigeonhole principle: at most k differing bits cannot touch all k+1 blocks.
    positions = data.draw(st.sets(st.integers(0, FP_BITS - 1), max_size=k))
    assert _share_block(fp, flip(fp, sorted(positions)), block_widths(k + 1))


@given(fp=U64, k=st.integers(min_value=0, max_value=10))
def test_pigeonhole_bound_is_tight(fp: int, k: int) -> None:
    # One flipped bit in each of the k+1 blocks: distance k+1, no block shared.
    widths = block_widths(k + 1)
    starts = list(itertools.accumulate(widths, initial=0))[:-1]
    other = flip(fp, starts)
    assert hamming(fp, other) == k + 1
    assert not _share_block(fp, other, widths)


# --- the Redis-backed index ---------------------------------------------------------------


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        port = int(sock.getsockname()[1])
    assert port != RESERVED_REDIS_PORT
    return port


@pytest.fixture(scope="module")
def redis_port(tmp_path_factory: pytest.TempPathFactory) -> Iterator[int]:
    """A private redis-server on a free loopback port, stopped after the module."""
    binary = shutil.which("redis-server")
    assert binary, "redis-server is required for these tests"
    port = _free_port()
    workdir: Path = tmp_path_factory.mktemp("redis")
    proc = subprocess.Popen(
        [binary, "--port", str(port), "--bind", "127.0.0.1", "--save", "",
         "--appendonly", "no", "--dir", str(workdir)],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    assert proc.stdout is not None
    lines = []
    for line in proc.stdout:  # ends when the server exits
        lines.append(line)
        if "Ready to accept connections" in line:
            break
    drain = threading.Thread(target=lambda: [None for _ in proc.stdout or ()], daemon=True)
    drain.start()
    try:
        client = redis.Redis(host="127.0.0.1", port=port, socket_timeout=5)
        try:
            assert client.ping(), "".join(lines)
        finally:
            client.close()
        yield port
    finally:
        proc.terminate()
        proc.wait(timeout=10)
        drain.join(timeout=10)
        proc.stdout.close()


@pytest.fixture
async def client(redis_port: int) -> AsyncIterator[aioredis.Redis]:
    conn = aioredis.Redis(host="127.0.0.1", port=redis_port, socket_timeout=5)
    try:
        yield conn
    finally:
        await conn.aclose()


def _keyspace() -> tuple[str, Any]:
    prefix = f"nd:{uuid.uuid4().hex}"
    return prefix, lambda block, value: f"{prefix}:{block}:{value:x}"


async def test_index_finds_within_k_and_not_beyond(client: aioredis.Redis) -> None:
    # Manku et al. 2007 s.3.1.1 with k = 3, 4 blocks of 16 bits.
    _, key = _keyspace()
    index = NearDuplicateIndex(client, key)
    fp = 0xF0F0_1234_ABCD_8001  # top bit set: stored as a negative decimal
    assert await index.find(fp) is None
    await index.add(fp)
    assert await index.find(fp) == fp
    rng = random.Random(3)
    for distance in (1, 2, 3):
        near = flip(fp, rng.sample(range(FP_BITS), distance))
        assert await index.find(near) == fp
    one_per_block = flip(fp, [0, 16, 32, 48])  # distance 4, shares no block
    assert await index.find(one_per_block) is None
    same_block = flip(fp, [0, 1, 2, 3])  # distance 4, shares 3 blocks: candidate rejected
    assert await index.find(same_block) is None


async def test_buckets_hold_signed_decimal_members(client: aioredis.Redis) -> None:
    # Storage format: members are decimal strings of the signed 64-bit value.
    prefix, key = _keyspace()
    fp = (1 << 63) | 5
    index = NearDuplicateIndex(client, key)
    await index.add(fp)
    keys = sorted(k.decode() for k in await client.keys(f"{prefix}:*"))
    assert keys == sorted(index.keys(fp))
    assert len(keys) == math.comb(8, 2)  # sketch_k = 6 over 8 blocks: every pair a table
    for k in keys:
        assert await client.smembers(k) == {str(fp - (1 << 64)).encode()}


async def test_check_and_add_returns_closest_previous(client: aioredis.Redis) -> None:
    _, key = _keyspace()
    index = NearDuplicateIndex(client, key)
    first = 0x0123_4567_89AB_CDEF
    assert await index.check_and_add(first) is None
    closer = flip(first, [5])
    assert await index.check_and_add(flip(first, [5, 20, 40])) == first
    assert await index.check_and_add(closer) == first  # first at 1, the other at 2
    assert await index.find(flip(closer, [60, 61, 62])) == closer  # closer was stored


async def test_a_batch_is_checked_against_itself_as_one_by_one(client: aioredis.Redis) -> None:
    # A batch must answer as if its fingerprints were checked and added one at a time
    # (Manku et al. 2007: within k bits is a near-duplicate, whichever came first).
    rng = random.Random(17)
    bases = [rng.getrandbits(64) for _ in range(6)]
    batch = []
    for _ in range(60):
        base = rng.choice(bases)
        batch.append(flip(base, rng.sample(range(FP_BITS), rng.choice([0, 1, 2, 3, 4, 6, 30]))))
    _, key = _keyspace()
    await NearDuplicateIndex(client, key).add(bases[0])  # stored before the batch
    together = await NearDuplicateIndex(client, key).check_and_add_many(batch)
    _, other = _keyspace()
    alone = NearDuplicateIndex(client, other)
    await alone.add(bases[0])
    one_by_one = [await alone.check_and_add(fp) for fp in batch]
    distances = [None if m is None else hamming(fp, m) for fp, m in zip(batch, one_by_one)]
    assert [None if m is None else hamming(fp, m) for fp, m in zip(batch, together)] == distances
    assert sum(d is not None for d in distances) > 30  # the batch does hold near-duplicates


@pytest.mark.parametrize("layout", [
    {},  # the worker's: 8 byte-wide blocks, a table per pair, candidates up to 10 bits
    {"sketch_k": None},  # k = 3: 4 blocks of 16 bits, a table per block
    {"k": 5, "sketch_k": None},  # 6 blocks of 11 and 10 bits
    {"sketch_k": 6, "blocks": 9},  # 9 blocks of 8 and 7 bits, a table per three blocks
])
async def test_batch_candidates_are_those_found_one_by_one(client: aioredis.Redis,
                                                           layout: dict[str, Any]) -> None:
    # Within a batch, a fingerprint's candidates among the earlier ones must be exactly
    # those the Redis tables would return had they been stored one at a time: sharing a
    # table key (Manku et al. 2007's pigeonhole), kept up to the index's reach.
    rng = random.Random(23)
    bases = [rng.getrandbits(64) for _ in range(5)]
    batch = [flip(rng.choice(bases), rng.sample(range(FP_BITS), rng.choice([0, 2, 5, 8, 11, 14])))
             for _ in range(80)]
    _, key = _keyspace()
    together = await NearDuplicateIndex(client, key, **layout)._candidates_many(batch)
    _, other = _keyspace()
    alone = NearDuplicateIndex(client, other, **layout)
    one_by_one = [(await alone._candidates_many([fp]))[0] for fp in batch]
    assert together == one_by_one
    assert sum(map(len, one_by_one)) >= 20  # the batch does find candidates
    assert any(hamming(fp, c) > alone.sketch_k for fp, cs in zip(batch, one_by_one) for c in cs) \
        or alone.reach == alone.sketch_k


async def test_generalised_k_uses_k_plus_one_blocks(client: aioredis.Redis) -> None:
    _, key = _keyspace()
    index = NearDuplicateIndex(client, key, k=5, sketch_k=None)
    assert index.widths == [11, 11, 11, 11, 10, 10]
    fp = random.Random(8).getrandbits(64)
    await index.add(fp)
    assert await index.find(flip(fp, [1, 9, 17, 33, 50])) == fp
    starts = list(itertools.accumulate(index.widths, initial=0))[:-1]
    assert await index.find(flip(fp, starts)) is None


class _CountingRedis:
    """Wraps a client: counts pipeline round trips, refuses direct commands."""

    def __init__(self, inner: aioredis.Redis) -> None:
        self.inner = inner
        self.round_trips = 0
        self.commands: list[list[str]] = []

    def pipeline(self, transaction: bool = True) -> Any:
        outer = self
        pipe = self.inner.pipeline(transaction=transaction)
        execute = pipe.execute

        async def counted_execute(*args: Any, **kwargs: Any) -> Any:
            outer.round_trips += 1
            outer.commands.append([str(cmd[0][0]) for cmd in pipe.command_stack])
            return await execute(*args, **kwargs)

        pipe.execute = counted_execute
        return pipe


async def test_check_and_add_takes_two_round_trips(client: aioredis.Redis) -> None:
    # Project requirement (common practice, no source): one pipelined round trip
    # for the lookup (on a single server one SUNION of the k+1 buckets), one for the SADDs.
    _, key = _keyspace()
    counting = _CountingRedis(client)
    index = NearDuplicateIndex(counting, key, sketch_k=None)  # Manku et al.: k + 1 tables
    await index.check_and_add(12345)
    assert counting.round_trips == 2
    assert counting.commands == [["SUNION"], ["SADD"] * 4]


async def test_unreachable_redis_raises_store_unavailable() -> None:
    # Errors are translated at the boundary (frontier/exceptions.py).
    dead = aioredis.Redis(host="127.0.0.1", port=_free_port(), socket_connect_timeout=1,
                          retry=Retry(NoBackoff(), 0))
    try:
        index = NearDuplicateIndex(dead, lambda b, v: f"x:{b}:{v}")
        with pytest.raises(StoreUnavailable):
            await index.find(1)
        with pytest.raises(StoreUnavailable):
            await index.add(1)
    finally:
        await dead.aclose()


async def test_a_page_fetched_again_is_not_its_own_near_duplicate(
        redis_client: Any) -> None:
    # Seen in a fault test: a worker stored a page's fingerprint, died before completing
    # its lease, and the page's second fetch matched itself (distance 0), so its links
    # were dropped and pages reachable only through it were lost.
    from frontier.keys import Keys

    keys = Keys("nd-self", 4)
    index = NearDuplicateIndex(redis_client, keys.near_dup, page_key=keys.near_dup_page)
    fp = 0xF0F0_1234_ABCD_8001
    assert await index.match_pages([fp], ["http://a.test/1"]) == [None]
    assert await index.match_pages([fp], ["http://a.test/1"]) == [None]  # itself again
    changed = flip(fp, [5])  # the same page, a counter changed between the fetches
    assert await index.match_pages([changed], ["http://a.test/1"]) == [None]
    # another URL with the same text is a near-duplicate and names the first page
    assert await index.match_pages([flip(fp, [9, 40])], ["http://b.test/copy"]) == [
        (fp, "http://a.test/1")]
    # within one batch, the later of two copies names the earlier
    other = 0x0123_4567_89AB_CDEF
    assert await index.match_pages([other, other], ["http://c.test/x", "http://d.test/y"]) == [
        None, (other, "http://c.test/x")]
