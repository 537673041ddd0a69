"""The address guard's host map: entries and lookup, the loopback-only rule and its
opt-in, the settings and command-line flags that build it, and fuzzed entries.

These tests send no traffic: a map off loopback is refused before any connection. The
autouse audit hook from tests/guardkit.py blocks and records every ``socket.connect``
outside loopback made while a test of this module runs.
"""

from __future__ import annotations

import argparse
import ipaddress
import socket
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from frontier.cli import _job_flags, _overrides
from frontier.exceptions import AddressRefused, ConfigError
from frontier.settings import FetchSettings, load_settings
from workers.fetcher import Fetcher
from frontier.guard import GuardedResolver, host_map_from_settings, parse_host_map
from tests.guardkit import (  # noqa: F401  (outside_connects: autouse fixture)
    DEFAULT_PORTS,
    LOOPBACK,
    TEST_NET,
    UA,
    StubResolver,
    _is_loopback,
    outside_connects,
)


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

