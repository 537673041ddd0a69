"""From offered URLs to store batches: canonical form, scope, fingerprint, partition.

Nothing offered raises: a URL that cannot be parsed, has another scheme, is too long or
lies out of scope is admitted as *excluded* with its reason, so the counts add up.
"""

from __future__ import annotations

from collections.abc import Iterable

from frontier.exceptions import UrlError
from frontier.keys import partition_of
from frontier.model import AdmitResult, Candidate, encode_credit, encode_score
from frontier.settings import JobSettings
from frontier.store import FrontierStore, PartitionBatch, QueuedUrl
from frontier.urls import Scope, canonicalize, fingerprint, host_of, politeness_key

HOST_CACHE_SIZE = 100_000  # hosts whose politeness key and partition are remembered


def scope_from_settings(settings: JobSettings, seeds: Iterable[str] = ()) -> Scope:
    """The job's scope; with no host patterns, the seeds' hosts (and their subdomains)."""
    s = settings.scope
    allow: list[str] = list(s.allow_hosts)
    if not allow and not s.allow_all_hosts:
        for seed in seeds:
            try:
                allow.append(host_of(canonicalize(seed, max_length=s.max_url_length)))
            except UrlError:
                continue
    return Scope(allow=allow, include=s.include, exclude=s.exclude, max_depth=s.max_depth)


class Admission:
    """Prepares candidates for the store and admits them."""

    def __init__(self, store: FrontierStore, scope: Scope) -> None:
        self.store = store
        self.scope = scope
        s = store.settings
        self.partitions = s.store.partitions
        self.max_length = s.scope.max_url_length
        self.schemes = frozenset(s.scope.schemes)
        self.key_mode = s.politeness.key
        self._places: dict[str, tuple[str, int]] = {}  # host -> (politeness key, partition)

    def prepare(self, candidates: Iterable[Candidate]) -> dict[int, PartitionBatch]:
        """Group candidates by partition and host; refusals keep their reason."""
        batches: dict[int, PartitionBatch] = {}
        parts, max_length, schemes = self.partitions, self.max_length, self.schemes
        places = self._places
        check = self.scope.check
        key_mode = self.key_mode
        for c in candidates:
            try:
                url = canonicalize(c.url, max_length=max_length, schemes=schemes)
            except UrlError as exc:
                raw = c.url[: max_length * 2]
                p = partition_of(raw, parts)
                batches.setdefault(p, PartitionBatch()).refused.append(
                    (fingerprint(raw), f"url_{exc.reason}"))
                continue
            host = host_of(url)
            place = places.get(host)
            if place is None:
                if len(places) > HOST_CACHE_SIZE:
                    places.clear()
                key = politeness_key(host, self.key_mode)
                place = places[host] = (key, partition_of(key, parts))
            batch = batches.get(place[1])
            if batch is None:
                batch = batches[place[1]] = PartitionBatch()
            reason = check(url, host, c.depth)
            if reason is not None:
                batch.refused.append((fingerprint(url), reason))
                continue
            queue = batch.hosts.get(place[0])
            if queue is None:
                queue = batch.hosts[place[0]] = []
            queue.append(QueuedUrl(url, fingerprint(url), encode_score(c.cash, c.depth),
                                   encode_credit(c.credit)))
            if c.depth == 0:  # a seed, or where a seed redirects: the operator vouches
                batch.seeded.add(place[0])
            source = c.source_host
            if source is not None and source != host:
                source_key = politeness_key(source, key_mode) if key_mode != "host" else source
                if source_key != place[0]:
                    batch.add_source(place[0], source_key)
        return batches

    async def admit(self, candidates: Iterable[Candidate], now: int | None = None) -> AdmitResult:
        return await self.store.admit_batches(self.prepare(candidates), now)
