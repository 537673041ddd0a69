"""One validated model for a crawl job, read from TOML, ``SLUICE_`` variables and flags.

Precedence, highest first: command-line flags (passed as keyword overrides), then
environment variables (``SLUICE_FETCH__USER_AGENT=...``, nested with ``__``), then the
TOML job file, then the defaults below. Every model is frozen. Defaults are polite;
where a default comes from a published source, the source is named beside it.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator,
)
from pydantic_settings import (
    BaseSettings,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
)

from frontier.exceptions import ConfigError


class _Part(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class ScopeSettings(_Part):
    """Which URLs belong to the crawl."""

    allow_hosts: tuple[str, ...] = Field(
        default=(), description="host patterns ('site.test', '*.site.test'); empty: the seeds' hosts"
    )
    allow_all_hosts: bool = Field(default=False, description="follow links to any host")
    include: tuple[str, ...] = Field(default=(), description="regexes; if any, a URL must match one")
    exclude: tuple[str, ...] = Field(default=(), description="regexes; a match excludes the URL")
    max_depth: int | None = Field(default=None, ge=0, description="link hops from a seed")
    max_url_length: int = Field(default=2048, ge=64, le=65536)
    schemes: tuple[str, ...] = ("http", "https")


class BudgetSettings(_Part):
    """Bounds on the crawl."""

    max_pages: int | None = Field(default=None, ge=1, description="pages fetched in all")
    max_pages_per_host: int | None = Field(
        default=5000, ge=1, description="URLs admitted per politeness key (a trap bound)"
    )


class PolitenessSettings(_Part):
    """When a host may be fetched again: now + max(crawl-delay, min delay, factor x response time)."""

    key: Literal["host", "domain", "ip"] = Field(
        default="host", description="what one politeness queue covers: a host, a registrable "
        "domain, or an IP address (hosts that resolve to one address share a queue)")
    min_delay_s: float = Field(default=1.0, ge=0.0, description="common practice, no source")
    # Najork & Heydon, "High-Performance Web Crawling", SRC Research Report 173 (2001):
    # wait a multiple (10x) of the time the last download from the host took.
    response_time_factor: float = Field(default=10.0, ge=0.0)
    max_delay_s: float = Field(default=120.0, ge=0.0, description="cap on the computed gap")
    crawl_delay_cap_s: float = Field(default=30.0, ge=0.0, description="robots crawl-delay cap")
    obey_robots: bool = True
    robots_ttl_s: float = Field(default=86400.0, gt=0, le=86400.0)  # RFC 9309 s.2.4: <= 24 h
    robots_error_ttl_s: float = Field(default=600.0, gt=0)
    retry_backoff_s: float = Field(default=30.0, ge=0.0, description="host pause after a retryable error")


class LeaseSettings(_Part):
    """How long a worker may hold a URL, and how often it may fail."""

    ttl_s: float = Field(default=120.0, gt=0)
    max_attempts: int = Field(default=3, ge=1)
    batch: int = Field(default=32, ge=1, le=1000)
    rank_spread: float = Field(
        default=2.0, ge=1.0, le=8.0,
        description="each partition is asked for this many times its fair share of a lease "
        "and the best hosts over all partitions are kept: 1.0 is cheapest (best-first within "
        "a partition only), 2.0 keeps importance order across partitions")


SINGLE_SERVER_PARTITIONS = 4
CLUSTER_PARTITIONS = 16


class StoreSettings(_Part):
    """The Redis layout: fixed when the job is created."""

    partitions: int | None = Field(
        default=None, ge=1, le=4096,
        description="none: chosen when the job is created, 4 on one Redis server (fewer script "
        "calls a lease and an admit), 16 on a Cluster (spread over its masters)")
    hot_capacity: int = Field(default=128, ge=8, le=4096, description="URLs per host kept sorted")
    expected_urls: int = Field(default=2_000_000, ge=1000, description="sizes the URL-seen buckets")
    seen_bucket_entries: int = Field(default=2048, ge=64, le=8192)


class RedisSettings(_Part):
    url: str | None = Field(default=None, description="none: start the embedded server")
    socket_timeout_s: float = Field(default=10.0, gt=0)
    wait_replicas: int = Field(
        default=0, ge=0, le=16, description="on a Cluster with replicas: an admit returns "
        "only once this many replicas of each master it wrote to have it (Redis WAIT), so a "
        "master's failover cannot lose links whose page is already done; 0: off")
    wait_timeout_ms: int = Field(default=1000, ge=1, le=60_000,
                                 description="longest wait for those replicas")


class FetchSettings(_Part):
    user_agent: str | None = Field(
        default=None, description="an honest User-Agent with a contact URL (required to crawl)"
    )
    concurrency: int = Field(default=32, ge=1, le=4096)
    connect_timeout_s: float = Field(default=10.0, gt=0)
    read_timeout_s: float = Field(default=20.0, gt=0)
    total_timeout_s: float = Field(default=60.0, gt=0)
    max_body_bytes: int = Field(default=10 * 1024 * 1024, ge=1024)
    max_decompressed_bytes: int = Field(default=20 * 1024 * 1024, ge=1024)
    max_header_bytes: int = Field(default=32 * 1024, ge=1024)
    archive_other_types: bool = Field(default=True, description="archive non-HTML bodies")
    map_hosts: tuple[str, ...] = Field(default=(), description="'*.test=127.0.0.1[:PORT]' entries")
    map_ports: tuple[Annotated[int, Field(ge=1, le=65535)], ...] = Field(
        default=(80, 443), description="ports a port-less map_hosts entry lets a URL keep")
    map_remote: bool = Field(
        default=False, description="allow map_hosts entries to non-loopback addresses (they "
        "send traffic wherever they point)")
    allow_private: bool = Field(default=False, description="allow non-global addresses (unsafe)")
    follow_nofollow: bool = False
    max_redirects: int = Field(default=10, ge=0, le=15, description="redirect hops per chain")
    max_links_per_page: int = Field(
        default=5000, ge=1, description="links kept from one page (the first ones, in order)")
    parse_timeout_s: float = Field(
        default=10.0, gt=0, description="a page whose processing takes longer ends as failed")
    offload_bytes: int = Field(
        default=512 * 1024, ge=0, description="pages larger than this are parsed, "
        "fingerprinted and archived off the event loop")
    stop_grace_s: float = Field(
        default=10.0, ge=0, description="after the first stop signal, time to finish "
        "in-flight fetches before handing them back")

    @field_validator("user_agent")
    @classmethod
    def _honest(cls, value: str | None) -> str | None:
        if value is not None and not any(m in value for m in ("http://", "https://", "@")):
            raise ValueError("must carry a contact URL or e-mail, e.g. 'name/1.0 (+https://you.test/)'")
        return value


class PrioritySettings(_Part):
    """Importance estimation (OPIC, Abiteboul, Preda & Cobena, WWW 2003) and its defences.

    Per-host budgets grow with the number of other hosts linking in (Lee, Leonard, Wang
    & Loguinov, "IRLbot", WWW 2008). docs/priority.md describes every knob.
    """

    seed_cash: float = Field(default=1.0, gt=0, description="cash of each seed")
    # PageRank's damping (Page, Brin et al. 1998: alpha = 0.85, so 0.15 jumps)
    jump_share: float = Field(default=0.15, ge=0, lt=1, description="cash to the random-jump pool")
    jump_floor: float = Field(
        default=1e-5, ge=0, description="cash each new URL gets from the random-jump pool"
    )
    cross_host_weight: float = Field(
        default=4.0, ge=1, description="a link to another host counts this much more"
    )
    host_budget_base: int = Field(
        default=20, ge=0, description="URLs a host may get with no other host linking in (0: no earned budget)"
    )
    host_budget_per_linking_host: int = Field(
        default=25, ge=0, description="more URLs per distinct other host linking in"
    )
    trap_depth: int = Field(default=8, ge=1, description="path segments beyond which a URL is penalised")
    trap_length: int = Field(default=200, ge=16, description="URL length beyond which a URL is penalised")
    trap_penalty: float = Field(default=0.05, gt=0, le=1, description="cash factor per trap sign")
    # link spam (docs/priority.md "Link spam"): host trust from the seeds (TrustRank,
    # Gyöngyi, Garcia-Molina & Pedersen, VLDB 2004), reciprocal links (Wu & Davison, WWW 2005)
    trust_damping: float = Field(
        default=0.85, gt=0, le=1, description="share of a host's trust its out-links hand on (TrustRank's beta)"
    )
    trust_threshold: float = Field(
        default=0.25, gt=0, le=1, description="trust below which a host is untrusted: crawled slowly, "
        "a suspect if it also has reciprocal links, and its links earn less budget"
    )
    vouch_threshold: float = Field(
        default=0.05, gt=0, le=1, description="trust from which a host's links hand trust on and "
        "count as trusted for the budgets and the reciprocal-link test"
    )
    reciprocal_hosts: int = Field(
        default=3, ge=1, description="hosts that both link to and are linked from an untrusted host "
        "that make it a link-spam suspect"
    )
    reciprocal_ratio: float = Field(
        default=3.0, ge=0, description="an untrusted host is a suspect when its reciprocal hosts "
        "outnumber this many times its trusted one-way linking hosts"
    )
    host_budget_per_untrusted_host: int = Field(
        default=5, ge=0, description="more URLs per distinct untrusted host linking in"
    )
    suspect_penalty: float = Field(
        default=0.001, gt=0, le=1, description="priority factor of a suspect (and the floor for untrusted hosts)"
    )
    suspect_delay_s: float = Field(
        default=30.0, ge=0, description="at least this long between fetches of a link-spam suspect"
    )
    untrusted_delay_s: float = Field(
        default=5.0, ge=0, description="at least this long between fetches of an untrusted host"
    )
    probation_s: float = Field(
        default=30.0, ge=0, description="a host found through links waits this long for its first "
        "fetch unless trusted hosts vouch for it meanwhile (0: no probation)"
    )
    probation_linking_hosts: int = Field(
        default=3, ge=1, description="distinct trusted hosts linking to a new host that end its "
        "probation"
    )
    endorse_hosts: int = Field(
        default=4, ge=0, description="distinct trusted hosts linking one-way (not linked back) to an "
        "untrusted host that endorse it: it is ranked and paced as a trusted host (0: none)"
    )


class DedupeSettings(_Part):
    """Duplicates: mirror hosts (docs/duplicates.md). A host whose fetched pages are mostly
    copies (exact or near) of other hosts' pages is a mirror (Bharat, Broder, Dean &
    Henzinger, JASIS 2000); its budget is cut to the new pages it has shown plus a slack."""

    mirror_min_pages: int = Field(
        default=10, ge=0, description="pages of a host compared before it may be called a "
        "mirror (0: mirror hosts are neither found nor cut); common practice, no source")
    mirror_share: float = Field(
        default=0.6, gt=0, le=1, description="share of those pages that copy another host's "
        "pages from which the host is a mirror; common practice, no source")
    mirror_slack: int = Field(
        default=5, ge=1, description="URLs a mirror host may hold beyond the new (not copied) "
        "pages it has shown")


class RevisitSettings(_Part):
    """Continuous crawling (docs/revisits.md): a fetched page goes back to its host's queue
    after an interval set by its estimated change rate (Cho & Garcia-Molina, ACM TOIT
    2003) and the optimal-freshness allocation of the host's revisit budget (Cho &
    Garcia-Molina, ACM TODS 2003), kept between the two bounds below."""

    enabled: bool = Field(default=False, description="revisit fetched pages (the crawl "
                          "then runs until stopped or its page budget is spent)")
    min_interval_s: float = Field(
        default=3600.0, gt=0, allow_inf_nan=False,
        description="shortest time between two fetches of one page; common practice, no source")
    max_interval_s: float = Field(
        default=30 * 86400.0, gt=0, allow_inf_nan=False,
        description="longest time between two fetches of one page; common practice, no source")
    host_fetches_per_day: float = Field(
        default=2880.0, gt=0, allow_inf_nan=False,
        description="the host's share of the revisit budget: revisits a day spread over its "
        "pages (politeness still applies); common practice, no source")

    @field_validator("max_interval_s")
    @classmethod
    def _ordered(cls, value: float, info: Any) -> float:
        low = info.data.get("min_interval_s")
        if low is not None and value < low:
            raise ValueError(f"must be at least min_interval_s ({low:g}), got {value:g}")
        return value


class SitemapSettings(_Part):
    """Sitemaps (sitemaps.org protocol 0.9; docs/sitemaps.md): read from robots.txt
    ``Sitemap:`` lines and from ``urls``; their URLs admitted with a priority of their own."""

    enabled: bool = Field(default=True, description="read robots.txt Sitemap: lines")
    urls: tuple[str, ...] = Field(default=(), description="sitemaps the operator names")
    max_index_depth: int = Field(
        default=2, ge=0, le=8, description="index files below a named sitemap followed "
        "(0: none); common practice, no source")
    # sitemaps.org protocol 0.9: a file holds at most 50,000 URLs and 50 MB uncompressed
    max_bytes: int = Field(default=50 * 1024 * 1024, ge=1024, le=50 * 1024 * 1024)
    max_urls: int = Field(default=50_000, ge=1, le=50_000)
    max_per_host: int = Field(
        default=100, ge=1, description="sitemaps admitted per host; common practice, no source")
    robots_cash: float = Field(
        default=0.1, gt=0, description="cash of a sitemap named in robots.txt")
    url_cash: float = Field(
        default=0.001, ge=0, description="cash each listed URL gets on top of its share "
        "(docs/priority.md, Sitemaps)")

    @field_validator("urls")
    @classmethod
    def _absolute(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        from frontier.exceptions import UrlError
        from frontier.urls import canonicalize
        for url in value:
            try:
                canonicalize(url.partition("#")[0])
            except UrlError as exc:
                raise ValueError(f"{url[:200]!r} is not an http(s) URL: {exc}") from exc
        return value


class OutputSettings(_Part):
    warc_max_bytes: int = Field(default=1_000_000_000, ge=1_000_000)
    warc_prefix: str = "sluice"


class FocusSettings(_Part):
    """Topic focus (docs/focus.md): the subject by example pages and/or weighted terms.

    Relevance: multinomial naive Bayes over hashed words (Manning, Raghavan & Schütze,
    IIR ch. 13) and/or BM25 (Robertson & Zaragoza 2009); a page's links get their cash
    times its relevance (soft focus, Chakrabarti, van den Berg & Dom, WWW 1999)."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    examples: tuple[Path, ...] = Field(
        default=(), max_length=1000, description="files of pages about the subject (HTML or "
        "text), read by every process at start; needs background pages")
    background: tuple[Path, ...] = Field(
        default=(), max_length=1000, description="files of pages not about the subject (naive "
        "Bayes's other class; BM25's IDF and average length)")
    terms: dict[str, float] = Field(
        default_factory=dict, max_length=10_000,
        description="subject words and their weights (> 0), scored by BM25")
    threshold: float = Field(
        default=0.5, ge=0, le=1, description="relevance below which a page is off topic: "
        "archived, its links' cash times off_topic_factor")
    off_topic_factor: float = Field(
        default=0.01, ge=0, le=1, description="cash factor of an off-topic page's links (0: its "
        "links are not followed)")
    evidence_words: int = Field(
        default=50, ge=1, le=1_000_000, description="a page counts as at most this many words "
        "of naive-Bayes evidence (our rule against NB's overconfidence on long pages)")
    hash_bits: int = Field(default=18, ge=8, le=24, description="2**bits word buckets (mmh3)")
    bm25_k1: float = Field(default=1.2, ge=0, le=100, description="BM25 term-frequency "
                           "saturation (Robertson & Zaragoza 2009: 1.2 typical)")
    bm25_b: float = Field(default=0.75, ge=0, le=1, description="BM25 length normalisation "
                          "(0.75 typical)")
    terms_avg_words: float = Field(
        default=300.0, gt=0, le=1e7, description="BM25 average page length without background "
        "pages (common practice, no source)")
    terms_half_score: float = Field(
        default=1.0, gt=0, le=1e6, description="BM25 score at which the terms' relevance is "
        "one half")

    @field_validator("terms")
    @classmethod
    def _words(cls, value: dict[str, float]) -> dict[str, float]:
        from frontier.focus import is_word

        out: dict[str, float] = {}
        for term, weight in value.items():
            word = term.strip().casefold()
            if not is_word(word):
                raise ValueError(f"term {term!r} is not one word of two or more letters "
                                 "(phrases, digits and punctuation are not matched)")
            if not (math.isfinite(weight) and weight > 0):
                raise ValueError(f"term {term!r}: weight {weight!r} must be a finite number "
                                 "above 0")
            if word in out:
                raise ValueError(f"term {term!r} is given twice (words are matched "
                                 "case-folded)")
            out[word] = weight
        return out

    @model_validator(mode="after")
    def _subject(self) -> FocusSettings:
        if not self.examples and not self.terms:
            raise ValueError("[focus] needs examples (files of pages about the subject, with "
                             "background files) or terms (word = weight); remove [focus] to "
                             "order by link importance alone")
        if self.examples and not self.background:
            raise ValueError("focus.examples need focus.background: files of pages not about "
                             "the subject, which the model learns the subject's words against")
        return self


