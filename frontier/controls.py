"""Operator host controls: the one place admin input is validated.

``sluice host`` and the admin API hand their raw text here. :func:`host_command` turns a
host name, an action and a value into a :class:`HostCommand`, or raises ``ConfigError``
with one line that says what is wrong; nothing reaches Redis before that. The control
script checks its arguments again before its first write (frontier/scripts/control.lua).

A host is named the way URLs name it: ``SITE.test``, ``site.test.``, ``site.test:8080``
and ``http://site.test/page`` all mean the politeness key ``site.test``, found as
admission finds it (frontier/urls.py canonical form, then the job's politeness key). A
name the frontier has no record of is refused, unless asked for on purpose (``new``): a
host may be paused or blocked before it is found.
"""

from __future__ import annotations

import ipaddress
import math
from typing import TYPE_CHECKING, Any, Literal, get_args

from pydantic import (
    BaseModel, ConfigDict, Field, ValidationError, ValidationInfo, field_validator, model_validator,
)

from frontier.exceptions import ConfigError, UrlError
from frontier.settings import JobSettings
from frontier.urls import MAX_HOST_LENGTH, canonicalize, host_of, politeness_key

if TYPE_CHECKING:
    from frontier.store import FrontierStore

Action = Literal["pause", "resume", "block", "unblock", "boost", "delay", "clear", "trust",
                 "untrust"]
HOST_ACTIONS: tuple[str, ...] = get_args(Action)
VALUE_ACTIONS = frozenset({"boost", "delay"})  # the actions that take a value
ListFilter = Literal["paused", "blocked", "boosted", "delayed"]
LIST_FILTERS: tuple[str, ...] = get_args(ListFilter)

MIN_BOOST = 0.001  # priority multipliers an operator may set (common practice, no source)
MAX_BOOST = 1000.0
MAX_NAME_CHARS = 2048  # a host name or URL naming a host
MAX_VALUE_CHARS = 32  # a number as text
ECHO_CHARS = 60  # how much of a refused input an error message repeats

ACTION_HELP = {
    "pause": "stop leasing the host's URLs (they stay queued)",
    "resume": "lease a paused host again",
    "block": "set the host's queued URLs aside (counted excluded:host_blocked), admit no more",
    "unblock": "queue a blocked host's URLs again",
    "boost": f"multiply the host's priority by VALUE ({MIN_BOOST:g} to {MAX_BOOST:g})",
    "delay": "at least VALUE seconds between fetches (0 to politeness.max_delay_s)",
    "clear": "reset the host's boost, operator delay and schedule (due now)",
    "trust": "mark the host trusted: trust 1, never a link-spam suspect, its links vouch",
    "untrust": "mark the host untrusted: trust 0, a link-spam suspect (slow, last in line)",
}


def echo(raw: object) -> str:
    """A refused input, quoted and shortened, for a one-line message."""
    text = repr(raw)
    return text if len(text) <= ECHO_CHARS else text[: ECHO_CHARS - 3] + "..."


def host_key(name: str, settings: JobSettings) -> str:
    """The politeness key a host name or URL stands for, as admission derives it.

    In ``politeness.key = 'ip'`` mode a key is an address (or a host that did not
    resolve): an address is taken in its standard text form, a name as its canonical host;
    names are not resolved here.
    """
    if not isinstance(name, str):
        raise ValueError("a host name is text")
    text = name.strip()
    if not text:
        raise ValueError("a host name is needed")
    if len(text) > MAX_NAME_CHARS:
        raise ValueError(f"a host name or URL is at most {MAX_NAME_CHARS} characters")
    mode = settings.politeness.key
    if mode == "ip":
        try:
            return str(ipaddress.ip_address(text.strip("[]")))
        except ValueError:
            pass
    url = text if "://" in text else f"http://{text}/"
    try:
        canonical = canonicalize(url, max_length=max(settings.scope.max_url_length, len(url) + 64),
                                 schemes=frozenset(settings.scope.schemes))
        host = host_of(canonical)
    except UrlError as exc:
        raise ValueError(f"{echo(name)} is not a host name or URL ({exc})") from None
    if len(host) > MAX_HOST_LENGTH + 2:  # an IPv6 literal keeps its brackets
        raise ValueError(f"{echo(name)} is not a host name")
    return host if mode == "ip" else politeness_key(host, mode)


