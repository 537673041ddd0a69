"""Mirror hosts: a host whose fetched pages mostly copy another host's pages is reported
and its budget cut to the new pages it has shown plus a slack.

Source: Bharat, Broder, Dean & Henzinger, "A comparison of techniques to find mirrored
hosts on the WWW", JASIS 51(12), 2000 (WWW 1999 workshop): two hosts are mirrors when
they serve largely the same pages. The thresholds (pages seen, share of copies, slack)
are common practice, no source. Every test runs on one Redis server and on a Redis
Cluster (``make_store``): the mirror script touches one partition, one slot.
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from hypothesis import given
from hypothesis import strategies as st
from warcio.archiveiterator import ArchiveIterator

from frontier.admission import Admission
from frontier.embedded import free_port
from frontier.exceptions import ConfigError
from frontier.explain import explain, format_explain
from frontier.mirrors import MIRROR_REASON, MirrorHosts, mirror_state, read_mirrors
from frontier.model import Candidate, Completion, Outcome
from frontier.redis_client import connect
from frontier.settings import load_settings
from frontier.store import FrontierStore
from frontier.urls import Scope
from frontier.keys import Keys
from frontier.simhash import NearDuplicateIndex, hamming, simhash64
from synthweb.copies import CopyServer, CopySpec, CopyWeb, copy_web
from synthweb.server import render_page
from workers.parser import parse_html
from tests.conftest import StoreFactory

MIN_PAGES, SHARE, SLACK = 10, 0.6, 5  # the defaults


def mirror_store(make_store: StoreFactory, **dedupe: Any) -> FrontierStore:
    return make_store(politeness={"min_delay_s": 0.0, "response_time_factor": 0.0},
                      budget={"max_pages_per_host": None},
                      priority={"host_budget_base": 0}, dedupe=dedupe)


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


def urls(host: str, n: int, start: int = 0) -> list[Candidate]:
    return [Candidate(f"http://{host}/p{i}.html", depth=1) for i in range(start, start + n)]


def copied(host: str, n: int, start: int = 0,
           of: str = "orig.test") -> list[tuple[str, str, str | None]]:
    """Pages p<start>.. of ``host``, each a copy of the page of that name on ``of``."""
    return [(host, f"http://{host}/p{i}.html", f"http://{of}/c{i}.html")
            for i in range(start, start + n)]


def new(host: str, n: int, start: int = 0) -> list[tuple[str, str, str | None]]:
    """Pages of ``host`` that copy nothing."""
    return [(host, f"http://{host}/p{i}.html", None) for i in range(start, start + n)]


async def fetch(store: FrontierStore, n: int) -> list[str]:
    """Lease and complete up to ``n`` URLs as fetched (one lease per host at a time)."""
    done: list[str] = []
    while len(done) < n:
        got = await store.lease(1)
        if not got:
            break
        await store.complete_many([Completion(lease, Outcome.FETCHED) for lease in got])
        done += [lease.url for lease in got]
    return done


async def test_a_host_of_copies_becomes_a_mirror_and_its_queue_is_cut(
        make_store: StoreFactory) -> None:
    store = mirror_store(make_store)
    adm = admission(store)
    mirrors = MirrorHosts(store)
    await adm.admit(urls("copy.test", 100))
    fetched = await fetch(store, 10)
    assert len(fetched) == 10
    # 7 of 10 pages copy orig.test's pages, 1 copies other.test's, 2 are new
    pages = [("copy.test", u, f"http://orig.test/p{i}.html") for i, u in enumerate(fetched[:7])]
    pages += [("copy.test", fetched[7], "http://other.test/x.html"),
              ("copy.test", fetched[8], None), ("copy.test", fetched[9], None)]
    assert await mirrors.record(pages) == {"copy.test"}
    state = await mirror_state(store, "copy.test")
    assert (state["pages"], state["copies"], state["new_pages"]) == (10, 8, 2)
    assert state["mirror"] and state["mirror_of"] == "orig.test"
    assert state["copies_most_of"] == "orig.test" and state["copies_of_that_host"] == 7
    # it may hold the 2 new pages it showed + 5: 7 URLs; 10 are fetched already, so the
    # 90 still queued are excluded as mirror_host
    assert state["limit"] == 2 + SLACK
    counts = await store.counts()
    assert counts.queued == 0 and counts.excluded == 90 and counts.balanced
    assert counts.reasons[f"excluded:{MIRROR_REASON}"] == 90
    assert mirrors.cut == 90
    ended = await store.take_ended()
    assert len(ended) == 90 and {(o, r) for o, r, _ in ended} == {("excluded", MIRROR_REASON)}
    assert not {u for _, _, u in ended} & set(fetched)
    assert await store.lease(5) == []
    # new links to the mirror are excluded too, and not remembered as seen
    result = await adm.admit(urls("copy.test", 3, start=500))
    assert (result.new, result.excluded) == (0, 3)
    assert (await store.counts()).reasons[f"excluded:{MIRROR_REASON}"] == 93
    # reported: status and explain
    listed = await read_mirrors(store)
    assert listed["count"] == 1 and listed["hosts"][0]["host"] == "copy.test"
    assert listed["hosts"][0]["mirror_of"] == "orig.test"
    info = await explain(store, "http://copy.test/p500.html")
    assert info["mirror"]["mirror_of"] == "orig.test"
    text = " ".join(format_explain(info).split())
    assert "a mirror of orig.test" in text and "may hold 7 URLs" in text


async def test_the_cut_keeps_the_best_urls_the_limit_leaves(make_store: StoreFactory) -> None:
    # 10 pages fetched, 4 new: the limit is 4 + 5 = 9 URLs... fewer than fetched, so
    # nothing is left. With 8 new of 12 compared (share 0.33) it is no mirror at all.
    # A host with the slack still open keeps its best URLs: 10 fetched with 6 copies and
    # slack 20 may hold 4 + 20 = 24, so 14 of its queued URLs stay, the best ones.
    store = mirror_store(make_store, mirror_slack=20)
    adm = admission(store)
    await adm.admit([Candidate(f"http://copy.test/q{i}", depth=1, cash=0.001 * (i + 1))
                     for i in range(40)])
    await fetch(store, 10)  # the ten best (highest cash) go first
    mirrors = MirrorHosts(store)
    await mirrors.record(copied("copy.test", 6) + new("copy.test", 4, 6))
    counts = await store.counts()
    assert counts.queued == 14 and counts.excluded == 16 and counts.balanced
    info = await store.url_facts("http://copy.test/q29", 0, "copy.test")
    assert info["hot_score"] is not None  # the 11th best stays
    gone = {u for _, _, u in await store.take_ended()}
    assert gone == {f"http://copy.test/q{i}" for i in range(16)}  # the worst went


async def test_below_the_rule_no_mirror(make_store: StoreFactory) -> None:
    store = mirror_store(make_store)
    mirrors = MirrorHosts(store)
    # too few pages: 9 copies of 9
    assert await mirrors.record(copied("few.test", 9)) == set()
    # enough pages, too small a share: 5 of 10 (< 0.6)
    assert await mirrors.record(copied("half.test", 5) + new("half.test", 5, 5)) == set()
    # copies of its own pages are no evidence: 10 of 10 copy self.test's other pages
    assert await mirrors.record(copied("self.test", 10, of="self.test")) == set()
    assert (await mirror_state(store, "self.test"))["copies"] == 0
    # a page of few.test found shared again (orig.test's copy of it) counts once
    assert await mirrors.record(
        [("orig.test", "http://orig.test/c0.html", "http://few.test/p0.html")]) == set()
    assert (await mirror_state(store, "few.test"))["copies"] == 9
    # the tenth page tips few.test over: 10 of 10
    assert await mirrors.record(copied("few.test", 1, start=9)) == {"few.test"}
    assert (await read_mirrors(store))["count"] == 1


async def test_a_mirror_that_shows_new_pages_again_is_no_mirror(make_store: StoreFactory) -> None:
    store = mirror_store(make_store)
    mirrors = MirrorHosts(store)
    await mirrors.record(copied("m.test", 10))
    assert (await mirror_state(store, "m.test"))["mirror"]
    await mirrors.record(new("m.test", 10, 10))  # 10 of 20: below 0.6
    state = await mirror_state(store, "m.test")
    assert not state["mirror"] and state["limit"] is None
    assert (await read_mirrors(store))["count"] == 0
    result = await admission(store).admit(urls("m.test", 3))
    assert result.new == 3


async def test_a_copy_fetched_first_counts_for_its_host_too(make_store: StoreFactory) -> None:
    # Hosts crawled side by side meet their shared pages in either order (Bharat et al.
    # 2000: mirroring is a relation between the two hosts' pages): the mirror's pages,
    # fetched before orig.test's, are found shared when orig.test's pages are fetched.
    # orig.test (40 pages, 10 shared: 25 %) is no mirror; mirror.test (10 of 10) is.
    store = mirror_store(make_store)
    mirrors = MirrorHosts(store)
    assert await mirrors.record(new("mirror.test", 10)) == set()
    pages = [("orig.test", f"http://orig.test/c{i}.html", f"http://mirror.test/p{i}.html")
             for i in range(10)] + new("orig.test", 30, 100)
    assert await mirrors.record(pages) == {"mirror.test"}
    state = await mirror_state(store, "mirror.test")
    assert (state["pages"], state["copies"], state["mirror_of"]) == (10, 10, "orig.test")
    state = await mirror_state(store, "orig.test")
    assert (state["pages"], state["copies"], state["mirror"]) == (40, 10, False)


async def test_a_seeded_host_is_never_cut(make_store: StoreFactory) -> None:
    # The operator vouches for a seed's host, as for its budget (admit.lua).
    store = mirror_store(make_store)
    await admission(store).admit([Candidate("http://m.test/", depth=0)])
    assert await MirrorHosts(store).record(copied("m.test", 20)) == set()
    assert (await mirror_state(store, "m.test"))["copies"] == 20


async def test_mirror_hosts_off(make_store: StoreFactory) -> None:
    store = mirror_store(make_store, mirror_min_pages=0)
    mirrors = MirrorHosts(store)
    assert await mirrors.record(copied("m.test", 50)) == set()
    state = await mirror_state(store, "m.test")
    assert state["copies"] == 50 and not state["mirror"]
    assert "mirror hosts are off" in " ".join(
        format_explain(await explain(store, "http://m.test/")).split())


NOT_A_NUMBER = st.text(alphabet=st.characters(exclude_categories=("Nd", "No", "Nl")),
                       max_size=8).filter(lambda t: t.strip().lower() not in (
                           "inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"))


@pytest.mark.fuzz
@given(data=st.data())
def test_odd_mirror_settings_are_refused(data: st.DataObject) -> None:
    # Operator input (job file, SLUICE_DEDUPE__*, flags): a clear ConfigError naming the
    # key, for every value out of range or not a number.
    key, value = data.draw(st.one_of(
        st.tuples(st.just("mirror_min_pages"), st.one_of(
            st.integers(max_value=-1), NOT_A_NUMBER,
            st.floats().filter(lambda x: not (x == x and x >= 0 and float(x).is_integer())))),
        st.tuples(st.just("mirror_share"), st.one_of(
            st.floats(max_value=0.0), st.floats(min_value=1.0, exclude_min=True),
            st.just(float("nan")), NOT_A_NUMBER)),
        st.tuples(st.just("mirror_slack"), st.one_of(
            st.integers(max_value=0), NOT_A_NUMBER,
            st.floats().filter(lambda x: not (x == x and x >= 1 and float(x).is_integer()))))))
    with pytest.raises(ConfigError, match=f"dedupe.{key}"):
        load_settings(None, {"dedupe": {key: value}})


def test_mirror_settings_defaults_and_file(tmp_path: Any) -> None:
    s = load_settings(None, {})
    assert (s.dedupe.mirror_min_pages, s.dedupe.mirror_share, s.dedupe.mirror_slack) == (
        MIN_PAGES, SHARE, SLACK)
    job = tmp_path / "job.toml"
    job.write_text("[dedupe]\nmirror_min_pages = 4\nmirror_share = 0.9\n")
    s = load_settings(job, {})
    assert (s.dedupe.mirror_min_pages, s.dedupe.mirror_share) == (4, 0.9)


# --- end to end: a real `sluice crawl` of a web with print and mirror hosts -------------

UA = "sluice-test/0.1 (+http://operator.test/contact)"
REVISIT_PROFILE = "http://netpreserve.org/warc/1.1/revisit/identical-payload-digest"
"""ISO 28500:2017 s.6.7.2, the WARC 1.1 profile URI."""


async def sluice(*args: str, timeout: float = 300.0) -> tuple[int, str]:
    proc = await asyncio.create_subprocess_exec(
        sys.executable, "-m", "frontier.cli", *args,
        stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
    out, _ = await asyncio.wait_for(proc.communicate(), timeout)
    return proc.returncode or 0, out.decode()


def job_file(folder: Path, name: str, port: int, **dedupe: int) -> Path:
    """The job: politeness delays 0 and the link-spam slow lanes off (they are checked by
    tests/test_spam_signals.py; here they would only stretch the crawl)."""
    lines = [f'name = "{name}"', "[scope]", 'allow_hosts = ["*.test"]',
             "[politeness]", "min_delay_s = 0.0", "response_time_factor = 0.0",
             "[priority]", "untrusted_delay_s = 0.0", "suspect_delay_s = 0.0",
             "probation_s = 0.0",
             "[fetch]", f'user_agent = "{UA}"', f'map_hosts = ["*.test=127.0.0.1:{port}"]',
             "[dedupe]", *(f"{k} = {v}" for k, v in dedupe.items())]
    path = folder / f"{name}.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


async def crawl_copies(folder: Path, redis_url: str, copies: CopyWeb, name: str,
                       **dedupe: int) -> dict[str, Any]:
    """One `sluice crawl` of the web; then `sluice status`, `sluice explain` of a URL on
    each copy host, and the daemon's /status and /metrics (read before the next test
    flushes Redis)."""
    client = connect(redis_url)
    await client.flushall()
    await client.aclose()
    out = folder / name
    seeds = folder / "seeds.txt"
    seeds.write_text("\n".join(copies.web.seeds) + "\n")
    server = CopyServer(copies, latency=0.0)
    port = await server.start("127.0.0.1", 0)
    try:
        job = job_file(folder, name, port, **dedupe)
        code, text = await sluice("crawl", "--config", str(job), "--seeds", str(seeds),
                                  "--redis", redis_url, "--out", str(out), "--processes", "1",
                                  "--quiet")
        assert code == 0, text
        code, text = await sluice("status", "--redis", redis_url, "--job", name)
        assert code == 0, text
        status = json.loads(text)
        explained = {}
        for host in copies.copied_host:
            code, text = await sluice("explain", "--redis", redis_url, "--job", name,
                                      f"http://{host}/")
            assert code == 0, text
            explained[host] = " ".join(text.split())
        admin = f"127.0.0.1:{free_port()}"
        daemon = await asyncio.create_subprocess_exec(
            sys.executable, "-m", "frontier.cli", "daemon", "--config", str(job),
            "--redis", redis_url, "--admin", admin,
            env={**os.environ, "SLUICE_ADMIN_TOKEN": "mirror-test-token-0123456789abcdef"},
            stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.STDOUT)
        try:
            assert daemon.stdout is not None
            await asyncio.wait_for(daemon.stdout.readline(), 60)
            async with aiohttp.ClientSession() as http:
                async with http.get(f"http://{admin}/status") as r:
                    page = await r.json()
                metrics = ""
                for _ in range(60):  # the stats loop refreshes the gauges every 2 s
                    async with http.get(f"http://{admin}/metrics") as r:
                        metrics = await r.text()
                    if "sluice_mirror_hosts{" in metrics and not metrics.count(
                            'sluice_mirror_hosts{job="' + name + '"} 0.0') and (
                            dedupe.get("mirror_min_pages") != 0):
                        break
                    if dedupe.get("mirror_min_pages") == 0 and "sluice_mirror_hosts{" in metrics:
                        await asyncio.sleep(2.5)
                        async with http.get(f"http://{admin}/metrics") as r:
                            metrics = await r.text()
                        break
                    await asyncio.sleep(0.5)
        finally:
            daemon.terminate()
            await daemon.wait()
    finally:
        await server.stop()
    log = [json.loads(x) for x in (out / "fetches.jsonl").read_text().splitlines()]
    return {"out": out, "log": log, "requests": list(server.log), "status": status,
            "explain": explained, "page": page, "metrics": metrics}


@pytest.fixture(scope="module")
def crawls(tmp_path_factory: pytest.TempPathFactory,
           redis_server: Any) -> dict[str, dict[str, Any]]:
    copies = copy_web(CopySpec())
    folder = tmp_path_factory.mktemp("mirrors")

    async def both() -> dict[str, dict[str, Any]]:
        return {"cut": await crawl_copies(folder, redis_server.url, copies, "cut"),
                "off": await crawl_copies(folder, redis_server.url, copies, "off",
                                          mirror_min_pages=0),
                "web": copies}  # type: ignore[dict-item]

    return asyncio.run(both())


async def test_every_near_copy_of_the_copies_web_is_found(single_client: Any) -> None:
    # The 50 near copies (two words of about 400 changed) through the job's index on a
    # real redis-server, each original stored first, as a crawl meets them: Charikar's
    # (2002) law puts a two-word edit about 3.5 bits away, with a tail past the 6 bits
    # the 28 pair tables guarantee (Manku, Jain & Das Sarma 2007 s.3.1.1). A copy the
    # tables bring back anyway (its fingerprint shares a pair of blocks) is confirmed by
    # Broder's (1997) resemblance whatever its distance; distinct pages never are.
    copies = copy_web(CopySpec())
    keys = Keys("near-copies", 4)
    index = NearDuplicateIndex(single_client, keys.near_dup, page_key=keys.near_dup_page)

    def fingerprint(url: str) -> Any:  # as the worker computes it (workers/loop.py)
        return simhash64(parse_html(render_page(copies.web.pages[url]), url).text)

    near = sorted(copies.near)
    originals = [copies.original_of[c] for c in near]
    first = [fingerprint(u) for u in originals]
    assert await index.match_pages(first, originals) == [None] * len(near)
    found = await index.match_pages([fingerprint(c) for c in near], near)
    distances = sorted(hamming(a, b) for a, b in zip(first, map(fingerprint, near)))
    missed = [c for c, m in zip(near, found) if m is None or m[1] != copies.original_of[c]]
    print(f"\nnear copies: distances {distances}; found {len(near) - len(missed)} of {len(near)}")
    assert max(distances) > 6  # the tail this checks
    assert missed == []
    # pages of the plain web (none a copy of another) are matched to nothing
    involved = set(copies.original_of) | set(copies.original_of.values())
    plain = sorted(set(copies.web.pages) - involved)[:200]
    flagged = await index.match_pages([fingerprint(u) for u in plain], plain)
    assert [m for m in flagged if m is not None] == []


def warc_records(out: Path) -> list[dict[str, Any]]:
    """Every record of the crawl's WARC files, read by warcio (the reference reader);
    `warcio check` verifies each file's digests."""
    recs = []
    for path in sorted((out / "warc").glob("*.warc.gz")):
        done = subprocess.run([str(Path(sys.executable).with_name("warcio")), "check",
                               str(path)], capture_output=True, text=True)
        assert done.returncode == 0, done.stdout + done.stderr
        with path.open("rb") as stream:
            for rec in ArchiveIterator(stream):
                recs.append({"type": rec.rec_type, "headers": dict(rec.rec_headers.headers)})
    return recs


