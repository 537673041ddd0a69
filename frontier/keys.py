"""The one place that builds Redis keys.

A job ``J`` has ``P`` partitions. Every key of partition ``p`` carries the hash tag
``{J.p}``, so a Lua script that touches one partition touches one Cluster slot. Job-wide
keys carry ``{J}``. Nobody else concatenates key strings.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import mmh3

PREFIX = "sluice"


def partition_of(politeness_key: str, partitions: int) -> int:
    """The partition of a politeness key (a host, or a registered domain)."""
    return mmh3.hash(politeness_key, signed=False) % partitions


class PartitionKeys:
    """Keys of one partition; per-host keys are methods taking the politeness key."""

    __slots__ = ("job", "index", "tag")

    def __init__(self, job: str, index: int) -> None:
        self.job = job
        self.index = index
        self.tag = f"{PREFIX}:{{{job}.{index}}}"

    # fixed keys, one each per partition
    @property
    def counts(self) -> str:
        """HASH state -> count (admitted, queued, leased, fetched, failed, excluded, dead)."""
        return f"{self.tag}:counts"

    @property
    def reasons(self) -> str:
        """HASH 'outcome:reason' -> count."""
        return f"{self.tag}:reasons"

    @property
    def due(self) -> str:
        """ZSET host -> earliest next fetch (ms)."""
        return f"{self.tag}:due"

    @property
    def ready(self) -> str:
        """ZSET host -> priority of its best URL times its boost."""
        return f"{self.tag}:ready"

    @property
    def prio(self) -> str:
        """HASH host -> its current priority (read when a due host becomes ready)."""
        return f"{self.tag}:prio"

    @property
    def claims(self) -> str:
        """ZSET host -> claim expiry (ms): hosts an older version picked and had not leased
        yet (lease_pick.lua puts them back in due; nothing writes claims any more)."""
        return f"{self.tag}:claims"

    @property
    def touched(self) -> str:
        """SET of leased hosts whose queue, standing or controls changed while leased: their
        completion reads them afresh instead of trusting what the lease carried."""
        return f"{self.tag}:touched"

    @property
    def leases(self) -> str:
        """ZSET 'id\\nhost\\nscore\\nattempts\\nurl' -> expiry (ms): the leases held."""
        return f"{self.tag}:leases"

    @property
    def attempts(self) -> str:
        """HASH url -> failed attempts so far (only URLs that failed once)."""
        return f"{self.tag}:attempts"

    @property
    def dead(self) -> str:
        """HASH url -> last error, for URLs past the attempt limit."""
        return f"{self.tag}:dead"

    @property
    def hosts(self) -> str:
        """SET of the politeness keys known in this partition."""
        return f"{self.tag}:hosts"

    @property
    def ended(self) -> str:
        """LIST of 'outcome reason url': URLs that reached a final state outside a worker's
        own completion (excluded on admission, dead, dropped with a blocked host), waiting
        for a worker to write them to its fetch log."""
        return f"{self.tag}:ended"

    def seen(self, bucket: int) -> str:
        """SET of 64-bit URL fingerprints (intset encoded: ~8 bytes each)."""
        return f"{self.tag}:seen:{bucket}"

    # per-host keys
    def host(self, host: str) -> str:
        """HASH of one politeness key: state, boost, delays, next fetch, lease, counters."""
        return f"{self.tag}:host:{host}"

    def hot(self, host: str) -> str:
        """ZSET url -> score: the host's best queued URLs (listpack encoded)."""
        return f"{self.tag}:hot:{host}"

    def cold(self, host: str) -> str:
        """LIST of 'score url': queued URLs beyond the hot window, in arrival order."""
        return f"{self.tag}:cold:{host}"

    def robots(self, host: str) -> str:
        """HASH: the shared robots.txt cache entry of one scheme://host:port."""
        return f"{self.tag}:robots:{host}"

    def robots_lock(self, host: str) -> str:
        return f"{self.tag}:robots-lock:{host}"

    def linking_hosts(self, host: str) -> str:
        """HyperLogLog of the other hosts that link to this host (budget growth)."""
        return f"{self.tag}:in-hosts:{host}"

    def copies(self, host: str) -> str:
        """HASH of one politeness key's duplicate counters: 'pages' compared, 'dups' that
        copy another host's page, and '>' + other host -> copies of that host's pages."""
        return f"{self.tag}:copies:{host}"

    @property
    def mirrors(self) -> str:
        """SET of this partition's politeness keys found to be mirror hosts."""
        return f"{self.tag}:mirrors"

    @property
    def controlled(self) -> str:
        """SET of this partition's politeness keys under operator control: paused, blocked,
        boosted or delayed (kept by the control script)."""
        return f"{self.tag}:controlled"

    @property
    def revisits(self) -> str:
        """ZSET 'host url' -> when the page is due again (ms): the revisit schedule."""
        return f"{self.tag}:revisits"

    def revisit_state(self, host: str) -> str:
        """HASH url -> packed revisit state of one politeness key's fetched pages
        (visits, changes, times, validators, digest; frontier/revisit.py)."""
        return f"{self.tag}:rv:{host}"

    def held_hot(self, host: str) -> str:
        """ZSET: a blocked host's hot window, set aside until it is unblocked."""
        return f"{self.tag}:held-hot:{host}"

    def held_cold(self, host: str) -> str:
        """LIST: a blocked host's cold list, set aside until it is unblocked."""
        return f"{self.tag}:held-cold:{host}"

    def out_hosts(self, host: str) -> str:
        """HyperLogLog of the other hosts this host's fetched pages link to (reciprocal
        links: Wu & Davison, WWW 2005)."""
        return f"{self.tag}:out-hosts:{host}"

    def trusted_hosts(self, host: str) -> str:
        """HyperLogLog of the trusted hosts that link to this host (budget growth by the
        reputation of the linking hosts)."""
        return f"{self.tag}:trusted-in:{host}"


