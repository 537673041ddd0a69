"""Revisits: change-rate estimates, revisit intervals, stored per-URL state, validators.

Sources (quoted from memory; docs/revisits.md has the derivations):

- Cho & Garcia-Molina, "Estimating frequency of change", ACM TOIT 3(3), 2003: for a page
  visited ``n`` times at a regular interval ``I`` (``n`` intervals) with ``X`` of them
  showing a change, the improved estimator of the Poisson change rate is
  ``r = -log((n - X + 0.5) / (n + 0.5)) / I`` (finite even when every visit saw a change).
- Cho & Garcia-Molina, "Effective page refresh policies for web crawlers", ACM TODS
  28(4), 2003 (and SIGMOD 2000): a page changing at rate ``lambda`` and fetched every
  ``I`` has expected freshness ``F = (1 - e^(-lambda I)) / (lambda I)``; uniform
  revisiting beats revisiting in proportion to the change rate; the allocation of ``B``
  fetches that maximises the summed freshness has ``dF/df = mu`` for every page fetched
  (Lagrange), i.e. ``g(lambda / f) = mu * lambda`` with ``g(x) = 1 - (1 + x) e^(-x)``, and
  no fetches for a page with ``mu * lambda >= 1``.

The script ``frontier/scripts/revisit.lua`` does the same arithmetic inside Redis (one
host's multiplier ``mu`` is kept in its host hash); the functions here are the reference
it is tested against, and what the bench and the status use.
"""

from __future__ import annotations

import email.utils
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime

DAY_S = 86400.0
SOLVE_STEPS = 60  # bisection steps for g(x) = y (as revisit.lua)
SOLVE_HIGH = 60.0  # g(60) = 1 - 61 e^-60: no y below 1 in doubles needs more
GROWTH = 2.0  # an interval at most doubles from one visit to the next: common practice, no source
G_AT_ONE = 1 - 2 / math.e  # g(1): the first multiplier is this times the uniform interval
MU_MIN, MU_MAX = 1e-3, 1e10  # seconds: bounds on a host's multiplier

ETAG_MAX = 200  # longer entity tags are not kept (no conditional request by them)
_ETAG = re.compile(r'(?:W/)?"[\x21\x23-\x7e]*"')
"""RFC 9110 s.8.8.3 entity-tag, without obs-text (bytes over 0x7F are not kept)."""
LAST_MODIFIED_MIN = 0  # 1970-01-01
LAST_MODIFIED_MAX = 253402300799  # 9999-12-31T23:59:59Z


# -- change rates and intervals ---------------------------------------------------------------

def change_rate(intervals: int, changes: int, mean_interval_s: float) -> float | None:
    """Cho & Garcia-Molina's improved estimator (TOIT 2003) of a Poisson change rate (per
    second) from ``intervals`` visits after the first, ``changes`` of which found the
    page changed, ``mean_interval_s`` apart on average. None when nothing is known yet.
    Irregular intervals are taken at their mean (the estimator assumes regular ones)."""
    if intervals < 1 or not mean_interval_s > 0:
        return None
    changes = min(max(changes, 0), intervals)
    return -math.log((intervals - changes + 0.5) / (intervals + 0.5)) / mean_interval_s


def g(x: float) -> float:
    """``1 - (1 + x) e^-x``: ``lambda`` times the marginal freshness of one more fetch of a
    page whose change rate times interval is ``x`` (TODS 2003's Lagrange condition)."""
    return 1.0 - (1.0 + x) * math.exp(-x)


def solve_g(y: float) -> float:
    """The ``x`` with ``g(x) = y`` for ``0 <= y < 1`` (bisection, as revisit.lua)."""
    lo, hi = 0.0, SOLVE_HIGH
    for _ in range(SOLVE_STEPS):
        mid = (lo + hi) / 2
        if g(mid) < y:
            lo = mid
        else:
            hi = mid
    return (lo + hi) / 2


def optimal_interval(rate: float, mu: float, low: float, high: float) -> float:
    """The interval (s) of a page changing at ``rate`` (1/s) under multiplier ``mu`` (s):
    ``x / rate`` with ``g(x) = mu * rate``, none (``high``) when ``mu * rate >= 1`` or the
    page never changes, kept within ``[low, high]``."""
    y = mu * rate
    if rate <= 0 or y >= 1:
        return high
    return min(high, max(low, solve_g(y) / rate))


def freshness(rate: float, interval_s: float) -> float:
    """Expected freshness of a Poisson page fetched every ``interval_s`` (TODS 2003):
    ``(1 - e^(-lambda I)) / (lambda I)``."""
    x = rate * interval_s
    if x <= 0:
        return 1.0
    return -math.expm1(-x) / x