def judged(copies: CopyWeb, log: list[dict[str, Any]]) -> dict[str, Any]:
    """Recall and precision of the duplicate flags against the web's truth.

    A pair (original, copy) both fetched is found when the one fetched later is flagged
    with the other (exact: duplicate_of, near: near_duplicate_of); a flag is right when
    it names the other page of its pair. Recall over pairs, precision over flags."""
    lines = {e["url"]: e for e in log if e["outcome"] == "fetched"}
    order = {e["url"]: i for i, e in enumerate(log)}
    pair_of = {**copies.original_of, **{o: c for c, o in copies.original_of.items()}}
    found = pairs = right = flags = 0
    for copy, original in copies.original_of.items():
        if copy not in lines or original not in lines:
            continue
        pairs += 1
        later, earlier = sorted((copy, original), key=order.__getitem__, reverse=True)
        field = "duplicate_of" if copy in copies.exact else "near_duplicate_of"
        found += lines[later].get(field) == earlier
    for url, e in lines.items():
        named = e.get("duplicate_of") or e.get("near_duplicate_of")
        if named is None:
            continue
        flags += 1
        right += pair_of.get(url) == named
    return {"pairs": pairs, "found": found, "recall": found / pairs if pairs else 0.0,
            "flags": flags, "right": right, "precision": right / flags if flags else 1.0}