class AdminSettings(_Part):
    """The admin HTTP API. Its token is never stored with the job: it comes from the
    ``SLUICE_ADMIN_TOKEN`` variable or the file named here."""

    token_file: Path | None = Field(
        default=None, description="file holding the admin token (one line); without it and "
        "without SLUICE_ADMIN_TOKEN, a loopback API makes one in the state folder")
    allowed_hosts: tuple[str, ...] = Field(
        default=(), description="names the API answers to in the Host header, besides its "
        "own address and localhost (a guard against DNS rebinding)")


class JobSettings(BaseSettings):
    """A crawl job: everything a daemon and its workers need to agree on."""

    model_config = SettingsConfigDict(
        env_prefix="SLUICE_", env_nested_delimiter="__", frozen=True, extra="forbid"
    )

    name: str = Field(default="crawl", pattern=r"^[A-Za-z0-9_.-]{1,64}$")
    seeds: tuple[str, ...] = ()
    state_dir: Path = Path(".sluice")
    scope: ScopeSettings = ScopeSettings()
    budget: BudgetSettings = BudgetSettings()
    politeness: PolitenessSettings = PolitenessSettings()
    lease: LeaseSettings = LeaseSettings()
    store: StoreSettings = StoreSettings()
    redis: RedisSettings = RedisSettings()
    fetch: FetchSettings = FetchSettings()
    priority: PrioritySettings = PrioritySettings()
    dedupe: DedupeSettings = DedupeSettings()
    revisit: RevisitSettings = RevisitSettings()
    sitemaps: SitemapSettings = SitemapSettings()
    output: OutputSettings = OutputSettings()
    admin: AdminSettings = AdminSettings()
    focus: FocusSettings | None = None  # no [focus]: link importance alone

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        return (init_settings, env_settings)

    def laid_out(self, *, cluster: bool, partitions: int | None = None) -> JobSettings:
        """These settings with the partition count decided: as set, else ``partitions``
        (an existing job's), else the default for one server or a Cluster."""
        if self.store.partitions is not None:
            return self
        count = partitions or (CLUSTER_PARTITIONS if cluster else SINGLE_SERVER_PARTITIONS)
        return self.model_copy(update={"store": self.store.model_copy(update={"partitions": count})})

    def public_dict(self) -> dict[str, Any]:
        """The settings as JSON-ready data (stored with the job in Redis). The Redis URL's
        password is not kept: every process connects with its own URL."""
        data = self.model_dump(mode="json")
        if self.redis.url:
            from frontier.redis_client import redacted
            data["redis"]["url"] = redacted(self.redis.url)
        return data


