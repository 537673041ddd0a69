"""The address guard: special-purpose ranges, IP literal spellings, host map, aiohttp.

Classification tests send no traffic. The fetch tests talk only to an aiohttp server
on 127.0.0.1 that the test starts; every other destination is refused before a socket
is opened (the server counts its hits to prove it). An audit hook watches every
``socket.connect`` made while a test of this module runs and blocks (and records) any
destination outside loopback, so a guard bug cannot send traffic elsewhere either.
"""

from __future__ import annotations

import ipaddress
import socket
from collections import Counter
from collections.abc import AsyncIterator

import aiohttp
import pytest
from aiohttp import web
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.exceptions import AddressRefused, FetchError
from frontier.settings import FetchSettings
from workers.fetcher import Fetcher
from frontier.guard import (
    GuardedConnector,
    GuardedResolver,
    HostMap,
    check_address,
    parse_host_map,
    parse_ip_literal,
)
from tests.guardkit import (  # noqa: F401  (outside_connects: autouse fixture)
    DEFAULT_PORTS,
    LOOPBACK,
    UA,
    StubResolver,
    outside_connects,
)

CLIENT_TIMEOUT = aiohttp.ClientTimeout(total=5)

# IANA IPv4 Special-Purpose Address Registry and IANA IPv6 Special-Purpose Address
# Registry (RFC 6890, updated by RFC 8190): none of these is globally reachable.
SPECIAL_PURPOSE = [
    ("0.0.0.0/8", "IANA IPv4 registry: 'this network', RFC 791"),
    ("10.0.0.0/8", "IANA IPv4 registry: private-use, RFC 1918"),
    ("100.64.0.0/10", "IANA IPv4 registry: shared address space, RFC 6598"),
    ("127.0.0.0/8", "IANA IPv4 registry: loopback, RFC 1122"),
    ("169.254.169.254/32", "IANA IPv4 registry: link local 169.254/16, RFC 3927"),
    ("169.254.0.0/16", "IANA IPv4 registry: link local, RFC 3927"),
    ("172.16.0.0/12", "IANA IPv4 registry: private-use, RFC 1918"),
    ("192.0.0.0/29", "IANA IPv4 registry: IETF protocol assignments 192.0.0/24, RFC 6890"),
    ("192.0.0.8/32", "IANA IPv4 registry: IPv4 dummy address, RFC 7600"),
    ("192.0.0.170/31", "IANA IPv4 registry: NAT64/DNS64 discovery, RFC 8880"),
    ("192.0.2.0/24", "IANA IPv4 registry: documentation TEST-NET-1, RFC 5737"),
    ("192.168.0.0/16", "IANA IPv4 registry: private-use, RFC 1918"),
    ("198.18.0.0/15", "IANA IPv4 registry: benchmarking, RFC 2544"),
    ("224.0.0.0/4", "IANA multicast address space, RFC 5771"),
    ("240.0.0.0/4", "IANA IPv4 registry: reserved, RFC 1112"),
    ("255.255.255.255/32", "IANA IPv4 registry: limited broadcast, RFC 919"),
    ("::1/128", "IANA IPv6 registry: loopback, RFC 4291"),
    ("::/128", "IANA IPv6 registry: unspecified, RFC 4291"),
    ("fe80::/10", "IANA IPv6 registry: link-local unicast, RFC 4291"),
    ("fc00::/7", "IANA IPv6 registry: unique-local, RFC 4193"),
    ("2001:db8::/32", "IANA IPv6 registry: documentation, RFC 3849"),
    ("ff00::/8", "IPv6 multicast, RFC 4291 s.2.7"),
    ("::ffff:127.0.0.1/128", "IANA IPv6 registry: IPv4-mapped ::ffff:0:0/96, RFC 4291"),
    ("::ffff:169.254.169.254/128", "IANA IPv6 registry: IPv4-mapped, RFC 4291"),
    ("::ffff:10.0.0.0/104", "IPv4-mapped (RFC 4291 s.2.5.5.2) wrapping 10/8 (RFC 1918)"),
]

