"""What the address-guard tests share (tests/test_guard.py, tests/test_host_map.py):
the addresses they name, a stub resolver, and an audit hook that keeps every connection
on loopback.

Importing this module installs a PEP 578 audit hook once per process; the autouse
fixture ``outside_connects`` (imported into each test module that uses it) arms it for
one test, so every ``socket.connect`` outside loopback made during that test is blocked
and recorded, and the test fails if any was attempted.
"""

from __future__ import annotations

import ipaddress
import socket
import sys
from collections.abc import Iterator
from typing import Any

import pytest
from aiohttp.abc import AbstractResolver, ResolveResult

LOOPBACK = "127.0.0.1"
UA = "sluice-test/0.1 (+http://operator.test/contact)"
# RFC 5737 s.3: TEST-NET-1, documentation only. Used as a non-loopback map target that
# is parsed and refused, never connected to (the audit hook below blocks it regardless).
TEST_NET = "192.0.2.1"
# RFC 9110 s.4.2.1 / s.4.2.2: the default ports of http and https.
DEFAULT_PORTS = (80, 443)

# -- no connection leaves loopback while a test using this fixture runs ---------------------

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
