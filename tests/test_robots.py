"""robots.txt policy (RFC 9309) and its shared Redis cache.

The cache tests run against a redis-server this module starts on a free loopback port
(never 6379) in a temporary folder; fetches are counted stubs, and time is a clock the
tests move by hand.
"""

from __future__ import annotations

import asyncio
import socket
import subprocess
import time
import zlib
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import pytest
import redis
import redis.asyncio as aioredis
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.exceptions import ConfigError, FetchError, StoreUnavailable
from frontier.robots import MIN_PARSE_BYTES, RobotsCache, RobotsFetchResult, robots_url
from frontier.robots_rules import DEFAULT_MAX_BYTES, RobotsRules, product_token

LOOPBACK = "127.0.0.1"
REDIS_DEFAULT_PORT = 6379
REDIS_START_TIMEOUT_S = 10.0
REDIS_POLL_S = 0.02
UA = "sluice/0.1 (+https://ops.example.test/contact)"
ORIGIN = "http://site.test:8401"
DAY_S = 86400.0
ERROR_TTL_S = 600.0


def rules(body: str | bytes, user_agent: str = UA, status: int = 200, **kwargs: int) -> RobotsRules:
    raw = body.encode() if isinstance(body, str) else body
    return RobotsRules.from_entry(status, raw, user_agent=user_agent, **kwargs)


def url(path: str) -> str:
    return ORIGIN + path


# --------------------------------------------------------------------------- product token


def test_product_token() -> None:
    # RFC 9309 s.2.2.1: the product token is the first part of the User-Agent
    # (RFC 9110 s.10.1.5 product = token ["/" product-version]).
    assert product_token(UA) == "sluice"
    assert product_token("foo-bot_x/2.0") == "foo-bot_x"
    with pytest.raises(ConfigError):
        product_token("/1.0 nothing")


# --------------------------------------------------------------------------- RFC 9309 s.5

# RFC 9309 s.5.1 "Simple Example" (text checked against a copy of the RFC).
RFC9309_5_1 = """\
User-Agent: *
Disallow: *.gif$
Disallow: /example/
Allow: /publications/

User-Agent: foobot
Disallow:/
Allow:/example/page.html
Allow:/example/allowed.gif

User-Agent: barbot
User-Agent: bazbot
Disallow: /example/page.html

User-Agent: quxbot

EOF
"""


def test_rfc9309_5_1_any_crawler() -> None:
    # RFC 9309 s.5.1: the "*" group applies to crawlers without a group of their own.
    policy = rules(RFC9309_5_1, "otherbot/1.0")
    assert policy.allowed(url("/publications/"))
    assert policy.allowed(url("/publications/2022/paper.html"))
    assert not policy.allowed(url("/example/"))
    assert not policy.allowed(url("/example/page.html"))
    assert not policy.allowed(url("/images/photo.gif"))
    assert policy.allowed(url("/images/photo.gif.html"))  # "$" anchors the end (s.2.2.3)
    assert policy.allowed(url("/"))


def test_rfc9309_5_1_foobot() -> None:
    # RFC 9309 s.5.1: foobot may fetch only /example/page.html and /example/allowed.gif.
    policy = rules(RFC9309_5_1, "foobot/2.1")
    assert policy.allowed(url("/example/page.html"))
    assert policy.allowed(url("/example/allowed.gif"))
    assert not policy.allowed(url("/"))
    assert not policy.allowed(url("/example/other.html"))
    assert not policy.allowed(url("/publications/"))  # the "*" group does not apply


def test_rfc9309_5_1_barbot_and_bazbot() -> None:
    # RFC 9309 s.5.1 (and s.2.1: several user-agent lines open one group).
    for agent in ("barbot", "bazbot"):
        policy = rules(RFC9309_5_1, f"{agent}/1.0")
        assert not policy.allowed(url("/example/page.html"))
        assert policy.allowed(url("/example/other.html"))  # "*" rules do not apply
        assert policy.allowed(url("/images/photo.gif"))


def test_rfc9309_5_1_quxbot_is_unrestricted() -> None:
    # RFC 9309 s.5.1: quxbot's group is empty, so nothing is disallowed.
    policy = rules(RFC9309_5_1, "quxbot")
    for path in ("/", "/example/", "/example/page.html", "/images/photo.gif"):
        assert policy.allowed(url(path))


