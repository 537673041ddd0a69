"""The address guard: special-purpose ranges, IP literal spellings, host map, aiohttp.

Classification tests send no traffic. The fetch tests talk only to an aiohttp server
on 127.0.0.1 that the test starts; every other destination is refused before a socket
is opened (the server counts its hits to prove it). An audit hook watches every
``socket.connect`` made while a test of this module runs and blocks (and records) any
destination outside loopback, so a guard bug cannot send traffic elsewhere either.
"""

from __future__ import annotations

import argparse
import ipaddress
import socket
import sys
from collections import Counter
from collections.abc import AsyncIterator, Iterator
from typing import Any

import aiohttp
import pytest
from aiohttp import web
from aiohttp.abc import AbstractResolver, ResolveResult
from hypothesis import given, settings
from hypothesis import strategies as st

from frontier.cli import _job_flags, _overrides
from frontier.exceptions import AddressRefused, ConfigError, FetchError
from frontier.settings import FetchSettings, load_settings
from workers.fetcher import Fetcher
from frontier.guard import (
    GuardedConnector,
    GuardedResolver,
    HostMap,
    check_address,
    host_map_from_settings,
    parse_host_map,
    parse_ip_literal,
)

LOOPBACK = "127.0.0.1"
CLIENT_TIMEOUT = aiohttp.ClientTimeout(total=5)
UA = "sluice-test/0.1 (+http://operator.test/contact)"
# RFC 5737 s.3: TEST-NET-1, documentation only. Used as a non-loopback map target that
# is parsed and refused, never connected to (the audit hook below blocks it regardless).
TEST_NET = "192.0.2.1"
# RFC 9110 s.4.2.1 / s.4.2.2: the default ports of http and https.
DEFAULT_PORTS = (80, 443)

# -- no connection leaves loopback while this module runs -------------------------------------

_WATCHES: list[list[Any]] = []


def _is_loopback(host: str) -> bool:
    # RFC 1122 s.3.2.1.3 (127.0.0.0/8) and RFC 4291 s.2.5.3 (::1).
    try:
        addr = ipaddress.ip_address(host.split("%", 1)[0])
    except ValueError:
        return False
    return addr.is_loopback and (addr.version == 4 or addr == ipaddress.IPv6Address("::1"))


def _audit(event: str, args: tuple[Any, ...]) -> None:
    """PEP 578 audit hook: record and block socket connects outside loopback."""
    if event != "socket.connect" or not _WATCHES:
        return
    address = args[1]
    if isinstance(address, tuple) and not _is_loopback(str(address[0])):
        _WATCHES[-1].append(address)
        raise PermissionError(f"test module refuses to connect to {address!r}")


sys.addaudithook(_audit)


@pytest.fixture(autouse=True)
def outside_connects() -> Iterator[list[Any]]:
    """Non-loopback connects this test attempted (each one blocked); must stay empty."""
    seen: list[Any] = []
    _WATCHES.append(seen)
    try:
        yield seen
    finally:
        _WATCHES.remove(seen)
    assert seen == [], f"connects outside loopback were attempted: {seen}"

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


# --------------------------------------------------------------------------- host map


def test_host_map_entries_and_lookup() -> None:
    # Project contract (frontier/guard.py); host names compare case-insensitively
    # (RFC 4343) and a trailing dot is the absolute form of the same name (RFC 1034 s.3.1).
    host_map = parse_host_map(
        ["*.test=127.0.0.1", "*.deep.site.test=127.0.0.2:8401", "exact.test=[::1]:9000"]
    )
    assert host_map.lookup("site.test") == ("127.0.0.1", None)
    assert host_map.lookup("test") == ("127.0.0.1", None)  # the suffix itself
    assert host_map.lookup("A.B.Site.TEST.") == ("127.0.0.1", None)
    assert host_map.lookup("x.deep.site.test") == ("127.0.0.2", 8401)  # longest suffix
    assert host_map.lookup("deep.site.test") == ("127.0.0.2", 8401)
    assert host_map.lookup("exact.test") == ("::1", 9000)  # exact beats the wildcard
    assert host_map.lookup("sub.exact.test") == ("127.0.0.1", None)
    assert host_map.lookup("site.example") is None
    assert parse_host_map(["one.test=::1"]).lookup("one.test") == ("::1", None)


@pytest.mark.parametrize(
    "entry",
    [
        "site.test",
        "=127.0.0.1",
        "site.test=",
        "site.test=not-an-ip",
        "site.test=127.0.0.1:0",
        "site.test=127.0.0.1:70000",
        "site.test=127.0.0.1:http",
        "site.test=[::1",
        "site.test=[::1]x",
        "bad host.test=127.0.0.1",
        "*.=127.0.0.1",
        "site.test=127.0.0.1:\u00b2",  # a superscript two: str.isdigit() but not a port
        "site.test=127.0.0.1:\u0661\u0662",  # Arabic-Indic: RFC 3986 s.3.2.3 port = *DIGIT
        "site.test=127.0.0.1:08080x",
        "site.test=[::1%eth0]:8080",  # a zone id names an interface, not a destination
        "ab\n.test=127.0.0.1",  # RFC 1035 s.2.3.1: letters, digits, hyphen only
        "site.test=0.0.0.0:8080",  # unspecified: no destination (RFC 1122 s.3.2.1.3)
        "site.test=[::]:8080",
    ],
)
def test_invalid_host_map_entries_name_the_entry(entry: str) -> None:
    with pytest.raises(ConfigError) as info:
        parse_host_map([entry])
    assert repr(entry) in str(info.value)


