"""The revisit bench's measures: the closed-form freshness of uniform revisiting of a
Poisson page, (1 - e^(-lambda I)) / (lambda I) (Cho & Garcia-Molina, ACM TODS 2003 and
SIGMOD 2000, quoted from memory), against the simulated change schedule of the changing
synthetic web; and a short run of the real frontier (real redis-server, fake clock)
where sluice's policy is at least as fresh as uniform revisiting and fresher than
proportional revisiting at the same fetch rate, as those papers predict."""

from __future__ import annotations

import math
import random
from typing import Any

import pytest

from frontier.bench.revisit_bench import (
    BenchSpec, evaluate, periodic, simulate_sluice, window_freshness)
from frontier.revisit import freshness
from synthweb.changing import DAY_S, ChangingPage, ChangingWeb


def test_uniform_closed_form_matches_the_simulation() -> None:
    """2,000 pages with rates from 0.1 to 20 a day, each fetched once a day at a random
    phase for 60 days: the mean simulated freshness is the closed form's mean."""
    web = ChangingWeb.generate(40, 50, seed=3, horizon_s=62 * DAY_S)
    rng = random.Random(5)
    a, b = DAY_S, 61 * DAY_S
    simulated, closed = [], []
    for page in web.pages:
        phase = rng.uniform(0, DAY_S)
        simulated.append(window_freshness(page, periodic(phase, DAY_S, b), a, b))
        closed.append(freshness(page.rate, DAY_S))
    assert sum(simulated) / len(simulated) == pytest.approx(sum(closed) / len(closed), abs=0.01)


def test_one_fast_page_by_hand() -> None:
    """lambda I = 1: the closed form is 1 - 1/e = 0.632; 20,000 simulated intervals agree."""
    rng = random.Random(11)
    page = ChangingPage("http://x.test/", 1 / 3600)
    t = rng.expovariate(page.rate)
    while t < 20001 * 3600:
        page.changes.append(t)
        t += rng.expovariate(page.rate)
    f = window_freshness(page, periodic(0.0, 3600.0, 20001 * 3600), 3600.0, 20001 * 3600)
    assert f == pytest.approx(1 - math.exp(-1), abs=0.01)


def test_window_freshness_by_hand() -> None:
    page = ChangingPage("http://x.test/", 1.0, changes=[5.0, 12.0])
    # fetched at 0 and 10: fresh 0..5 and 10..12 of [0, 20)
    assert window_freshness(page, [0.0, 10.0], 0.0, 20.0) == pytest.approx(7 / 20)
    assert window_freshness(page, [0.0, 10.0], 10.0, 20.0) == pytest.approx(2 / 10)


async def test_sluice_beats_proportional_and_matches_uniform(redis_server: Any) -> None:
    """A short run: 40 pages on 2 hosts, two days to learn, two days measured."""
    spec = BenchSpec(hosts=2, pages_per_host=20, warmup_days=2, days=2, seed=1)
    web = ChangingWeb.generate(spec.hosts, spec.pages_per_host, seed=spec.seed,
                               horizon_s=5 * DAY_S)
    fetched, figures = await simulate_sluice(web, spec, redis_server.url)
    result = evaluate(web, fetched, spec)
    f = result["freshness"]
    assert figures["balanced"] and figures["tracked"] == 40
    assert f["sluice"] >= f["uniform"] > f["proportional"]
    # uniform's simulation and its closed form at sluice's fetch rate agree
    assert f["uniform"] == pytest.approx(f["uniform_closed_form"], abs=0.03)