# Addresses that wrap a loopback or metadata IPv4 address inside an IPv6 form.
WRAPPED = [
    ("::127.0.0.1", "IPv4-compatible, RFC 4291 s.2.5.5.1 (deprecated)"),
    ("2002:7f00:1::1", "6to4 2002::/16 embedding 127.0.0.1, RFC 3056 s.2"),
    ("2002:a9fe:a9fe::1", "6to4 embedding 169.254.169.254, RFC 3056 s.2"),
    ("64:ff9b::7f00:1", "NAT64 well-known prefix embedding 127.0.0.1, RFC 6052 s.2.1"),
    ("2001::1", "Teredo 2001::/32, IANA IPv6 registry, RFC 4380"),
]

# Legacy spellings of 127.0.0.1 that inet_aton(3) and URL hosts accept
# (WHATWG URL Standard, "IPv4 parser").
LOOPBACK_SPELLINGS = ["2130706433", "0x7f000001", "0177.0.0.1", "127.1", "0x7f.1", "127.0.0.1."]

# Globally reachable public resolvers: only classified, never contacted.
PUBLIC = ["8.8.8.8", "1.1.1.1", "2001:4860:4860::8888", "::ffff:8.8.8.8"]


def _samples(network: str) -> list[str]:
    net = ipaddress.ip_network(network)
    return sorted({str(net[0]), str(net[net.num_addresses // 2]), str(net[-1])})


@pytest.mark.parametrize(("network", "source"), SPECIAL_PURPOSE)
def test_special_purpose_ranges_are_refused(network: str, source: str) -> None:
    for address in _samples(network):  # first, middle and last address of the range
        with pytest.raises(AddressRefused) as info:
            check_address(address)
        assert info.value.reason == "non_global_address", (address, source)


@pytest.mark.parametrize(("address", "source"), WRAPPED)
def test_wrapped_ipv4_forms_are_refused(address: str, source: str) -> None:
    with pytest.raises(AddressRefused) as info:
        check_address(address)
    assert info.value.reason == "non_global_address", source


@pytest.mark.parametrize("address", PUBLIC)
async def test_public_addresses_pass(address: str) -> None:
    # IANA registries: outside every special-purpose block, hence globally reachable;
    # Python's ipaddress tables (a reference implementation of them) agree.
    assert ipaddress.ip_address(address).is_global
    check_address(address)  # raises AddressRefused on refusal
    # A name answering with the address is handed back as it is, with the port asked
    # for (classified only: the stub answers, nothing is contacted).
    stub = StubResolver({"public.site.com": [address]})
    guard = GuardedResolver(HostMap(), resolver=stub)
    [answer] = await guard.resolve("public.site.com", 443)
    assert (answer["host"], answer["port"]) == (address, 443)
    assert stub.asked == ["public.site.com"]


@pytest.mark.parametrize("spelling", LOOPBACK_SPELLINGS)
def test_legacy_spellings_parse_to_loopback_and_are_refused(spelling: str) -> None:
    # inet_aton(3) reads each spelling as 127.0.0.1; Python's socket.inet_aton agrees.
    assert parse_ip_literal(spelling) == ipaddress.IPv4Address(LOOPBACK)
    assert socket.inet_aton(spelling.rstrip(".")) == socket.inet_aton(LOOPBACK)
    literal = parse_ip_literal(spelling)
    assert literal is not None
    with pytest.raises(AddressRefused):
        check_address(literal)


def test_bracketed_ipv6_and_zone_ids() -> None:
    # RFC 3986 s.3.2.2 IP-literal in brackets; RFC 6874 zone id as %25.
    assert parse_ip_literal("[::1]") == ipaddress.IPv6Address("::1")
    assert parse_ip_literal("[fe80::1%25eth0]") == ipaddress.IPv6Address("fe80::1")
    assert parse_ip_literal("site.test") is None
    with pytest.raises(AddressRefused) as info:
        parse_ip_literal("[not-an-address]")
    assert info.value.reason == "invalid_address"


def test_out_of_range_numbers_are_invalid_not_names() -> None:
    # WHATWG URL Standard, IPv4 parser: a numeric host out of range is a failure.
    for host in ("256.1.1.1", "1.2.3.256", "0x100000000", "4294967296"):
        with pytest.raises(AddressRefused) as info:
            parse_ip_literal(host)
        assert info.value.reason == "invalid_address"


_RADIX_FORMAT = {10: "{:d}", 8: "0{:o}", 16: "0x{:x}"}


@settings(max_examples=300, deadline=None)
@given(
    value=st.integers(min_value=0, max_value=2**32 - 1),
    parts=st.integers(min_value=1, max_value=4),
    radixes=st.lists(st.sampled_from([10, 8, 16]), min_size=4, max_size=4),
)
def test_legacy_spellings_agree_with_inet_aton(value: int, parts: int, radixes: list[int]) -> None:
    # Reference: inet_aton(3) via socket.inet_aton; a spelling with n parts has n-1
    # leading octets and a last part filling the remaining 32 - 8(n-1) bits.
    octets = value.to_bytes(4, "big")
    numbers = list(octets[: parts - 1]) + [int.from_bytes(octets[parts - 1 :], "big")]
    spelling = ".".join(_RADIX_FORMAT[r].format(n) for r, n in zip(radixes, numbers))
    expected = ipaddress.IPv4Address(socket.inet_aton(spelling))
    assert parse_ip_literal(spelling) == expected == ipaddress.IPv4Address(value)

# --------------------------------------------------------------------------- resolver

async def test_names_resolving_to_any_non_global_address_are_refused() -> None:
    # DNS rebinding defence: every answer is checked (IANA registries as above).
    stub = StubResolver(
        {
            "mixed.site.com": ["8.8.8.8", "10.1.2.3"],
            "meta.site.com": ["169.254.169.254"],
            "public.site.com": ["8.8.8.8", "2001:4860:4860::8888"],
        }
    )
    guard = GuardedResolver(HostMap(), resolver=stub)
    for host in ("mixed.site.com", "meta.site.com"):
        with pytest.raises(AddressRefused) as info:
            await guard.resolve(host, 80)
        assert info.value.reason == "non_global_address"
        assert host in str(info.value)
    answers = await guard.resolve("public.site.com", 443)
    assert [(a["host"], a["port"]) for a in answers] == [
        ("8.8.8.8", 443),
        ("2001:4860:4860::8888", 443),
    ]


async def test_allow_private_lets_non_global_answers_through() -> None:
    stub = StubResolver({"intranet.site.com": ["10.1.2.3"]})
    guard = GuardedResolver(HostMap(), allow_private=True, resolver=stub)
    answers = await guard.resolve("intranet.site.com", 80)
    assert [a["host"] for a in answers] == ["10.1.2.3"]
    assert (await guard.resolve("0x7f000001", 80))[0]["host"] == LOOPBACK


@pytest.mark.parametrize(
    "host",
    ["unmapped.test", "localhost", "app.localhost", "x.invalid", "www.example", "printer.local"],
)
async def test_special_use_names_are_refused_without_dns(host: str) -> None:
    # RFC 6761 s.6.2-6.5 (test, localhost, invalid, example), RFC 6762 (local).
    stub = StubResolver({host: ["8.8.8.8"]})
    guard = GuardedResolver(parse_host_map(["site.test=127.0.0.1"]), resolver=stub)
    with pytest.raises(AddressRefused) as info:
        await guard.resolve(host, 80)
    assert info.value.reason == "reserved_name"
    assert stub.asked == []


@pytest.mark.parametrize("spelling", [*LOOPBACK_SPELLINGS, "[::1]", "::ffff:7f00:1"])
async def test_ip_literals_are_refused_without_dns(spelling: str) -> None:
    stub = StubResolver()
    guard = GuardedResolver(HostMap(), resolver=stub)
    with pytest.raises(AddressRefused) as info:
        await guard.resolve(spelling, 80)
    assert info.value.reason == "non_global_address"
    assert stub.asked == []


async def test_host_map_bypasses_the_global_check_and_sets_the_port() -> None:
    stub = StubResolver()
    host_map = parse_host_map(["exact.test=[::1]:9000", "*.test=127.0.0.1"])
    guard = GuardedResolver(host_map, resolver=stub)
    [mapped] = await guard.resolve("exact.test", 80)
    assert (mapped["host"], mapped["port"], mapped["family"]) == ("::1", 9000, socket.AF_INET6)
    [wild] = await guard.resolve("site.test", 80)
    assert (wild["host"], wild["port"], wild["family"]) == (LOOPBACK, 80, socket.AF_INET)
    assert stub.asked == []


async def test_port_less_map_keeps_only_the_listed_ports() -> None:
    # Project contract: a port-less entry keeps the URL's port only if fetch.map_ports
    # lists it; by default the http and https ports (RFC 9110 s.4.2.1, s.4.2.2).
    stub = StubResolver()
    guard = GuardedResolver(parse_host_map(["*.test=127.0.0.1"]), resolver=stub)
    for port in DEFAULT_PORTS:
        [answer] = await guard.resolve("site.test", port)
        assert (answer["host"], answer["port"]) == (LOOPBACK, port)
    for port in (8080, 6379, 18402, 1, 65535):
        with pytest.raises(AddressRefused) as info:
            await guard.resolve("site.test", port)
        assert info.value.reason == "map_port"
        assert str(port) in str(info.value) and "fetch.map_ports" in str(info.value)
    listed = GuardedResolver(parse_host_map(["*.test=127.0.0.1"], ports=(8401,)), resolver=stub)
    [answer] = await listed.resolve("a.site.test", 8401)
    assert (answer["host"], answer["port"]) == (LOOPBACK, 8401)
    with pytest.raises(AddressRefused) as info:
        await listed.resolve("a.site.test", 80)  # the list replaces the default
    assert info.value.reason == "map_port"
    assert stub.asked == []


async def test_a_map_with_a_port_sends_every_url_port_there() -> None:
    # Project contract: 'host=ADDR:PORT' connects to PORT whatever port the URL names.
    guard = GuardedResolver(parse_host_map(["*.test=127.0.0.1:8080"], ports=()))
    for url_port in (80, 443, 8080, 18402, 1):
        [answer] = await guard.resolve("x.test", url_port)
        assert (answer["host"], answer["port"]) == (LOOPBACK, 8080)


async def test_address_only_question_is_not_a_port() -> None:
    # Port 0 asks for the address only (the 'ip' politeness key); it opens nothing.
    guard = GuardedResolver(parse_host_map(["*.test=127.0.0.2"]))
    [answer] = await guard.resolve("x.test", 0, socket.AF_UNSPEC)
    assert answer["host"] == "127.0.0.2"


async def test_check_url_host() -> None:
    stub = StubResolver({"public.site.com": ["8.8.8.8"], "lan.site.com": ["192.168.1.9"]})
    guard = GuardedResolver(parse_host_map(["site.test=127.0.0.1"]), resolver=stub)
    await guard.check_url_host("public.site.com")
    await guard.check_url_host("site.test")
    with pytest.raises(AddressRefused):
        await guard.check_url_host("lan.site.com")
    with pytest.raises(AddressRefused):
        await guard.check_url_host("2130706433")
    with pytest.raises(FetchError) as info:  # DNS failure is translated, and retryable
        await guard.check_url_host("missing.site.com")
    assert info.value.reason == "dns_error" and info.value.retryable


# --------------------------------------------------------------------------- aiohttp


class LoopbackSite:
    """An aiohttp server on 127.0.0.1 that counts hits per path."""

    def __init__(self) -> None:
        self.hits: Counter[str] = Counter()
        self.port = 0
        self._runner: web.AppRunner | None = None

    async def start(self) -> None:
        app = web.Application()
        app.router.add_get("/{tail:.*}", self._handle)
        self._runner = web.AppRunner(app)
        await self._runner.setup()
        site = web.TCPSite(self._runner, LOOPBACK, 0)
        await site.start()
        self.port = self._runner.addresses[0][1]

    async def stop(self) -> None:
        if self._runner is not None:
            await self._runner.cleanup()

    async def _handle(self, request: web.Request) -> web.StreamResponse:
        self.hits[request.path] += 1
        target = request.query.get("to")
        if target:
            raise web.HTTPFound(target)
        return web.Response(text=f"hello {request.host}")


@pytest.fixture
async def site() -> AsyncIterator[LoopbackSite]:
    server = LoopbackSite()
    await server.start()
    yield server
    await server.stop()


def _session(
    entries: list[str], stub: StubResolver | None = None, ports: tuple[int, ...] = DEFAULT_PORTS
) -> aiohttp.ClientSession:
    host_map = parse_host_map(entries, ports=ports)
    resolver = GuardedResolver(host_map, resolver=stub or StubResolver())
    return aiohttp.ClientSession(
        connector=GuardedConnector(resolver), timeout=CLIENT_TIMEOUT, trust_env=False
    )


async def test_mapped_name_reaches_the_loopback_server(site: LoopbackSite) -> None:
    async with _session(["*.test=127.0.0.1"], ports=(site.port,)) as session:
        async with session.get(f"http://site.test:{site.port}/page") as resp:
            assert resp.status == 200
            # RFC 9110 s.7.2: the Host header keeps the name, not the mapped address.
            assert await resp.text() == f"hello site.test:{site.port}"
    assert site.hits["/page"] == 1


async def test_mapped_port_overrides_the_url_port(site: LoopbackSite) -> None:
    async with _session([f"*.test=127.0.0.1:{site.port}"]) as session:
        async with session.get("http://site.test/ported") as resp:
            assert resp.status == 200
        async with session.get("http://site.test:1/ported") as resp:  # any URL port: site.port
            assert resp.status == 200
    assert site.hits["/ported"] == 2


async def test_port_less_map_does_not_reach_another_loopback_port(site: LoopbackSite) -> None:
    # The server listens on a free port that no map names; a page linking to it through
    # a port-less map is refused by the fetcher before any connection is opened.
    assert site.port not in DEFAULT_PORTS
    settings = FetchSettings(map_hosts=("*.test=127.0.0.1",))
    async with Fetcher(settings, UA) as fetcher:
        for url in (f"http://x.test:{site.port}/secret", f"http://deep.x.test:{site.port}/"):
            with pytest.raises(AddressRefused) as info:
                await fetcher.get(url)
            assert info.value.reason == "map_port"
            assert str(site.port) in str(info.value)
    assert sum(site.hits.values()) == 0


async def test_listed_port_reaches_the_server_through_a_port_less_map(site: LoopbackSite) -> None:
    fetch = FetchSettings(map_hosts=("*.test=127.0.0.1",), map_ports=(80, 443, site.port))
    resolver = GuardedResolver.from_settings(fetch, resolver=StubResolver())
    async with aiohttp.ClientSession(
        connector=GuardedConnector(resolver), timeout=CLIENT_TIMEOUT, trust_env=False
    ) as session:
        async with session.get(f"http://x.test:{site.port}/listed") as resp:
            assert resp.status == 200
        with pytest.raises(AddressRefused) as info:
            async with session.get(f"http://x.test:{site.port + 1}/unlisted"):
                pass
        assert info.value.reason == "map_port"
        with pytest.raises(AddressRefused):  # port 0 names no port; never connected to
            async with session.get("http://x.test:0/zero"):
                pass
    assert site.hits == Counter({"/listed": 1})


async def test_unmapped_names_and_literals_do_not_reach_the_server(site: LoopbackSite) -> None:
    stub = StubResolver()
    async with _session([], stub) as session:
        for url, reason in [
            (f"http://site.test:{site.port}/a", "reserved_name"),
            ("http://unmapped.test/b", "reserved_name"),
            (f"http://127.0.0.1:{site.port}/c", "non_global_address"),
            (f"http://[::ffff:127.0.0.1]:{site.port}/d", "non_global_address"),
            (f"http://0x7f000001:{site.port}/e", "non_global_address"),
            (f"http://127.1:{site.port}/f", "non_global_address"),
        ]:
            # AddressRefused is not an OSError, so aiohttp does not wrap it.
            with pytest.raises(AddressRefused) as info:
                async with session.get(url):
                    pass
            assert info.value.reason == reason, url
    assert sum(site.hits.values()) == 0
    assert stub.asked == []


async def test_a_followed_redirect_to_a_refused_address_is_refused(site: LoopbackSite) -> None:
    # RFC 9110 s.15.4: a redirect names a new target; each hop opens its own connection,
    # which passes the guard again.
    async with _session(["site.test=127.0.0.1"], ports=(site.port,)) as session:
        for target in (
            f"http://127.0.0.1:{site.port}/secret",
            f"http://other.test:{site.port}/secret",
            f"http://2130706433:{site.port}/secret",
        ):
            with pytest.raises(AddressRefused):
                async with session.get(
                    f"http://site.test:{site.port}/hop", params={"to": target}
                ):
                    pass
        # The same redirect is fine when it stays on a mapped name.
        async with session.get(
            f"http://site.test:{site.port}/hop",
            params={"to": f"http://site.test:{site.port}/secret"},
        ) as resp:
            assert resp.status == 200
    assert site.hits["/hop"] == 4
    assert site.hits["/secret"] == 1  # only the mapped hop got through
