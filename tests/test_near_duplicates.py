"""Near-duplicate quality on generated pages: recall and precision over edit sizes and k.

Pages are built from an invented vocabulary; every page of a site shares the same
template boilerplate (header, navigation, footer), so distinct pages look alike. A near
copy replaces a share of a page's words with new words.
"""

from __future__ import annotations

import itertools
import math
import random
import uuid
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.simhash import (
    FP_BITS,
    NearDuplicateIndex,
    hamming,
    resemblance,
    simhash64,
    split_blocks,
    table_blocks,
)

EDIT_SHARES = (0.001, 0.0025, 0.005, 0.01, 0.02, 0.05)
BODY_WORDS = 400
TEMPLATE_SHARES = (1 / 3, 3 / 4)  # share of a page's words that are the site's boilerplate
VARIANTS: dict[str, dict[str, Any]] = {
    "k3": {"sketch_k": None},  # Manku et al. 2007 as published: 4 tables, no sketch
    "k6+sketch": {},  # the default: 28 tables (pairs of 8 blocks), Broder-confirmed
    "k7+sketch": {"sketch_k": 7, "blocks": 9},  # 36 tables (pairs of 9 blocks)
}


def _word(rng: random.Random) -> str:
    return "".join(rng.choice("bdfgklmnprstvz") + rng.choice("aeiou") for _ in range(3))