def host_fetches(result: dict[str, Any], host: str) -> int:
    return sum(1 for r in result["requests"] if r.host == host and r.path != "/robots.txt")


def test_copies_without_the_cut(crawls: dict[str, Any]) -> None:
    copies: CopyWeb = crawls["web"]
    off = crawls["off"]
    log = off["log"]
    lines = {e["url"]: e for e in log if e["outcome"] == "fetched"}
    # every copy fetched: nothing cut
    assert copies.exact | copies.near <= set(lines)
    recs = warc_records(off["out"])
    responses = {r["headers"]["WARC-Target-URI"]: r for r in recs if r["type"] == "response"}
    revisits = {r["headers"]["WARC-Target-URI"]: r for r in recs if r["type"] == "revisit"}
    for copy in copies.exact:  # ISO 28500:2017 s.6.7.2, pointing at the right original
        original = copies.original_of[copy]
        assert copy not in responses and copy in revisits
        h = revisits[copy]["headers"]
        assert h["WARC-Profile"] == REVISIT_PROFILE
        assert h["WARC-Refers-To"] == responses[original]["headers"]["WARC-Record-ID"]
        assert h["WARC-Refers-To-Target-URI"] == original
        assert h["WARC-Refers-To-Date"] == responses[original]["headers"]["WARC-Date"]
        assert h["WARC-Payload-Digest"] == responses[original]["headers"]["WARC-Payload-Digest"]
        assert lines[copy]["duplicate_of"] == original
    for copy in copies.near:  # archived in full
        assert copy in responses
    score = judged(copies, log)
    print(f"\nwithout the cut: {score}")
    assert score["pairs"] == len(copies.original_of)
    assert score["recall"] >= 0.9 and score["precision"] >= 0.95
    near = judged(CopyWeb(copies.spec, copies.web, {c: copies.original_of[c]
                                                     for c in copies.near}), log)
    print(f"near copies alone: recall {near['recall']:.3f} ({near['found']} of {near['pairs']})")
    assert near["recall"] >= 0.9  # (its precision: the line above, over both kinds)
    # the page only a near copy links to is fetched for every near copy fetched
    requested = {f"http://{r.host}{r.path}" for r in off["requests"]}
    assert all(copies.only_through[c] in requested for c in copies.near if c in lines)
    # no mirror reported when the rule is off; the counters still count
    assert off["status"]["mirrors"] == {"count": 0, "hosts": []}
    assert 'sluice_mirror_hosts{job="off"} 0.0' in off["metrics"]
    assert "mirror hosts are off" in off["explain"]["print-00.test"]


