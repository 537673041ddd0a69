"""Revisit arithmetic against the papers it comes from, the stored state's form, the
validators (RFC 9110) under odd input, and the [revisit] settings.

Sources, quoted from memory: Cho & Garcia-Molina, "Estimating frequency of change", ACM
TOIT 2003 (the improved estimator r = -log((n - X + 0.5) / (n + 0.5)) / I); Cho &
Garcia-Molina, "Effective page refresh policies for web crawlers", ACM TODS 2003, and
"Synchronizing a database to improve freshness", SIGMOD 2000 (freshness of a Poisson page
fetched every I: (1 - e^(-lambda I)) / (lambda I); the worked example of five pages
changing 1..5 times a day with 5 fetches a day, optimal fetches 1.15, 1.36, 1.35, 1.14, 0).
"""

from __future__ import annotations

import math
import os
from datetime import UTC, datetime

import pytest
from hypothesis import given
from hypothesis import strategies as st

from frontier.exceptions import ConfigError
from frontier.revisit import (
    RevisitState, change_rate, conditional_headers, freshness, g, http_date,
    optimal_allocation, optimal_interval, parse_http_date, solve_g, usable_etag)
from frontier.settings import load_settings

DAY = 86400.0


# -- the estimator, by hand -----------------------------------------------------------------

@pytest.mark.parametrize("n, x, interval, expected", [
    (10, 3, DAY, math.log(10.5 / 7.5) / DAY),  # ln 1.4 = 0.336472 a day
    (10, 10, DAY, math.log(21.0) / DAY),  # every visit changed: ln(21), finite
    (5, 0, DAY, 0.0),  # never changed: 0
    (4, 2, 43200.0, math.log(1.8) / 43200.0),  # ln(4.5 / 2.5)
    (1, 1, 3600.0, math.log(3.0) / 3600.0),  # ln(1.5 / 0.5)
])
def test_change_rate_by_hand(n: int, x: int, interval: float, expected: float) -> None:
    """TOIT 2003's improved estimator, computed by hand for each row."""
    assert change_rate(n, x, interval) == pytest.approx(expected, rel=1e-12)


def test_change_rate_values_written_out() -> None:
    """The same estimator with the arithmetic done on paper: ln(1.4) = 0.33647."""
    assert change_rate(10, 3, 1.0) == pytest.approx(0.336472, abs=1e-6)
    assert change_rate(10, 10, 1.0) == pytest.approx(3.044522, abs=1e-6)


def test_change_rate_unknown_before_a_second_visit() -> None:
    assert change_rate(0, 0, DAY) is None
    assert change_rate(3, 1, 0.0) is None


def test_estimator_nearly_unbiased_on_poisson_samples() -> None:
    """TOIT 2003: the improved estimator is close to unbiased when the page changes about
    once per visit; the naive X / (n I) underestimates (a visit sees one change at most)."""
    import random
    rng = random.Random(7)
    rate, n, trials = 1.0, 50, 400
    improved, naive = [], []
    for _ in range(trials):
        x = sum(1 for _ in range(n) if rng.random() < 1 - math.exp(-rate))
        improved.append(change_rate(n, x, 1.0))
        naive.append(x / n)
    mean = sum(v for v in improved if v is not None) / trials
    assert abs(mean - rate) < 0.05
    assert sum(naive) / trials < 0.7  # 1 - e^-1 = 0.632


# -- freshness and the allocation ----------------------------------------------------------------

def test_freshness_closed_form() -> None:
    """(1 - e^(-lambda I)) / (lambda I): 1 - 1/e at lambda I = 1; 1 for a page that never
    changes; 1/x for large x."""
    assert freshness(1 / DAY, DAY) == pytest.approx(1 - math.exp(-1))
    assert freshness(0.0, DAY) == 1.0
    assert freshness(100 / DAY, DAY) == pytest.approx(0.01, rel=1e-6)


def test_g_and_its_inverse() -> None:
    assert g(0.0) == 0.0
    assert g(1.0) == pytest.approx(1 - 2 / math.e)
    for y in (1e-6, 0.01, 0.264, 0.5, 0.9, 0.999):
        assert g(solve_g(y)) == pytest.approx(y, rel=1e-9, abs=1e-12)


def test_worked_example_five_pages() -> None:
    """SIGMOD 2000 / TODS 2003 worked example (quoted from memory): pages changing 1, 2, 3,
    4, 5 times a day, 5 fetches a day in all; the optimal fetches a day are 1.15, 1.36,
    1.35, 1.14 and 0 (the fastest page is not fetched at all)."""
    rates = [i / DAY for i in range(1, 6)]
    intervals = optimal_allocation(rates, 5 / DAY, 1.0, 1e12)
    per_day = [DAY / iv for iv in intervals]
    assert [round(f, 2) for f in per_day] == [1.15, 1.36, 1.35, 1.14, 0.0]
    assert sum(per_day) == pytest.approx(5.0, rel=1e-6)


def test_optimal_beats_uniform_beats_proportional() -> None:
    """TODS 2003: at the same fetch rate, uniform revisiting beats proportional revisiting
    in average freshness, and the Lagrange allocation beats both."""
    rates = [i / DAY for i in range(1, 6)]
    uniform = sum(freshness(r, DAY) for r in rates) / 5
    proportional = sum(freshness(r, 3 / r * 1 / 1) for r in rates) / 5  # f = lambda / 3
    optimal = sum(freshness(r, iv) for r, iv in zip(
        rates, optimal_allocation(rates, 5 / DAY, 1.0, 1e12))) / 5
    assert proportional == pytest.approx((1 - math.exp(-3)) / 3)
    assert optimal > uniform > proportional