class Site:
    """A generated site: one template, pages whose bodies draw on one vocabulary."""

    def __init__(self, seed: int, template_share: float = 1 / 3, vocabulary: int = 3000) -> None:
        self.rng = random.Random(seed)
        self.vocabulary = [_word(self.rng) for _ in range(vocabulary)]
        template = round(BODY_WORDS * template_share / (1 - template_share))
        self.header = [self.rng.choice(self.vocabulary) for _ in range(template // 2)]
        self.footer = [self.rng.choice(self.vocabulary) for _ in range(template - template // 2)]
        self.words = BODY_WORDS + template

    def body(self) -> list[str]:
        return [self.rng.choice(self.vocabulary) for _ in range(BODY_WORDS)]

    def page(self, body: list[str]) -> str:
        return " ".join(self.header + body + self.footer)

    def edited(self, body: list[str], share: float) -> list[str]:
        """``body`` with ``share`` of the page's words replaced (at least one)."""
        copy = list(body)
        changes = max(1, round(share * self.words))
        for i in self.rng.sample(range(BODY_WORDS), changes):
            copy[i] = f"x{self.rng.randrange(10**9)}"
        return copy


async def _run(index: NearDuplicateIndex, site: Site, share: float,
               originals: int = 200) -> tuple[float, float]:
    """Store ``originals`` distinct pages, then offer one near copy of each and one more
    distinct page of the template; (recall over copies, precision over all flagged; 1.0
    when nothing was flagged). Distinct originals flagged among themselves count as wrong."""
    plain = index.sketch_k == index.k  # the published index: fingerprints only
    digest = (lambda text: int(simhash64(text))) if plain else simhash64
    bodies = [site.body() for _ in range(originals)]
    urls = [f"http://site.test/p{i}" for i in range(originals)]
    first = await index.match_pages([digest(site.page(b)) for b in bodies], urls)
    copies = [digest(site.page(site.edited(b, share))) for b in bodies]
    found = await index.match_pages(copies, [f"http://site.test/c{i}" for i in range(originals)])
    fresh = [digest(site.page(site.body())) for _ in range(originals)]
    false = await index.match_pages(fresh, [f"http://site.test/n{i}" for i in range(originals)])
    right = sum(m is not None and m[1] == urls[i] for i, m in enumerate(found))
    wrong = sum(m is not None for m in first + false) + sum(
        m is not None and m[1] != urls[i] for i, m in enumerate(found))
    return right / originals, (right / (right + wrong) if right + wrong else 1.0)


def _keyspace() -> tuple[Any, Any]:
    prefix = f"nde:{uuid.uuid4().hex}"
    return (lambda b, v: f"{prefix}:{b}:{v:x}"), (lambda fp: f"{prefix}:p:{fp & 0xff}")


async def test_recall_and_precision_over_edit_sizes_and_k(single_client: Any) -> None:
    # Manku, Jain & Das Sarma 2007 (k = 3 on 64 bits) against tables reaching 6 and 7
    # bits whose candidates beyond 3 bits are confirmed by Broder's (1997) resemblance
    # estimate from MIN_s sketches. Charikar 2002: at 0.5 % of words changed about 3.5
    # bits differ, so k = 3 finds only about half. The default index must find >= 90 %
    # of copies at <= 0.5 % edits and flag no distinct page of the template: precision
    # >= 0.95, with a light (1/3) and a heavy (3/4) shared template.
    curve: dict[tuple[str, float, float], tuple[float, float]] = {}
    for (name, options), template in itertools.product(VARIANTS.items(), TEMPLATE_SHARES):
        for n, share in enumerate(EDIT_SHARES):
            table, page = _keyspace()
            index = NearDuplicateIndex(single_client, table, page_key=page, **options)
            curve[(name, template, share)] = await _run(index, Site(1000 + n, template), share)
    for (name, template, share), (recall, precision) in curve.items():
        print(f"{name:10} template {template:.2f} edits {share:.2%}: "
              f"recall {recall:.3f} precision {precision:.3f}")
    for template, share in itertools.product(TEMPLATE_SHARES, EDIT_SHARES):
        for name in ("k6+sketch", "k7+sketch"):
            assert curve[(name, template, share)][1] >= 0.95, (name, template, share)
        recall = curve[("k6+sketch", template, share)][0]
        if share <= 0.005:
            assert recall >= 0.9, (template, share, recall)
        if share <= 0.01:  # beyond, all three find next to nothing
            assert recall >= curve[("k3", template, share)][0]  # wider finds more
            assert curve[("k7+sketch", template, share)][0] >= recall
    # the plain 3-bit index misses a real share at 0.5 % (the reason for the wider
    # tables), and on the heavy template flags distinct pages (the reason for the sketch)
    assert max(curve[("k3", t, 0.005)][0] for t in TEMPLATE_SHARES) < 0.85
    assert min(curve[("k3", 0.75, share)][1] for share in EDIT_SHARES) < 0.95


def test_distinct_template_pages_have_low_resemblance() -> None:
    # Broder 1997: resemblance r = |S(A) n S(B)| / |S(A) u S(B)| of shingle sets, and
    # the MIN_s estimate is within a few s^-1/2 of it. Two pages sharing a third of
    # their words (the template) resemble each other about 0.2; a 0.5 % edit about 0.97.
    site = Site(7)
    a, b = site.body(), site.body()
    estimate = resemblance(simhash64(site.page(a)).sketch, simhash64(site.page(b)).sketch)
    assert estimate < 0.5
    copy = simhash64(site.page(site.edited(a, 0.005))).sketch
    assert resemblance(simhash64(site.page(a)).sketch, copy) > 0.85


@given(fp=st.integers(0, (1 << 64) - 1), data=st.data())
@settings(max_examples=300, deadline=None)
def test_pigeonhole_for_pairs_of_blocks(fp: int, data: st.DataObject) -> None:
    # Manku, Jain & Das Sarma 2007 s.3.1.1 (pigeonhole): with 8 blocks, fingerprints
    # within 6 bits differ in at most 6 blocks, so they agree on some pair of blocks,
    # i.e. on one whole table key of the 28 tables.
    positions = data.draw(st.sets(st.integers(0, FP_BITS - 1), max_size=6))
    other = fp
    for p in positions:
        other ^= 1 << p
    index = NearDuplicateIndex(None, lambda b, v: "")
    assert len(index.tables) == math.comb(8, 2)
    assert any(x == y for x, y in zip(index.table_values(fp), index.table_values(other)))


def test_pigeonhole_bound_for_pairs_is_tight() -> None:
    # One bit in each of 7 of the 8 blocks: 7 bits apart, no pair of blocks agrees.
    index = NearDuplicateIndex(None, lambda b, v: "")
    fp = random.Random(3).getrandbits(64)
    other = fp
    for start in list(itertools.accumulate(index.widths, initial=0))[:7]:
        other ^= 1 << start
    assert hamming(fp, other) == 7
    assert not any(x == y for x, y in zip(index.table_values(fp), index.table_values(other)))
    assert table_blocks(4, 3) == [(0,), (1,), (2,), (3,)]  # k + 1 tables of one block
    assert split_blocks(fp, index.widths)  # the 8 blocks cover the 64 bits


def test_mean_differing_bits_is_64_theta_over_pi() -> None:
    # Charikar 2002 s.3: for feature vectors at angle theta the SimHash bits differ with
    # probability theta/pi, so the mean distance is 64 * theta / pi. Random vectors:
    # features are shingles of random words; theta from their shingle counts. The
    # tolerance is 5 standard errors of the mean of Binomial(64, theta/pi) over pairs.
    rng = random.Random(2002)
    for replaced in (0.005, 0.05, 0.3):
        pairs, distances, thetas = 150, [], []
        for _ in range(pairs):
            a = [f"w{rng.randrange(10**9)}" for _ in range(401)]
            b = list(a)
            for i in rng.sample(range(401), max(1, int(401 * replaced))):
                b[i] = f"v{rng.randrange(10**9)}"
            sa = set(zip(a, a[1:], a[2:]))
            sb = set(zip(b, b[1:], b[2:]))
            thetas.append(math.acos(len(sa & sb) / math.sqrt(len(sa) * len(sb))))
            distances.append(hamming(simhash64(" ".join(a)), simhash64(" ".join(b))))
        p = sum(thetas) / pairs / math.pi
        mean = sum(distances) / pairs
        tolerance = 5 * math.sqrt(FP_BITS * p * (1 - p) / pairs)
        assert abs(mean - FP_BITS * p) <= tolerance, (replaced, mean, FP_BITS * p)


@pytest.mark.parametrize("share", [0.005])
async def test_near_copy_in_the_same_batch_is_confirmed(single_client: Any, share: float) -> None:
    # Broder 1997 confirmation also applies to an earlier page of the same batch.
    site = Site(11)
    body = site.body()
    table, page = _keyspace()
    index = NearDuplicateIndex(single_client, table, page_key=page)
    a = simhash64(site.page(body))
    b = simhash64(site.page(site.edited(body, share)))
    got = await index.match_pages([a, b], ["http://site.test/a", "http://site.test/b"])
    assert got == [None, (a, "http://site.test/a")] or hamming(a, b) > index.sketch_k


async def test_sketch_confirmed_copies_on_a_server_and_a_cluster(redis_client: Any) -> None:
    # Every command of match_pages touches one key (keys from frontier/keys.py), so it
    # runs unchanged on a Cluster. A copy 4..6 bits away is found only through the
    # stored sketch (Broder 1997); a plain-int query keeps Manku's k = 3 rule.
    from frontier.keys import Keys

    keys = Keys(f"nd-{uuid.uuid4().hex[:8]}", 4)
    index = NearDuplicateIndex(redis_client, keys.near_dup, page_key=keys.near_dup_page)
    site = Site(21)
    while True:  # a copy whose SimHash is 4..6 bits away
        body = site.body()
        a = simhash64(site.page(body))
        b = simhash64(site.page(site.edited(body, 0.005)))
        if 3 < hamming(a, b) <= 6 and resemblance(a.sketch, b.sketch) >= index.threshold:
            break
    assert await index.match_pages([a], ["http://site.test/a"]) == [None]
    assert await index.match_pages([b], ["http://site.test/b"]) == [(a, "http://site.test/a")]
    # no sketch: within 3 bits only, so b itself (0 bits), not a (4..6 bits)
    assert await index.match_pages([int(b)], ["http://site.test/c"]) == [
        (b, "http://site.test/b")]
    assert await index.match_pages([int(a) ^ 0b1111], ["http://site.test/e"]) == [None]
    other = simhash64(site.page(site.body()))
    assert await index.match_pages([other], ["http://site.test/d"]) == [None]


def test_fingerprint_survives_pickling_with_its_sketch() -> None:
    # Big pages are fingerprinted in child processes (pickle over a pipe): the sketch
    # must come back with the SimHash (Python pickle protocol, __reduce__).
    import pickle

    fp = simhash64(Site(2).page(Site(2).body()))
    back = pickle.loads(pickle.dumps(fp))
    assert back == fp and back.sketch == fp.sketch and len(fp.sketch) == 4 * 64
    assert f"{back:016x}" == f"{int(fp):016x}"
