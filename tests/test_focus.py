"""Topic focus: the relevance model against worked examples, the [focus] settings, the
soft-focus rule, and the crawl order unchanged without [focus] (docs/focus.md)."""

from __future__ import annotations

import math
import string
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from frontier.bench.focus_bench import focus_settings, focused_crawl, job_settings, served_text
from frontier.bench.ordering_crawl import crawl
from frontier.exceptions import ConfigError
from frontier.focus import (
    Focus, NaiveBayes, TermScorer, bucket, build_focus, explain_focus, format_focus, words,
)
from frontier.model import Candidate
from frontier.settings import FocusSettings, JobSettings, load_settings
from synthweb.topical import SUBJECTS, generate, harvest, training_pages
from tests.servers import RedisServer

# --- naive Bayes: IIR example 13.1 -----------------------------------------------------------
# Manning, Raghavan & Schütze, Introduction to Information Retrieval (2008), ch. 13,
# table 13.1 / example 13.1, values quoted from memory. Training: class c = China,
# d1 "Chinese Beijing Chinese", d2 "Chinese Chinese Shanghai", d3 "Chinese Macao";
# not c: d4 "Tokyo Japan Chinese". Test d5 "Chinese Chinese Chinese Tokyo Japan".
# |V| = 6; P(c) = 3/4; P(Chinese|c) = (5+1)/(8+6) = 3/7; P(Tokyo|c) = P(Japan|c) = 1/14;
# P(Chinese|not c) = (1+1)/(3+6) = 2/9; P(Tokyo|not c) = P(Japan|not c) = 2/9.
# P(c|d5) is proportional to 3/4 (3/7)^3 (1/14)^2 ~ 0.0003, P(not c|d5) to
# 1/4 (2/9)^3 (2/9)^2 ~ 0.0001: d5 is assigned to China.
IIR_C = ["Chinese Beijing Chinese", "Chinese Chinese Shanghai", "Chinese Macao"]
IIR_NOT_C = ["Tokyo Japan Chinese"]
IIR_D5 = "Chinese Chinese Chinese Tokyo Japan"


def test_naive_bayes_reproduces_iir_example_13_1() -> None:
    nb = NaiveBayes.train(IIR_C, IIR_NOT_C, bits=18)
    assert len(nb.llr) == 6  # |V| = 6: no two of the six words share a bucket
    b = {w: bucket(w, 18) for w in ("chinese", "tokyo", "japan", "beijing")}
    assert nb.llr[b["chinese"]] == pytest.approx(math.log(3 / 7) - math.log(2 / 9))
    assert nb.llr[b["tokyo"]] == pytest.approx(math.log(1 / 14) - math.log(2 / 9))
    assert nb.llr[b["japan"]] == pytest.approx(math.log(1 / 14) - math.log(2 / 9))
    # Beijing: (1+1)/(8+6) = 1/7 for c, (0+1)/(3+6) = 1/9 for not c
    assert nb.llr[b["beijing"]] == pytest.approx(math.log(1 / 7) - math.log(1 / 9))
    assert nb.log_prior_ratio == pytest.approx(math.log(3 / 4) - math.log(1 / 4))
    c = 3 / 4 * (3 / 7) ** 3 * (1 / 14) ** 2
    not_c = 1 / 4 * (2 / 9) ** 3 * (2 / 9) ** 2
    assert round(c, 4) == 0.0003 and round(not_c, 4) == 0.0001  # the book's rounded values
    odds = nb.log_odds(words(IIR_D5))  # no evidence cap: the textbook rule
    assert odds == pytest.approx(math.log(c / not_c))
    assert odds > 0  # assigned to China
    # ApplyMultinomialNB skips words outside V: adding unseen words changes nothing
    assert nb.log_odds(words(IIR_D5 + " Osaka Kyoto")) == pytest.approx(odds)


def test_evidence_cap_scales_long_pages_only() -> None:
    nb = NaiveBayes.train(IIR_C, IIR_NOT_C, bits=18)
    full = nb.log_odds(words(IIR_D5))
    assert nb.log_odds(words(IIR_D5), evidence_words=5) == pytest.approx(full)
    capped = nb.log_odds(words(IIR_D5), evidence_words=2)
    assert capped - nb.log_prior_ratio == pytest.approx((full - nb.log_prior_ratio) * 2 / 5)


