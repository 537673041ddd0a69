"""Mirror hosts: a host whose fetched pages mostly copy another host's pages is reported
and its budget cut to the new pages it has shown plus a slack.

Source: Bharat, Broder, Dean & Henzinger, "A comparison of techniques to find mirrored
hosts on the WWW", JASIS 51(12), 2000 (WWW 1999 workshop): two hosts are mirrors when
they serve largely the same pages. The thresholds (pages seen, share of copies, slack)
are common practice, no source. Every test runs on one Redis server and on a Redis
Cluster (``make_store``): the mirror script touches one partition, one slot.
"""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from frontier.admission import Admission
from frontier.exceptions import ConfigError
from frontier.explain import explain, format_explain
from frontier.mirrors import MIRROR_REASON, MirrorHosts, mirror_state, read_mirrors
from frontier.model import Candidate, Completion, Outcome
from frontier.settings import load_settings
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import StoreFactory

MIN_PAGES, SHARE, SLACK = 10, 0.6, 5  # the defaults


def mirror_store(make_store: StoreFactory, **dedupe: Any) -> FrontierStore:
    return make_store(politeness={"min_delay_s": 0.0, "response_time_factor": 0.0},
                      budget={"max_pages_per_host": None},
                      priority={"host_budget_base": 0}, dedupe=dedupe)


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


def urls(host: str, n: int, start: int = 0) -> list[Candidate]:
    return [Candidate(f"http://{host}/p{i}.html", depth=0) for i in range(start, start + n)]


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
    pages = [("copy.test", f"http://orig.test/p{i}.html") for i in range(7)]
    pages += [("copy.test", "http://other.test/x.html"), ("copy.test", None),
              ("copy.test", None)]
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
    await adm.admit([Candidate(f"http://copy.test/q{i}", depth=0, cash=0.001 * (i + 1))
                     for i in range(40)])
    await fetch(store, 10)  # the ten best (highest cash) go first
    mirrors = MirrorHosts(store)
    await mirrors.record([("copy.test", "http://orig.test/a")] * 6 + [("copy.test", None)] * 4)
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
    assert await mirrors.record([("few.test", "http://orig.test/a")] * 9) == set()
    # enough pages, too small a share: 5 of 10 (< 0.6)
    assert await mirrors.record([("half.test", "http://orig.test/a")] * 5
                                + [("half.test", None)] * 5) == set()
    # copies of its own pages are no evidence: 10 of 10 copy half.test... itself
    assert await mirrors.record([("self.test", "http://self.test/a")] * 10) == set()
    assert (await mirror_state(store, "self.test"))["copies"] == 0
    # the tenth page tips few.test over: 10 of 10
    assert await mirrors.record([("few.test", "http://orig.test/b")]) == {"few.test"}
    assert (await read_mirrors(store))["count"] == 1


async def test_a_mirror_that_shows_new_pages_again_is_no_mirror(make_store: StoreFactory) -> None:
    store = mirror_store(make_store)
    mirrors = MirrorHosts(store)
    await mirrors.record([("m.test", "http://orig.test/a")] * 10)
    assert (await mirror_state(store, "m.test"))["mirror"]
    await mirrors.record([("m.test", None)] * 10)  # 10 of 20: below 0.6
    state = await mirror_state(store, "m.test")
    assert not state["mirror"] and state["limit"] is None
    assert (await read_mirrors(store))["count"] == 0
    result = await admission(store).admit(urls("m.test", 3))
    assert result.new == 3


async def test_mirror_hosts_off(make_store: StoreFactory) -> None:
    store = mirror_store(make_store, mirror_min_pages=0)
    mirrors = MirrorHosts(store)
    assert await mirrors.record([("m.test", "http://orig.test/a")] * 50) == set()
    state = await mirror_state(store, "m.test")
    assert state["copies"] == 50 and not state["mirror"]
    assert "mirror hosts are off" in " ".join(
        format_explain(await explain(store, "http://m.test/")).split())


@pytest.mark.fuzz
@given(min_pages=st.one_of(st.integers(-10**6, -1), st.floats(allow_nan=True), st.text(max_size=5)),
       share=st.one_of(st.floats(max_value=0.0), st.floats(min_value=1.0001),
                       st.just(float("nan")), st.text(max_size=5)),
       slack=st.one_of(st.integers(max_value=0), st.text(max_size=5)))
def test_odd_mirror_settings_are_refused(min_pages: Any, share: Any, slack: Any) -> None:
    # Operator input (job file, SLUICE_DEDUPE__*, flags): a clear ConfigError, nothing set.
    for key, value in (("mirror_min_pages", min_pages), ("mirror_share", share),
                       ("mirror_slack", slack)):
        if isinstance(value, str) and value.strip().lstrip("+").isdigit() and int(value) > 0:
            continue  # a number written as text is a number
        if isinstance(value, float) and value.is_integer() and key == "mirror_min_pages" \
                and value >= 0:
            continue
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
