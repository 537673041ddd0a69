"""Near-duplicate detection with 64-bit SimHash and a Redis block-table index.

``simhash64`` is Charikar's (STOC 2002) random-hyperplane hash applied to word
shingles: each shingle is hashed with MurmurHash3 to 64 pseudo-random +-1
coordinates, the coordinates are summed over the document, and bit i of the
fingerprint is the sign of sum i. Two documents whose shingle vectors are at
angle theta agree on each bit with probability 1 - theta/pi, so the expected
Hamming distance is 64 * theta / pi.

``NearDuplicateIndex`` finds a stored fingerprint within Hamming distance k by
the pigeonhole method of Manku, Jain & Das Sarma, "Detecting Near-Duplicates for
Web Crawling" (WWW 2007): split the 64 bits into k + 1 blocks; two fingerprints
that differ in at most k bits agree exactly on at least one block. Each block
value names a Redis set (a bucket) of fingerprints, so a lookup reads k + 1
buckets and checks the candidates' real distance.

Within 3 bits only about 60 % of pages with 0.5 % of their words changed are found
(Charikar's law: about 3.5 bits differ at that similarity). So the index also takes
candidates up to ``sketch_k`` = 6 bits (blocks = 8, every pair of blocks a table: two
fingerprints within 6 bits agree on at least 2 of 8 blocks) and confirms those beyond k
with a second sketch stored beside each fingerprint: the ``SKETCH_SIZE`` smallest
32-bit shingle hashes (Broder, "On the resemblance and containment of documents",
1997, the MIN_s sketch), confirmed when the estimated resemblance is at least
``RESEMBLANCE_THRESHOLD``. Distinct pages of one template can be a few bits apart in
SimHash (even within 3 bits), but their shingle sets differ in all their own text,
so their resemblance stays low: every candidate with both sketches is confirmed by it.
The tables also return most fingerprints 7..10 bits away (they share a pair of blocks);
those are kept as candidates too (``reach``, ``DEFAULT_REACH``), so a two-word edit in the
tail of Charikar's distribution is still found, with the same tables and stored values.
"""

from __future__ import annotations

import functools
import heapq
import itertools
import re
from array import array
from collections.abc import Callable
from typing import Any

import mmh3
from redis.asyncio import Redis
from redis.asyncio.cluster import RedisCluster
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import RedisError
from redis.exceptions import TimeoutError as RedisTimeoutError

from frontier.exceptions import StoreError, StoreUnavailable

try:  # optional: counts the bit planes and sorts the sketch in compiled code (same results)
    import numpy as _np
except ImportError:  # pragma: no cover - the pure-Python path below is used
    _np = None

FP_BITS = 64
FP_MASK = (1 << FP_BITS) - 1
SIGN_BIT = 1 << (FP_BITS - 1)
SHINGLE_WORDS = 3
"""Words per shingle (feature)."""
DEFAULT_MAX_DISTANCE = 3
"""k in Manku et al.: 64-bit fingerprints within 3 bits are near-duplicates."""
HASH_SEED = 0
DEFAULT_SKETCH_DISTANCE = 6
"""Candidates up to this many bits apart are confirmed by the resemblance sketch."""
DEFAULT_SKETCH_BLOCKS = 8
"""Blocks for ``sketch_k`` = 6: tables keyed on every pair of blocks (16-bit keys)."""
DEFAULT_REACH = 10
"""Candidates the tables return are kept up to this many bits (``reach``): beyond
``sketch_k`` the pigeonhole guarantees nothing, but a fingerprint 7..10 bits away still
shares a pair of blocks most of the time (unless its differing bits touch 7 of the 8
blocks: of uniformly spread bits, 2.7 % at 7 bits, 9.7 % at 8, 20 % at 9, 33 % at 10,
counted by inclusion-exclusion), and its sketch decides. No table, key or stored value
changes: the tables' answer is read further, and the extra candidates' URLs and sketches
come in the same pipelined call as the others'."""
SKETCH_SIZE = 64
"""s in Broder 1997: how many smallest shingle hashes a page keeps (4 bytes each)."""
RESEMBLANCE_THRESHOLD = 0.85
"""Estimated resemblance at or above which a candidate beyond k bits is a near copy."""
MAX_CONFIRM = 8
"""Candidates whose URL and sketch are read per page (the closest first)."""