def test_mirror_hosts_reported_and_cut(crawls: dict[str, Any]) -> None:
    copies: CopyWeb = crawls["web"]
    cut, off = crawls["cut"], crawls["off"]
    status = cut["status"]
    assert status["balanced"] and status["queued"] == 0
    reported = {row["host"]: row["mirror_of"] for row in status["mirrors"]["hosts"]}
    assert reported == copies.copied_host  # each copy host, of the site it copies; no other
    assert cut["page"]["mirrors"]["count"] == len(copies.copied_host)
    assert {r["host"] for r in cut["page"]["mirrors"]["hosts"]} == set(copies.copied_host)
    assert f'sluice_mirror_hosts{{job="cut"}} {float(len(copies.copied_host))}' in cut["metrics"]
    excluded = status["reasons"].get(f"excluded:{MIRROR_REASON}", 0)
    assert excluded > 0
    assert f'sluice_mirror_excluded_urls{{job="cut"}} {float(excluded)}' in cut["metrics"]
    for host, original in copies.copied_host.items():
        assert f"a mirror of {original}" in cut["explain"][host]
    figures = {h: (host_fetches(cut, h), host_fetches(off, h)) for h in sorted(copies.copied_host)}
    print(f"\npages fetched per copy host, with the cut / without: {figures}")
    for host, (with_cut, without) in figures.items():
        # found after mirror_min_pages pages; then held to its new pages + the slack (a
        # page whose copy went unnoticed counts as new; a batch in flight still lands)
        assert without == copies.spec.copies_per_host
        assert with_cut <= MIN_PAGES + SLACK + 3 < without
    score = judged(copies, cut["log"])
    print(f"with the cut: {score}")
    assert score["recall"] >= 0.9 and score["precision"] >= 0.95
    lines = {e["url"] for e in cut["log"] if e["outcome"] == "fetched"}
    requested = {f"http://{r.host}{r.path}" for r in cut["requests"]}
    assert all(copies.only_through[c] in requested for c in copies.near if c in lines)
    # the originals' hosts lost nothing
    for original in copies.copied_host.values():
        assert host_fetches(cut, original) == host_fetches(off, original)