def test_rfc9309_5_2_longest_match() -> None:
    # RFC 9309 s.5.2 "Longest Match" example.
    body = "User-Agent: foobot\nAllow: /example/page/\nDisallow: /example/page/disallowed.gif\n"
    policy = rules(body, "foobot")
    assert not policy.allowed(url("/example/page/disallowed.gif"))
    assert policy.allowed(url("/example/page/"))
    assert policy.allowed(url("/example/page/allowed.gif"))


# --------------------------------------------------------------------------- RFC 9309 s.2.2


def test_product_token_matches_case_insensitively() -> None:
    # RFC 9309 s.2.2.1: crawlers MUST match the product token case-insensitively.
    body = "User-agent: FooBot\nDisallow: /private\n"
    for agent in ("foobot/1.0", "FOOBOT", "fOoBoT/2 (+https://ops.example.test/)"):
        assert not rules(body, agent).allowed(url("/private/x"))
        assert rules(body, agent).allowed(url("/public"))


def test_group_name_must_equal_the_product_token() -> None:
    # RFC 9309 s.2.2.1: the group that *matches the product token*; a group named "foo"
    # is not foobot's group (protego alone would apply it), so the "*" group applies.
    body = "User-agent: foo\nDisallow: /\n\nUser-agent: *\nDisallow: /star-only\n"
    policy = rules(body, "foobot/1.0")
    assert policy.allowed(url("/page"))
    assert not policy.allowed(url("/star-only"))
    assert not rules(body, "foo/1.0").allowed(url("/page"))


def test_no_matching_group_and_no_star_allows_all() -> None:
    # RFC 9309 s.2.2.1: no matching group and no "*" group -> no rules apply.
    assert rules("User-agent: otherbot\nDisallow: /\n").allowed(url("/page"))


def test_longest_match_wins() -> None:
    # RFC 9309 s.2.2.2: the most specific (longest) matching rule is used.
    body = "User-agent: *\nDisallow: /\nAllow: /p\nDisallow: /folder/page\nAllow: /folder\n"
    policy = rules(body)
    assert policy.allowed(url("/page"))
    assert not policy.allowed(url("/other"))
    assert policy.allowed(url("/folder/other"))
    assert not policy.allowed(url("/folder/page.html"))


def test_allow_wins_a_tie() -> None:
    # RFC 9309 s.2.2.2: if an allow and a disallow rule are equivalent, allow SHOULD win.
    for body in (
        "User-agent: *\nDisallow: /page\nAllow: /page\n",
        "User-agent: *\nAllow: /page\nDisallow: /page\n",
    ):
        assert rules(body).allowed(url("/page"))


# RFC 9309 s.2.2.2 percent-encoding table, as (rule path, URL path) pairs that must
# match in both spellings [memory: the table rows as remembered].
PERCENT_EQUIVALENT = [
    ("/foo/bar?baz=https://foo.bar", "/foo/bar?baz=https%3A%2F%2Ffoo.bar"),
    ("/foo/bar/\u30c4", "/foo/bar/%E3%83%84"),
    ("/foo/bar/%62%61%7A", "/foo/bar/baz"),
]


@pytest.mark.parametrize(("one", "other"), PERCENT_EQUIVALENT)
def test_percent_encoding_equivalences(one: str, other: str) -> None:
    for rule_path, url_path in ((one, other), (other, one), (one, one), (other, other)):
        policy = rules(f"User-agent: *\nDisallow: {rule_path}\n")
        assert not policy.allowed(url(url_path)), (rule_path, url_path)
        assert policy.allowed(url("/foo/bar/qux"))


def test_encoded_slash_in_the_path_stays_distinct() -> None:
    # RFC 3986 s.2.2: "/" and "%2F" differ in a path; only the query rows of the
    # RFC 9309 s.2.2.2 table make them equal, so the path is left alone.
    policy = rules("User-agent: *\nDisallow: /a%2Fb\n")
    assert policy.allowed(url("/a/b"))
    assert not policy.allowed(url("/a%2Fb"))


def test_robots_txt_itself_is_always_allowed() -> None:
    # RFC 9309 s.2.2.2: "The /robots.txt URI is implicitly allowed."
    assert rules("User-agent: *\nDisallow: /\n").allowed(url("/robots.txt"))
    assert RobotsRules.from_entry(503, b"", user_agent=UA).allowed(url("/robots.txt"))
    assert RobotsRules.from_entry(None, b"", user_agent=UA).allowed(url("/robots.txt"))