_BYTES = FP_BITS // 8
_HASH_BYTES = 16
"""Length of mmh3.hash_bytes output (x64 128-bit MurmurHash3)."""
_WORD = re.compile(r"\w+")
# For ASCII text, \w is [A-Za-z0-9_]: a byte table that lower-cases letters and turns every
# other byte into a space finds the same words as _WORD on the lower-cased text, faster.
_ASCII_WORDS = bytes(
    c + 32 if 65 <= c <= 90 else c if (97 <= c <= 122 or 48 <= c <= 57 or c == 95) else 32
    for c in range(256))
_hash128 = (mmh3.hash_bytes if HASH_SEED == 0  # mmh3's default seed: no keyword to pass
            else functools.partial(mmh3.hash_bytes, seed=HASH_SEED))
"""128-bit MurmurHash3 (x64) of a shingle, bytes little-endian."""



class Fingerprint(int):
    """A page's 64-bit SimHash (the int value) carrying its resemblance sketch.

    ``sketch`` is the page's ``SKETCH_SIZE`` smallest distinct 32-bit shingle hashes,
    sorted, as native unsigned 32-bit integers (Broder 1997's MIN_s). It travels with
    the fingerprint (also through pickling to and from the offload children) so callers
    that pass plain ints keep working: a plain int simply has no sketch.
    """

    sketch: bytes

    def __new__(cls, value: int, sketch: bytes = b"") -> "Fingerprint":
        self = super().__new__(cls, value)
        self.sketch = sketch
        return self

    def __reduce__(self) -> tuple[Any, tuple[int, bytes]]:
        return (Fingerprint, (int(self), self.sketch))


def sketch_of(fp: int) -> bytes:
    """The resemblance sketch a fingerprint carries (empty for a plain int)."""
    return getattr(fp, "sketch", b"")


def resemblance(a: bytes, b: bytes, size: int = SKETCH_SIZE) -> float:
    """Broder (1997) estimate of the resemblance of two pages from their MIN_s sketches:
    |MIN_s(A u B) n MIN_s(A) n MIN_s(B)| / |MIN_s(A u B)|. 0.0 if either is empty."""
    if not a or not b:
        return 0.0
    sa = set(memoryview(a).cast("I"))
    sb = set(memoryview(b).cast("I"))
    union = heapq.nsmallest(size, sa | sb)
    both = sa & sb
    return sum(1 for v in union if v in both) / len(union)


def _sketch(packed: bytes, count: int = SKETCH_SIZE) -> bytes:
    """MIN_s of the shingle hashes in ``packed``: 32 bits of each 128-bit hash's high half
    (bytes 8..12, independent of the low 64 bits SimHash uses), smallest first."""
    if _np is not None:
        return _np_sketch(packed, count)
    values = memoryview(packed).cast("I")[2::4]
    return array("I", heapq.nsmallest(count, set(values))).tobytes()


def _np_sketch(packed: bytes, count: int = SKETCH_SIZE) -> bytes:
    """:func:`_sketch` with numpy: sort, drop repeats, keep the first ``count``."""
    ordered = _np.sort(_np.frombuffer(packed, dtype=_np.uint32)[2::4])
    if len(ordered) > 1:
        ordered = ordered[_np.concatenate(([True], ordered[1:] != ordered[:-1]))]
    return ordered[:count].astype("=u4").tobytes()


def _np_bits(packed: bytes, total: int) -> int:
    """The SimHash bits from the packed 128-bit hashes with numpy: bit i is set when more
    than half of the hashes have bit i of their low 64 bits set."""
    low = _np.frombuffer(packed, dtype=_np.uint8).reshape(total, _HASH_BYTES)[:, :_BYTES]
    ones = _np.unpackbits(low, axis=1, bitorder="little").sum(axis=0, dtype=_np.int64)
    return int.from_bytes(_np.packbits(2 * ones > total, bitorder="little").tobytes(),
                          "little")


TableKey = Callable[[int, int], str]
PageKey = Callable[[int], str]
"""(block index, block value) -> Redis key of that bucket."""


def shingles(text: str, width: int = SHINGLE_WORDS) -> list[str]:
    """Overlapping ``width``-word shingles of the lower-cased words of ``text``.

    Words are maximal runs of Unicode word characters. A text with fewer than
    ``width`` words yields one shingle of all its words.
    """
    words = _WORD.findall(text.lower())
    if len(words) <= width:
        return [" ".join(words)] if words else []
    return list(map(" ".join, zip(*(words[i:] for i in range(width)))))