def _merge(base: dict[str, Any], over: dict[str, Any]) -> dict[str, Any]:
    out = dict(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = value
    return out


def _explain(error: ValidationError, origin: str) -> ConfigError:
    lines = []
    for item in error.errors():
        key = ".".join(str(p) for p in item["loc"]) or "(top)"
        lines.append(f"{key}: {item['msg']}")
    return ConfigError(f"invalid settings ({origin}): " + "; ".join(lines))


def load_settings(
    config_file: Path | None = None, overrides: dict[str, Any] | None = None
) -> JobSettings:
    """Build the job settings: flags (``overrides``) > ``SLUICE_`` env > TOML file > defaults."""
    file_data: dict[str, Any] = {}
    origin = "defaults"
    if config_file is not None:
        origin = str(config_file)
        try:
            file_data = tomllib.loads(Path(config_file).read_text(encoding="utf-8"))
        except FileNotFoundError as exc:
            raise ConfigError(f"{config_file}: no such job file") from exc
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"{config_file}: not valid TOML: {exc}") from exc
        except UnicodeDecodeError as exc:  # TOML v1.0.0: "a TOML file must be ... UTF-8"
            raise ConfigError(f"{config_file}: not UTF-8 text at byte {exc.start} (a TOML "
                              "file is UTF-8)") from exc
    try:
        env_only = JobSettings()  # reads SLUICE_ variables over defaults
        env_set = env_only.model_dump(exclude_unset=True)
    except ValidationError as exc:
        raise _explain(exc, "environment") from exc
    data = _merge(_merge(file_data, env_set), overrides or {})
    try:
        return JobSettings.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, origin) from exc


def settings_from_dict(data: dict[str, Any]) -> JobSettings:
    """Rebuild settings stored with a job (no environment read)."""
    try:
        return JobSettings.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, "stored job") from exc
