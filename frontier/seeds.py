"""Seed lists: one absolute URL a line, checked line by line; adding seeds to a job.

A line that is not exactly one URL (spaces, words after the URL, control characters, no
scheme, another scheme) is rejected with its line number and the reason, never mended:
``http://site.test/ extra words`` is not the page ``/%20extra%20words``. Blank lines and
lines starting with ``#`` are skipped.
"""

from __future__ import annotations

import sys
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple, TextIO

from frontier.exceptions import ConfigError, UrlError
from frontier.urls import (
    BAD_SCHEME, DEFAULT_SCHEMES, EXCLUDED_PATTERN, HOST_OUT_OF_SCOPE, MAX_URL_LENGTH,
    NOT_INCLUDED, TOO_DEEP, TOO_LONG, canonicalize, host_of,
)

MAX_SHOWN_CHARS = 120  # a rejected line is echoed up to this many characters
BOM = "\ufeff"


class SeedLine(NamedTuple):
    """An accepted seed: where it came from (a file, ``argument``, ``urls``) and its URL."""

    source: str
    line: int  # 1-based
    url: str


@dataclass(frozen=True)
class RejectedSeed:
    """A seed line that is not one crawlable URL."""

    source: str  # a file name, "argument" or "urls"
    line: int  # 1-based
    text: str
    reason: str

    def describe(self) -> str:
        """``seeds.txt:3: 'http://x.test/ more': has spaces ...`` (one line)."""
        shown = self.text if len(self.text) <= MAX_SHOWN_CHARS else self.text[:MAX_SHOWN_CHARS] + "…"
        where = f"{self.source} {self.line}" if self.source in ITEM_SOURCES else \
            f"{self.source}:{self.line}"
        return f"{where}: {shown!r}: {self.reason}"

    def as_dict(self) -> dict[str, Any]:
        return {"source": self.source, "line": self.line, "text": self.text[:MAX_SHOWN_CHARS],
                "reason": self.reason}


ITEM_SOURCES = ("argument", "urls", "seeds item")  # numbered items rather than file lines


@dataclass
class SeedList:
    """Accepted and rejected seeds, in the order read."""

    accepted: list[SeedLine] = field(default_factory=list)
    rejected: list[RejectedSeed] = field(default_factory=list)

    @property
    def urls(self) -> list[str]:
        return [seed.url for seed in self.accepted]

    def extend(self, other: SeedList) -> None:
        self.accepted.extend(other.accepted)
        self.rejected.extend(other.rejected)


def seed_problem(text: str, *, max_length: int = MAX_URL_LENGTH,
                 schemes: frozenset[str] = DEFAULT_SCHEMES) -> str | None:
    """Why ``text`` (one stripped line) is not a seed URL, or None when it is one."""
    if any(ch.isspace() for ch in text):
        return ("has spaces: one URL a line, nothing after it "
                "(a space inside a URL is written %20)")
    if any(ord(ch) < 0x20 or ord(ch) == 0x7F for ch in text):
        return "has control characters"
    if "://" not in text:
        return "not an absolute URL: write it with its scheme, e.g. http://site.test/"
    try:
        url = canonicalize(text, max_length=max_length, schemes=schemes)
    except UrlError as exc:
        if exc.reason == BAD_SCHEME:
            return f"scheme {str(exc).split(': ', 1)[-1]!r} is not crawled (only {', '.join(sorted(schemes))})"
        if exc.reason == TOO_LONG:
            return f"longer than {max_length} characters (scope.max_url_length)"
        return f"not a URL sluice can crawl ({exc})"
    if not host_of(url):
        return "has no host name"
    return None


def parse_seed_lines(lines: Iterable[str | bytes], *, source: str = "seeds",
                     max_length: int = MAX_URL_LENGTH,
                     schemes: frozenset[str] = DEFAULT_SCHEMES) -> SeedList:
    """Check every line; bytes that are not UTF-8 reject their line. Never raises."""
    seeds = SeedList()
    for number, raw in enumerate(lines, 1):
        if isinstance(raw, bytes):
            try:
                raw = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                seeds.rejected.append(RejectedSeed(
                    source, number, raw.decode("utf-8", "replace").strip(),
                    f"not UTF-8 text (byte {exc.start + 1})"))
                continue
        text = raw.strip()
        if number == 1:
            text = text.lstrip(BOM).strip()
        if not text or text.startswith("#"):
            continue
        problem = seed_problem(text, max_length=max_length, schemes=schemes)
        if problem is None:
            seeds.accepted.append(SeedLine(source, number, text))
        else:
            seeds.rejected.append(RejectedSeed(source, number, text, problem))
    return seeds