class HostCommand(BaseModel):
    """One validated operator action on one politeness key.

    ``value`` is the boost multiplier or the delay in seconds (None for other actions);
    ``new`` allows a key the frontier has no record of yet.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    host: str
    action: Action
    value: float | None = Field(default=None, allow_inf_nan=False)
    new: bool = False

    @field_validator("host", mode="before")
    @classmethod
    def _canonical_host(cls, raw: Any, info: ValidationInfo) -> str:
        return host_key(raw, _settings(info))

    @field_validator("action", mode="before")
    @classmethod
    def _known_action(cls, raw: Any) -> Any:
        if raw not in HOST_ACTIONS:
            raise ValueError(f"{echo(raw)} is not one of {', '.join(HOST_ACTIONS)}")
        return raw

    @field_validator("value", mode="before")
    @classmethod
    def _number(cls, raw: Any) -> Any:
        if raw is None or isinstance(raw, (int, float)) and not isinstance(raw, bool):
            return raw
        if not isinstance(raw, str):
            raise ValueError(f"{echo(raw)} is not a number")
        text = raw.strip()
        if not text:
            raise ValueError("a number is needed")
        if len(text) > MAX_VALUE_CHARS:
            raise ValueError(f"{echo(raw)} is not a number of at most {MAX_VALUE_CHARS} characters")
        try:
            number = float(text)
        except ValueError:
            raise ValueError(f"{echo(raw)} is not a number") from None
        if "_" in text or text.lower().startswith(("0x", "-0x", "+0x")):
            raise ValueError(f"{echo(raw)} is not a plain decimal number")
        return number

    @model_validator(mode="after")
    def _value_in_range(self, info: ValidationInfo) -> HostCommand:
        action, value = self.action, self.value
        if action not in VALUE_ACTIONS:
            if value is not None:
                raise ValueError(f"{action} takes no value")
            return self
        if value is None:
            raise ValueError(f"{action} needs a value: {ACTION_HELP[action]}")
        if not math.isfinite(value):
            raise ValueError(f"{action} needs a finite number")
        if action == "boost" and not MIN_BOOST <= value <= MAX_BOOST:
            raise ValueError(f"boost {value:g} is outside {MIN_BOOST:g} to {MAX_BOOST:g}")
        if action == "delay":
            longest = _settings(info).politeness.max_delay_s
            if not 0 <= value <= longest:
                raise ValueError(f"delay {value:g} s is outside 0 to {longest:g} s "
                                 "(politeness.max_delay_s)")
        return self


def _settings(info: ValidationInfo) -> JobSettings:
    context = info.context or {}
    settings = context.get("settings")
    if not isinstance(settings, JobSettings):
        raise TypeError("HostCommand is validated with context={'settings': JobSettings}")
    return settings


def _one_line(exc: ValidationError) -> ConfigError:
    """A pydantic error as one line: the first problem, named by its field."""
    first = exc.errors(include_url=False)[0]
    message = str(first["msg"]).removeprefix("Value error, ")
    field = ".".join(str(p) for p in first["loc"])
    if first["type"] in ("finite_number", "float_parsing", "float_type"):
        message = f"{echo(first.get('input'))} is not a finite number"
    elif first["type"].startswith("bool"):
        message = f"{echo(first.get('input'))} is not yes or no (1, 0, true, false)"
    return ConfigError(f"{field}: {message}" if field else message)


def host_command(settings: JobSettings, host: Any, action: Any, value: Any = None, *,
                 new: Any = False) -> HostCommand:
    """Validate raw admin input; raises ConfigError with one line."""
    try:
        return HostCommand.model_validate(
            {"host": host, "action": action, "value": value, "new": new},
            context={"settings": settings})
    except ValidationError as exc:
        raise _one_line(exc) from None


def lookup_key(settings: JobSettings, host: Any) -> str:
    """The politeness key of a host name given to a read (host info); ConfigError if odd."""
    try:
        return host_key(host, settings)
    except ValueError as exc:
        raise ConfigError(f"host: {exc}") from None


def list_filter(raw: Any) -> str | None:
    """The state a host list is filtered by (None: every host under control)."""
    if raw is None:
        return None
    if raw not in LIST_FILTERS:
        raise ConfigError(f"state: {echo(raw)} is not one of {', '.join(LIST_FILTERS)}")
    return str(raw)


async def apply(store: FrontierStore, command: HostCommand) -> dict[str, Any]:
    """Run a validated command; the host's stored fields after it.

    A host the frontier has no record of is refused (ConfigError) unless ``command.new``;
    host records are never removed, so the check cannot go stale before the control runs
    (the control script checks again).
    """
    if not command.new and not await store.host_known(command.host):
        raise ConfigError(f"unknown host {echo(command.host)}: the frontier has no record of it "
                          "(to control it before it is found, ask for a new host)")
    state = await store.control(command.host, command.action, command.value,
                                create=command.new)
    info = await store.host_info(command.host)
    return {"host": command.host, "action": command.action, **info, "state": state}


def format_host_list(rows: list[dict[str, Any]]) -> str:
    """The hosts under control as a plain table, one host a line."""
    head = ("host", "state", "boost", "delay_s", "queued", "held", "due_ms")
    lines = [tuple(str(x) for x in head)]
    for r in rows:
        lines.append((r["host"], str(r["state"]), f"{r['boost']:g}", f"{r['delay_s']:g}",
                      str(r["queued"]), str(r["held"]),
                      "-" if r["due_ms"] is None else str(r["due_ms"])))
    widths = [max(len(line[i]) for line in lines) for i in range(len(head))]
    return "\n".join("  ".join(cell.ljust(w) for cell, w in zip(line, widths)).rstrip()
                     for line in lines)