@pytest.mark.parametrize(
    "value",
    # RFC 1122 s.3.2.1.3: all of 127.0.0.0/8 is loopback; RFC 4291 s.2.5.3: ::1.
    ["127.0.0.1:8080", "127.0.0.2", "127.255.255.254:1", "[::1]:8080", "::1", "[::1]"],
)
def test_loopback_targets_need_no_opt_in(value: str) -> None:
    target = parse_host_map([f"a.test={value}"]).lookup("a.test")
    assert target is not None and _is_loopback(target[0])


@pytest.mark.parametrize(
    "value",
    [
        f"{TEST_NET}:8080",  # RFC 5737 TEST-NET-1
        TEST_NET,
        "[2001:db8::1]:8080",  # RFC 3849 documentation prefix
        "10.0.0.5:8080",  # RFC 1918 private-use: still not loopback
        "[::ffff:127.0.0.1]:8080",  # IPv4-mapped: loopback only as 127.0.0.0/8 or ::1
        "128.0.0.1:8080",  # just past 127.0.0.0/8
    ],
)
def test_remote_map_needs_the_opt_in(value: str) -> None:
    entry = f"far.test={value}"
    with pytest.raises(ConfigError) as info:
        parse_host_map([entry])
    message = str(info.value)
    assert repr(entry) in message and "fetch.map_remote" in message and "loopback" in message
    allowed = parse_host_map([entry], remote=True).lookup("far.test")
    assert allowed is not None and not _is_loopback(allowed[0])


async def test_remote_map_is_refused_before_any_connection() -> None:
    # The fetcher is never built, so nothing can connect; the audit hook (autouse
    # fixture) would also block and record any connect outside loopback.
    entry = f"far.test={TEST_NET}:8080"
    with pytest.raises(ConfigError) as info:
        Fetcher(FetchSettings(map_hosts=(entry,)), UA)
    assert repr(entry) in str(info.value) and "fetch.map_remote" in str(info.value)
    with pytest.raises(ConfigError):
        host_map_from_settings(load_settings(None, {"fetch": {"map_hosts": [entry]}}).fetch)


async def test_remote_map_with_the_opt_in_still_keeps_the_port_rule(
    outside_connects: list[Any],
) -> None:
    # With fetch.map_remote the entry parses; a URL port outside fetch.map_ports is still
    # refused before a connection (none is attempted: the audit list stays empty).
    fetch = FetchSettings(map_hosts=(f"far.test={TEST_NET}",), map_remote=True)
    host_map = host_map_from_settings(fetch)
    assert host_map.lookup("far.test") == (TEST_NET, None)
    resolver = GuardedResolver.from_settings(fetch, resolver=StubResolver())
    with pytest.raises(AddressRefused) as info:  # asked of the guard alone: no HTTP request
        await resolver.resolve("far.test", 8080, socket.AF_UNSPEC)
    assert info.value.reason == "map_port"
    assert outside_connects == []


@pytest.mark.parametrize("ports", [(0,), (65536,), (80, -1)])
def test_bad_map_ports_name_the_setting(ports: tuple[int, ...]) -> None:
    # RFC 9293 s.3.1: a TCP port is 16 bits; 0 is no destination. The settings refuse
    # them before any host map is built.
    with pytest.raises(ConfigError) as info:
        load_settings(None, {"fetch": {"map_hosts": ["*.test=127.0.0.1"], "map_ports": ports}})
    assert "fetch.map_ports" in str(info.value)


def test_settings_reach_the_host_map() -> None:
    fetch = load_settings(
        None, {"fetch": {"map_hosts": ["*.test=127.0.0.1"], "map_ports": [8401]}}
    ).fetch
    host_map = host_map_from_settings(fetch)
    assert host_map.ports == frozenset({8401})
    assert host_map.lookup("a.test") == (LOOPBACK, None)
    assert host_map_from_settings(FetchSettings()).ports == frozenset(DEFAULT_PORTS)


# --------------------------------------------------------------------------- flags


def _flags(*argv: str) -> dict[str, Any]:
    p = argparse.ArgumentParser()
    _job_flags(p)
    return _overrides(p.parse_args(list(argv)))


