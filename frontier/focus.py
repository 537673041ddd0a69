"""Topic focus: how relevant a fetched page is to the job's subject, and what that does
to the priority of its links (docs/focus.md).

Two published, explainable scorers, either or both:

* **Multinomial naive Bayes** over hashed word features (Manning, Raghavan & Schütze,
  *Introduction to Information Retrieval*, 2008, ch. 13, figure 13.2: TrainMultinomialNB /
  ApplyMultinomialNB, add-one smoothing), trained on the operator's example pages (the
  subject) against background pages (anything else). Words are hashed with MurmurHash3
  (``mmh3``) into ``2**hash_bits`` buckets, the "hashing trick" (Weinberger et al., ICML
  2009); the vocabulary V is the set of buckets the training pages use, and words outside
  V are skipped when a page is scored, as ApplyMultinomialNB does. NB's independence
  assumption counts every word as fresh evidence, so a long page's posterior is 0 or 1;
  a page therefore counts as at most ``evidence_words`` words of evidence (its summed
  log-likelihood ratio is scaled by ``evidence_words / n`` when n is larger: our rule).
* **BM25** against the operator's weighted term list (Robertson & Zaragoza, "The
  Probabilistic Relevance Framework: BM25 and Beyond", 2009, eq. 3.15 with the query-term
  weights of the operator): ``s = sum_t w_t * idf_t * tf (k1 + 1) / (tf + k1 (1 - b + b
  dl / avgdl))``; ``idf_t = ln(1 + (N - n_t + 0.5) / (n_t + 0.5))`` over the background
  pages (1 without them); relevance ``s / (s + terms_half_score)``.

A page's relevance r is the mean of the scorers configured, in [0, 1]. Soft focus
(Chakrabarti, van den Berg & Dom, "Focused crawling", WWW 1999: a link's priority is the
relevance of the page it was found on): the cash and credit OPIC hands to the page's links
(``frontier.priority.distribute``) are multiplied by ``g(r) = r`` when ``r >= threshold``,
else by ``off_topic_factor`` (0: the links make no candidates, the page is archived but
not expanded).
"""

from __future__ import annotations

import math
import re
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import mmh3

from frontier.exceptions import ConfigError
from frontier.model import Candidate

WORD_RE = re.compile(r"\w{2,}")  # kept when all letters (twice as fast as [^\W\d_]{2,})
MAX_SCORED_CHARS = 100_000  # a page's text beyond this is not scored (per-page CPU bound)
MEMO_SIZE = 1 << 16  # words whose bucket weight is remembered
EXPLAIN_TERMS = 10  # the strongest subject words shown by explain


def words(text: str) -> list[str]:
    """The words of ``text``, case-folded: runs of two or more word characters (letters,
    digits, underscores) made of letters only."""
    return [w for w in WORD_RE.findall(text.casefold()) if w.isalpha()]


def is_word(term: str) -> bool:
    """Whether ``term`` (case-folded) is one word as :func:`words` finds them."""
    folded = term.casefold()
    return WORD_RE.fullmatch(folded) is not None and folded.isalpha()


def bucket(word: str, bits: int) -> int:
    """The hashed feature of a word: MurmurHash3 x86 32-bit, seed 0, low ``bits`` bits."""
    return mmh3.hash(word, 0, False) & ((1 << bits) - 1)


def page_text(raw: str) -> str:
    """The visible text of an example file: HTML (from its first ``<``) or plain text."""
    if raw.lstrip()[:1] != "<":
        return raw
    from selectolax.lexbor import LexborHTMLParser

    tree = LexborHTMLParser(raw)
    tree.strip_tags(["script", "style", "noscript", "template"])
    title = tree.css_first("title")
    root = tree.body or tree.root
    head = title.text(deep=True) if title is not None else ""
    return f"{head} {root.text(deep=True, separator=' ') if root is not None else ''}"


# --- naive Bayes ------------------------------------------------------------------------


