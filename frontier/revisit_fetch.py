"""A fetch worker's part in revisits (``revisit.enabled``): the stored validators of the
pages it leases (for conditional GETs, RFC 9110 s.13.1.2 and s.13.1.3), what each fetch
showed, the record of it sent in the pipeline of the lease's completion, and pages
whose revisit time has come sent back to their queues (at most once a second), and
pages a sitemap lists with a ``<lastmod>`` after their last fetch made due.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Iterable, Sequence
from datetime import UTC, datetime

from frontier.digests import Capture, PayloadDigestIndex
from frontier.exceptions import StoreError
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.revisit import (
    RevisitState, conditional_headers, parse_http_date, short_digest, usable_etag)
from frontier.revisit_store import Observation, RevisitStore
from frontier.scripts import ScriptCall
from frontier.sitemaps import SitemapCandidate
from frontier.store import FrontierStore

log = logging.getLogger(__name__)

RELEASE_EVERY_S = 1.0  # how often a worker sends due pages back to their queues
WARC_DATE = "%Y-%m-%dT%H:%M:%SZ"  # ISO 28500 s.5.4: W3C ISO 8601, UTC
MEMORY = 100_000  # leases whose state a worker keeps at most (cleared when full)

Header = Callable[[str], "str | None"]
"""A response's header lookup by name (any case)."""

Locate = Callable[[str], "tuple[str, str] | None"]
"""An offered URL's (politeness key, canonical URL), None if refused (Admission.locate)."""


class WorkerRevisits:
    """Revisit state around one worker's leases."""

    def __init__(self, store: FrontierStore, digests: PayloadDigestIndex, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.store = RevisitStore(store)
        self.digests = digests
        self.clock = clock
        self._states: dict[str, RevisitState | None] = {}  # lease member -> stored state
        self._seen: dict[str, Observation] = {}  # lease member -> what its fetch showed
        self._released_at = -RELEASE_EVERY_S

    async def release_due(self) -> int:
        """Send pages whose time has come back to their queues (at most once a second)."""
        now = self.clock()
        if now - self._released_at < RELEASE_EVERY_S:
            return 0
        self._released_at = now
        return await self.store.release_due()

    async def listed(self, candidates: Iterable[Candidate], locate: Locate) -> int:
        """Sitemap candidates with a ``<lastmod>`` (sitemaps.org 0.9: the date the page
        was last modified): a tracked page modified after its last fetch is made due now,
        within the min interval (RevisitStore.sooner). A W3C date without a time counts
        as its first moment. A Redis failure loses the hint only: the page keeps its
        schedule. How many pages were made due sooner."""
        listed = []
        for c in candidates:
            lastmod = c.lastmod if isinstance(c, SitemapCandidate) else None
            if lastmod is not None and (place := locate(c.url)) is not None:
                listed.append((place[0], place[1], int(lastmod.timestamp())))
        if not listed:
            return 0
        try:
            return await self.store.sooner(listed)
        except StoreError as exc:
            log.warning("could not move %d sitemap-listed pages sooner: %s", len(listed), exc)
            return 0

    async def leased(self, leases: Sequence[Lease]) -> None:
        """Read the stored state of newly leased pages (one round trip)."""
        if len(self._states) > MEMORY:
            self._states.clear()
        states = await self.store.states([(lz.host, lz.url) for lz in leases])
        for lease, state in zip(leases, states):
            self._states[lease.member] = state

    def state(self, lease: Lease) -> RevisitState | None:
        return self._states.get(lease.member)

    def headers(self, lease: Lease) -> dict[str, str] | None:
        """The conditional GET's validators for this lease (None: an ordinary GET)."""
        return conditional_headers(self.state(lease)) or None

    def unchanged(self, lease: Lease, digest: str | None) -> bool:
        """True if a full response has the payload of the page's last capture."""
        state = self.state(lease)
        return bool(state and digest and state.digest == short_digest(digest))

    def observe(self, lease: Lease, header: Header, digest: str | None, *,
                not_modified: bool = False) -> None:
        """Note what a fetch showed: a 304, or a full response with its payload digest;
        the validators kept are the usable ones (odd values are dropped)."""
        self._seen[lease.member] = Observation(
            lease.host, lease.url, lease.score, not_modified, digest,
            usable_etag(header("ETag")), parse_http_date(header("Last-Modified")))

    async def earlier_capture(self, lease: Lease) -> Capture:
        """What a 304 refers to: the page's last full capture (its WARC-Date; its record
        ID when the payload-digest index still names this URL's record)."""
        state = self.state(lease)
        at = datetime.fromtimestamp(state.capture_s if state else 0, UTC)
        if state and state.digest:
            try:
                first = await self.digests.first(f"sha1:{state.digest}")
            except StoreError:
                first = None
            if first is not None and first.url == lease.url:
                return first
        return Capture(lease.url, at.strftime(WARC_DATE), "")

    def record_calls(self, completions: Sequence[Completion]) -> list[ScriptCall]:
        """The revisit records of these completions' fetches (for their pipeline)."""
        seen = [self._seen[c.lease.member] for c in completions
                if c.outcome is Outcome.FETCHED and c.lease.member in self._seen]
        return self.store.record_calls(seen) if seen else []

    async def settle(self, completions: Sequence[Completion]) -> None:
        """After the completions: forget their leases; a tracked page whose revisit ended
        otherwise than fetched (gone, refused) is no longer tracked."""
        gone = []
        for c in completions:
            self._seen.pop(c.lease.member, None)
            state = self._states.pop(c.lease.member, None)
            if state is not None and c.outcome in (Outcome.FAILED, Outcome.EXCLUDED):
                gone.append((c.lease.host, c.lease.url))
        if gone:
            try:
                await self.store.drop(gone)
            except StoreError as exc:
                log.warning("could not drop %d revisited pages: %s", len(gone), exc)