# --------------------------------------------------------------------------- status codes


@pytest.mark.parametrize("status", [400, 401, 403, 404, 410])
def test_4xx_allows_all(status: int) -> None:
    # RFC 9309 s.2.3.1.3: "unavailable" status -> the crawler MAY access any resource.
    policy = RobotsRules.from_entry(status, b"User-agent: *\nDisallow: /\n", user_agent=UA)
    assert policy.state == "allow_all"
    assert policy.allowed(url("/anything"))


@pytest.mark.parametrize("status", [500, 502, 503, None])
def test_5xx_and_unreachable_disallow_all(status: int | None) -> None:
    # RFC 9309 s.2.3.1.4: server error or unreachable -> MUST assume complete disallow.
    policy = RobotsRules.from_entry(status, b"", user_agent=UA)
    assert policy.state == "disallow_all"
    assert not policy.allowed(url("/anything"))
    assert policy.crawl_delay() is None


def test_429_disallows_all() -> None:
    # common practice, no source: a rate-limited robots.txt is not "unavailable".
    assert not RobotsRules.from_entry(429, b"", user_agent=UA).allowed(url("/x"))


# --------------------------------------------------------------------------- bodies


def test_garbage_and_binary_lines_are_skipped() -> None:
    # RFC 9309 s.2.2: lines that do not parse are ignored; the rest still apply.
    body = (
        b"\x89PNG\r\n\x1a\n\x00\x00\xff\xfe\xfd garbage\n"
        b"User-agent: *\n"
        b"\xc3\x28 not utf-8\n"
        b"Disallow: /private\n"
        b"<html><body>oops</body></html>\n"
    )
    policy = rules(body)
    assert not policy.allowed(url("/private/page"))
    assert policy.allowed(url("/public"))


@settings(max_examples=100, deadline=None)
@given(body=st.binary(max_size=2048), path=st.text(max_size=40))
def test_any_body_parses_without_raising(body: bytes, path: str) -> None:
    # RFC 9309 s.2.2: parse what parses; an arbitrary body must not stop the crawl.
    # s.2.2.2: only a disallow rule can forbid a path, and /robots.txt is always allowed.
    policy = rules(body)
    verdict = policy.allowed(url("/" + path))
    if b"disallow" not in body.lower():
        assert verdict is True
    assert policy.allowed(url("/robots.txt"))


def test_dollar_only_ends_a_pattern() -> None:
    # RFC 9309 s.2.2.3: "$" designates the end of the pattern; a "$" in the URL is an
    # ordinary character, which a pattern names as "%24".
    policy = rules("User-agent: *\nDisallow: /a$\nDisallow: /b%24\n")
    assert not policy.allowed(url("/a"))
    assert policy.allowed(url("/a$b"))
    assert policy.allowed(url("/ab"))
    assert not policy.allowed(url("/b$"))
    assert not policy.allowed(url("/b%24x"))
    assert rules("User-agent: *\nDisallow: /$\n").allowed(url("/$"))


def test_star_in_a_url_is_an_ordinary_character() -> None:
    # RFC 9309 s.2.2.3: a literal "*" is written "%2A" in a pattern; in the URL it is
    # an ordinary character that a pattern's "*" matches like any other.
    policy = rules("User-agent: *\nDisallow: /file-%2A.html\n")
    assert not policy.allowed(url("/file-*.html"))
    assert policy.allowed(url("/file-x.html"))


def test_only_the_rules_written_apply() -> None:
    # RFC 9309 s.2.2.2: "Allow: /a/index.html" matches that path and nothing else; the
    # longer "Disallow: /a/" still covers "/a/" itself.
    policy = rules("User-agent: *\nDisallow: /a/\nAllow: /a/index.html\n")
    assert not policy.allowed(url("/a/"))
    assert policy.allowed(url("/a/index.html"))


def test_field_names_are_ascii() -> None:
    # RFC 9309 s.2.2: the field names are ASCII words (matched case-insensitively);
    # "di\u017fallow" (LONG S) is not "disallow", though Unicode case folding says so.
    assert rules("User-agent: *\nDi\u017fallow: /\n").allowed(url("/x"))
    assert not rules("User-agent: *\nDISALLOW: /\n").allowed(url("/x"))


def test_default_parse_limit_meets_rfc_minimum() -> None:
    # RFC 9309 s.2.5: the parsing limit MUST be at least 500 KiB.
    assert DEFAULT_MAX_BYTES >= MIN_PARSE_BYTES == 500 * 1024


