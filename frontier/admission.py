"""From offered URLs to store batches: canonical form, scope, fingerprint, partition.

Nothing offered raises: a URL that cannot be parsed, has another scheme, is too long or
lies out of scope is admitted as *excluded* with its reason, so the counts add up.
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable, Callable, Iterable

from frontier.exceptions import ConfigError, UrlError
from frontier.keys import partition_of
from frontier.model import (
    CASH_SCALE, CASH_UNIT, DEPTH_SCALE, MAX_DEPTH, MAX_HOPS, AdmitResult, Candidate,
)
from frontier.settings import JobSettings
from frontier.store import FrontierStore, PartitionBatch, QueuedUrl
from frontier.urls import Scope, canonicalize, fingerprint, host_of, politeness_key

HOST_CACHE_SIZE = 100_000  # hosts whose politeness key and partition are remembered
URL_MEMO_SIZE = 1 << 16  # offered URLs whose canonical form and fingerprint are remembered
RESOLVE_CONCURRENCY = 32  # address lookups at once, for the 'ip' politeness key

Resolver = Callable[[str], Awaitable[str | None]]


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

    def __init__(self, store: FrontierStore, scope: Scope,
                 resolver: Resolver | None = None) -> None:
        """``resolver`` maps a host to its address; needed for the 'ip' politeness key."""
        self.store = store
        self.scope = scope
        self.resolver = resolver
        self._address: dict[str, str] = {}  # host -> address, for the 'ip' politeness key
        s = store.settings
        self.partitions = store.partitions
        self.max_length = s.scope.max_url_length
        self.schemes = frozenset(s.scope.schemes)
        self.key_mode = s.politeness.key
        if self.key_mode == "ip" and resolver is None:
            raise ConfigError("politeness.key = 'ip' needs a resolver")
        self._places: dict[str, tuple[str, int]] = {}  # host -> (politeness key, partition)
        # offered URL -> (canonical URL, host, fingerprint) or the reason it is refused;
        # a crawl offers each URL many times (once per link to it)
        self._facts: dict[str, tuple[str, str, int] | str] = {}

    def prepare(self, candidates: Iterable[Candidate],
                linked: Iterable[tuple[str, str]] = ()) -> dict[int, PartitionBatch]:
        """Group candidates by partition and host; refusals keep their reason.

        ``linked`` holds (page host, URL) links to pages fetched already: no URL to look
        up, but the link between the two hosts counts for the target's earned budget.
        """
        batches: dict[int, PartitionBatch] = {}
        parts, max_length = self.partitions, self.max_length
        check = self.scope.check
        key_mode = self.key_mode
        facts, places = self._facts, self._places
        for c in candidates:
            raw, depth, cash, credit, source, hops = c
            fact = facts.get(raw)
            if fact is None:
                fact = self._remember(raw)
            if type(fact) is str:  # the reason the URL was refused
                raw = raw[: max_length * 2]
                p = partition_of(raw, parts)
                batches.setdefault(p, PartitionBatch()).refused.append(
                    (fingerprint(raw), fact, raw))
                continue
            url, host, fp = fact
            key, partition = places.get(host) or self._place(host)
            batch = batches.get(partition)
            if batch is None:
                batch = batches[partition] = PartitionBatch()
            reason = check(url, host, depth)
            if reason is not None:
                batch.refused.append((fp, reason, url))
                continue
            queue = batch.hosts.get(key)
            if queue is None:
                queue = batch.hosts[key] = []
            # the scores of frontier.model.encode_score and encode_credit, inlined
            queue.append(QueuedUrl(
                url, fp,
                max(1, round(cash * CASH_SCALE)) * CASH_UNIT
                + (min(hops, MAX_HOPS) * DEPTH_SCALE if hops else 0)
                + min(max(depth, 0), MAX_DEPTH),
                max(0, round(credit * CASH_SCALE)) * CASH_UNIT))
            if depth == 0:  # a seed (redirects and links are one depth further): the operator vouches
                batch.seeded.add(key)
            if source is not None and source != host:
                self._link_hosts(batch, key, source, key_mode)
        for source, raw in linked:
            fact = facts.get(raw) or self._remember(raw)
            if type(fact) is str or source == fact[1]:
                continue
            key, partition = places.get(fact[1]) or self._place(fact[1])
            batch = batches.get(partition)
            if batch is None:
                batch = batches[partition] = PartitionBatch()
            self._link_hosts(batch, key, source, key_mode)
        return batches

    def _link_hosts(self, batch: PartitionBatch, key: str, source: str, key_mode: str) -> None:
        """Record that a page of host ``source`` links to politeness key ``key``."""
        source_key = source if key_mode == "host" else self._key(source)
        if source_key != key:
            linking = batch.sources.get(key)
            if linking is None:
                batch.sources[key] = {source_key}
            else:
                linking.add(source_key)

    def _remember(self, raw: str) -> tuple[str, str, int] | str:
        facts = self._facts
        if len(facts) >= URL_MEMO_SIZE:
            facts.clear()
        fact = facts[raw] = self._url_facts(raw)
        return fact

    def _place(self, host: str) -> tuple[str, int]:
        """(politeness key, partition) of a host, remembered."""
        places = self._places
        if len(places) > HOST_CACHE_SIZE:
            places.clear()
        key = self._key(host)
        place = places[host] = (key, partition_of(key, self.partitions))
        return place

    def _url_facts(self, raw: str) -> tuple[str, str, int] | str:
        """(canonical URL, host, fingerprint) of an offered URL, or why it is refused."""
        try:
            url = canonicalize(raw, max_length=self.max_length, schemes=self.schemes)
        except UrlError as exc:
            return f"url_{exc.reason}"
        return url, host_of(url), fingerprint(url)

    def _key(self, host: str) -> str:
        """The politeness key of a host (an unresolved host stands for itself)."""
        if self.key_mode == "ip":
            return self._address.get(host, host)
        return politeness_key(host, self.key_mode)

    async def _resolve_new_hosts(self, candidates: list[Candidate]) -> None:
        """Look up the addresses of hosts not seen before ('ip' politeness key)."""
        assert self.resolver is not None
        hosts = set()
        for c in candidates:
            for url in (c.url, c.source_host and f"http://{c.source_host}/"):
                if not url:
                    continue
                try:
                    host = host_of(canonicalize(url, max_length=self.max_length,
                                                schemes=self.schemes))
                except UrlError:
                    continue
                if host not in self._address:
                    hosts.add(host)
        if len(self._address) + len(hosts) > HOST_CACHE_SIZE:
            self._address.clear()
            self._places.clear()
        limit = asyncio.Semaphore(RESOLVE_CONCURRENCY)

        async def one(host: str) -> None:
            async with limit:
                address = await self.resolver(host)  # type: ignore[misc]
            if address is not None:
                self._address[host] = address

        await asyncio.gather(*(one(h) for h in hosts))

    async def admit(self, candidates: Iterable[Candidate], now: int | None = None, *,
                    linked: Iterable[tuple[str, str]] = ()) -> AdmitResult:
        """Admit candidates, and count ``linked`` links between hosts (see :meth:`prepare`)."""
        if self.key_mode == "ip":
            candidates, linked = list(candidates), list(linked)
            await self._resolve_new_hosts(
                candidates + [Candidate(url, source_host=source) for source, url in linked])
        return await self.store.admit_batches(self.prepare(candidates, linked), now)
