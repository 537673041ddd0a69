"""``sluice explain URL``: why a URL is where it is in the frontier.

:func:`explain` gathers what the store knows (state, cash, depth, host fields and
budget, the host's place in its partition's schedule) and what can be recomputed from
the URL alone (trap signs). :func:`format_explain` renders it as plain text; the dict
itself is JSON-ready.

The outcome of one URL after its lease ended (fetched, failed, excluded) is counted per
partition in Redis, and written with its reason to the fetch logs: given the logs
(``sluice explain --log FILE``, or the crawl's own log next to its state folder),
:func:`explain` shows the URL's lines from them. What is not kept anywhere: how many
in-links and distinct hosts gave a queued URL its cash: keeping that per URL would cost
more bytes per queued URL than the frontier's memory goal (mean URL length + 24 bytes).
"""

from __future__ import annotations

import textwrap
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import orjson

from frontier.exceptions import UrlError
from frontier.model import CASH_SCALE, CASH_UNIT, decode_score
from frontier.priority import trap_factor, trap_signs
from frontier.store import FrontierStore
from frontier.urls import canonicalize, fingerprint, host_of, politeness_key

QUEUED_HOT = "queued (hot window)"
QUEUED_COLD = "queued (cold list)"
LEASED = "leased"
DEAD = "dead"
SEEN = "seen, not queued"
UNKNOWN = "unknown"
INVALID = "invalid"
WRAP = 100  # width of the plain-text notes

STATE_NOTES = {
    QUEUED_HOT: "waits among the host's best URLs, sorted by cash; gains credit from new in-links",
    QUEUED_COLD: "waits beyond the host's hot window in arrival order; in-links found now add no credit",
    LEASED: "held by a worker until the lease expires",
    DEAD: "failed too often; kept in the dead letters",
    SEEN: "admitted before and no longer queued: fetched, failed or excluded (blocked host, "
          "absolute host budget, scope); the fetch log has its outcome and reason",
    UNKNOWN: "never admitted, or refused for its host's earned budget (such URLs are not "
             "remembered, so they may be admitted when offered again)",
}
CASH_SOURCES_NOTE = (
    "not tracked per URL: the cash shown is the URL's first share plus every credit it "
    "received while in its host's hot window; counting its in-links and linking hosts would "
    "cost more bytes per queued URL than the memory goal (mean URL length + 24). Per host, "
    "distinct linking hosts are counted (HyperLogLog, about 0.81% standard error)."
)


def _state(facts: dict[str, Any]) -> str:
    if facts["lease"] is not None:
        return LEASED
    if facts["hot_score"] is not None:
        return QUEUED_HOT
    if facts["cold_position"] is not None:
        return QUEUED_COLD
    if facts["dead_reason"] is not None:
        return DEAD
    return SEEN if facts["seen"] else UNKNOWN


def _budget(store: FrontierStore, linking: int, admitted: int, seeded: bool) -> dict[str, Any]:
    prio = store.settings.priority
    absolute = store.settings.budget.max_pages_per_host
    earned = None
    if prio.host_budget_base > 0 and not seeded:
        earned = prio.host_budget_base + prio.host_budget_per_linking_host * linking
    limits = [x for x in (earned, absolute) if x is not None]
    limit = min(limits) if limits else None
    return {
        "base": prio.host_budget_base,
        "per_linking_host": prio.host_budget_per_linking_host,
        "earned": earned,
        "absolute": absolute,
        "limit": limit,
        "admitted": admitted,
        "left": None if limit is None else max(0, limit - admitted),
    }


