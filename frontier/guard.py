"""The address guard: fetch workers connect only to globally reachable addresses.

Three layers, all raising :class:`~frontier.exceptions.AddressRefused`:

* :func:`check_address` classifies one IP address (IPv4-mapped, IPv4-compatible,
  6to4 and NAT64 forms are unwrapped and their IPv4 address is checked too).
* :class:`GuardedResolver` is the aiohttp resolver: a host-map entry wins (the only way
  to reach loopback; see :class:`HostMap` for its port rule), an IP literal in any
  spelling is checked without DNS, a
  special-use name (``.test``, ``.localhost`` ...) is refused without DNS, and any other
  name is resolved and *every* address checked. Only checked addresses are handed back,
  so aiohttp connects to exactly what was checked (no DNS-rebinding window).
* :class:`GuardedConnector` is needed because aiohttp does not call the resolver for a
  host that looks like an IP address (``http://127.0.0.1/``, ``http://[::1]/``); it checks
  every request's host before a connection is taken from the pool or opened, which
  also covers each redirect hop that aiohttp follows.

How a fetcher catches it: ``AddressRefused`` is not an ``OSError``, so aiohttp lets it
propagate unwrapped out of ``session.get()`` / ``session.request()``. Catch
``AddressRefused`` *before* ``aiohttp.ClientError``::

    try:
        async with session.get(url, allow_redirects=False) as resp: ...
    except AddressRefused as exc:      # permanent: exclude the URL, reason exc.reason
        ...
    except aiohttp.ClientError as exc: # network trouble: FetchError(..., retryable=True)
        ...

Sessions must be made with ``trust_env=False`` and no proxy (a proxy would connect on
the fetcher's behalf, past the guard); :class:`GuardedConnector` refuses proxied requests.
"""

from __future__ import annotations

import ipaddress
import re
import socket
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import aiohttp
from aiohttp.abc import AbstractResolver, ResolveResult

from frontier.exceptions import AddressRefused, ConfigError, FetchError
from frontier.settings import FetchSettings

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address

# Reasons carried by AddressRefused.
REASON_NON_GLOBAL = "non_global_address"
REASON_RESERVED_NAME = "reserved_name"
REASON_INVALID = "invalid_address"
REASON_PROXY = "proxy_not_allowed"
REASON_MAP_PORT = "map_port"

# RFC 9110 s.4.2.1 and s.4.2.2: the default ports of http and https; the ports a
# port-less host-map entry lets a URL keep unless fetch.map_ports says otherwise.
DEFAULT_MAP_PORTS = (80, 443)
# What a host map may point at without fetch.map_remote: RFC 1122 s.3.2.1.3 (127.0.0.0/8)
# and RFC 4291 s.2.5.3 (::1).
LOOPBACK_NETWORKS = (ipaddress.IPv4Network("127.0.0.0/8"), ipaddress.IPv6Network("::1/128"))

# Special-use names that must never reach DNS unless the host map names them.
# RFC 6761 s.6.2 (test), s.6.3 (localhost), s.6.4 (invalid), s.6.5 (example);
# RFC 6762 (local, multicast DNS on the LAN); RFC 8375 (home.arpa); RFC 7686 (onion).
RESERVED_NAME_SUFFIXES = ("test", "localhost", "invalid", "example", "local", "home.arpa", "onion")

# Ranges refused in addition to ``not is_global``: the IANA IPv4/IPv6 Special-Purpose
# Address Registries (RFC 6890) mark them not globally reachable (or they are
# deprecated), but the ipaddress tables of some Python versions call them global.
EXTRA_REFUSED_NETWORKS = tuple(
    ipaddress.ip_network(net)
    for net in (
        "0.0.0.0/8",  # "this network", RFC 791
        "100.64.0.0/10",  # shared address space, RFC 6598
        "192.0.0.0/24",  # IETF protocol assignments, RFC 6890
        "192.88.99.0/24",  # deprecated 6to4 relay anycast, RFC 7526
        "198.18.0.0/15",  # benchmarking, RFC 2544
        "fec0::/10",  # deprecated site-local, RFC 3879
        "5f00::/16",  # SRv6 SIDs, RFC 9602
        "3fff::/20",  # documentation, RFC 9637
    )
)

