"""From offered URLs to store batches: canonical form, scope, fingerprint, partition.

Nothing offered raises: a URL that cannot be parsed, has another scheme, is too long or
lies out of scope is admitted as *excluded* with its reason, so the counts add up.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Awaitable, Callable, Iterable

from frontier.exceptions import ConfigError, UrlError
from frontier.keys import partition_of
from frontier.model import (
    CASH_SCALE, CASH_UNIT, DEPTH_SCALE, MAX_DEPTH, MAX_HOPS, AdmitResult, Candidate,
)
from frontier.settings import JobSettings
from frontier.sitemaps import MARK as SITEMAP_MARK
from frontier.sitemaps import fingerprint_form, sitemap_url, split_sitemap
from frontier.store import TRUST_SPLIT_MIN_HOSTS, FrontierStore, PartitionBatch, QueuedUrl
from frontier.urls import (
    Scope, canonicalize, fingerprint, host_of, politeness_key, registered_domain,
)

HOST_CACHE_SIZE = 100_000  # hosts whose politeness key and partition are remembered
URL_MEMO_SIZE = 1 << 16  # offered URLs whose canonical form and fingerprint are remembered
RESOLVE_CONCURRENCY = 32  # address lookups at once, for the 'ip' politeness key

DOMAIN_MEMO_SIZE = 1 << 16  # politeness keys whose registrable domain is remembered

Resolver = Callable[[str], Awaitable[str | None]]

_domain_of = functools.lru_cache(maxsize=DOMAIN_MEMO_SIZE)(registered_domain)
# QueuedUrl from a 4-tuple without the named tuple's Python-level constructor
_queued: Callable[[tuple[str, int, int, int]], QueuedUrl] = functools.partial(
    tuple.__new__, QueuedUrl)


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
        self._hosts: dict[str, str] = {}  # origin (scheme://authority) -> host
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
        facts, places, url_facts = self._facts, self._places, self._url_facts
        queued = _queued
        # source politeness key -> {target key: its partition}, and trust given with them
        links: dict[str, dict[str, int]] = {}
        given: dict[str, float] = {}
        redirects: dict[str, dict[str, int]] = {}  # pairs seen only through a redirect
        for raw, depth, cash, credit, source, hops, source_trust in candidates:
            fact = facts.get(raw)
            if fact is None:
                if len(facts) >= URL_MEMO_SIZE:
                    facts.clear()
                fact = facts[raw] = url_facts(raw)
            if type(fact) is str:  # the reason the URL was refused
                raw = raw[: max_length * 2]
                p = partition_of(raw, parts)
                batches.setdefault(p, PartitionBatch()).refused.append(
                    (fingerprint(raw), fact, raw))
                continue
            url, host, fp = fact
            place = places.get(host)
            if place is None:
                place = self._place(host)
            key, partition = place
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
            # the scores of frontier.model.encode_score and encode_credit, inlined, with
            # comparisons instead of calls to min and max (the same values)
            score = round(cash * CASH_SCALE)
            if score < 1:
                score = 1
            score *= CASH_UNIT
            if hops:
                score += (hops if hops < MAX_HOPS else MAX_HOPS) * DEPTH_SCALE
            if depth > 0:
                score += depth if depth < MAX_DEPTH else MAX_DEPTH
            if credit:
                credit = round(credit * CASH_SCALE)
                credit = credit * CASH_UNIT if credit > 0 else 0
            else:  # none (0 or 0.0): its encoding is 0
                credit = 0
            queue.append(queued((url, fp, score, credit)))
            if depth == 0:  # a seed (redirects and links are one depth further): the operator vouches
                batch.seeded.add(key)
            if source is not None and source != host:
                source_key = source if key_mode == "host" else self._key(source)
                if source_key != key:
                    (redirects if hops else links).setdefault(source_key, {})[key] = partition
                    if source_trust is not None:
                        given[source_key] = source_trust
        for source, raw in linked:
            fact = facts.get(raw) or self._remember(raw)
            if type(fact) is str or source == fact[1]:
                continue
            key, partition = places.get(fact[1]) or self._place(fact[1])
            source_key = source if key_mode == "host" else self._key(source)
            if source_key != key:
                links.setdefault(source_key, {})[key] = partition
        for source_key, targets in redirects.items():  # a link between the same hosts wins
            plain = links.setdefault(source_key, {})
            for key, partition in targets.items():
                if key not in plain:
                    plain[key] = -1 - partition
        self._link_hosts(batches, links, given)
        return batches

    def _link_hosts(self, batches: dict[int, PartitionBatch], links: dict[str, dict[str, int]],
                    given: dict[str, float]) -> None:
        """Record the links between hosts: each target learns its linking hosts and the
        trust each hands on, each source its out-linked hosts.

        Host-level TrustRank (Gyöngyi, Garcia-Molina & Pedersen, VLDB 2004): a host hands
        ``trust_damping`` x its trust, split over the distinct hosts it links to (the most
        of those counted so far and those its pages link to in this call). A source's
        trust comes with its candidates, or from its lease taken by this store; unknown,
        it hands on nothing (its link still counts, untrusted, for the target's budget).

        Two links hand on no trust and count as untrusted linking hosts: a link between
        hosts of one registrable domain (its owner's own hosts vouch for each other no
        more than a host's pages do), and a redirect into another registrable domain (a
        doorway on a trusted host lends the target nothing). ``links`` marks a pair seen
        only through a redirect by a negative partition (``-1 - partition``).
        """
        prio = self.store.settings.priority
        damping, threshold = prio.trust_damping, prio.vouch_threshold
        parts = self.partitions
        for source_key, targets in links.items():
            known = self.store.leased_trust(source_key)
            trust = given.get(source_key, known[0] if known else None)
            domain = _domain_of(source_key)
            # out-linked hosts of other registrable domains only: the reciprocity of Wu &
            # Davison counts domains, and a domain's own hosts get no share of its trust
            foreign = {key for key in targets if _domain_of(key) != domain}
            out_degree = max(TRUST_SPLIT_MIN_HOSTS, len(foreign), known[1] if known else 0)
            # only a trusted host hands trust on (a farm cannot raise itself)
            share = damping * trust / out_degree if trust and trust >= threshold else 0.0
            trusted = None if trust is None else trust >= threshold
            unvouched = (0.0, None if trust is None else False)
            for key, partition in targets.items():
                given_here = (share, trusted)
                if partition < 0:  # only a redirect: trust within the domain only
                    partition = -1 - partition
                    targets[key] = partition
                    if _domain_of(key) != domain:
                        given_here = unvouched
                elif trusted and _domain_of(key) == domain:
                    given_here = unvouched
                batch = batches.get(partition)
                if batch is None:
                    batch = batches[partition] = PartitionBatch()
                linking = batch.sources.get(key)
                if linking is None:
                    batch.sources[key] = {source_key: given_here}
                else:
                    linking[source_key] = given_here
            p = partition_of(source_key, parts)
            batch = batches.get(p)
            if batch is None:
                batch = batches[p] = PartitionBatch()
            batch.out_links.setdefault(source_key, set()).update(foreign)

    def locate(self, raw: str) -> tuple[str, str] | None:
        """(politeness key, canonical URL) of an offered URL, None if it is refused; for
        the ip key, the host's address as resolved by an earlier admit."""
        fact = self._facts.get(raw) or self._remember(raw)
        if type(fact) is str:
            return None
        url, host, _ = fact
        return (self._places.get(host) or self._place(host))[0], url

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
        """(canonical URL, host, fingerprint) of an offered URL, or why it is refused.
        A sitemap keeps its kind mark (frontier/sitemaps.py)."""
        sitemap = split_sitemap(raw) if SITEMAP_MARK in raw else None
        try:
            url = canonicalize(sitemap[0] if sitemap else raw, max_length=self.max_length,
                               schemes=self.schemes)
        except UrlError as exc:
            return f"url_{exc.reason}"
        if sitemap is not None:
            return sitemap_url(url, sitemap[1]), host_of(url), fingerprint(fingerprint_form(url))
        # a canonical URL is scheme://authority/...: its host, remembered by its origin
        end = url.find("/", url.find("//") + 2)
        origin = url[:end] if end > 0 else url
        host = self._hosts.get(origin)
        if host is None:
            if len(self._hosts) >= HOST_CACHE_SIZE:
                self._hosts.clear()
            host = self._hosts[origin] = host_of(url)
        return url, host, fingerprint(url)

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