@dataclass(frozen=True)
class Keys:
    """All keys of one job."""

    job: str
    partitions: int

    @cached_property
    def parts(self) -> tuple[PartitionKeys, ...]:
        return tuple(PartitionKeys(self.job, p) for p in range(self.partitions))

    def part(self, index: int) -> PartitionKeys:
        return self.parts[index]

    def part_for(self, politeness_key: str) -> PartitionKeys:
        return self.parts[partition_of(politeness_key, self.partitions)]

    @property
    def tag(self) -> str:
        return f"{PREFIX}:{{{self.job}}}"

    @property
    def settings(self) -> str:
        """STRING: the job's settings as JSON (written by the daemon, read by workers)."""
        return f"{self.tag}:settings"

    @property
    def budget(self) -> str:
        """HASH: 'used' = pages fetched + in flight, against the job's page budget."""
        return f"{self.tag}:budget"

    @property
    def control(self) -> str:
        """HASH: job-wide flags (paused, stopping)."""
        return f"{self.tag}:control"

    def near_dup(self, block: int, value: int) -> str:
        """SET of SimHash fingerprints sharing one block value (Manku et al. 2007)."""
        return f"{PREFIX}:{{{self.job}.nd{block}.{value >> 8}}}:nd:{block}:{value}"

    def near_dup_page(self, fingerprint: int) -> str:
        """HASH SimHash fingerprint -> URL of the page first stored with it (one of 256
        shards): a page fetched again is not taken for a near-duplicate of itself, and a
        near-duplicate can name what it matched."""
        return f"{PREFIX}:{{{self.job}.ndp{fingerprint & 0xff}}}:ndp"

    @staticmethod
    def job_index() -> str:
        """SET of job names, for listing."""
        return f"{PREFIX}:jobs"

    @property
    def workers(self) -> str:
        """ZSET worker id -> last heartbeat (ms): the index of the workers' heartbeats."""
        return f"{self.tag}:workers"

    def worker(self, worker_id: str) -> str:
        """STRING: one worker's heartbeat as JSON (host, pid, pages...), set to expire."""
        return f"{self.tag}:worker:{worker_id}"

    def sitemaps_of(self, host: str) -> str:
        """SET of the sitemap URLs admitted on one host (at most sitemaps.max_per_host)."""
        return f"{self.tag}:sitemaps:{host}"

    @property
    def robots_outcomes(self) -> str:
        """HASH robots.txt policy (rules, allow_all, disallow_all) -> fetches."""
        return f"{self.tag}:robots-outcomes"

    @property
    def robots_failures(self) -> str:
        """LIST of JSON: the latest robots.txt fetches that ended in 'disallow all' (newest
        first)."""
        return f"{self.tag}:robots-failures"

    def payload_digests(self, digest: str) -> str:
        """HASH payload digest -> 'WARC-Date record-ID URL' of the first capture with that
        payload (one of 256 shards): later copies are written as revisit records."""
        return f"{PREFIX}:{{{self.job}.pd{mmh3.hash(digest, signed=False) & 0xff}}}:pd"