# RFC 6052 s.2.1: the NAT64 well-known prefix embeds an IPv4 address in its low 32 bits.
NAT64_WELL_KNOWN_PREFIX = ipaddress.IPv6Network("64:ff9b::/96")
# RFC 4291 s.2.5.5.1: deprecated IPv4-compatible addresses, ::a.b.c.d.
IPV4_COMPATIBLE_PREFIX = ipaddress.IPv6Network("::/96")
LAST_NON_COMPATIBLE = 1  # :: and ::1 are the unspecified and loopback addresses
IPV4_BITS = 32
IPV4_MASK = (1 << IPV4_BITS) - 1

PORT_MIN = 1
PORT_MAX = 65535
IPV4_PARTS_MAX = 4
IPV4_OCTET_MAX = 255
OCTET_BITS = 8

_LABEL = re.compile(r"[a-z0-9_](?:[a-z0-9_-]{0,61}[a-z0-9_])?")
_PORT = re.compile(r"[0-9]{1,5}")  # ASCII digits only (RFC 3986 s.3.2.3)
_HEX_PART = re.compile(r"^0[xX][0-9a-fA-F]*$")
_OCTAL_PART = re.compile(r"^0[0-7]*$")
_DECIMAL_PART = re.compile(r"^[1-9][0-9]*$")
_ZONE_ESCAPE = "%25"  # RFC 6874: "%" before a zone id is percent-encoded in a URL


# --------------------------------------------------------------------------- host map


def _normalise_host(host: str) -> str:
    host = host.strip().lower()
    return host[:-1] if host.endswith(".") else host


def _valid_hostname(name: str) -> bool:
    return bool(name) and all(_LABEL.fullmatch(label) for label in name.split("."))


def is_loopback(addr: IPAddress) -> bool:
    """True for 127.0.0.0/8 and ::1 only (an IPv4-mapped or zoned form is not)."""
    if isinstance(addr, ipaddress.IPv6Address) and addr.scope_id:
        return False
    return any(addr in net for net in LOOPBACK_NETWORKS if net.version == addr.version)


def _valid_port(text: str) -> bool:
    return bool(_PORT.fullmatch(text)) and PORT_MIN <= int(text) <= PORT_MAX


def _parse_map_value(entry: str, value: str, remote: bool) -> tuple[str, int | None]:
    """``127.0.0.1``, ``127.0.0.1:8401``, ``[::1]``, ``[::1]:9000`` or ``::1``.

    A target outside loopback is refused unless ``remote`` (fetch.map_remote) allows it.
    """
    port_text: str | None = None
    if value.startswith("["):
        inner, sep, rest = value[1:].partition("]")
        if not sep or (rest and not rest.startswith(":")):
            raise ConfigError(f"host map entry {entry!r}: bad bracketed address {value!r}")
        address_text, port_text = inner, (rest[1:] if rest else None)
    elif value.count(":") == 1:
        address_text, port_text = value.split(":")
    else:
        address_text = value
    try:
        address = ipaddress.ip_address(address_text)
    except ValueError:
        raise ConfigError(
            f"host map entry {entry!r}: {address_text!r} is not an IP address"
        ) from None
    if isinstance(address, ipaddress.IPv6Address) and address.scope_id:
        raise ConfigError(f"host map entry {entry!r}: a zone id names no destination")
    if address.is_unspecified or address.is_multicast:
        raise ConfigError(f"host map entry {entry!r}: {address} is not a destination")
    if not remote and not is_loopback(address):
        raise ConfigError(
            f"host map entry {entry!r}: {address} is not a loopback address (127.0.0.0/8, "
            "::1); set fetch.map_remote = true (--map-remote) to send traffic there"
        )
    if port_text is None:
        return str(address), None
    if not _valid_port(port_text):
        raise ConfigError(f"host map entry {entry!r}: bad port {port_text!r}")
    return str(address), int(port_text)