@dataclass
class NaiveBayes:
    """Two-class multinomial naive Bayes (IIR fig. 13.2) over hashed words."""

    bits: int
    log_prior_ratio: float  # ln P(subject) - ln P(background)
    llr: dict[int, float]  # per bucket of V: ln P(t|subject) - ln P(t|background)
    vocabulary: dict[int, str] = field(default_factory=dict)  # a word seen in each bucket
    _memo: dict[str, float | None] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def train(cls, subject: Sequence[str], background: Sequence[str], bits: int) -> NaiveBayes:
        """Train on subject and background texts (one document each)."""
        if not subject or not background:
            raise ConfigError("focus: naive Bayes needs at least one example and one "
                              "background page")
        counts = (Counter[int](), Counter[int]())
        names: dict[int, str] = {}
        for k, docs in enumerate((subject, background)):
            for doc in docs:
                for w in words(doc):
                    b = bucket(w, bits)
                    counts[k][b] += 1
                    names.setdefault(b, w)
        vocab = set(counts[0]) | set(counts[1])
        size = len(vocab)
        total = [sum(c.values()) for c in counts]
        llr = {b: math.log((counts[0][b] + 1) / (total[0] + size))
               - math.log((counts[1][b] + 1) / (total[1] + size)) for b in vocab}
        prior = math.log(len(subject)) - math.log(len(background))
        return cls(bits, prior, llr, names)

    def weight(self, word: str) -> float | None:
        """The log-likelihood ratio of a word's bucket (None: outside V); remembered."""
        memo = self._memo
        if word in memo:
            return memo[word]
        if len(memo) >= MEMO_SIZE:
            memo.clear()
        v = memo[word] = self.llr.get(bucket(word, self.bits))
        return v

    def log_odds(self, tokens: Iterable[str] | Counter[str],
                 evidence_words: int | None = None) -> float:
        """ln P(subject|d) - ln P(background|d); words outside V are skipped. With
        ``evidence_words``, the words' sum counts as at most that many words."""
        counts = tokens if isinstance(tokens, Counter) else Counter(tokens)
        total, n = 0.0, 0
        weight = self.weight
        for w, k in counts.items():
            v = weight(w)
            if v is not None:
                total += v * k
                n += k
        if evidence_words is not None and n > evidence_words:
            total *= evidence_words / n
        return self.log_prior_ratio + total

    def strongest(self, count: int = EXPLAIN_TERMS) -> list[tuple[str, float]]:
        """The words that speak most for the subject, with their log-likelihood ratio."""
        best = sorted(self.llr.items(), key=lambda kv: -kv[1])[:count]
        return [(self.vocabulary.get(b, f"#{b}"), round(v, 4)) for b, v in best]


def sigmoid(x: float) -> float:
    """1 / (1 + e^-x), without overflow."""
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    z = math.exp(x)
    return z / (1.0 + z)


# --- BM25 ---------------------------------------------------------------------------------


@dataclass
class TermScorer:
    """BM25 (Robertson & Zaragoza 2009) of a page against a weighted term list."""

    weights: dict[str, float]
    idf: dict[str, float]
    avgdl: float
    k1: float
    b: float

    @classmethod
    def build(cls, terms: dict[str, float], background: Sequence[str], k1: float, b: float,
              default_avgdl: float) -> TermScorer:
        """IDF and average length from the background pages, if any (else idf 1)."""
        weights = {t.casefold(): w for t, w in terms.items()}
        docs = [words(d) for d in background]
        n = len(docs)
        if n:
            sets = [set(d) for d in docs]
            idf = {t: math.log(1 + (n - (nt := sum(t in s for s in sets)) + 0.5) / (nt + 0.5))
                   for t in weights}
            avgdl = sum(map(len, docs)) / n or default_avgdl
        else:
            idf, avgdl = dict.fromkeys(weights, 1.0), default_avgdl
        return cls(weights, idf, avgdl, k1, b)

    def score(self, tokens: Sequence[str] | Counter[str]) -> float:
        """The BM25 score of a page with these words (a list, or their counts)."""
        counts = tokens if isinstance(tokens, Counter) else Counter(tokens)
        weights = self.weights
        tf = {t: counts[t] for t in weights if t in counts}
        if not tf:
            return 0.0
        norm = self.k1 * (1 - self.b + self.b * counts.total() / self.avgdl)
        return sum(weights[t] * self.idf[t] * f * (self.k1 + 1) / (f + norm)
                   for t, f in tf.items())


# --- the focus ------------------------------------------------------------------------------


@dataclass
class Relevance:
    """One page's relevance and its parts (JSON-ready with :meth:`as_dict`)."""

    value: float
    bayes: float | None = None  # posterior P(subject | page)
    terms: float | None = None  # s / (s + half) of the BM25 score s
    bm25: float | None = None

    def as_dict(self) -> dict[str, Any]:
        return {k: None if v is None else round(v, 6) for k, v in self.__dict__.items()}


@dataclass
class Focus:
    """The job's relevance model and the soft-focus rule."""

    threshold: float
    off_topic_factor: float
    evidence_words: int
    terms_half_score: float
    bayes: NaiveBayes | None = None
    terms: TermScorer | None = None

    def score(self, text: str) -> Relevance:
        """Relevance of a page's text (title and visible text)."""
        tokens = Counter(words(text[:MAX_SCORED_CHARS]))
        parts: list[float] = []
        out = Relevance(0.0)
        if self.bayes is not None:
            out.bayes = sigmoid(self.bayes.log_odds(tokens, self.evidence_words))
            parts.append(out.bayes)
        if self.terms is not None:
            out.bm25 = self.terms.score(tokens)
            out.terms = out.bm25 / (out.bm25 + self.terms_half_score)
            parts.append(out.terms)
        out.value = sum(parts) / len(parts)
        return out

    def relevance(self, text: str) -> float:
        return self.score(text).value

    def factor(self, relevance: float) -> float:
        """g(r): r at or above the threshold, ``off_topic_factor`` below it."""
        return relevance if relevance >= self.threshold else self.off_topic_factor

    def expands(self, relevance: float) -> bool:
        """Whether a page of this relevance is on topic (its links keep their cash)."""
        return relevance >= self.threshold

    def steer(self, candidates: list[Candidate], relevance: float) -> list[Candidate]:
        """The candidates of a page of this relevance, their cash and credit times g(r)
        (none when g(r) is 0)."""
        g = self.factor(relevance)
        if g <= 0.0:
            return []
        if g == 1.0:
            return candidates
        return [c._replace(cash=c.cash * g, credit=c.credit * g) for c in candidates]

    def describe(self) -> dict[str, Any]:
        """The model in brief (for ``sluice explain``)."""
        out: dict[str, Any] = {
            "threshold": self.threshold, "off_topic_factor": self.off_topic_factor,
            "rule": "links' cash and credit x r when r >= threshold, else x off_topic_factor "
                    "(0: not expanded)",
        }
        if self.bayes is not None:
            out["bayes"] = {"vocabulary": len(self.bayes.llr),
                            "log_prior_ratio": round(self.bayes.log_prior_ratio, 4),
                            "evidence_words": self.evidence_words,
                            "strongest_words": self.bayes.strongest()}
        if self.terms is not None:
            out["terms"] = {t: {"weight": w, "idf": round(self.terms.idf[t], 4)}
                            for t, w in self.terms.weights.items()}
            out["terms_avg_words"] = round(self.terms.avgdl, 1)
        return out


