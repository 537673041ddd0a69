"""End-to-end: a focused crawl of a topical web over real HTTP on loopback, real Redis.

The real worker parses each served page, scores it with the job's relevance model
(example files against background files) and steers its links' cash; judged from the
fetch log against the web's own labels (synthweb.topical).
"""

from __future__ import annotations

import asyncio
import json
from pathlib import Path
from typing import Any

import pytest

from frontier.explain import explain_focus, logged_outcomes
from frontier.redis_client import connect
from frontier.runner import crawl
from frontier.settings import load_settings
from synthweb.server import SyntheticServer
from synthweb.adversarial import breadth_first
from synthweb.topical import TopicalWeb, generate, harvest, training_pages
from tests.servers import RedisServer

UA = "sluice-test/0.1 (+http://operator.test/contact)"
SUBJECT = "tideclocks"
BUDGET = 300


def _write_training(folder: Path) -> dict[str, list[str]]:
    examples, background = training_pages(SUBJECT, 9)
    out: dict[str, list[str]] = {"examples": [], "background": []}
    folder.mkdir(parents=True, exist_ok=True)
    for what, texts in (("examples", examples), ("background", background)):
        for i, text in enumerate(texts):
            path = folder / f"{what}-{i}.html"
            path.write_text(f"<html><body><p>{text}</p></body></html>", encoding="utf-8")
            out[what].append(str(path))
    return out


def _run(tw: TopicalWeb, out: Path, redis_url: str, focus: dict[str, Any]) -> list[dict[str, Any]]:
    async def go() -> list[dict[str, Any]]:
        client = connect(redis_url)
        await client.flushall()
        await client.aclose()
        async with SyntheticServer(tw.web, latency=0.001) as server:
            port = server.port
            settings = load_settings(None, {
                "name": "focus-e2e", "seeds": list(tw.seeds), "redis": {"url": redis_url},
                "scope": {"allow_hosts": ["*.test"]},
                "budget": {"max_pages": BUDGET},
                "priority": {"untrusted_delay_s": 0.0, "suspect_delay_s": 0.0,
                             "probation_s": 0.0},
                "politeness": {"min_delay_s": 0.0, "response_time_factor": 0.0},
                "fetch": {"user_agent": UA, "map_hosts": [f"*.test=127.0.0.1:{port}"],
                          "concurrency": 8},
                "focus": focus,
            })
            await crawl(settings, out, 1, quiet=True)
        lines = [json.loads(x) for x in (out / "fetches.jsonl").read_text().splitlines()]
        return [x for x in lines if x["outcome"] == "fetched"]

    return asyncio.run(go())


@pytest.fixture(scope="module")
def web() -> TopicalWeb:
    return generate(SUBJECT, 9)


def test_focused_crawl_labels_pages_and_finds_the_subject_sooner(
        web: TopicalWeb, tmp_path: Path, redis_server: RedisServer) -> None:
    files = _write_training(tmp_path / "training")
    fetched = _run(web, tmp_path / "out", redis_server.url, files)
    assert len(fetched) == BUDGET
    # the worker's relevance agrees with the web's labels (off_topic below the threshold)
    agree = sum(("off_topic" in (x["reason"] or "")) == (web.labels[x["url"]] != SUBJECT)
                for x in fetched)
    assert agree / len(fetched) >= 0.95
    order = [x["url"] for x in fetched]
    bfs = [u for u, _ in breadth_first(web.web.pages, web.seeds)]
    focused_rate = harvest(order, web.labels, SUBJECT, BUDGET)
    bfs_rate = harvest(bfs, web.labels, SUBJECT, BUDGET)
    assert focused_rate is not None and bfs_rate is not None
    assert focused_rate >= 1.5 * bfs_rate, (focused_rate, bfs_rate)
    # explain reads the log: an off-topic page says so
    off = next(x["url"] for x in fetched if "off_topic" in (x["reason"] or ""))
    settings = load_settings(None, {"focus": files})
    info = explain_focus(settings, logged_outcomes(off, [tmp_path / "out" / "fetches.jsonl"]))
    assert info["page"].startswith("off topic")


def test_off_topic_pages_are_archived_but_not_expanded_with_factor_zero(
        web: TopicalWeb, tmp_path: Path, redis_server: RedisServer) -> None:
    files = _write_training(tmp_path / "training")
    fetched = _run(web, tmp_path / "out", redis_server.url, {**files, "off_topic_factor": 0.0})
    off = [x for x in fetched if "off_topic" in (x["reason"] or "")]
    assert off and all(x["warc_file"] for x in off)  # kept: archived
    expanded = {x["url"] for x in fetched if "off_topic" not in (x["reason"] or "")}
    reached = set(web.seeds) | {ln.url for u in expanded for ln in web.web.pages[u].links}
    assert {x["url"] for x in fetched} <= reached  # nothing found only through an off-topic page