@dataclass(frozen=True)
class HostMap:
    """Host name -> (IP, optional port); ``*.suffix`` covers the suffix and its subdomains.

    An entry with a port sends every URL of its hosts to that port. A port-less entry
    keeps the URL's port only if it is one of ``ports`` (fetch.map_ports), so a page
    cannot reach any other service listening on the mapped address.
    """

    exact: dict[str, tuple[str, int | None]] = field(default_factory=dict)
    suffixes: dict[str, tuple[str, int | None]] = field(default_factory=dict)
    ports: frozenset[int] = frozenset(DEFAULT_MAP_PORTS)

    def lookup(self, host: str) -> tuple[str, int | None] | None:
        """The mapped address of ``host``; an exact entry beats the longest suffix."""
        name = _normalise_host(host)
        if name in self.exact:
            return self.exact[name]
        labels = name.split(".")
        for start in range(len(labels)):
            suffix = ".".join(labels[start:])
            if suffix in self.suffixes:
                return self.suffixes[suffix]
        return None

    def destination(self, host: str, port: int) -> tuple[str, int] | None:
        """Where a request to ``host:port`` goes, or None when ``host`` is not mapped.

        ``port`` 0 asks for the address only (no connection is made with it). Raises
        ``AddressRefused("map_port")`` for a port-less entry and a port not in ``ports``.
        """
        mapped = self.lookup(host)
        if mapped is None:
            return None
        ip, mapped_port = mapped
        if mapped_port is not None:
            return ip, mapped_port
        if port and port not in self.ports:
            allowed = ", ".join(str(p) for p in sorted(self.ports)) or "none"
            raise AddressRefused(
                REASON_MAP_PORT,
                f"{host!r} is mapped to {ip} without a port; port {port} is not in "
                f"fetch.map_ports ({allowed})",
            )
        return ip, port

    def __bool__(self) -> bool:
        return bool(self.exact or self.suffixes)


def parse_host_map(
    entries: Sequence[str],
    *,
    ports: Sequence[int] = DEFAULT_MAP_PORTS,
    remote: bool = False,
) -> HostMap:
    """Build a :class:`HostMap` from ``pattern=address[:port]`` entries.

    ``ports`` are the URL ports a port-less entry keeps (fetch.map_ports); ``remote``
    (fetch.map_remote) allows targets outside loopback. Raises ConfigError naming the
    entry or the setting at fault.
    """
    bad = [p for p in ports if not PORT_MIN <= p <= PORT_MAX]
    if bad:
        raise ConfigError(f"fetch.map_ports: {bad} are not ports ({PORT_MIN}-{PORT_MAX})")
    exact: dict[str, tuple[str, int | None]] = {}
    suffixes: dict[str, tuple[str, int | None]] = {}
    for entry in entries:
        pattern, sep, value = entry.strip().partition("=")
        pattern, value = pattern.strip(), value.strip()
        if not sep or not pattern or not value:
            raise ConfigError(f"host map entry {entry!r}: expected 'host=address[:port]'")
        target = _parse_map_value(entry, value, remote)
        wildcard = pattern.startswith("*.")
        name = _normalise_host(pattern[2:] if wildcard else pattern)
        if not _valid_hostname(name):
            raise ConfigError(f"host map entry {entry!r}: {pattern!r} is not a host name")
        (suffixes if wildcard else exact)[name] = target
    return HostMap(exact, suffixes, frozenset(ports))


def host_map_from_settings(fetch: FetchSettings) -> HostMap:
    """The host map of a job's fetch settings (map_hosts, map_ports, map_remote)."""
    return parse_host_map(fetch.map_hosts, ports=fetch.map_ports, remote=fetch.map_remote)


# --------------------------------------------------------------------------- addresses


def _embedded_ipv4(addr: ipaddress.IPv6Address) -> ipaddress.IPv4Address | None:
    """The IPv4 address an IPv6 address stands for, if it is one of the wrapping forms."""
    if addr.ipv4_mapped is not None:  # ::ffff:a.b.c.d, RFC 4291 s.2.5.5.2
        return addr.ipv4_mapped
    if addr.sixtofour is not None:  # 2002:aabb:ccdd::/48, RFC 3056
        return addr.sixtofour
    if addr in NAT64_WELL_KNOWN_PREFIX:
        return ipaddress.IPv4Address(int(addr) & IPV4_MASK)
    if addr in IPV4_COMPATIBLE_PREFIX and int(addr) > LAST_NON_COMPATIBLE:
        return ipaddress.IPv4Address(int(addr) & IPV4_MASK)
    return None