# --- BM25: by hand on a tiny corpus ----------------------------------------------------------
# Robertson & Zaragoza (2009) BM25 with k1 = 1.2, b = 0.75; idf = ln(1 + (N - n + 0.5) /
# (n + 0.5)). Background: "lantern wick glow", "market road bus", "lantern market": N = 3,
# avgdl = 8/3. n(lantern) = 2: idf = ln(1 + 1.5/2.5) = ln 1.6 = 0.470004;
# n(wick) = 1: idf = ln(1 + 2.5/1.5) = ln 2.666667 = 0.980829.
# Page "lantern lantern wick road": dl = 4, K = 1.2 (0.25 + 0.75 x 4 / (8/3)) = 1.65.
# lantern (weight 2): 2 x 0.470004 x 2 x 2.2 / (2 + 1.65) = 1.133160
# wick (weight 1):    1 x 0.980829 x 1 x 2.2 / (1 + 1.65) = 0.814273
# total 1.947433; relevance with half score 1: 1.947433 / 2.947433 = 0.660725.
BM25_BACKGROUND = ["lantern wick glow", "market road bus", "lantern market"]


def test_bm25_matches_a_hand_computation() -> None:
    scorer = TermScorer.build({"Lantern": 2.0, "wick": 1.0}, BM25_BACKGROUND, 1.2, 0.75, 300.0)
    assert scorer.idf["lantern"] == pytest.approx(0.470004, abs=1e-6)
    assert scorer.idf["wick"] == pytest.approx(0.980829, abs=1e-6)
    assert scorer.avgdl == pytest.approx(8 / 3)
    page = words("Lantern lantern, WICK road!")
    assert scorer.score(page) == pytest.approx(1.947433, abs=1e-5)
    focus = Focus(0.5, 0.01, 50, 1.0, None, scorer)
    assert focus.relevance("Lantern lantern, WICK road!") == pytest.approx(0.660725, abs=1e-5)
    assert scorer.score(words("market road bus")) == 0.0


def test_bm25_without_background_uses_idf_one_and_the_set_length() -> None:
    scorer = TermScorer.build({"wick": 1.0}, [], 1.2, 0.75, 4.0)
    # tf 1, dl 4 = avgdl: 1 x 2.2 / (1 + 1.2) = 1
    assert scorer.score(words("wick road bus market")) == pytest.approx(1.0)


# --- the soft-focus rule -----------------------------------------------------------------


def _cands() -> list[Candidate]:
    return [Candidate("http://a.test/1", 1, 0.5, 0.4, "s.test"),
            Candidate("http://b.test/2", 1, 0.2, 0.1, "s.test")]


def test_steer_scales_cash_and_credit_by_relevance_above_the_threshold() -> None:
    focus = Focus(0.5, 0.01, 50, 1.0)
    out = focus.steer(_cands(), 0.8)
    assert [(c.cash, c.credit) for c in out] == [pytest.approx((0.4, 0.32)),
                                                 pytest.approx((0.16, 0.08))]
    assert [c.url for c in out] == [c.url for c in _cands()]
    at = focus.steer(_cands(), 0.5)  # at the threshold: on topic
    assert at[0].cash == pytest.approx(0.25) and focus.expands(0.5)
    below = focus.steer(_cands(), 0.49)
    assert below[0].cash == pytest.approx(0.005) and below[0].credit == pytest.approx(0.004)
    assert not focus.expands(0.49)


def test_off_topic_factor_zero_means_not_expanded() -> None:
    focus = Focus(0.5, 0.0, 50, 1.0)
    assert focus.steer(_cands(), 0.2) == []
    assert len(focus.steer(_cands(), 0.9)) == 2


# --- the model on the topical webs ------------------------------------------------------


@pytest.mark.parametrize("subject", sorted(SUBJECTS))
def test_model_separates_the_topical_web_by_its_labels(subject: str, tmp_path: Path) -> None:
    tw = generate(subject, 7)
    settings = job_settings(focus_settings(tw, tmp_path, "focused"))
    focus = build_focus(settings)
    assert focus is not None
    right = sum(focus.expands(focus.relevance(served_text(p))) == (tw.labels[u] == subject)
                for u, p in tw.web.pages.items())
    assert right / len(tw.web.pages) >= 0.97
    strongest = [w for w, _ in focus.describe()["bayes"]["strongest_words"]]
    assert sum(w in SUBJECTS[subject] for w in strongest) >= 8  # of 10: the explanation