def optimal_allocation(rates: Sequence[float], fetches_per_s: float, low: float,
                       high: float) -> list[float]:
    """The intervals that maximise the summed freshness of pages with known ``rates``
    for ``fetches_per_s`` fetches in all, each within ``[low, high]`` (the Lagrange
    solution of TODS 2003, ``mu`` found by bisection on a log scale)."""
    def load(mu: float) -> float:
        return sum(1.0 / optimal_interval(r, mu, low, high) for r in rates)

    lo, hi = MU_MIN, MU_MAX
    for _ in range(200):
        mid = math.sqrt(lo * hi)
        if load(mid) > fetches_per_s:
            lo = mid
        else:
            hi = mid
    return [optimal_interval(r, hi, low, high) for r in rates]


# -- stored state ---------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class RevisitState:
    """What the frontier keeps for one fetched page (packed in one string, field order
    fixed: revisit.lua reads and writes the same form)."""

    visits: int = 0
    changes: int = 0
    first_s: int = 0  # first fetch (epoch s)
    last_s: int = 0  # latest fetch
    interval_s: int = 0  # the interval it was scheduled with
    capture_s: int = 0  # the latest fetch archived in full (a changed or first payload)
    digest: str | None = None  # payload digest of that capture, without 'sha1:'
    score: int = 0  # its queue score when it returns
    etag: str | None = None
    last_modified: int | None = None  # epoch s

    def encode(self) -> str:
        return " ".join((str(self.visits), str(self.changes), str(self.first_s),
                         str(self.last_s), str(self.interval_s), str(self.capture_s),
                         self.digest or "-", str(self.score), self.etag or "-",
                         "-" if self.last_modified is None else str(self.last_modified)))

    @classmethod
    def decode(cls, raw: bytes | str) -> RevisitState:
        text = raw.decode("ascii", "replace") if isinstance(raw, bytes) else raw
        v, c, t0, t1, ivl, cap, dig, score, etag, lm = text.split(" ")
        return cls(int(v), int(c), int(t0), int(t1), int(ivl), int(cap),
                   None if dig == "-" else dig, int(score), None if etag == "-" else etag,
                   None if lm == "-" else int(lm))

    @property
    def rate(self) -> float | None:
        """The estimated change rate (1/s), or None before a second visit."""
        n = self.visits - 1
        if n < 1:
            return None
        return change_rate(n, self.changes, (self.last_s - self.first_s) / n)

    def fresh_probability(self, now_s: float) -> float | None:
        """The chance the page is unchanged since its last fetch, by its estimated rate."""
        rate = self.rate
        if rate is None:
            return None
        return math.exp(-rate * max(0.0, now_s - self.last_s))


# -- validators (RFC 9110) ----------------------------------------------------------------------

def usable_etag(value: str | None) -> str | None:
    """An ETag value worth sending back in If-None-Match: one entity-tag of printable
    ASCII (RFC 9110 s.8.8.3), at most ETAG_MAX characters; else None."""
    if value is None:
        return None
    value = value.strip(" \t")
    if len(value) > ETAG_MAX or not _ETAG.fullmatch(value):
        return None
    return value


def parse_http_date(value: str | None) -> int | None:
    """A Last-Modified value (an HTTP-date, RFC 9110 s.5.6.7) as epoch seconds, or None
    for anything that is not a date."""
    if not value or len(value) > 64:
        return None
    try:
        moment = email.utils.parsedate_to_datetime(value.strip())
    except (TypeError, ValueError, IndexError, OverflowError):
        return None
    if moment is None:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    try:
        seconds = int(moment.timestamp())
    except (OverflowError, OSError, ValueError):
        return None
    return seconds if LAST_MODIFIED_MIN <= seconds <= LAST_MODIFIED_MAX else None


def http_date(seconds: int) -> str:
    """Epoch seconds as an IMF-fixdate (RFC 9110 s.5.6.7)."""
    return email.utils.format_datetime(datetime.fromtimestamp(seconds, UTC), usegmt=True)


def conditional_headers(state: RevisitState | None) -> dict[str, str]:
    """The request headers of a conditional GET with the stored validators:
    If-None-Match (RFC 9110 s.13.1.2) and If-Modified-Since (s.13.1.3; a server ignores
    it when If-None-Match is present). Empty when nothing is stored."""
    if state is None:
        return {}
    out = {}
    if state.etag:
        out["If-None-Match"] = state.etag
    if state.last_modified is not None:
        out["If-Modified-Since"] = http_date(state.last_modified)
    return out


def short_digest(digest: str | None) -> str:
    """A payload digest as stored ('sha1:' dropped), '' for none."""
    if not digest:
        return ""
    return digest.split(":", 1)[-1]