def _refusal(addr: IPAddress) -> str | None:
    """Why ``addr`` itself is not a fit destination, or None."""
    if addr.is_unspecified:
        return "unspecified"
    if addr.is_loopback:
        return "loopback"
    if addr.is_link_local:
        return "link-local"
    if addr.is_multicast:
        return "multicast"
    if addr.is_private:
        return "private or special-purpose"
    if addr.is_reserved:
        return "reserved"
    if any(addr in net for net in EXTRA_REFUSED_NETWORKS if net.version == addr.version):
        return "special-purpose"
    if not addr.is_global:
        return "not globally reachable"
    return None


def check_address(ip: str | IPAddress) -> None:
    """Raise ``AddressRefused("non_global_address")`` unless ``ip`` is globally reachable."""
    if isinstance(ip, str):
        try:
            addr: IPAddress = ipaddress.ip_address(ip.strip("[]"))
        except ValueError:
            raise AddressRefused(REASON_INVALID, repr(ip)) from None
    else:
        addr = ip
    if isinstance(addr, ipaddress.IPv6Address) and addr.scope_id:
        addr = ipaddress.IPv6Address(str(addr).split("%", 1)[0])
    if isinstance(addr, ipaddress.IPv6Address):
        inner = _embedded_ipv4(addr)
        if inner is not None:
            why = _refusal(inner)
            if why is not None:
                raise AddressRefused(REASON_NON_GLOBAL, f"{addr} wraps {inner} ({why})")
            if addr not in IPV4_COMPATIBLE_PREFIX:
                return  # mapped, 6to4, NAT64: the packets reach the IPv4 address just checked
    why = _refusal(addr)
    if why is not None:
        raise AddressRefused(REASON_NON_GLOBAL, f"{addr} ({why})")


def _ipv4_number(part: str) -> int | None:
    """One part of a legacy IPv4 spelling (inet_aton(3)): decimal, 0-octal or 0x-hex."""
    if _HEX_PART.match(part):
        digits = part[2:]
        return int(digits, 16) if digits else 0
    if _OCTAL_PART.match(part):
        return int(part, 8)
    if _DECIMAL_PART.match(part):
        return int(part)
    return None


def _parse_legacy_ipv4(host: str) -> ipaddress.IPv4Address | None:
    """``a.b.c.d``, ``a.b.c``, ``a.b``, ``a`` in decimal, octal or hex (inet_aton(3))."""
    parts = host.split(".")
    if len(parts) > 1 and parts[-1] == "":
        parts = parts[:-1]  # one trailing dot, as a URL host may carry
    if not 1 <= len(parts) <= IPV4_PARTS_MAX:
        return None
    numbers = [_ipv4_number(part) for part in parts]
    if any(n is None for n in numbers):
        return None
    values = [n for n in numbers if n is not None]
    *leading, last = values
    last_bits = IPV4_BITS - OCTET_BITS * len(leading)
    if any(n > IPV4_OCTET_MAX for n in leading) or last >= 1 << last_bits:
        raise AddressRefused(REASON_INVALID, f"{host!r} is an out-of-range IPv4 number")
    value = last
    for index, octet in enumerate(leading):
        value |= octet << (IPV4_BITS - OCTET_BITS * (index + 1))
    return ipaddress.IPv4Address(value)


def parse_ip_literal(host: str) -> IPAddress | None:
    """The address a URL host spells, in any form a resolver would accept, or None.

    Recognises dotted quads, the legacy inet_aton(3) spellings (``2130706433``,
    ``0x7f000001``, ``0177.0.0.1``, ``127.1``), bracketed or bare IPv6 (a zone id,
    ``%25eth0`` or ``%eth0``, is dropped). A host that is all numbers but out of
    range raises ``AddressRefused("invalid_address")`` rather than reach DNS.
    """
    text = host.strip()
    bracketed = text.startswith("[") or text.endswith("]")
    if bracketed:
        if not (text.startswith("[") and text.endswith("]")):
            raise AddressRefused(REASON_INVALID, repr(host))
        text = text[1:-1]
    if bracketed or ":" in text:
        text = text.replace(_ZONE_ESCAPE, "%").split("%", 1)[0]
        try:
            return ipaddress.IPv6Address(text)
        except ValueError:
            raise AddressRefused(REASON_INVALID, repr(host)) from None
    return _parse_legacy_ipv4(text)