def read_pages(paths: Iterable[Path], what: str) -> list[str]:
    """The texts of example files; a missing or unreadable one is a clear error."""
    out = []
    for path in paths:
        try:
            raw = Path(path).read_bytes()
        except OSError as exc:
            raise ConfigError(f"focus.{what}: cannot read {path}: {exc.strerror or exc}") from None
        text = page_text(raw.decode("utf-8", errors="replace"))
        if not words(text):
            raise ConfigError(f"focus.{what}: {path} holds no words")
        out.append(text)
    return out


def build_focus(settings: Any) -> Focus | None:
    """The job's focus from its ``focus`` settings (None: no ``[focus]``, the crawl is
    ordered by link importance alone)."""
    fs = getattr(settings, "focus", None)
    if fs is None:
        return None
    background = read_pages(fs.background, "background")
    bayes = None
    if fs.examples:
        examples = read_pages(fs.examples, "examples")
        bayes = NaiveBayes.train(examples, background, fs.hash_bits)
    terms = None
    if fs.terms:
        terms = TermScorer.build(dict(fs.terms), background, fs.bm25_k1, fs.bm25_b,
                                 fs.terms_avg_words)
    return Focus(fs.threshold, fs.off_topic_factor, fs.evidence_words, fs.terms_half_score,
                 bayes, terms)


# --- sluice explain -------------------------------------------------------------------------

FOCUS_OFF_NOTE = "no [focus]: URLs are ordered by link importance alone"
CASH_NOTE = ("a queued URL's cash already carries g(r) of each page that linked to it "
             "(not kept per URL: the score holds only the sum)")


def explain_focus(settings: Any, logged: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """The relevance part of a URL for ``sluice explain``: the model in brief, the rule,
    and what the fetch log says of the URL's own page (``off_topic`` among its reasons)."""
    if getattr(settings, "focus", None) is None:
        return {"on": False, "note": FOCUS_OFF_NOTE}
    out: dict[str, Any] = {"on": True, "cash": CASH_NOTE}
    try:
        focus = build_focus(settings)
    except ConfigError as exc:  # the example files are on another machine
        out["model"] = None
        out["model_error"] = str(exc)
        fs = settings.focus
        out["threshold"], out["off_topic_factor"] = fs.threshold, fs.off_topic_factor
    else:
        assert focus is not None
        out["model"] = focus.describe()
        out["threshold"], out["off_topic_factor"] = focus.threshold, focus.off_topic_factor
    fetched = [e for e in logged if e.get("outcome") == "fetched"]
    if not fetched:
        out["page"] = "not fetched (or not in the fetch logs given)"
    elif "off_topic" in (fetched[-1].get("reason") or "").split(","):
        out["page"] = (f"off topic: relevance below {out['threshold']:g}, its links' cash x "
                       f"{out['off_topic_factor']:g}" + (" (not followed)"
                                                         if out["off_topic_factor"] == 0 else ""))
    else:
        out["page"] = "on topic: its links' cash x its relevance"
    return out


def format_focus(info: dict[str, Any]) -> list[str]:
    """Plain-text lines of :func:`explain_focus`."""
    if not info["on"]:
        return [f"focus:    {info['note']}"]
    lines = [f"focus:    page {info['page']}",
             f"          rule: links' cash x r if r >= {info['threshold']:g}, else x "
             f"{info['off_topic_factor']:g}; {info['cash']}"]
    model = info.get("model")
    if model is None:
        lines.append(f"          model not built here: {info.get('model_error')}")
        return lines
    if "bayes" in model:
        top = ", ".join(w for w, _ in model["bayes"]["strongest_words"])
        lines.append(f"          naive Bayes, {model['bayes']['vocabulary']} words; "
                     f"strongest: {top}")
    if "terms" in model:
        terms = ", ".join(f"{t} ({v['weight']:g})" for t, v in model["terms"].items())
        lines.append(f"          BM25 terms: {terms}")
    return lines