def test_map_flags_set_the_settings() -> None:
    overrides = _flags(
        "--map-hosts", "far.test=127.0.0.1", "--map-port", "8401", "--map-port", "8402",
        "--map-remote",
    )
    assert overrides["fetch"]["map_ports"] == [8401, 8402]
    assert overrides["fetch"]["map_remote"] is True
    fetch = load_settings(None, overrides).fetch
    assert (fetch.map_ports, fetch.map_remote) == ((8401, 8402), True)
    assert host_map_from_settings(fetch).ports == frozenset({8401, 8402})


def test_without_map_flags_the_settings_keep_their_defaults() -> None:
    overrides = _flags("--map-hosts", "*.test=127.0.0.1")
    assert set(overrides["fetch"]) == {"map_hosts"}  # a job file's values are not overridden
    fetch = load_settings(None, overrides).fetch
    assert (fetch.map_ports, fetch.map_remote) == (DEFAULT_PORTS, False)
    remote = load_settings(None, _flags("--map-hosts", f"x.test={TEST_NET}")).fetch
    with pytest.raises(ConfigError) as info:  # a remote map without --map-remote
        host_map_from_settings(remote)
    assert "--map-remote" in str(info.value)


def test_map_port_flag_takes_only_numbers() -> None:
    p = argparse.ArgumentParser()
    _job_flags(p)
    with pytest.raises(SystemExit):
        p.parse_args(["--map-port", "http"])


# --------------------------------------------------------------------------- fuzz

_MAP_PIECES = st.sampled_from(
    ["*.", "site", ".", "test", "=", "127.0.0.1", "127.0.0.9", "::1", "[", "]", ":", "8080",
     "0", "65536", TEST_NET, "%25", "%", " ", "\n", "-", "_", "x", "\u00b2", "0x7f000001"]
)


def _check_entry(entry: str, remote: bool) -> None:
    """Any entry is either a valid map whose target follows the rules, or a ConfigError
    naming the entry; no other exception escapes."""
    try:
        host_map = parse_host_map([entry], remote=remote)
    except ConfigError as exc:
        assert repr(entry) in str(exc)
        return
    pattern = entry.strip().partition("=")[0].strip()
    name = pattern[2:] if pattern.startswith("*.") else pattern
    target = host_map.lookup(name)
    assert target is not None
    ip, port = target
    addr = ipaddress.ip_address(ip)  # a plain address, no zone id
    assert not addr.is_unspecified
    assert remote or _is_loopback(ip)
    assert port is None or 1 <= port <= 65535


@pytest.mark.fuzz
@given(entry=st.text(), remote=st.booleans())
def test_fuzz_any_text_is_a_map_or_a_config_error(entry: str, remote: bool) -> None:
    _check_entry(entry, remote)


_LABELS = st.from_regex(r"[a-zA-Z0-9_]([a-zA-Z0-9_-]{0,8}[a-zA-Z0-9_])?", fullmatch=True)
_ADDRESSES = st.one_of(
    st.ip_addresses(v=4, network="127.0.0.0/8").map(str),
    st.ip_addresses(v=6, network="::1/128").map(lambda a: f"[{a}]"),
    st.sampled_from([TEST_NET, "[2001:db8::1]", "[::ffff:127.0.0.1]", "0.0.0.0", "[::1%1]"]),
)
_PORTS = st.one_of(st.just(""), st.integers(min_value=-1, max_value=70_000).map(lambda n: f":{n}"))
_GRAMMAR_ENTRIES = st.builds(
    lambda wild, labels, addr, port, pad: f"{pad}{wild}{'.'.join(labels)}{pad}={pad}{addr}{port}",
    st.sampled_from(["", "*."]),
    st.lists(_LABELS, min_size=1, max_size=4),
    _ADDRESSES,
    _PORTS,
    st.sampled_from(["", " ", "\t"]),
)


@pytest.mark.fuzz
@given(
    entry=st.one_of(_GRAMMAR_ENTRIES, st.lists(_MAP_PIECES, max_size=12).map("".join)),
    remote=st.booleans(),
)
def test_fuzz_entry_shaped_text_is_a_map_or_a_config_error(entry: str, remote: bool) -> None:
    _check_entry(entry, remote)


# --------------------------------------------------------------------------- resolver


class StubResolver(AbstractResolver):
    """Answers from a table; records every name asked (proves whether DNS was used)."""

    def __init__(self, answers: dict[str, list[str]] | None = None) -> None:
        self.answers = answers or {}
        self.asked: list[str] = []

    async def resolve(
        self, host: str, port: int = 0, family: socket.AddressFamily = socket.AF_INET
    ) -> list[ResolveResult]:
        self.asked.append(host)
        if host not in self.answers:
            raise socket.gaierror(socket.EAI_NONAME, "stub: no such name")
        return [
            ResolveResult(
                hostname=host,
                host=ip,
                port=port,
                family=socket.AF_INET6 if ":" in ip else socket.AF_INET,
                proto=0,
                flags=0,
            )
            for ip in self.answers[host]
        ]

    async def close(self) -> None:
        return None


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