def _schedule(facts: dict[str, Any], now_ms: int) -> dict[str, Any]:
    place = "not scheduled"
    if facts["claimed_until_ms"] is not None:
        place = "claimed by a worker"
    elif facts["host"].get("lease"):
        place = "leased (one lease per host at a time)"
    elif facts["ready_rank"] is not None:
        place = f"ready, rank {facts['ready_rank'] + 1} of {facts['ready_size']}"
    elif facts["due_ms"] is not None:
        wait = (int(facts["due_ms"]) - now_ms) / 1000
        place = f"due in {wait:.1f} s" if wait > 0 else "due now (ready at the next lease)"
    return {
        "partition": facts["partition"],
        "place": place,
        "priority": facts["priority"],
        "ready_rank": None if facts["ready_rank"] is None else facts["ready_rank"] + 1,
        "ready_size": facts["ready_size"],
        "due_ms": None if facts["due_ms"] is None else int(facts["due_ms"]),
        "due_size": facts["due_size"],
        "claimed_until_ms": None if facts["claimed_until_ms"] is None else int(facts["claimed_until_ms"]),
    }


LOG_LINES_SHOWN = 5  # a URL's latest fetch-log lines shown by explain


def logged_outcomes(url: str, logs: Iterable[Path]) -> list[dict[str, Any]]:
    """The fetch-log lines of one canonical URL, oldest first (the last few)."""
    needle = orjson.dumps(url)  # the URL as it appears in a line, quoted and escaped
    found: list[dict[str, Any]] = []
    for path in logs:
        try:
            with open(path, "rb") as lines:
                for line in lines:
                    if needle in line:
                        try:
                            entry = orjson.loads(line)
                        except orjson.JSONDecodeError:
                            continue  # a torn last line
                        if entry.get("url") == url:
                            found.append(entry)
        except OSError:
            continue
    return found[-LOG_LINES_SHOWN:]


async def explain(store: FrontierStore, url: str, logs: Iterable[Path] = ()) -> dict[str, Any]:
    """What the frontier knows about ``url`` (JSON-ready); ``logs`` are fetch logs to
    search for its outcomes."""
    s = store.settings
    try:
        canonical = canonicalize(url, max_length=s.scope.max_url_length,
                                 schemes=frozenset(s.scope.schemes))
    except UrlError as exc:
        return {"url": url, "state": INVALID, "note": f"refused as url_{exc.reason}"}
    host = host_of(canonical)
    key = politeness_key(host, s.politeness.key)
    facts = await store.url_facts(canonical, fingerprint(canonical), key)
    state = _state(facts)
    lease = facts["lease"]
    score = lease.score if lease is not None else facts["hot_score"]
    if score is None:
        score = facts["cold_score"]
    out: dict[str, Any] = {"url": canonical, "host": host, "politeness_key": key,
                           "state": state, "note": STATE_NOTES[state]}
    if score is not None:
        cash, depth = decode_score(score)
        out.update(score=int(score), cash=cash, depth=depth)
    if state == QUEUED_HOT:
        out["queue"] = {"window": "hot", "rank": facts["hot_rank"] + 1, "of": facts["hot_size"],
                        "cold": facts["cold_size"]}
    elif state == QUEUED_COLD:
        out["queue"] = {"window": "cold", "position": facts["cold_position"] + 1,
                        "of": facts["cold_size"], "hot": facts["hot_size"]}
    if lease is not None:
        out["lease"] = {"id": lease.id, "expires_ms": lease.expires_ms, "attempts": lease.attempts}
    out["attempts"] = facts["attempts"]
    if facts["dead_reason"] is not None:
        out["dead_reason"] = facts["dead_reason"]
    fields = facts["host"]
    admitted = int(fields.get("admitted", 0))
    seeded = fields.get("seeded") == "1"
    out["host_fields"] = {
        "known": bool(fields),
        "state": fields.get("state"),
        "boost": float(fields.get("boost", 1.0)),
        "admitted": admitted,
        "fetched": int(fields.get("fetched", 0)),
        "queued": facts["hot_size"] + facts["cold_size"],
        "linking_hosts": facts["linking_hosts"],
        "seeded": seeded,
        "budget": _budget(store, facts["linking_hosts"], admitted, seeded),
        "next_fetch_ms": int(fields["next"]) if "next" in fields else None,
        "delay_ms": int(fields.get("delay_ms", 0)),
        "crawl_delay_ms": int(fields.get("crawl_ms", 0)),
    }
    out["schedule"] = _schedule(facts, int(store.clock() * 1000))
    out["trap"] = {"signs": trap_signs(canonical, s.priority),
                   "factor": trap_factor(canonical, s.priority)}
    out["cash_sources"] = CASH_SOURCES_NOTE
    out["logged"] = [{k: entry.get(k) for k in ("outcome", "reason", "fetched_at", "status",
                                                "warc_file", "warc_offset")}
                     for entry in logged_outcomes(canonical, logs)]
    return out


