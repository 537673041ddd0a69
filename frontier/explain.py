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
from frontier.focus import explain_focus, format_focus
from frontier.mirrors import format_mirror, mirror_state
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


def _budget(store: FrontierStore, linking: int, admitted: int, seeded: bool,
            trusted: int = 0, suspect: bool = False) -> dict[str, Any]:
    """The host's budget as the admit script works it out (frontier/scripts/admit.lua)."""
    prio = store.settings.priority
    absolute = store.settings.budget.max_pages_per_host
    earned = None
    good = min(trusted, linking)
    if prio.host_budget_base > 0 and not seeded:
        earned = prio.host_budget_base
        if not suspect:
            earned += (prio.host_budget_per_linking_host * good
                       + prio.host_budget_per_untrusted_host * (linking - good))
    limits = [x for x in (earned, absolute) if x is not None]
    limit = min(limits) if limits else None
    return {
        "base": prio.host_budget_base,
        "per_linking_host": prio.host_budget_per_linking_host,
        "per_untrusted_host": prio.host_budget_per_untrusted_host,
        "trusted_linking_hosts": good,
        "suspect": suspect,
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


def _spam(store: FrontierStore, fields: dict[str, str], counts: dict[str, int]) -> dict[str, Any]:
    """The host's link-spam signals (docs/priority.md, "Link spam")."""
    prio = store.settings.priority
    tracked = "trust" in fields
    trust = float(fields["trust"]) if tracked else None
    mark = fields.get("mark")
    if mark:
        source = f"marked {mark} by the operator"
    elif fields.get("seeded") == "1":
        source = "a seed's host"
    elif not tracked:
        source = "not tracked (no link from a host of known trust)"
    elif fields.get("tfrom"):
        source = (f"the linking hosts' shares; the largest, {float(fields.get('tbest', 0)):.4f}, "
                  f"from {fields['tfrom']}")
    else:
        source = "no trusted host links here"
    suspect = fields.get("suspect") == "1"
    recip = counts.get("reciprocal_hosts", 0)
    endorsed = counts.get("trusted_one_way", 0)
    if suspect and mark == "untrusted":
        why = "marked untrusted by the operator"
    elif suspect:
        why = (f"trust below {prio.trust_threshold:g} and {recip} reciprocal hosts > "
               f"{prio.reciprocal_ratio:g} x {endorsed} trusted one-way linking hosts")
    else:
        why = None
    untrusted = tracked and trust is not None and trust < prio.trust_threshold and not (
        mark == "trusted" or fields.get("seeded") == "1")
    # endorsed (admit.lua): untrusted, not a suspect, enough trusted one-way linking hosts
    endorsed_host = untrusted and not suspect and fields.get("pf") == "1"
    return {
        "trust": trust,
        "trust_source": source,
        "mark": mark,
        "untrusted": untrusted,
        "endorsed": endorsed_host,
        "suspect": suspect,
        "suspect_because": why,
        "reciprocal_hosts": recip,
        "trusted_one_way_linking_hosts": endorsed,
        "trusted_linking_hosts": counts.get("trusted_linking_hosts", 0),
        "out_hosts": counts.get("out_hosts", 0),
        "priority_factor": float(fields.get("pf", 1.0)),
        "lease_gap_s": (prio.suspect_delay_s if suspect else
                        prio.untrusted_delay_s if untrusted and not endorsed_host else 0.0),
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
    counts = facts.get("spam", {})
    suspect = fields.get("suspect") == "1"
    out["host_fields"] = {
        "known": bool(fields),
        "state": fields.get("state"),
        "boost": float(fields.get("boost", 1.0)),
        "admitted": admitted,
        "fetched": int(fields.get("fetched", 0)),
        "queued": facts["hot_size"] + facts["cold_size"],
        "linking_hosts": facts["linking_hosts"],
        "seeded": seeded,
        "budget": _budget(store, facts["linking_hosts"], admitted, seeded,
                          counts.get("trusted_linking_hosts", 0), suspect),
        "next_fetch_ms": int(fields["next"]) if "next" in fields else None,
        "delay_ms": int(fields.get("delay_ms", 0)),
        "crawl_delay_ms": int(fields.get("crawl_ms", 0)),
    }
    out["spam"] = _spam(store, fields, counts)
    out["mirror"] = await mirror_state(store, key)
    out["schedule"] = _schedule(facts, int(store.clock() * 1000))
    out["trap"] = {"signs": trap_signs(canonical, s.priority),
                   "factor": trap_factor(canonical, s.priority)}
    out["cash_sources"] = CASH_SOURCES_NOTE
    out["logged"] = [{k: entry.get(k) for k in ("outcome", "reason", "fetched_at", "status",
                                                "warc_file", "warc_offset")}
                     for entry in logged_outcomes(canonical, logs)]
    out["focus"] = explain_focus(s, out["logged"])
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
    elif b["suspect"]:
        earned = f"{b['base']} (a link-spam suspect earns nothing more)"
    else:
        good = b["trusted_linking_hosts"]
        earned = (f"{b['base']} + {b['per_linking_host']} x {good} trusted + "
                  f"{b['per_untrusted_host']} x {h['linking_hosts'] - good} other linking hosts"
                  f" = {b['earned']}")
    lines += [
        f"host:     {info['politeness_key']} ({h['state'] or 'not known'}), boost x{h['boost']:g}",
        f"          admitted {h['admitted']}, fetched {h['fetched']}, queued {h['queued']}",
        f"          linking hosts {h['linking_hosts']}" + (", has seeds" if h["seeded"] else ""),
        f"budget:   earned {earned}; absolute {b['absolute'] or 'none'}; limit {limit}"
        + ("" if b["left"] is None else f", {b['left']} left"),
    ]
    sp = info["spam"]
    trust = "not tracked" if sp["trust"] is None else f"{sp['trust']:.4f}"
    standing = ("a link-spam suspect: " + sp["suspect_because"] if sp["suspect"]
                else f"untrusted but endorsed by {sp['trusted_one_way_linking_hosts']} trusted hosts "
                "it does not link back to: ranked and paced as trusted" if sp["endorsed"]
                else "untrusted" if sp["untrusted"] else "trusted" if sp["trust"] is not None
                else "no signal")
    lines += [
        f"trust:    {trust} ({sp['trust_source']}); {standing}",
        f"links:    {sp['reciprocal_hosts']} reciprocal hosts, {sp['trusted_linking_hosts']} "
        f"trusted linking hosts ({sp['trusted_one_way_linking_hosts']} not linked back), "
        f"{sp['out_hosts']} hosts linked to",
        f"          priority factor {sp['priority_factor']:g}"
        + (f", at least {sp['lease_gap_s']:g} s between fetches" if sp["lease_gap_s"] else ""),
    ]
    if "mirror" in info:
        lines += textwrap.wrap(format_mirror(info["mirror"]), width=WRAP,
                               initial_indent="copies:   ", subsequent_indent=" " * 10)
    sch = info["schedule"]
    lines.append(f"schedule: partition {sch['partition']}: {sch['place']}")
    if sch["priority"] is not None:
        lines.append(f"          host priority: best cash x boost x trust factor = "
                     f"{sch['priority'] / (CASH_UNIT * CASH_SCALE):.6f}")
    trap = info["trap"]
    signs = ", ".join(trap["signs"]) or "none"
    lines.append(f"trap:     signs {signs}; cash factor {trap['factor']:g}")
    lines += format_focus(info["focus"]) if "focus" in info else []
    lines += textwrap.wrap(info["cash_sources"], width=WRAP, initial_indent="sources:  ",
                           subsequent_indent=" " * len("sources:  "))
    return "\n".join(lines)