def split_lines(data: bytes) -> list[bytes]:
    """Lines as editors number them: split at LF, CRLF or CR only."""
    return data.splitlines()


def read_seed_file(path: Path, *, label: str = "seeds file", max_length: int = MAX_URL_LENGTH,
                   schemes: frozenset[str] = DEFAULT_SCHEMES) -> SeedList:
    """Read and check a seeds file; ConfigError when it cannot be read at all."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except IsADirectoryError as exc:
        raise ConfigError(f"{label} {path}: is a folder; pass a text file of URLs, "
                          "one a line") from exc
    except OSError as exc:
        raise ConfigError(f"{label} {path}: cannot be read ({exc.strerror or exc}); pass a "
                          "text file of URLs, one a line") from exc
    return parse_seed_lines(split_lines(data), source=str(path), max_length=max_length,
                            schemes=schemes)


def report_rejected(rejected: Iterable[RejectedSeed], stream: TextIO | None = None) -> None:
    """One line per rejected seed on stderr."""
    out = stream if stream is not None else sys.stderr
    for seed in rejected:
        print(f"sluice: rejected seed {seed.describe()}", file=out, flush=True)


def usable_seeds(seeds: SeedList, label: str) -> list[str]:
    """The accepted URLs after reporting the rejected ones; ConfigError naming ``label``
    (e.g. ``--seeds seeds.txt``) when none is left."""
    report_rejected(seeds.rejected)
    if seeds.accepted:
        return seeds.urls
    if seeds.rejected:
        raise ConfigError(f"{label}: no usable seed URL ({len(seeds.rejected)} line(s) "
                          "rejected, see above); put one absolute URL a line")
    raise ConfigError(f"{label}: has no URLs (it is empty or only comments); put one "
                      "absolute URL a line, e.g. http://site.test/")


def seeds_from_json(body: Any) -> SeedList:
    """``{"urls": ["http://site.test/", ...]}`` (the admin API's POST /seeds), checked."""
    urls = body.get("urls") if isinstance(body, dict) else None
    if (not isinstance(urls, list) or set(body) != {"urls"}
            or not all(isinstance(u, str) for u in urls)):
        raise ConfigError('the request body is a JSON object {"urls": ["http://site.test/", '
                          '...]}: a list of strings, one URL each')
    return parse_seed_lines(urls, source="urls")


SCOPE_REASONS = {
    HOST_OUT_OF_SCOPE: "host {host} is outside the job's scope (its allowed hosts, or the "
                       "seeds' hosts); start the crawl with --allow-host {host} to widen it",
    TOO_DEEP: "deeper than the job's scope.max_depth",
    EXCLUDED_PATTERN: "matches one of the job's scope.exclude patterns",
    NOT_INCLUDED: "matches none of the job's scope.include patterns",
}


async def add_seeds(job: Any, seeds: SeedList) -> dict[str, Any]:
    """Admit the accepted seeds of a list that lie in the job's scope; the others join
    the rejected ones. Returns ``{"added", "known", "rejected": [...]}``."""
    from frontier.job import admit_seeds

    s = job.settings.scope
    rejected = list(seeds.rejected)
    keep: list[str] = []
    for source, line, text in seeds.accepted:
        try:
            url = canonicalize(text, max_length=s.max_url_length, schemes=frozenset(s.schemes))
        except UrlError as exc:
            rejected.append(RejectedSeed(source, line, text, f"not a URL this job crawls ({exc})"))
            continue
        host = host_of(url)
        reason = job.admission.scope.check(url, host, 0)
        if reason is None:
            keep.append(text)
        else:
            why = SCOPE_REASONS.get(reason, "outside the job's scope ({reason})")
            rejected.append(RejectedSeed(source, line, text, why.format(host=host, reason=reason)))
    result = await admit_seeds(job, keep) if keep else None
    return {"added": result.new if result else 0,
            "known": result.duplicates if result else 0,
            "rejected": [r.as_dict() for r in rejected]}