def format_explain(info: dict[str, Any]) -> str:
    """Plain-text rendering of :func:`explain`'s result."""
    lines = [f"url:      {info['url']}", f"state:    {info['state']}: {info['note']}"]
    if info["state"] == INVALID:
        return "\n".join(lines)
    if "cash" in info:
        lines.append(f"cash:     {info['cash']:.6f}  depth: {info['depth']}  (score {info['score']})")
    queue = info.get("queue")
    if queue and queue["window"] == "hot":
        lines.append(f"queue:    hot window, rank {queue['rank']} of {queue['of']} "
                     f"({queue['cold']} more in the cold list)")
    elif queue:
        lines.append(f"queue:    cold list, position {queue['position']} of {queue['of']}")
    if "lease" in info:
        lease = info["lease"]
        lines.append(f"lease:    {lease['id']}, expires at {lease['expires_ms']} ms, "
                     f"attempt {lease['attempts'] + 1}")
    if info.get("attempts"):
        lines.append(f"attempts: {info['attempts']} failed so far")
    if "dead_reason" in info:
        lines.append(f"dead:     {info['dead_reason']}")
    for entry in info.get("logged", ()):
        reason = f" ({entry['reason']})" if entry.get("reason") else ""
        status = f" HTTP {entry['status']}" if entry.get("status") else ""
        warc = f", {entry['warc_file']} @ {entry['warc_offset']}" if entry.get("warc_file") else ""
        lines.append(f"logged:   {entry['fetched_at']} {entry['outcome']}{reason}{status}{warc}")
    h = info["host_fields"]
    b = h["budget"]
    limit = "none" if b["limit"] is None else str(b["limit"])
    if h["seeded"]:
        earned = "none (a seed's host: the operator vouches for it)"
    elif b["earned"] is None:
        earned = "off"
    else:
        earned = f"{b['base']} + {b['per_linking_host']} x {h['linking_hosts']} = {b['earned']}"
    lines += [
        f"host:     {info['politeness_key']} ({h['state'] or 'not known'}), boost x{h['boost']:g}",
        f"          admitted {h['admitted']}, fetched {h['fetched']}, queued {h['queued']}",
        f"          linking hosts {h['linking_hosts']}" + (", has seeds" if h["seeded"] else ""),
        f"budget:   earned {earned}; absolute {b['absolute'] or 'none'}; limit {limit}"
        + ("" if b["left"] is None else f", {b['left']} left"),
    ]
    sch = info["schedule"]
    lines.append(f"schedule: partition {sch['partition']}: {sch['place']}")
    if sch["priority"] is not None:
        lines.append(f"          host priority: best cash x boost = "
                     f"{sch['priority'] / (CASH_UNIT * CASH_SCALE):.6f}")
    trap = info["trap"]
    signs = ", ".join(trap["signs"]) or "none"
    lines.append(f"trap:     signs {signs}; cash factor {trap['factor']:g}")
    lines += textwrap.wrap(info["cash_sources"], width=WRAP, initial_indent="sources:  ",
                           subsequent_indent=" " * len("sources:  "))
    return "\n".join(lines)