def test_training_pages_are_not_pages_of_the_web() -> None:
    tw = generate("lanterns", 1)
    examples, background = training_pages("lanterns", 1)
    texts = {p.text for p in tw.web.pages.values()}
    assert not any(e.split(" ", 3)[-1] in texts for e in examples + background)


# --- settings --------------------------------------------------------------------------------


def _load(focus: Any) -> JobSettings:
    return load_settings(None, {"focus": focus})


def test_no_focus_section_is_off() -> None:
    assert JobSettings().focus is None
    assert build_focus(JobSettings()) is None
    assert explain_focus(JobSettings(), [])["on"] is False


def test_focus_from_a_job_file(tmp_path: Path) -> None:
    (tmp_path / "ex.html").write_text("<html><title>Moth lanterns</title><body><p>wick glow "
                                      "<script>var market</script></p></body></html>")
    (tmp_path / "bg.txt").write_text("market road bus weather")
    job = tmp_path / "job.toml"
    job.write_text(f'[focus]\nexamples = ["{tmp_path / "ex.html"}"]\n'
                   f'background = ["{tmp_path / "bg.txt"}"]\n'
                   '[focus.terms]\nLantern = 2.0\nwick = 0.5\n')
    s = load_settings(job)
    assert s.focus is not None and s.focus.terms == {"lantern": 2.0, "wick": 0.5}
    focus = build_focus(s)
    assert focus is not None and focus.bayes is not None
    vocab = set(focus.bayes.vocabulary.values())
    assert {"moth", "lanterns", "wick", "glow", "market"} <= vocab
    assert "var" not in vocab  # script text is not page text
    assert focus.relevance("moth lantern wick glow") > 0.5 > focus.relevance("market road bus")


@pytest.mark.parametrize("focus, needle", [
    ({}, "needs examples"),
    ({"examples": ["x.html"]}, "need focus.background"),
    ({"terms": {}}, "needs examples"),
    ({"terms": {"moth lantern": 1.0}}, "not one word"),
    ({"terms": {"": 1.0}}, "not one word"),
    ({"terms": {"wick": -1.0}}, "above 0"),
    ({"terms": {"wick": 0.0}}, "above 0"),
    ({"terms": {"wick": float("nan")}}, "finite"),
    ({"terms": {"wick": float("inf")}}, "finite"),
    ({"terms": {"Wick": 1.0, "wick": 2.0}}, "twice"),
    ({"terms": {"wick": 1.0}, "threshold": 1.5}, "focus.threshold"),
    ({"terms": {"wick": 1.0}, "threshold": float("nan")}, "focus.threshold"),
    ({"terms": {"wick": 1.0}, "off_topic_factor": -0.1}, "focus.off_topic_factor"),
    ({"terms": {"wick": 1.0}, "hash_bits": 40}, "focus.hash_bits"),
    ({"terms": {"wick": 1.0}, "colour": "red"}, "focus.colour"),
])
def test_bad_focus_settings_say_what_is_wrong(focus: dict[str, Any], needle: str) -> None:
    with pytest.raises(ConfigError) as err:
        _load(focus)
    assert needle in str(err.value) and "focus" in str(err.value)


def test_missing_or_empty_example_files_are_named(tmp_path: Path) -> None:
    (tmp_path / "empty.txt").write_text("1234 !!")
    (tmp_path / "bg.txt").write_text("market road")
    s = _load({"examples": [str(tmp_path / "gone.html")], "background": [str(tmp_path / "bg.txt")]})
    with pytest.raises(ConfigError, match="focus.examples: cannot read .*gone.html"):
        build_focus(s)
    s = _load({"examples": [str(tmp_path / "empty.txt")], "background": [str(tmp_path / "bg.txt")]})
    with pytest.raises(ConfigError, match="empty.txt holds no words"):
        build_focus(s)


ODD_FLOATS = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10, 10),
                       st.text(max_size=5), st.none(), st.booleans())


@given(threshold=ODD_FLOATS, factor=ODD_FLOATS)
def test_threshold_and_factor_accepted_only_in_range(threshold: Any, factor: Any) -> None:
    def ok(v: Any) -> bool:
        return (isinstance(v, (int, float)) and not isinstance(v, bool)
                and math.isfinite(v) and 0 <= v <= 1)

    raw = {"terms": {"wick": 1.0}, "threshold": threshold, "off_topic_factor": factor}
    try:
        s = _load(raw)
    except ConfigError as exc:
        assert not (ok(threshold) and ok(factor)) or isinstance(threshold, bool) or isinstance(factor, bool)
        assert "focus" in str(exc)
        return
    assert s.focus is not None
    assert 0 <= s.focus.threshold <= 1 and 0 <= s.focus.off_topic_factor <= 1
    assert math.isfinite(s.focus.threshold) and math.isfinite(s.focus.off_topic_factor)