def reserved_name(host: str) -> bool:
    """True for special-use names (RFC 6761 and friends) that never go to DNS."""
    name = _normalise_host(host)
    return any(name == s or name.endswith("." + s) for s in RESERVED_NAME_SUFFIXES)


# --------------------------------------------------------------------------- aiohttp


def _result(hostname: str, ip: str, port: int) -> ResolveResult:
    family = socket.AF_INET6 if ":" in ip else socket.AF_INET
    return ResolveResult(
        hostname=hostname,
        host=ip,
        port=port,
        family=family,
        proto=0,
        flags=socket.AI_NUMERICHOST | socket.AI_NUMERICSERV,
    )


class GuardedResolver(AbstractResolver):
    """An aiohttp resolver that hands out only addresses the guard accepts."""

    def __init__(
        self,
        host_map: HostMap,
        *,
        allow_private: bool = False,
        resolver: AbstractResolver | None = None,
    ) -> None:
        self._host_map = host_map
        self._allow_private = allow_private
        self._inner = resolver

    @classmethod
    def from_settings(
        cls, fetch: FetchSettings, *, resolver: AbstractResolver | None = None
    ) -> GuardedResolver:
        """The guard for a job's fetch settings; raises ConfigError for a bad host map."""
        return cls(host_map_from_settings(fetch), allow_private=fetch.allow_private,
                   resolver=resolver)

    def _check(self, addr: IPAddress | str) -> None:
        if not self._allow_private:
            check_address(addr)

    def precheck(self, host: str, port: int = 0) -> list[ResolveResult] | None:
        """Decide ``host`` without DNS: the mapped or literal address, or None for a name.

        Raises AddressRefused for a refused literal, an unmapped special-use name, or a
        port a port-less host-map entry does not allow.
        """
        mapped = self._host_map.destination(host, port)
        if mapped is not None:
            ip, mapped_port = mapped
            return [_result(host, ip, mapped_port)]
        literal = parse_ip_literal(host)
        if literal is not None:
            self._check(literal)
            return [_result(host, str(literal), port)]
        if reserved_name(host):
            raise AddressRefused(REASON_RESERVED_NAME, f"{host!r} has no host map entry")
        return None

    async def resolve(
        self, host: str, port: int = 0, family: socket.AddressFamily = socket.AF_INET
    ) -> list[ResolveResult]:
        """Resolve ``host``; raises AddressRefused, or OSError when DNS fails."""
        decided = self.precheck(host, port)
        if decided is not None:
            return decided
        if self._inner is None:
            self._inner = aiohttp.ThreadedResolver()
        answers = await self._inner.resolve(host, port, family)
        if not answers:
            raise OSError(f"no addresses for {host!r}")
        for answer in answers:
            try:
                self._check(answer["host"])
            except AddressRefused as exc:
                raise AddressRefused(exc.reason, f"{host!r} resolves to {exc.args[0]}") from None
        return answers

    async def check_url_host(self, host: str) -> None:
        """Raise AddressRefused if a request to ``host`` would be refused (may query DNS)."""
        try:
            await self.resolve(host, 0, socket.AF_UNSPEC)
        except OSError as exc:
            raise FetchError("dns_error", f"{host!r}: {exc}", retryable=True) from exc

    async def close(self) -> None:
        if self._inner is not None:
            await self._inner.close()


class GuardedConnector(aiohttp.TCPConnector):
    """A TCPConnector whose every request host passes the guard before connecting.

    aiohttp skips the resolver for IP-literal hosts, so literals are checked here;
    names are left to the :class:`GuardedResolver` the connector resolves with.
    """

    def __init__(self, resolver: GuardedResolver, **kwargs: Any) -> None:
        super().__init__(resolver=resolver, **kwargs)
        self._guard = resolver

    async def connect(self, req: Any, *args: Any, **kwargs: Any) -> Any:
        if req.proxy is not None:
            raise AddressRefused(REASON_PROXY, str(req.proxy))
        port = req.url.port
        if not port:  # 0 means "address only" to precheck; a request always names a port
            raise AddressRefused(REASON_INVALID, f"{req.url.host!r}: no port to connect to")
        self._guard.precheck(req.url.raw_host or "", port)
        return await super().connect(req, *args, **kwargs)
