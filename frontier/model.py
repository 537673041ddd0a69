"""Plain values that cross the store's boundary: candidates, leases, outcomes, counts."""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from typing import NamedTuple

# A score packs an URL's cash (OPIC importance, in micro-units), the redirect hops that
# led to it and its link depth:
# score = round(cash * CASH_SCALE) * CASH_UNIT + hops * DEPTH_SCALE + depth.
# Integer scores keep Redis listpacks compact; 2**53 bounds cash at about 2.2e6.
CASH_SCALE = 1_000_000
DEPTH_SCALE = 256
MAX_DEPTH = DEPTH_SCALE - 1
HOPS_SCALE = 16
MAX_HOPS = HOPS_SCALE - 1
CASH_UNIT = HOPS_SCALE * DEPTH_SCALE


def encode_score(cash: float, depth: int, hops: int = 0) -> int:
    """The sorted-set score of a URL with this cash at this depth, ``hops`` redirects
    into a chain (cash >= 1 micro-unit)."""
    return (max(1, round(cash * CASH_SCALE)) * CASH_UNIT
            + min(max(hops, 0), MAX_HOPS) * DEPTH_SCALE + min(max(depth, 0), MAX_DEPTH))


def encode_credit(cash: float) -> int:
    """The score increment for extra cash (the hop and depth bits stay as they are)."""
    return max(0, round(cash * CASH_SCALE)) * CASH_UNIT


def decode_score(score: float) -> tuple[float, int]:
    """(cash, depth) of a score."""
    whole = int(score)
    return (whole // CASH_UNIT) / CASH_SCALE, whole % DEPTH_SCALE


def score_hops(score: float) -> int:
    """Redirect hops of the chain that led to a URL (0: not reached by a redirect)."""
    return (int(score) // DEPTH_SCALE) % HOPS_SCALE


class Outcome(StrEnum):
    """How a lease ends."""

    FETCHED = "fetched"
    FAILED = "failed"  # final: will not be tried again
    EXCLUDED = "excluded"  # robots, scope, content policy
    RETRY = "retry"  # back to the queue with attempts + 1, dead past the limit


STATES = ("queued", "leased", "fetched", "failed", "excluded", "dead")


class Candidate(NamedTuple):
    """A URL offered to the frontier: a seed or a discovered link.

    A tuple, not a dataclass: a crawl makes one per discovered link, and a frozen
    dataclass costs several times more to build.
    """

    url: str
    depth: int = 0
    cash: float = 1.0  # initial priority of a new URL
    credit: float = 0.0  # cash added if the URL already waits in its host's queue
    source_host: str | None = None  # the host of the page that links here
    hops: int = 0  # redirects in a row that led here (0 for a link or a seed)
    # the trust of the source host as its lease gave it (0 for a suspect); None: the trust
    # the store saw when this process leased that host, or none known
    source_trust: float | None = None


@dataclass(frozen=True, slots=True)
class Lease:
    """One URL held by one worker until ``expires_ms``."""

    id: str
    host: str
    url: str
    score: int
    attempts: int
    expires_ms: int
    member: str  # the lease as stored: 'id\nhost\nscore\nattempts\ntrust\ncarry\nurl'
    trust: float | None = None  # the host's trust when leased (None: not tracked)
    suspect: bool = False  # the host was a link-spam suspect when leased
    out_hosts: int = 0  # distinct other hosts its fetched pages linked to, when leased

    @classmethod
    def from_member(cls, member: str, expires_ms: int) -> Lease:
        """Parse a lease; the trust field is 'T/O' (T: trust, 'x' for a suspect, '-' for
        none; O: out-linked hosts); the carry field is the frontier's own (lease_take.lua).
        Members of older forms lack carry (six fields) or both (five)."""
        parts = member.split("\n", 6)
        if len(parts) == 5:
            lid, host, score, attempts, url = parts
            return cls(lid, host, url, int(score), int(attempts), expires_ms, member)
        if len(parts) == 7:
            lid, host, score, attempts, signal, _, url = parts
        else:
            lid, host, score, attempts, signal, url = parts
        trust, _, out = signal.partition("/")
        suspect = trust == "x"
        value = None if trust in ("-", "") else 0.0 if suspect else float(trust)
        return cls(lid, host, url, int(score), int(attempts), expires_ms, member,
                   value, suspect, int(out or 0))

    @property
    def passes_trust(self) -> float | None:
        """The trust links from this host carry (0 from a suspect; None: not tracked)."""
        return 0.0 if self.suspect else self.trust

    @property
    def partition(self) -> int:
        return int(self.id.split("-", 1)[0])

    @property
    def cash(self) -> float:
        return decode_score(self.score)[0]

    @property
    def depth(self) -> int:
        return decode_score(self.score)[1]

    @property
    def hops(self) -> int:
        """Redirects in a row that led to this URL."""
        return score_hops(self.score)


@dataclass(frozen=True, slots=True)
class Completion:
    """The end of one lease."""

    lease: Lease
    outcome: Outcome
    reason: str = ""
    response_s: float = 0.0
    extra_delay_s: float = 0.0  # Retry-After, backoff
    crawl_delay_s: float | None = None  # from robots.txt, if known


@dataclass
class AdmitResult:
    new: int = 0
    credited: int = 0
    excluded: int = 0
    duplicates: int = 0

    def add(self, other: AdmitResult) -> None:
        self.new += other.new
        self.credited += other.credited
        self.excluded += other.excluded
        self.duplicates += other.duplicates


@dataclass
class Counts:
    """URLs by state. Invariant: admitted == queued + leased + fetched + failed + excluded + dead."""

    admitted: int = 0
    queued: int = 0
    leased: int = 0
    fetched: int = 0
    failed: int = 0
    excluded: int = 0
    dead: int = 0
    reasons: dict[str, int] = field(default_factory=dict)

    @property
    def accounted(self) -> int:
        return sum(getattr(self, s) for s in STATES)

    @property
    def balanced(self) -> bool:
        return self.admitted == self.accounted

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"admitted": self.admitted}
        out.update({s: getattr(self, s) for s in STATES})
        out["reasons"] = dict(sorted(self.reasons.items()))
        return out