@given(st.dictionaries(st.text(max_size=12), st.one_of(st.floats(), st.integers(-3, 3)),
                       max_size=5))
def test_terms_accepted_only_as_words_with_positive_finite_weights(terms: dict[str, Any]) -> None:
    def word(t: str) -> bool:
        w = t.strip().casefold()
        return len(w) >= 2 and all(ch.isalpha() for ch in w) and w == "".join(words(w))

    folded = [t.strip().casefold() for t in terms]
    valid = (bool(terms) and all(word(t) for t in terms) and len(set(folded)) == len(folded)
             and all(math.isfinite(w) and w > 0 for w in terms.values()))
    try:
        s = _load({"terms": terms})
    except ConfigError as exc:
        assert not valid, exc
        assert "focus" in str(exc)
        return
    assert valid
    assert s.focus is not None and all(w > 0 for w in s.focus.terms.values())


def test_a_job_file_that_is_not_utf8_is_a_clear_error(tmp_path: Path) -> None:
    # found by the test below: a stray byte raised UnicodeDecodeError out of load_settings;
    # TOML v1.0.0 (toml.io): "A TOML file must be a valid UTF-8 encoded Unicode document"
    job = tmp_path / "job.toml"
    job.write_bytes(b"[focus]\nterms = { wick = 1.0 }\n\x80")
    with pytest.raises(ConfigError, match="not UTF-8 text at byte 31"):
        load_settings(job)


@given(st.binary(max_size=200))
def test_odd_bytes_in_a_focus_section_end_as_a_clear_error(tmp_path_factory: Any,
                                                            body: bytes) -> None:
    job = tmp_path_factory.mktemp("job") / "job.toml"
    job.write_bytes(b"[focus]\nterms = { wick = 1.0 }\n" + body)
    try:
        s = load_settings(job)
    except ConfigError as exc:
        assert str(job) in str(exc) or "focus" in str(exc)
        return
    assert s.focus is not None


# --- off by default: the order unchanged --------------------------------------------------


async def test_without_focus_the_crawl_order_is_unchanged(redis_server: RedisServer,
                                                          tmp_path: Path) -> None:
    tw = generate("saltglass", 11)
    limit = 400
    plain = job_settings(None)
    before = await crawl(tw.web, plain, limit, tmp_path / "a", redis_url=redis_server.url)
    after, cpu, scored = await focused_crawl(tw.web, plain, limit, tmp_path / "b",
                                             redis_url=redis_server.url)
    assert scored == 0 and after.order == before.order and len(before.order) == limit
    focused, _, scored = await focused_crawl(
        tw.web, job_settings(focus_settings(tw, tmp_path / "f", "focused")), limit,
        tmp_path / "c", redis_url=redis_server.url)
    assert scored > 0 and focused.order != before.order  # the check above can fail
    k = limit // 2
    assert harvest(focused.order, tw.labels, "saltglass", k) > harvest(
        before.order, tw.labels, "saltglass", k)


def test_explain_shows_the_relevance_part(tmp_path: Path) -> None:
    s = _load({"terms": {"wick": 1.0}, "threshold": 0.6, "off_topic_factor": 0.0})
    off = explain_focus(s, [{"outcome": "fetched", "reason": "links_capped,off_topic"}])
    assert off["on"] and off["page"].startswith("off topic") and "not followed" in off["page"]
    assert off["model"]["terms"]["wick"] == {"weight": 1.0, "idf": 1.0}
    on = explain_focus(s, [{"outcome": "fetched", "reason": None}])
    assert on["page"].startswith("on topic")
    text = "\n".join(format_focus(off))
    assert "BM25 terms: wick (1)" in text and "r >= 0.6" in text
    assert explain_focus(s, [])["page"].startswith("not fetched")
    gone = _load({"examples": [str(tmp_path / "nope.txt")], "background": [str(tmp_path / "nope.txt")]})
    assert "cannot read" in explain_focus(gone, [])["model_error"]


def test_words_fold_case_and_skip_digits_and_single_letters() -> None:
    assert words("Moth-LANTERN 42 a b ÉTÉ x2") == ["moth", "lantern", "été"]
    assert set(string.ascii_letters) & set("".join(words("a b c"))) == set()