def test_optimal_interval_bounds() -> None:
    assert optimal_interval(0.0, 100.0, 10.0, 1000.0) == 1000.0  # never changes: max
    assert optimal_interval(1.0, 2.0, 10.0, 1000.0) == 1000.0  # mu * rate >= 1: max
    assert optimal_interval(1.0, 1e-6, 10.0, 1000.0) == 10.0  # cheap fetches: clamped to min


# -- stored state ---------------------------------------------------------------------------------

def test_state_round_trip_and_rate() -> None:
    s = RevisitState(11, 3, 1000, 1000 + 10 * 86400, 86400, 5000, "ABC", 4096, '"x1"', 12345)
    back = RevisitState.decode(s.encode())
    assert back == s
    assert back.rate == pytest.approx(math.log(10.5 / 7.5) / DAY)
    assert RevisitState.decode(RevisitState().encode()).etag is None


# -- validators under odd input ---------------------------------------------------------------------

def test_etag_grammar() -> None:
    """RFC 9110 s.8.8.3: entity-tag = [ W/ ] DQUOTE *etagc DQUOTE."""
    assert usable_etag('"abc"') == '"abc"'
    assert usable_etag('W/"abc"') == 'W/"abc"'
    assert usable_etag('""') == '""'
    for bad in ("abc", '"a b"', '"a"b"', 'w/"a"', '"a', '"caf\u00e9"', '"a"\r\nX: 1', ""):
        assert usable_etag(bad) is None, bad


def test_http_dates() -> None:
    """RFC 9110 s.5.6.7: the IMF-fixdate, and the obsolete RFC 850 and asctime forms."""
    moment = int(datetime(1994, 11, 6, 8, 49, 37, tzinfo=UTC).timestamp())
    assert parse_http_date("Sun, 06 Nov 1994 08:49:37 GMT") == moment
    assert parse_http_date("Sunday, 06-Nov-94 08:49:37 GMT") == moment
    assert parse_http_date("Sun Nov  6 08:49:37 1994") == moment
    assert http_date(moment) == "Sun, 06 Nov 1994 08:49:37 GMT"
    for bad in ("", "yesterday", "Sun, 99 Nov 1994 08:49:37 GMT", "\x00\xff", "1" * 100):
        assert parse_http_date(bad) is None


ODD_TEXT = st.text(alphabet=st.characters(codec="utf-8"), max_size=300) | st.binary(
    max_size=300).map(lambda b: b.decode("latin-1"))


@pytest.mark.fuzz
@given(etag=ODD_TEXT, modified=ODD_TEXT)
def test_odd_validators_never_break_a_request(etag: str, modified: str) -> None:
    """Whatever a server sends as ETag and Last-Modified, what is kept is valid, survives
    the stored form, and the conditional headers built from it are printable ASCII
    without line breaks (safe to send)."""
    kept_etag = usable_etag(etag)
    kept_date = parse_http_date(modified)
    if kept_etag is not None:
        assert kept_etag.isascii() and " " not in kept_etag
    state = RevisitState(2, 1, 10, 20, 10, 10, "D", 1, kept_etag, kept_date)
    assert RevisitState.decode(state.encode()) == state
    for name, value in conditional_headers(state).items():
        assert value.isascii() and value.isprintable() and "\r" not in value and "\n" not in value
        if name == "If-Modified-Since":
            assert parse_http_date(value) == kept_date


# -- settings ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("section, message", [
    ({"min_interval_s": float("nan")}, "min_interval_s"),
    ({"max_interval_s": float("inf")}, "max_interval_s"),
    ({"min_interval_s": -1.0}, "min_interval_s"),
    ({"host_fetches_per_day": 0}, "host_fetches_per_day"),
    ({"min_interval_s": 7200.0, "max_interval_s": 3600.0}, "at least min_interval_s"),
])
def test_bad_revisit_settings_refused(section: dict[str, float], message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        load_settings(None, {"revisit": section})


def test_revisit_settings_from_a_job_file(tmp_path: os.PathLike[str]) -> None:
    path = tmp_path / "job.toml"  # type: ignore[operator]
    path.write_text("[revisit]\nenabled = true\nmin_interval_s = 60\nmax_interval_s = 600\n")
    s = load_settings(path)
    assert s.revisit.enabled and s.revisit.min_interval_s == 60
    path.write_text("[revisit]\nmin_interval_s = nan\n")
    with pytest.raises(ConfigError, match="revisit.min_interval_s"):
        load_settings(path)


@pytest.mark.fuzz
@given(low=st.floats(allow_nan=True, allow_infinity=True),
       high=st.floats(allow_nan=True, allow_infinity=True))
def test_any_interval_pair_is_kept_or_refused_clearly(low: float, high: float) -> None:
    try:
        s = load_settings(None, {"revisit": {"min_interval_s": low, "max_interval_s": high}})
    except ConfigError as exc:
        assert "revisit." in str(exc)
        return
    r = s.revisit
    assert 0 < r.min_interval_s <= r.max_interval_s and math.isfinite(r.max_interval_s)
