"""Operator host controls, validated in one place (frontier/controls.py): host names,
values and list filters, each refused in one line when wrong; no Redis involved.

Host names are canonicalised as URLs are: RFC 3986 s.6.2.2.1 (case), s.6.2.3 (default
port, empty path), IDNA (RFC 5891) for non-ASCII names; the politeness key is the host
(or its registrable domain) exactly as admission derives it.
"""

from __future__ import annotations

import math
from typing import Any

import pytest

from frontier import controls
from frontier.exceptions import ConfigError
from frontier.settings import JobSettings


def settings_for(**over: Any) -> JobSettings:
    data: dict[str, Any] = {"name": "t", "store": {"partitions": 4}}
    data.update(over)
    return JobSettings.model_validate(data)


@pytest.mark.parametrize("raw,key", [
    ("site-0013.test", "site-0013.test"),
    ("http://site-0013.test/", "site-0013.test"),  # a URL: its host
    ("SITE-0012.TEST", "site-0012.test"),  # RFC 3986 s.6.2.2.1: case-insensitive host
    ("Site-0012.Test.", "site-0012.test"),  # trailing dot (common practice, no source)
    ("http://site.test:80/x?y#z", "site.test"),  # RFC 3986 s.6.2.3: the default port
    ("site.test:8080", "site.test"),  # politeness keys are hosts, ports apart
    ("https://user@site.test/", "site.test"),
    ("bücher.test", "xn--bcher-kva.test"),  # IDNA (RFC 5891), as admission encodes it
    ("[::1]", "[::1]"),
    ("127.0.0.1", "127.0.0.1"),
])
def test_host_names_are_canonicalised_like_urls(raw: str, key: str) -> None:
    assert controls.host_command(settings_for(), raw, "pause").host == key


def test_politeness_key_by_domain() -> None:
    s = settings_for(politeness={"key": "domain"})
    # names under the reserved .test TLD (RFC 2606) group by their last two labels
    assert controls.host_command(s, "http://www.shop.site.test/", "pause").host == "site.test"


def test_politeness_key_by_address() -> None:
    s = settings_for(politeness={"key": "ip"})
    # addresses in their standard text form (RFC 5952 s.4 for IPv6), as the resolver gives them
    assert controls.host_command(s, "[::1]", "pause").host == "::1"
    assert controls.host_command(s, "0:0:0:0:0:0:0:1", "pause").host == "::1"
    assert controls.host_command(s, "127.0.0.1", "pause").host == "127.0.0.1"
    assert controls.host_command(s, "Unresolved.TEST", "pause").host == "unresolved.test"


@pytest.mark.parametrize("raw", [
    "", " ", "a b.test", "a\nb.test", "x" * 5000, "ftp://a.test/", "http://", "[::1", "a..b.test",
    "http://a.test:99999/", "a.test\x00", "\ud800.test", "%zz.test", "*.test",
])
def test_odd_host_names_are_refused_in_one_line(raw: str) -> None:
    with pytest.raises(ConfigError) as err:
        controls.host_command(settings_for(), raw, "pause")
    assert "\n" not in str(err.value) and len(str(err.value)) < 300


@pytest.mark.parametrize("action,value", [
    ("boost", "nan"), ("boost", "NaN"), ("boost", "inf"), ("boost", "-inf"), ("boost", "-1"),
    ("boost", "0"), ("boost", "1000.5"), ("boost", "1e9"), ("boost", ""), ("boost", None),
    ("boost", "x"), ("boost", "1" * 5000), ("boost", "1e400"), ("boost", "0x10"),
    ("delay", "nan"), ("delay", "inf"), ("delay", "-1"), ("delay", "1e9"), ("delay", "120.001"),
    ("delay", ""), ("delay", None), ("delay", " "), ("delay", math.nan), ("delay", math.inf),
    ("pause", "1"), ("clear", "0"), ("clear", ""), ("explode", None), ("", None), ("BOOST", "2"),
    ("list", None),
])
def test_bad_values_and_actions_are_refused_in_one_line(action: str, value: Any) -> None:
    with pytest.raises(ConfigError) as err:
        controls.host_command(settings_for(), "a.test", action, value)
    assert "\n" not in str(err.value) and len(str(err.value)) < 300


@pytest.mark.parametrize("action,value,expected", [
    ("boost", "1000", 1000.0), ("boost", "0.001", 0.001), ("boost", 2, 2.0), ("boost", " 3 ", 3.0),
    ("delay", "0", 0.0), ("delay", "120", 120.0), ("delay", "2.5", 2.5), ("pause", None, None),
])
def test_good_values_in_their_ranges(action: str, value: Any, expected: float | None) -> None:
    assert controls.host_command(settings_for(), "a.test", action, value).value == expected


@pytest.mark.parametrize("raw,ok", [
    (None, True), ("paused", True), ("blocked", True), ("boosted", True), ("delayed", True),
    ("active", False), ("", False), ("PAUSED", False), ("x" * 1000, False),
])
def test_list_filter(raw: str | None, ok: bool) -> None:
    if ok:
        assert controls.list_filter(raw) == raw
    else:
        with pytest.raises(ConfigError):
            controls.list_filter(raw)
