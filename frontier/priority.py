"""Online page importance (OPIC) and its defences against link farms and traps.

OPIC: "Adaptive On-Line Page Importance Computation" (Abiteboul, Preda & Cobena, WWW 2003):
every URL carries *cash*. Fetching a page hands its cash on to the pages it links
to; the cash a page has received over time estimates its importance, and the frontier
fetches the URLs holding the most cash first (their score is their cash, see
``frontier.model.encode_score``).

:func:`distribute` is the one step the crawl performs per fetched page:

* a ``jump_share`` of the page's cash goes to the random-jump pool (OPIC's virtual
  page, which links to every page; this is PageRank's damping, alpha = 1 - jump_share);
  a page without out-links (dangling) gives it all to the pool;
* the rest is split over the distinct out-links, a link to another host weighing
  ``cross_host_weight`` times a link within the host;
* every share is multiplied by ``trap_penalty`` once per trap sign of its target URL
  (:func:`trap_signs`); what a penalty withholds goes to the pool too.

The pool is not kept anywhere. OPIC's virtual page would pay it back to every page in
equal parts, which is the uniform ``(1 - alpha) / N`` term of PageRank: the same for every
page. The frontier gives each *new* URL ``jump_floor`` cash instead, its part of that
uniform term, so a URL discovered late is not worth nothing. Cash is therefore not
conserved exactly; only the order of URLs matters to the frontier.

:class:`OpicLedger` runs the textbook algorithm in memory (with history, virtual page
and exact pool) on a known graph: the tests use it to check that :func:`distribute`
splits cash so that OPIC converges to PageRank.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Callable, Container, Iterable, Sequence
from dataclasses import dataclass, field

from frontier.model import Candidate
from frontier.settings import PrioritySettings

# Trap signs (common practice, no source): shapes of URLs that an endless space
# (calendars, session ids, relative-link loops) produces without limit.
REPEATED_SEGMENT = "repeated_segment"
PATH_DEPTH = "path_depth"
URL_LENGTH = "url_length"
SESSION_QUERY = "session_query"
DATE_QUERY = "date_query"
DATE_PATH = "date_path"

LINK_MEMO_SIZE = 1 << 16  # link targets whose host and trap signs are remembered

SESSION_PARAMS = frozenset({
    "sid", "sess", "session", "sessionid", "session_id", "jsessionid", "phpsessid",
    "aspsessionid", "cfid", "cftoken", "token",
})
# a long run of hex digits, or a long base64url-ish token with letters and digits mixed
_TOKEN_RE = re.compile(r"[0-9a-fA-F]{16,}|(?=[A-Za-z0-9_-]{24,})(?=.*\d)(?=.*[A-Za-z])[A-Za-z0-9_-]+")
# 2024-01-31, 20240131, 2024/01 ... as a query value
_DATE_VALUE_RE = re.compile(r"(?:1[0-9]|2[0-9])\d\d(?:[-/._]?(?:0[1-9]|1[0-2]))(?:[-/._]?(?:0[1-9]|[12]\d|3[01]))?")
_DATE_PARAMS = frozenset({"date", "day", "month", "year", "ym", "ymd", "cal", "calendar"})
_YEAR_RE = re.compile(r"\d{4}")
_MONTH_OR_DAY_RE = re.compile(r"\d{1,2}")
_DATE_SEGMENT_RE = re.compile(r"\d{4}-\d{1,2}(?:-\d{1,2})?")


def url_host(url: str) -> str:
    """The lower-cased host of an absolute URL, canonical or not ('' if none)."""
    start = url.find("://")
    if start < 0:
        return ""
    start += 3
    end = len(url)
    for sep in "/?#":
        i = url.find(sep, start)
        if 0 <= i < end:
            end = i
    authority = url[start:end].rpartition("@")[2]
    if authority.startswith("["):
        return authority[: authority.find("]") + 1].lower()
    return authority.partition(":")[0].lower()


def _path_and_query(url: str) -> tuple[str, str]:
    start = url.find("://")
    rest = url[start + 3 :] if start >= 0 else url
    rest = rest.partition("#")[0]
    slash = rest.find("/")
    question = rest.find("?")
    if slash < 0 or 0 <= question < slash:
        path, query = "/", rest.partition("?")[2]
    else:
        path, _, query = rest[slash:].partition("?")
    return path, query


def _ends_in_date(segments: Sequence[str]) -> bool:
    """The path ends in a date: .../YYYY/MM, .../YYYY/MM/DD or .../YYYY-MM[-DD]."""
    if not segments or not segments[-1][:1].isdigit():  # every form ends in digits
        return False
    if _DATE_SEGMENT_RE.fullmatch(segments[-1]):
        return True
    for span in (2, 3):
        if len(segments) >= span and _YEAR_RE.fullmatch(segments[-span]) and all(
            _MONTH_OR_DAY_RE.fullmatch(s) for s in segments[-span + 1 :]
        ):
            return True
    return False


def trap_signs(url: str, settings: PrioritySettings) -> list[str]:
    """The trap signs of ``url``, each one multiplies its cash by ``trap_penalty``."""
    return _signs(url, settings.trap_depth, settings.trap_length)


def _signs(url: str, trap_depth: int, trap_length: int) -> list[str]:
    signs: list[str] = []
    path, query = _path_and_query(url)
    segments = [s for s in path.split("/") if s]
    if len(segments) > trap_depth:
        signs.append(PATH_DEPTH)
    if len(url) > trap_length:
        signs.append(URL_LENGTH)
    words = [s for s in segments if not s.isdigit()]  # /2024/01/01 repeats nothing
    if len(set(words)) < len(words):
        signs.append(REPEATED_SEGMENT)
    if _ends_in_date(segments):
        signs.append(DATE_PATH)
    session = date = False
    for pair in query.split("&") if query else ():
        name, _, value = pair.partition("=")
        name = name.lower()
        if name in SESSION_PARAMS or (value and _TOKEN_RE.fullmatch(value)):
            session = True
        if value and (name in _DATE_PARAMS or _DATE_VALUE_RE.fullmatch(value)):
            date = True
    if ";" in path and ";jsessionid=" in path.lower():
        session = True
    if session:
        signs.append(SESSION_QUERY)
    if date:
        signs.append(DATE_QUERY)
    return signs


def trap_factor(url: str, settings: PrioritySettings) -> float:
    """``trap_penalty`` to the power of the number of trap signs (1.0: no sign)."""
    signs = trap_signs(url, settings)
    return float(settings.trap_penalty ** len(signs)) if signs else 1.0


@functools.lru_cache(maxsize=LINK_MEMO_SIZE)
def _link_facts(url: str, trap_depth: int, trap_length: int) -> tuple[str, int]:
    """(host, number of trap signs) of a link target.

    A crawl meets each URL in many links (about ten times over in the benchmark crawl),
    so the answers are remembered.
    """
    return url_host(url), len(_signs(url, trap_depth, trap_length))


def link_weights(
    source_url: str, links: Iterable[str], settings: PrioritySettings
) -> dict[str, float]:
    """Weight per distinct out-link (self-links dropped, first occurrence kept)."""
    source = url_host(source_url)
    cross = settings.cross_host_weight
    weights: dict[str, float] = {}
    for url in links:
        if url == source_url or url in weights:
            continue
        weights[url] = cross if url_host(url) != source else 1.0
    return weights


def _weights(
    source_url: str, source: str, links: Iterable[str], settings: PrioritySettings
) -> tuple[dict[str, tuple[float, float]], float]:
    """(weight, trap factor) per distinct out-link of a page on host ``source``, and the
    weights' sum.

    Same weights as :func:`link_weights` and factors as :func:`trap_factor`, from the
    remembered facts of each link.
    """
    cross, penalty = settings.cross_host_weight, settings.trap_penalty
    depth, length = settings.trap_depth, settings.trap_length
    found: dict[str, tuple[float, float]] = {}
    total = 0.0
    for url in links:
        if url == source_url or url in found:
            continue
        host, signs = _link_facts(url, depth, length)
        weight = 1.0 if host == source else cross
        found[url] = (weight, float(penalty ** signs) if signs else 1.0)
        total += weight
    return found, total


def _shares(
    source_url: str, cash: float, links: Iterable[str], settings: PrioritySettings
) -> list[tuple[str, float, float]]:
    """(url, share, trap factor) per distinct out-link; shares carry the penalties."""
    found, total = _weights(source_url, url_host(source_url), links, settings)
    if not total:
        return []
    spend = (1.0 - settings.jump_share) * cash / total
    return [(url, spend * w * factor, factor) for url, (w, factor) in found.items()]


def split_cash(
    source_url: str, cash: float, links: Iterable[str], settings: PrioritySettings
) -> dict[str, float]:
    """The share of ``cash`` each distinct out-link receives (trap penalties applied).

    The shares sum to at most (1 - jump_share) x cash; the rest is the jump pool's.
    """
    return {url: share for url, share, _ in _shares(source_url, cash, links, settings)}


def distribute(
    lease_url: str,
    lease_cash: float,
    depth: int,
    links: Sequence[tuple[str, str]],
    settings: PrioritySettings,
    known: Container[str] = (),
) -> list[Candidate]:
    """Hand a fetched page's cash on to its out-links, as candidates for the frontier.

    ``links`` are (absolute URL, anchor text) pairs. Each candidate carries
    ``credit`` = its share (added if the URL already waits in the frontier) and
    ``cash`` = its share plus ``jump_floor`` (trap penalties on both), the priority of
    a URL the frontier has not seen. ``source_host`` is the fetched page's host.
    A link to a URL in ``known`` (fetched already) takes its share but makes no
    candidate: cash sent to a page that is not fetched again is lost, as in OPIC.
    """
    source = url_host(lease_url)
    found, total = _weights(lease_url, source, [u for u, _ in links], settings)
    if not total:
        return []
    spend = (1.0 - settings.jump_share) * lease_cash / total
    floor = settings.jump_floor
    child = depth + 1
    out = []
    for url, (weight, factor) in found.items():
        if url in known:
            continue
        share = spend * weight * factor
        out.append(Candidate(url, child, share + floor * factor, share, source))
    return out


# -- the textbook algorithm, in memory --------------------------------------------------

VIRTUAL = "(virtual page)"  # OPIC's page that links to every page: the jump pool


@dataclass
class OpicLedger:
    """OPIC over a fixed graph, with history (Abiteboul, Preda & Cobena 2003, section 3).

    Each page starts with cash 1/N. Visiting a page adds its cash to its history and
    hands it on with :func:`split_cash`; what is not handed on (jump share, dangling
    pages, trap penalties) goes to the virtual page, which hands its cash to all N pages
    in equal parts when it is visited. :meth:`importance` is (H[i] + C[i]) / (G + 1)
    over the real pages, G being the total history.
    """

    graph: dict[str, list[str]]
    settings: PrioritySettings
    cash: dict[str, float] = field(default_factory=dict)
    history: dict[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        pages = list(self.graph)
        for page in pages:
            self.cash[page] = 1.0 / len(pages)
            self.history[page] = 0.0
        self.cash[VIRTUAL] = 0.0
        self.history[VIRTUAL] = 0.0

    def visit(self, page: str) -> None:
        amount = self.cash[page]
        self.history[page] += amount
        self.cash[page] = 0.0
        if page == VIRTUAL:
            real = list(self.graph)
            for other in real:
                self.cash[other] += amount / len(real)
            return
        shares = split_cash(page, amount, self.graph[page], self.settings)
        for target, share in shares.items():
            self.cash[target] += share
        self.cash[VIRTUAL] += amount - sum(shares.values())

    def run(self, visits: int, schedule: Callable[[OpicLedger, int], str] | None = None) -> None:
        """Visit pages ``visits`` times; by default the page with the most cash (greedy)."""
        pick = schedule or greedy
        for step in range(visits):
            self.visit(pick(self, step))

    def importance(self) -> dict[str, float]:
        total = sum(self.history[p] + self.cash[p] for p in self.graph)
        return {p: (self.history[p] + self.cash[p]) / total for p in self.graph}


def greedy(ledger: OpicLedger, step: int) -> str:
    """Visit the page (or the virtual page) holding the most cash."""
    return max(ledger.cash, key=ledger.cash.__getitem__)


def round_robin(ledger: OpicLedger, step: int) -> str:
    """Visit every page in turn, then the virtual page."""
    order = [*ledger.graph, VIRTUAL]
    return order[step % len(order)]