def _ascii_shingles(text: str, width: int) -> list[bytes]:
    """:func:`shingles` of an ASCII text, as the UTF-8 bytes mmh3 would hash."""
    words = text.encode("ascii").translate(_ASCII_WORDS).split()
    if len(words) <= width:
        return [b" ".join(words)] if words else []
    return list(map(b" ".join, zip(*(words[i:] for i in range(width)))))


def simhash64(text: str, *, shingle_words: int = SHINGLE_WORDS) -> Fingerprint:
    """Unsigned 64-bit SimHash of ``text`` over word shingles (0 for no words).

    Each shingle occurrence adds +1 to coordinate i where bit i of its mmh3
    x64 hash (low 64 bits) is set and -1 elsewhere; bit i of the result is set
    iff coordinate i ends positive. Cost is linear in the text: about 1 ms
    per 1,500 words, so a text at the parser's 200,000-character cap takes
    tens of milliseconds (worth an executor if the event loop must stay snappy).
    The result also carries the page's resemblance sketch (:class:`Fingerprint`).
    """
    features = _ascii_shingles(text, shingle_words) if text.isascii() else shingles(
        text, shingle_words)
    if not features:
        return Fingerprint(0)
    # mmh3.hash_bytes gives the 128-bit hash little-endian; its first 8 bytes
    # are the unsigned 64-bit value mmh3.hash64 returns first.
    packed = b"".join(map(_hash128, features))
    total = len(features)
    if _np is not None:
        return Fingerprint(_np_bits(packed, total), _np_sketch(packed))
    masks = _bit_masks(total)
    fingerprint = 0
    bit = 1  # fingerprint bits in order: byte 0 bit 0, byte 0 bit 1, ...
    # Bit-plane counting: gather byte j of every hash into one big integer and
    # count the set bits of each plane with one AND and one popcount.
    for position in range(_BYTES):
        plane = int.from_bytes(packed[position::_HASH_BYTES], "little")
        for mask in masks:
            if 2 * (plane & mask).bit_count() > total:
                fingerprint |= bit
            bit <<= 1
    return Fingerprint(fingerprint, _sketch(packed))


@functools.lru_cache(maxsize=1024)
def _bit_masks(total: int) -> tuple[int, ...]:
    """For each bit b of a byte, an integer with bit b set in each of ``total`` bytes."""
    return tuple(int.from_bytes(bytes([1 << bit]) * total, "little") for bit in range(8))


def hamming(a: int, b: int) -> int:
    """Number of differing bits between two fingerprints."""
    return ((a ^ b) & FP_MASK).bit_count()


def to_signed(fp: int) -> int:
    """Unsigned 64-bit value as the signed 64-bit integer with the same bits."""
    fp &= FP_MASK
    return fp - (1 << FP_BITS) if fp & SIGN_BIT else fp


def to_unsigned(value: int) -> int:
    """Signed (or unsigned) 64-bit integer as its unsigned bit pattern."""
    return value & FP_MASK


def block_widths(blocks: int, bits: int = FP_BITS) -> list[int]:
    """Widths of ``blocks`` contiguous blocks covering ``bits`` bits, as equal as possible."""
    if not 1 <= blocks <= bits:
        raise ValueError(f"blocks must be in 1..{bits}, got {blocks}")
    base, extra = divmod(bits, blocks)
    return [base + 1 if i < extra else base for i in range(blocks)]


def split_blocks(fp: int, widths: list[int]) -> list[int]:
    """Block values of ``fp``, most significant block first."""
    values = []
    shift = sum(widths)
    for width in widths:
        shift -= width
        values.append((fp >> shift) & ((1 << width) - 1))
    return values


LOOKUP_AND_ADD = """
-- near-duplicate lookup and store for a batch of fingerprints, on one server
-- KEYS: the bucket keys (one per table) of each fingerprint, fingerprint after fingerprint
-- ARGV[1] tables (keys per fingerprint)  ARGV[2 ..] the fingerprints (signed decimal)
-- Returns per fingerprint the union of its buckets as they were before this batch.
local w = tonumber(ARGV[1])
local out = {}
for i = 2, #ARGV do
  local base = (i - 2) * w
  out[#out + 1] = redis.call('SUNION', unpack(KEYS, base + 1, base + w))
end
for i = 2, #ARGV do
  local base = (i - 2) * w
  for j = 1, w do
    redis.call('SADD', KEYS[base + j], ARGV[i])
  end
end
return out
"""

