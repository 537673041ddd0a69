"""The synthetic web: generation, ground truth and the loopback server."""

from __future__ import annotations

import asyncio
import dataclasses
import sys
import zlib
from collections import Counter
from urllib.parse import urldefrag, urljoin, urlsplit

import aiohttp
import networkx as nx
import pytest
from protego import Protego
from selectolax.lexbor import LexborHTMLParser as HTMLParser

from frontier.exceptions import ConfigError
from synthweb.graph import (
    BAD_HOST,
    BIG_ROBOTS_HOST,
    CALENDAR_HOST,
    GARBAGE_ROBOTS_HOST,
    RFC_9309_LONGEST_MATCH_EXAMPLE,
    RFC_9309_SIMPLE_EXAMPLE,
    RFC_EXAMPLE_HOST,
    RFC_LONGEST_MATCH_HOST,
    ROBOTS_SERVER_ERROR,
    SSRF_BAIT_URLS,
    Behaviour,
    Page,
    SyntheticWeb,
    WebSpec,
    calendar_path,
    host_of,
)
from synthweb.server import HUGE_BODY_BYTES, SyntheticServer, render_page

UA = "sluicetest/1.0"
UA_TOKEN = "sluicetest"
MB = 1_000_000
SMALL = WebSpec(seed=7, hosts=30, pages=1_500)


@pytest.fixture(scope="module")
def big_web() -> SyntheticWeb:
    return SyntheticWeb.generate(WebSpec(seed=1))


@pytest.fixture(scope="module")
def small_web() -> SyntheticWeb:
    return SyntheticWeb.generate(SMALL)


async def fetch(
    session: aiohttp.ClientSession, port: int, url: str, method: str = "GET"
) -> tuple[int, dict[str, str], bytes]:
    """Request ``url`` by connecting to 127.0.0.1:port with the URL's host as Host."""
    parts = urlsplit(url)
    async with session.request(
        method, f"http://127.0.0.1:{port}{parts.path or '/'}",
        headers={"Host": parts.netloc, "User-Agent": UA}, allow_redirects=False,
    ) as resp:
        return resp.status, dict(resp.headers), await resp.read()


# --- generation ----------------------------------------------------------------------


def test_same_seed_same_web_and_other_seed_differs(small_web: SyntheticWeb) -> None:
    again = SyntheticWeb.generate(SMALL)
    assert again.pages == small_web.pages
    assert again.robots == small_web.robots
    assert again.seeds == small_web.seeds
    assert list(again.edges()) == list(small_web.edges())
    other = SyntheticWeb.generate(WebSpec(seed=8, hosts=30, pages=1_500))
    assert other.pages != small_web.pages


def test_default_size_builds_with_only_test_hosts(big_web: SyntheticWeb) -> None:
    # The build time is reported by `sluice bench ordering` ("seconds": "generate"),
    # not timed here.
    assert len(ordinary(big_web)) == 20_000
    # RFC 2606 section 2: ".test" is reserved for testing; every served host uses it.
    assert all(h.endswith(".test") for h in big_web.hosts)