def test_a_line_cut_by_the_limit_is_dropped() -> None:
    # common practice, no source: "Allow: /abcdef" cut to "Allow: /a" would allow more.
    body = "User-agent: *\nDisallow: /a\nAllow: /abcdef\n"
    cut_inside_last_line = body.index("/abcdef") + 2
    policy = rules(body, max_bytes=cut_inside_last_line)
    assert not policy.allowed(url("/abc"))
    assert not policy.allowed(url("/abcdef"))  # the half-read Allow line is gone
    assert rules(body).allowed(url("/abcdef"))


def test_crawl_delay_is_read_and_capped() -> None:
    # Crawl-delay is not in RFC 9309 (a widely read extension); common practice, no
    # source: honour it up to a cap.
    body = "User-agent: *\nCrawl-delay: 2.5\n\nUser-agent: slowbot\nCrawl-delay: 120\n"
    assert rules(body).crawl_delay() == 2.5
    assert rules(body, "slowbot/1", crawl_delay_cap_s=30).crawl_delay() == 30
    assert rules("User-agent: *\nDisallow: /x\n").crawl_delay() is None


# --------------------------------------------------------------------------- Redis cache


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((LOOPBACK, 0))
        return int(sock.getsockname()[1])


@pytest.fixture(scope="module")
def robots_redis_port(tmp_path_factory: pytest.TempPathFactory) -> Iterator[int]:
    """A redis-server of our own on a free loopback port, without persistence."""
    port = _free_port()
    assert port != REDIS_DEFAULT_PORT
    folder: Path = tmp_path_factory.mktemp("robots-redis")
    process = subprocess.Popen(
        [
            "redis-server",
            "--port", str(port),
            "--bind", LOOPBACK,
            "--save", "",
            "--appendonly", "no",
            "--dir", str(folder),
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        client = redis.Redis(host=LOOPBACK, port=port)
        deadline = time.monotonic() + REDIS_START_TIMEOUT_S
        while True:
            try:
                if client.ping():
                    break
            except redis.ConnectionError:
                if time.monotonic() > deadline or process.poll() is not None:
                    raise
                time.sleep(REDIS_POLL_S)  # waiting for the server to start, not politeness
        client.close()
        yield port
    finally:
        process.terminate()
        process.wait(timeout=REDIS_START_TIMEOUT_S)


@pytest.fixture
async def rclient(robots_redis_port: int) -> AsyncIterator[aioredis.Redis]:
    client = aioredis.Redis(host=LOOPBACK, port=robots_redis_port)
    await client.flushdb()
    yield client
    await client.aclose()


class ManualClock:
    def __init__(self, start: float = 1_700_000_000.0) -> None:
        self.now = start

    def __call__(self) -> float:
        return self.now


class CountingFetch:
    """Answers robots.txt fetches from a fixed result and counts them."""

    def __init__(self, result: RobotsFetchResult) -> None:
        self.result = result
        self.urls: list[str] = []
        self.gate: asyncio.Event | None = None
        self.started = asyncio.Event()

    async def __call__(self, robots: str) -> RobotsFetchResult:
        self.urls.append(robots)
        self.started.set()
        if self.gate is not None:
            await self.gate.wait()
        return self.result


def key_for_host(host: str) -> str:
    return f"test:robots:{host}"


OK_BODY = b"User-agent: *\nDisallow: /private\nCrawl-delay: 4\n"


def make_cache(
    client: aioredis.Redis, fetch: CountingFetch, clock: ManualClock, **kw: Any
) -> RobotsCache:
    return RobotsCache(client, key_for_host, fetch, user_agent=UA, clock=clock, **kw)


async def test_second_lookup_does_not_fetch_again(rclient: aioredis.Redis) -> None:
    # RFC 9309 s.2.4: crawlers MAY cache robots.txt; one fetch serves every worker.
    clock, fetch = ManualClock(), CountingFetch(RobotsFetchResult(200, OK_BODY))
    cache = make_cache(rclient, fetch, clock)
    first = await cache.rules_for(ORIGIN)
    second = await cache.rules_for(ORIGIN)
    other_worker = await make_cache(rclient, fetch, clock).rules_for(ORIGIN)  # fresh LRU
    assert fetch.urls == [robots_url(ORIGIN)] == ["http://site.test:8401/robots.txt"]
    for policy in (first, second, other_worker):
        assert not policy.allowed(url("/private/x")) and policy.allowed(url("/ok"))
        assert policy.crawl_delay() == 4
    stored = await rclient.hgetall(key_for_host(ORIGIN))
    assert stored[b"status"] == b"200"
    assert float(stored[b"fetched_at"]) == clock.now
    assert float(stored[b"expires_at"]) == clock.now + DAY_S
    assert 0 < await rclient.pttl(key_for_host(ORIGIN)) <= DAY_S * 1000


async def test_entry_expires_after_ttl(rclient: aioredis.Redis) -> None:
    # RFC 9309 s.2.4: SHOULD NOT use a cached version for more than 24 hours.
    clock, fetch = ManualClock(), CountingFetch(RobotsFetchResult(200, OK_BODY))
    cache = make_cache(rclient, fetch, clock)
    await cache.rules_for(ORIGIN)
    clock.now += DAY_S - 1
    await cache.rules_for(ORIGIN)
    await make_cache(rclient, fetch, clock).rules_for(ORIGIN)
    assert len(fetch.urls) == 1
    clock.now += 2
    fetch.result = RobotsFetchResult(200, b"User-agent: *\nDisallow: /\n")
    assert not (await cache.rules_for(ORIGIN)).allowed(url("/ok"))
    assert len(fetch.urls) == 2


def test_ttl_above_24_hours_is_refused() -> None:
    # RFC 9309 s.2.4: no more than 24 hours.
    fetch = CountingFetch(RobotsFetchResult(404))
    with pytest.raises(ConfigError):
        RobotsCache(object(), key_for_host, fetch, user_agent=UA, ttl_s=DAY_S + 1)


@pytest.mark.parametrize(
    "result", [RobotsFetchResult(503), RobotsFetchResult(None, error="timeout")]
)
async def test_error_entries_expire_after_error_ttl(
    rclient: aioredis.Redis, result: RobotsFetchResult
) -> None:
    # RFC 9309 s.2.3.1.4: complete disallow while unreachable; common practice, no
    # source: try again after a short error TTL rather than the full day.
    clock, fetch = ManualClock(), CountingFetch(result)
    cache = make_cache(rclient, fetch, clock, error_ttl_s=ERROR_TTL_S)
    assert not (await cache.rules_for(ORIGIN)).allowed(url("/ok"))
    clock.now += ERROR_TTL_S - 1
    assert not (await cache.rules_for(ORIGIN)).allowed(url("/ok"))
    assert len(fetch.urls) == 1
    clock.now += 2
    fetch.result = RobotsFetchResult(404)
    assert (await cache.rules_for(ORIGIN)).allowed(url("/ok"))  # s.2.3.1.3 now
    assert len(fetch.urls) == 2


async def test_fetch_errors_count_as_unreachable(rclient: aioredis.Redis) -> None:
    # RFC 9309 s.2.3.1.4: a network error is "unreachable" -> complete disallow.
    class Failing(CountingFetch):
        async def __call__(self, robots: str) -> RobotsFetchResult:
            self.urls.append(robots)
            raise FetchError("connect_timeout", retryable=True)

    fetch = Failing(RobotsFetchResult(200))
    cache = make_cache(rclient, fetch, ManualClock())
    policy = await cache.rules_for(ORIGIN)
    assert policy.state == "disallow_all"
    stored = await rclient.hgetall(key_for_host(ORIGIN))
    assert stored[b"status"] == b"" and b"connect_timeout" in stored[b"error"]


async def test_concurrent_lookups_in_one_worker_fetch_once(rclient: aioredis.Redis) -> None:
    fetch = CountingFetch(RobotsFetchResult(200, OK_BODY))
    cache = make_cache(rclient, fetch, ManualClock())
    results = await asyncio.gather(*(cache.rules_for(ORIGIN) for _ in range(5)))
    assert len(fetch.urls) == 1
    assert all(not r.allowed(url("/private")) for r in results)


async def test_two_workers_fetch_once_under_the_lock(rclient: aioredis.Redis) -> None:
    # Worker A holds the Redis lock while its fetch is in flight; worker B finds no
    # entry, cannot take the lock, and polls until A's entry appears.
    clock = ManualClock()
    fetch = CountingFetch(RobotsFetchResult(200, OK_BODY))
    fetch.gate = asyncio.Event()
    b_polling = asyncio.Event()

    async def b_sleep(_seconds: float) -> None:
        b_polling.set()
        await asyncio.sleep(0)

    worker_a = make_cache(rclient, fetch, clock)
    worker_b = make_cache(rclient, fetch, clock, sleep=b_sleep)
    task_a = asyncio.create_task(worker_a.rules_for(ORIGIN))
    await fetch.started.wait()
    assert await rclient.exists(key_for_host(ORIGIN) + ":lock")
    task_b = asyncio.create_task(worker_b.rules_for(ORIGIN))
    await b_polling.wait()
    fetch.gate.set()
    rules_a, rules_b = await asyncio.gather(task_a, task_b)
    assert len(fetch.urls) == 1
    assert not rules_a.allowed(url("/private")) and not rules_b.allowed(url("/private"))
    assert not await rclient.exists(key_for_host(ORIGIN) + ":lock")  # released


async def test_a_stale_lock_does_not_stall_forever(rclient: aioredis.Redis) -> None:
    # A worker that took the lock and died: the others fetch after lock_wait_s.
    await rclient.set(key_for_host(ORIGIN) + ":lock", b"dead-worker", px=60_000)
    fetch = CountingFetch(RobotsFetchResult(404))
    cache = make_cache(rclient, fetch, ManualClock(), lock_wait_s=0.0)
    assert (await cache.rules_for(ORIGIN)).allowed(url("/x"))
    assert len(fetch.urls) == 1


async def test_large_body_is_truncated_compressed_and_still_parsed(rclient: aioredis.Redis) -> None:
    # RFC 9309 s.2.5: a parsing limit of at least 500 KiB; rules in the first part apply.
    head = b"User-agent: *\nDisallow: /early\n"
    filler = b"# " + b"x" * 97 + b"\n"  # 100-byte comment lines
    body = head + filler * 10_000 + b"Disallow: /late\n" + filler * 10_000  # ~2 MB
    assert len(body) > 2_000_000
    fetch = CountingFetch(RobotsFetchResult(200, body))
    cache = make_cache(rclient, fetch, ManualClock())
    policy = await cache.rules_for(ORIGIN)
    assert not policy.allowed(url("/early/page"))
    assert policy.allowed(url("/late/page"))  # beyond the limit, never read
    stored = await rclient.hgetall(key_for_host(ORIGIN))
    assert stored[b"encoding"] == b"zlib"
    kept = zlib.decompress(stored[b"body"])
    assert len(kept) <= DEFAULT_MAX_BYTES and kept.startswith(head)
    assert len(stored[b"body"]) < len(kept)  # stored compressed


async def test_client_with_decoded_responses_is_refused(robots_redis_port: int) -> None:
    client = aioredis.Redis(host=LOOPBACK, port=robots_redis_port, decode_responses=True)
    try:
        with pytest.raises(ConfigError):
            make_cache(client, CountingFetch(RobotsFetchResult(404)), ManualClock())
    finally:
        await client.aclose()


async def test_redis_down_is_store_unavailable() -> None:
    client = aioredis.Redis(host=LOOPBACK, port=_free_port(), socket_connect_timeout=1)
    try:
        cache = make_cache(client, CountingFetch(RobotsFetchResult(404)), ManualClock())
        with pytest.raises(StoreUnavailable):
            await cache.rules_for(ORIGIN)
    finally:
        await client.aclose()


async def test_workers_share_one_fetch_on_a_cluster(redis_cluster: Any) -> None:
    # The entry and its lock share a hash tag, so each script runs on one Cluster node.
    from frontier.redis_client import connect

    client = connect(redis_cluster.url.replace("redis://", "redis+cluster://"))
    try:
        fetch = CountingFetch(RobotsFetchResult(200, OK_BODY))

        def cache() -> RobotsCache:
            return RobotsCache(client, lambda h: f"{{t.7}}:robots:{h}", fetch, user_agent=UA,
                               clock=ManualClock(), lock_key_for_host=lambda h: f"{{t.7}}:lock:{h}")

        first, second = await asyncio.gather(cache().rules_for(ORIGIN), cache().rules_for(ORIGIN))
        third = await cache().rules_for(ORIGIN)
        assert len(fetch.urls) == 1
        assert all(not r.allowed(url("/private")) for r in (first, second, third))
        assert not await client.exists(f"{{t.7}}:lock:{ORIGIN}")
    finally:
        await client.aclose()