SET_ABSENT = """
-- HSETNX KEYS[i] ARGV[2i - 1] ARGV[2i] for every i, in order, on one server
for i, key in ipairs(KEYS) do
  redis.call('HSETNX', key, ARGV[2 * i - 1], ARGV[2 * i])
end
return #KEYS
"""


def table_blocks(blocks: int, distance: int) -> list[tuple[int, ...]]:
    """The tables of a block layout: every choice of ``blocks - distance`` blocks.

    Two fingerprints within ``distance`` bits differ in at most ``distance`` blocks, so
    they agree on at least ``blocks - distance`` of them: on one whole table key
    (pigeonhole; Manku, Jain & Das Sarma 2007 s.3.1.1, with blocks = k + 1 one table
    per block)."""
    if not 0 <= distance < blocks:
        raise ValueError(f"need 0 <= distance < blocks, got {distance} and {blocks}")
    return list(itertools.combinations(range(blocks), blocks - distance))


class NearDuplicateIndex:
    """Redis-backed index answering "is a stored fingerprint within k bits?".

    Each fingerprint is added to one bucket set per table. Members are decimal strings
    of the signed 64-bit value. With ``sketch_k`` > k the tables reach ``sketch_k`` bits
    (and return some candidates up to ``reach`` bits) and :meth:`match_pages` confirms a
    candidate beyond k bits only when the two pages' resemblance sketches agree (Broder
    1997); :meth:`find` and
    :meth:`check_and_add_many` answer within k bits only. Lookups are not atomic with
    adds: two workers adding near-duplicates at the same instant may both miss each
    other, which costs one extra stored page, never a lost one.
    """

    def __init__(self, redis: Any, table_key: TableKey, k: int = DEFAULT_MAX_DISTANCE,
                 page_key: PageKey | None = None, *,
                 sketch_k: int | None = DEFAULT_SKETCH_DISTANCE,
                 blocks: int | None = None,
                 threshold: float = RESEMBLANCE_THRESHOLD,
                 reach: int | None = DEFAULT_REACH) -> None:
        if k < 0:
            raise ValueError(f"k must be >= 0, got {k}")
        self.redis = redis
        self.table_key = table_key
        self.page_key = page_key  # where each fingerprint's first page is kept
        self.k = k
        self.sketch_k = k if sketch_k is None else max(k, sketch_k)
        # the published index (no sketch) keeps what it guarantees: k bits
        self.reach = self.sketch_k if self.sketch_k == k or reach is None else max(
            self.sketch_k, reach)
        if blocks is None:
            blocks = self.sketch_k + 1 if self.sketch_k == k else max(
                DEFAULT_SKETCH_BLOCKS, self.sketch_k + 1)
        self.widths = block_widths(blocks)
        self.tables = table_blocks(blocks, self.sketch_k)
        self._pairs = ([(i, self.widths[j], j) for i, j in self.tables]
                       if all(len(t) == 2 for t in self.tables) else None)
        self.threshold = threshold
        self._script: Any = None
        self._set_absent_script: Any = None

    def table_values(self, fp: int) -> list[int]:
        """``fp``'s key in each table: its chosen blocks' bits side by side."""
        parts = split_blocks(to_unsigned(fp), self.widths)
        if self._pairs is not None:
            return [parts[i] << width | parts[j] for i, width, j in self._pairs]
        values = []
        for table in self.tables:
            value = 0
            for b in table:
                value = value << self.widths[b] | parts[b]
            values.append(value)
        return values

    def keys(self, fp: int) -> list[str]:
        """The bucket keys ``fp`` belongs to, one per table."""
        return self._keys_of(self.table_values(fp))

    def _keys_of(self, values: list[int]) -> list[str]:
        table_key = self.table_key
        return [table_key(index, value) for index, value in enumerate(values)]

    async def find(self, fp: int) -> int | None:
        """The closest stored fingerprint within k bits of ``fp``, or None."""
        fp = to_unsigned(fp)
        return self._closest(fp, await self._buckets(self.keys(fp)))

    async def add(self, fp: int) -> None:
        """Store ``fp`` in its buckets (one round trip)."""
        fp = to_unsigned(fp)
        await self._add_many([self.keys(fp)], [fp])

    async def check_and_add(self, fp: int) -> int | None:
        """Return the closest stored fingerprint within k bits, then store ``fp``.

        One script call on a single server; on a Cluster two round trips (a pipeline
        of SMEMBERS, one of SADD). ``fp`` is stored even when a near-duplicate is
        found, so chains of small edits stay detectable.
        """
        return (await self.check_and_add_many([fp]))[0]

    async def check_and_add_many(self, fps: list[int]) -> list[int | None]:
        """:meth:`check_and_add` for a batch, in the same number of round trips.

        A fingerprint is also compared with the ones before it in the batch, so two
        near-duplicates fetched together are still caught.
        """
        out: list[int | None] = []
        for fp, near in zip(fps, await self._candidates_many(fps)):
            close = [c for c in near if hamming(fp, c) <= self.k]
            out.append(close[0] if close else None)
        return out

    async def _candidates_many(self, fps: list[int]) -> list[list[int]]:
        """Per fingerprint: stored (or earlier in the batch) fingerprints sharing a table
        key, within ``reach`` bits (all of those within ``sketch_k``), closest first; then
        the batch is stored."""
        if not fps:
            return []
        unsigned = [to_unsigned(fp) for fp in fps]
        table_values = [self.table_values(fp) for fp in unsigned]
        keys = [self._keys_of(values) for values in table_values]
        stored_already = False
        if isinstance(self.redis, RedisCluster):  # one fingerprint's buckets span slots
            flat = await self._buckets([k for ks in keys for k in ks])
            width = len(self.tables)
            candidates = [flat[i * width:(i + 1) * width] for i in range(len(unsigned))]
        elif isinstance(self.redis, Redis):  # one script call: look up, then store
            found = await self._lookup_and_add(keys, unsigned)
            candidates = [[f] for f in found]
            stored_already = True
        else:  # a wrapped client: one SUNION per fingerprint, then the SADDs
            candidates = [[found] for found in await self._unions(keys)]
        out: list[list[int]] = []
        # earlier fingerprints of the batch by table key: the same pigeonhole as the
        # index, so a fingerprint is compared only with those sharing a table key
        earlier_by_table: list[dict[int, list[int]]] = [{} for _ in self.tables]
        for i, (fp, values) in enumerate(zip(unsigned, table_values)):
            stored = {to_unsigned(int(m)) for bucket in candidates[i] for m in bucket}
            near = {e for table, value in zip(earlier_by_table, values)
                    for e in table.get(value, ())}
            ranked = sorted((hamming(fp, c), c) for c in stored | near)
            out.append([c for d, c in ranked if d <= self.reach])
            for table, value in zip(earlier_by_table, values):
                table.setdefault(value, []).append(fp)
        if not stored_already:
            await self._add_many(keys, unsigned)
        return out

    async def match_pages(self, fps: list[int],
                          urls: list[str]) -> list[tuple[int, str | None] | None]:
        """For each page (fingerprint, URL): the stored fingerprint it is a near copy of
        and the URL of the page first stored with it, or None; then store the pages.

        A candidate within ``reach`` bits is a near copy when the two pages' estimated
        resemblance (Broder 1997) is at least ``threshold`` (both sketches known: a
        :class:`Fingerprint` from :func:`simhash64`), else when it is within k bits. A
        match whose page is the same URL is no match: a page fetched again (its first
        worker died before completing its lease) must not be taken for a copy of itself.
        Needs ``page_key``; one more round trip than :meth:`check_and_add_many`, and one
        more when a candidate was found.
        """
        if self.page_key is None:
            raise ValueError("match_pages needs the index's page_key")
        page_key = self.page_key
        near = await self._candidates_many(fps)
        unsigned = [to_unsigned(fp) for fp in fps]
        wanted = [cs[:MAX_CONFIRM] for cs in near]  # the closest few candidates per page
        asked = [(i, c) for i, cs in enumerate(wanted) for c in cs]
        stored: list[Any] = []
        if asked:
            stored = await self._pipelined("page lookup", lambda pipe: [
                pipe.hmget(page_key(c), str(c), f"s{c}") for _, c in asked])
        await self._set_absent("page store", [
            (page_key(u), str(u), url) for u, url in zip(unsigned, urls)] + [
            (page_key(u), f"s{u}", sketch) for u, fp in zip(unsigned, fps)
            if (sketch := sketch_of(fp))])
        batch_owner: dict[int, tuple[str, bytes]] = {}
        for u, fp, url in zip(reversed(unsigned), reversed(fps), reversed(urls)):
            batch_owner[u] = (url, sketch_of(fp))
        out: list[tuple[int, str | None] | None] = [None] * len(fps)
        for (i, c), (owner, sketch) in zip(asked, stored):
            if out[i] is not None:
                continue  # a closer candidate already matched
            url = owner.decode("utf-8", "replace") if isinstance(owner, bytes) else owner
            if url is None and c in batch_owner:  # an earlier page of the same batch
                url, sketch = batch_owner[c]
            if url == urls[i]:
                continue
            if self._confirmed(hamming(unsigned[i], c), sketch_of(fps[i]), sketch or b""):
                out[i] = (c, url)
        return out

    def _confirmed(self, distance: int, sketch: bytes, stored_sketch: bytes) -> bool:
        """A candidate is a near copy when both pages have sketches and their estimated
        resemblance reaches the threshold (Broder 1997), whatever the distance: on a
        heavy template distinct pages can fall within 3 bits. Without both sketches
        (a plain int, a page stored before sketches were kept), within k bits."""
        if sketch and stored_sketch:
            return resemblance(sketch, stored_sketch) >= self.threshold
        return distance <= self.k

    async def _lookup_and_add(self, keys: list[list[str]], fps: list[int]) -> list[list[Any]]:
        """Unions of each fingerprint's buckets (before the batch), then the adds: one call."""
        if self._script is None:
            self._script = self.redis.register_script(LOOKUP_AND_ADD)
        try:
            result: list[list[Any]] = await self._script(
                [k for ks in keys for k in ks],
                [len(self.tables), *(str(to_signed(fp)) for fp in fps)])
        except (RedisConnectionError, RedisTimeoutError) as exc:
            raise StoreUnavailable(f"near-duplicate lookup failed: {exc}") from exc
        except RedisError as exc:
            raise StoreError(f"near-duplicate lookup failed: {exc}") from exc
        return result

    async def _set_absent(self, what: str, entries: list[tuple[str, str, Any]]) -> None:
        """HSETNX of each (key, field, value), in order: one script call on one server (a
        redis-py pipeline cost this process 11-14 us of CPU a command here, the script
        under 2), a pipeline on a Cluster (the keys span slots) or a wrapped client."""
        if not entries:
            return
        if not isinstance(self.redis, Redis) or isinstance(self.redis, RedisCluster):
            await self._pipelined(what, lambda pipe: [
                pipe.hsetnx(key, field, value) for key, field, value in entries])
            return
        if self._set_absent_script is None:
            self._set_absent_script = self.redis.register_script(SET_ABSENT)
        args: list[Any] = []
        for _, field, value in entries:
            args += (field, value)
        try:
            await self._set_absent_script([key for key, _, _ in entries], args)
        except (RedisConnectionError, RedisTimeoutError) as exc:
            raise StoreUnavailable(f"near-duplicate {what} failed: {exc}") from exc
        except RedisError as exc:
            raise StoreError(f"near-duplicate {what} failed: {exc}") from exc

    async def _pipelined(self, what: str, queue: Callable[[Any], None]) -> list[Any]:
        """One round trip of the commands ``queue`` adds, Redis errors translated."""
        try:
            async with self.redis.pipeline(transaction=False) as pipe:
                queue(pipe)
                return list(await pipe.execute())
        except (RedisConnectionError, RedisTimeoutError) as exc:
            raise StoreUnavailable(f"near-duplicate {what} failed: {exc}") from exc
        except RedisError as exc:
            raise StoreError(f"near-duplicate {what} failed: {exc}") from exc

    async def _add_many(self, keys: list[list[str]], fps: list[int]) -> None:
        def queue(pipe: Any) -> None:
            for ks, fp in zip(keys, fps):
                member = str(to_signed(fp))
                for key in ks:
                    pipe.sadd(key, member)

        await self._pipelined("add", queue)

    def _closest(self, fp: int, buckets: list[set[Any]]) -> int | None:
        candidates = {to_unsigned(int(member)) for member in set().union(*buckets)}
        best = min(((hamming(fp, c), c) for c in candidates), default=None)
        return best[1] if best is not None and best[0] <= self.k else None

    async def _unions(self, keys: list[list[str]]) -> list[set[Any]]:
        return await self._pipelined("lookup", lambda pipe: [pipe.sunion(ks) for ks in keys])

    async def _buckets(self, keys: list[str]) -> list[set[Any]]:
        return await self._pipelined("lookup", lambda pipe: [pipe.smembers(k) for k in keys])