def test_in_degree_is_heavy_tailed() -> None:
    # Preferential attachment gives power-law in-degrees (Barabasi & Albert, Science
    # 1999; Broder et al., "Graph structure in the Web", 2000): the top 1% of pages
    # hold far more than 1% of the in-links. networkx computes the degrees.
    def top_share(web: SyntheticWeb) -> float:
        graph = nx.DiGraph(web.edges())
        degrees = sorted((d for _, d in graph.in_degree()), reverse=True)
        return sum(degrees[: len(degrees) // 100]) / sum(degrees)

    spec = WebSpec(seed=1, hosts=30, pages=3_000)
    preferential = top_share(SyntheticWeb.generate(spec))
    assert preferential > 0.10
    uniform = top_share(SyntheticWeb.generate(dataclasses.replace(spec, preferential=False)))
    assert uniform < preferential / 2


def ordinary(web: SyntheticWeb) -> list[Page]:
    """Pages of the ordinary site tree (no redirects, loops or special hosts)."""
    sites = set(web.site_hosts)
    return [p for p in web.pages.values()
            if p.host in sites and (p.path == "/" or p.path.startswith(("/p/", "/private/")))]


def test_host_sizes_follow_zipf(big_web: SyntheticWeb) -> None:
    # Zipf's law for site sizes (Adamic & Huberman, "Zipf's law and the Internet",
    # 2002): with exponent 1 the rank-10 host is about a tenth of the rank-1 host.
    sizes = Counter(p.host for p in ordinary(big_web))
    ranked = [sizes[h] for h in big_web.site_hosts]
    assert ranked == sorted(ranked, reverse=True)
    assert 7 <= ranked[0] / ranked[9] <= 13


def test_links_mean_and_cross_host_share(big_web: SyntheticWeb) -> None:
    # Rule of thumb for the generator's own parameters (common practice, no source).
    pages = [p for p in ordinary(big_web) if p.path != "/"]
    links = [(p.host, link.url.split("/", 3)[2]) for p in pages for link in p.links]
    assert 8 <= len(links) / len(pages) <= 12
    assert 0.2 <= sum(a != b for a, b in links) / len(links) <= 0.4


def test_bad_spec_is_refused() -> None:
    with pytest.raises(ConfigError, match="pages"):
        WebSpec(hosts=10, pages=5)


# --- robots ground truth -------------------------------------------------------------


@pytest.mark.parametrize(
    ("path", "agent", "expected"),
    [
        # RFC 9309 section 5.1: the "*" group disallows /example/ and *.gif$ ...
        ("/example/page.html", "*", False),
        ("/example/allowed.gif", UA_TOKEN, False),
        ("/image.gif", UA_TOKEN, False),
        # ... and allows /publications/ (longest match beats "*.gif$", section 2.2.2).
        ("/publications/", UA_TOKEN, True),
        ("/publications/figure.gif", UA_TOKEN, True),
        ("/", UA_TOKEN, True),
        # foobot may fetch only the two listed paths.
        ("/example/page.html", "foobot", True),
        ("/example/allowed.gif", "foobot", True),
        ("/example/x.gif", "foobot", False),
        ("/publications/", "foobot", False),
        # barbot and bazbot share a group that disallows /example/page.html only.
        ("/example/page.html", "bazbot", False),
        ("/example/x.gif", "barbot", True),
        # quxbot's group is empty: everything allowed.
        ("/example/page.html", "quxbot", True),
    ],
)
def test_rfc_9309_simple_example(
    small_web: SyntheticWeb, path: str, agent: str, expected: bool
) -> None:
    url = f"http://{RFC_EXAMPLE_HOST}{path}"
    assert small_web.robots[RFC_EXAMPLE_HOST] == RFC_9309_SIMPLE_EXAMPLE
    assert small_web.allowed(url, agent) is expected
    assert Protego.parse(RFC_9309_SIMPLE_EXAMPLE).can_fetch(url, agent) is expected


@pytest.mark.parametrize(
    ("path", "expected"),
    [
        # RFC 9309 section 5.2: the longest matching rule wins.
        ("/example/page/", True),
        ("/example/page/allowed.html", True),
        ("/example/page/disallowed.gif", False),
    ],
)
def test_rfc_9309_longest_match_example(small_web: SyntheticWeb, path: str, expected: bool) -> None:
    url = f"http://{RFC_LONGEST_MATCH_HOST}{path}"
    assert small_web.robots[RFC_LONGEST_MATCH_HOST] == RFC_9309_LONGEST_MATCH_EXAMPLE
    assert small_web.allowed(url, UA_TOKEN) is expected
    assert url in small_web.pages


def test_missing_and_failing_robots(small_web: SyntheticWeb) -> None:
    missing = next(h for h, b in small_web.robots.items() if b is None and h.startswith("site-"))
    failing = next(h for h, b in small_web.robots.items() if b == ROBOTS_SERVER_ERROR)
    # RFC 9309 section 2.3.1.3: robots.txt unavailable (4xx) -> allow everything.
    assert small_web.allowed(f"http://{missing}/private/3.html", UA_TOKEN)
    # RFC 9309 section 2.3.1.4: unreachable (5xx) -> disallow everything.
    assert not small_web.allowed(f"http://{failing}/", UA_TOKEN)


def test_allowed_matches_protego_on_every_site_page(small_web: SyntheticWeb) -> None:
    # protego is the reference parser; the ground truth must agree with it.
    parsers = {h: Protego.parse(b) for h, b in small_web.robots.items()
               if b is not None and b != ROBOTS_SERVER_ERROR and h != BIG_ROBOTS_HOST}
    checked = 0
    for url, page in small_web.pages.items():
        if page.host in parsers:
            assert small_web.allowed(url, UA_TOKEN) == parsers[page.host].can_fetch(url, UA_TOKEN)
            checked += 1
    assert checked > 100


def test_big_and_garbage_robots(small_web: SyntheticWeb) -> None:
    big = small_web.robots[BIG_ROBOTS_HOST]
    assert big is not None and len(big.encode()) >= 2 * 1024 * 1024
    # RFC 9309 section 2.5: crawlers parse at least the first 500 KiB; the rule that
    # matters sits in the first lines, so a truncating parser reaches the same answer.
    assert big.index("Disallow: /private/") < 500 * 1024
    assert not small_web.allowed(f"http://{BIG_ROBOTS_HOST}/private/1.html", UA_TOKEN)
    assert small_web.allowed(f"http://{BIG_ROBOTS_HOST}/p/1.html", UA_TOKEN)
    # RFC 9309 section 2.2.1: with no groups at all, no rules apply -> allow all.
    assert small_web.allowed(f"http://{GARBAGE_ROBOTS_HOST}/private/1.html", UA_TOKEN)


def test_crawl_delays_are_in_robots(small_web: SyntheticWeb) -> None:
    assert small_web.crawl_delays
    for host, delay in small_web.crawl_delays.items():
        body = small_web.robots[host]
        assert body is not None
        assert Protego.parse(body).crawl_delay(UA_TOKEN) == delay


# --- graph ground truth --------------------------------------------------------------


def test_reachable_respects_robots_and_host_limits(small_web: SyntheticWeb) -> None:
    everything = small_web.reachable()
    polite = small_web.reachable(user_agent=UA_TOKEN)
    assert polite < everything
    assert all(small_web.allowed(u, UA_TOKEN) for u in polite)
    assert not any(host_of(u) == BAD_HOST for u in everything)
    assert not set(SSRF_BAIT_URLS) & everything
    one_host = small_web.reachable(hosts={host_of(small_web.seeds[0])})
    assert {host_of(u) for u in one_host} == {host_of(small_web.seeds[0])}
    # The farm and the trap hang off the ordinary web, so a crawler meets them.
    assert small_web.farm_hosts <= {host_of(u) for u in polite}
    assert any(small_web.pages[u].trap for u in polite)


def test_reachable_equals_networkx_descendants(small_web: SyntheticWeb) -> None:
    # BFS closure must equal graph reachability as networkx computes it.
    graph = nx.DiGraph(small_web.edges())
    graph.remove_nodes_from([u for u in list(graph) if host_of(u) == BAD_HOST])
    expected = set(small_web.seeds)
    for seed in small_web.seeds:
        expected |= nx.descendants(graph, seed)
    assert small_web.reachable() == expected


def test_edges_stay_inside_the_static_horizon(small_web: SyntheticWeb) -> None:
    pages = small_web.pages
    assert all(src in pages and dst in pages for src, dst in small_web.edges())
    last = max(u for u, p in pages.items() if p.trap and "/calendar/" in u)
    beyond = [link.url for link in pages[last].links if link.url not in pages]
    assert beyond and all(small_web.is_trap(u) for u in beyond)
    far = small_web.resolve(f"http://{CALENDAR_HOST}{calendar_path(2999, 12)}")
    assert far is not None and far.trap
    assert f"http://{CALENDAR_HOST}{calendar_path(3000, 1)}" in {lk.url for lk in far.links}


def test_farm_is_densely_interlinked(small_web: SyntheticWeb) -> None:
    farm = small_web.farm_hosts
    assert len(farm) == SMALL.farm_hosts
    farm_pages = [p for p in small_web.pages.values() if p.host in farm]
    assert len(farm_pages) == SMALL.farm_hosts * SMALL.farm_pages
    for page in farm_pages:
        assert sum(host_of(lk.url) in farm for lk in page.links) >= SMALL.farm_links - 1


def test_near_duplicates_differ_by_a_word_or_two(small_web: SyntheticWeb) -> None:
    # Word-level edit count (common practice, no source).
    assert len(small_web.near_duplicate_groups) == SMALL.near_duplicate_groups
    for group in small_web.near_duplicate_groups:
        base = small_web.pages[group[0]].text.split()
        for url in group[1:]:
            words = small_web.pages[url].text.split()
            assert len(words) == len(base)
            assert 1 <= sum(a != b for a, b in zip(base, words)) <= SMALL.near_duplicate_max_edits


def test_rendered_links_resolve_to_the_ground_truth(small_web: SyntheticWeb) -> None:
    # RFC 3986 section 5.2 (urljoin), with <base href> as the base URI (HTML
    # standard, "the base element"); fragments dropped (RFC 3986 section 3.5).
    seen_relative = seen_base = seen_meta = 0
    for page in small_web.pages.values():
        if page.behaviour is not Behaviour.OK or page.host in small_web.farm_hosts:
            continue
        tree = HTMLParser(render_page(page).decode())
        base_node = tree.css_first("base")
        base = base_node.attributes["href"] if base_node else page.url
        anchors = tree.css("a")
        got = [urldefrag(urljoin(base or "", a.attributes["href"] or ""))[0] for a in anchors]
        assert got == [lk.url for lk in page.links]
        assert [a.attributes.get("rel") == "nofollow" for a in anchors] == [
            lk.nofollow for lk in page.links
        ]
        seen_relative += sum(not (a.attributes["href"] or "").startswith("http") for a in anchors)
        seen_base += base_node is not None
        meta = tree.css_first('meta[name="robots"]')
        seen_meta += meta is not None
        assert (meta is not None and meta.attributes["content"] == "nofollow") is page.meta_nofollow
    assert seen_relative and seen_base and seen_meta


# --- the server ----------------------------------------------------------------------


async def test_server_serves_pages_robots_and_404s(small_web: SyntheticWeb) -> None:
    robots_host = next(h for h, b in small_web.robots.items() if b and b != ROBOTS_SERVER_ERROR
                       and h.startswith("site-"))
    failing = next(h for h, b in small_web.robots.items() if b == ROBOTS_SERVER_ERROR)
    async with SyntheticServer(small_web) as server, aiohttp.ClientSession() as session:
        assert server.port
        seed = small_web.seeds[0]
        status, headers, body = await fetch(session, server.port, seed)
        assert status == 200 and headers["Content-Type"].startswith("text/html")
        assert small_web.pages[seed].title.encode() in body
        status, _, body = await fetch(session, server.port, f"http://{robots_host}/robots.txt")
        assert status == 200 and body.decode() == small_web.robots[robots_host]
        assert (await fetch(session, server.port, f"http://{failing}/robots.txt"))[0] == 500
        assert (await fetch(session, server.port, f"http://{CALENDAR_HOST}/robots.txt"))[0] == 404
        assert (await fetch(session, server.port, "http://nowhere.test/"))[0] == 404
        assert (await fetch(session, server.port, f"http://{host_of(seed)}/nope"))[0] == 404
        status, _, body = await fetch(
            session, server.port, f"http://{CALENDAR_HOST}{calendar_path(4321, 5)}")
        assert status == 200 and calendar_path(4321, 6).encode() in body
    assert {r.host for r in server.log} >= {host_of(seed), robots_host, "nowhere.test"}
    assert all(r.user_agent == UA for r in server.log)


async def test_server_refuses_non_loopback_addresses(small_web: SyntheticWeb) -> None:
    with pytest.raises(ConfigError, match="loopback"):
        await SyntheticServer(small_web).start("10.0.0.1")


async def test_request_log_records_concurrency(small_web: SyntheticWeb) -> None:
    slow = sorted(small_web.slow_hosts)[0]
    fast = host_of(small_web.seeds[0])
    ticks = iter(range(10_000))
    async with SyntheticServer(small_web, slow_delay=0.05, clock=lambda: float(next(ticks))) as server:
        async with aiohttp.ClientSession() as session:
            await asyncio.gather(*(fetch(session, server.port, f"http://{slow}/") for _ in range(2)))
            for _ in range(2):
                await fetch(session, server.port, f"http://{fast}/")
    peaks = server.max_concurrency_per_host()
    assert peaks[slow] == 2 and peaks[fast] == 1
    a, b = server.requests_for(slow)
    assert a.start < b.end and b.start < a.end  # the intervals overlap
    x, y = server.requests_for(fast)
    assert x.end < y.start and x.status == 200 and x.bytes > 0 and x.path == "/"


async def test_gzip_bomb_is_small_on_the_wire_and_huge_inflated(small_web: SyntheticWeb) -> None:
    async with SyntheticServer(small_web) as server, aiohttp.ClientSession(
        auto_decompress=False
    ) as session:
        status, headers, body = await fetch(session, server.port, f"http://{BAD_HOST}/bomb.html")
    assert status == 200 and headers["Content-Encoding"] == "gzip"
    assert len(body) < 1 * MB
    # RFC 1952 gzip stream, inflated in bounded steps so the test holds ~1 MB at a time.
    inflater = zlib.decompressobj(zlib.MAX_WBITS | 16)
    total, data = 0, body
    while total <= 100 * MB and (data or inflater.unconsumed_tail):
        out = inflater.decompress(data or inflater.unconsumed_tail, 1 << 20)
        data = b""
        total += len(out)
        if not out:
            break
    assert total > 100 * MB


async def test_redirects_loop_chain_and_never_end(small_web: SyntheticWeb) -> None:
    # RFC 9110 section 15.4: 3xx with Location; relative Location resolves against
    # the request URI (section 10.2.2).
    async def follow(session: aiohttp.ClientSession, port: int, url: str, hops: int) -> list[str]:
        trail = [url]
        for _ in range(hops):
            status, headers, _ = await fetch(session, port, trail[-1])
            if not 300 <= status < 400:
                break
            trail.append(urljoin(trail[-1], headers["Location"]))
        return trail

    chain_start = next(u for u, p in small_web.pages.items() if p.path.endswith("/r/0/0"))
    async with SyntheticServer(small_web) as server, aiohttp.ClientSession() as session:
        a, b = small_web.redirect_loop
        assert await follow(session, server.port, a, 4) == [a, b, a, b, a]
        chain = await follow(session, server.port, chain_start, 10)
        assert 2 <= len(chain) <= 1 + SMALL.max_redirect_hops
        assert small_web.pages[chain[-1]].behaviour is not Behaviour.REDIRECT
        endless = await follow(session, server.port, f"http://{BAD_HOST}/endless-redirect/0", 25)
        assert len(set(endless)) == 26


async def test_flaky_page_sends_retry_after_then_recovers(small_web: SyntheticWeb) -> None:
    flaky = next(p for p in small_web.pages.values() if p.behaviour is Behaviour.FLAKY)
    async with SyntheticServer(small_web) as server, aiohttp.ClientSession() as session:
        answers = [await fetch(session, server.port, flaky.url) for _ in range(flaky.fail_count + 1)]
    # RFC 9110 section 10.2.3: Retry-After as delay-seconds.
    assert [s for s, _, _ in answers] == [503] * flaky.fail_count + [200]
    assert answers[0][1]["Retry-After"] == str(flaky.retry_after)


async def test_bad_inputs_are_what_they_claim(small_web: SyntheticWeb) -> None:
    async with SyntheticServer(small_web, drip_interval=0.01, drip_duration=0.05) as server:
        async with aiohttp.ClientSession() as session:
            _, headers, body = await fetch(session, server.port, f"http://{BAD_HOST}/wrong-charset.html")
            assert "utf-8" in headers["Content-Type"]
            with pytest.raises(UnicodeDecodeError):
                body.decode("utf-8")
            _, headers, body = await fetch(session, server.port, f"http://{BAD_HOST}/binary.html")
            assert headers["Content-Type"].startswith("text/html") and b"\x00" in body
            status, headers, _ = await fetch(
                session, server.port, f"http://{BAD_HOST}/huge.html", method="HEAD")
            assert status == 200 and int(headers["Content-Length"]) == HUGE_BODY_BYTES
            _, _, body = await fetch(session, server.port, f"http://{BAD_HOST}/slow-drip.html")
            assert body == b"." * 5
        # Raw socket: the client library rightly refuses ~64 KB of headers.
        reader, writer = await asyncio.open_connection("127.0.0.1", server.port)
        writer.write(b"GET /huge-headers.html HTTP/1.1\r\nHost: bad.test\r\nConnection: close\r\n\r\n")
        raw = await reader.read()
        writer.close()
        await writer.wait_closed()
    head = raw.split(b"\r\n\r\n", 1)[0]
    assert head.startswith(b"HTTP/1.1 200") and len(head) > 60_000


async def test_cli_prints_port_and_seeds() -> None:
    proc = await asyncio.create_subprocess_exec(
        sys.executable, "-m", "synthweb", "--port", "0", "--seed", "3",
        "--hosts", "10", "--pages", "200", stdout=asyncio.subprocess.PIPE,
    )
    try:
        assert proc.stdout is not None
        first = (await asyncio.wait_for(proc.stdout.readline(), 20)).decode().split()
        assert first[0] == "port"
        port = int(first[1])
        seed = (await proc.stdout.readline()).decode().strip()
        expected = SyntheticWeb.generate(WebSpec(seed=3, hosts=10, pages=200)).seeds[0]
        assert seed == expected
        async with aiohttp.ClientSession() as session:
            assert (await fetch(session, port, seed))[0] == 200
    finally:
        proc.terminate()
        await proc.wait()
