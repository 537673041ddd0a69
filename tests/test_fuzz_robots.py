"""Fuzzing robots.txt parsing and matching (frontier/robots_rules.py) with hypothesis.

Example counts come from the hypothesis profile (tests/conftest.py): "ci" by default,
HYPOTHESIS_PROFILE=fuzz for 10,000 a test.

The expected answer for generated rule sets is worked out by ``rfc9309_allowed`` below,
written by hand from RFC 9309 (not from the library the product wraps):

* s.2.2.1: the groups whose user-agent equals the crawler's product token
  (case-insensitively) apply, combined into one; if there are none, the "*" groups do;
  if there are none of those either, nothing is disallowed.
* s.2.2.2: a rule matches when its path pattern matches from the first octet of the
  URL's path (and query); of the matching rules the one with the most octets wins,
  an allow rule wins a tie with a disallow rule; no matching rule means allowed.
  "/robots.txt" is always allowed.
* s.2.2.3: "*" stands for any sequence of characters, a "$" ending the pattern anchors
  it to the end of the path; in the URL itself "*" and "$" are ordinary characters
  (a pattern names them as "%2A" and "%24").
"""

from __future__ import annotations

import re

import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from frontier.robots_rules import DEFAULT_CRAWL_DELAY_CAP_S, RobotsRules, product_token

pytestmark = pytest.mark.fuzz

UA = "sluicebot/2.0 (+http://operator.test/contact)"
TOKEN = product_token(UA)
ORIGIN = "http://site.test"

Rule = tuple[bool, str]  # (allow?, path pattern)
Group = tuple[list[str], list[Rule]]  # (user-agent names, rules)


# --- the hand-written reference (RFC 9309) ------------------------------------------------


def pattern_matches(pattern: str, path: str) -> bool:
    """RFC 9309 s.2.2.3: "*" any sequence, a final "$" the end; else a prefix match."""
    anchored = pattern.endswith("$")
    body = pattern[:-1] if anchored else pattern
    regex = ".*".join(re.escape(part) for part in body.split("*"))
    return re.match(regex + (r"\Z" if anchored else ""), path, re.S) is not None


def rfc9309_allowed(groups: list[Group], token: str, path: str) -> bool:
    """May a crawler with product token ``token`` fetch ``path`` (RFC 9309 s.2.2)?"""
    if path == "/robots.txt":
        return True
    own = [rules for names, rules in groups if token.lower() in {n.lower() for n in names}]
    chosen = own or [rules for names, rules in groups if "*" in names]
    best: Rule | None = None
    for rules in chosen:
        for allow, pattern in rules:
            if not pattern_matches(pattern, path):
                continue
            if best is None or len(pattern) > len(best[1]) or (
                    len(pattern) == len(best[1]) and allow):
                best = (allow, pattern)
    return best is None or best[0]


def test_reference_agrees_with_the_rfc_examples() -> None:
    # The reference itself, on RFC 9309 s.5.1 and s.5.2 (values read from the RFC).
    simple = [(["*"], [(False, "*.gif$"), (False, "/example/"), (True, "/publications/")]),
              (["foobot"], [(False, "/"), (True, "/example/page.html"),
                            (True, "/example/allowed.gif")]),
              (["barbot", "bazbot"], [(False, "/example/page.html")]),
              (["quxbot"], [])]
    assert not rfc9309_allowed(simple, "otherbot", "/example/x.gif")
    assert rfc9309_allowed(simple, "otherbot", "/publications/x.gif")  # longer allow wins
    assert rfc9309_allowed(simple, "FooBot", "/example/allowed.gif")
    assert not rfc9309_allowed(simple, "foobot", "/publications/")
    assert not rfc9309_allowed(simple, "bazbot", "/example/page.html")
    assert rfc9309_allowed(simple, "quxbot", "/example/x.gif")
    longest = [(["foobot"], [(True, "/example/page/"),
                             (False, "/example/page/disallowed.gif")])]
    assert not rfc9309_allowed(longest, "foobot", "/example/page/disallowed.gif")
    assert rfc9309_allowed(longest, "foobot", "/example/page/allowed.gif")


# --- generated rule sets --------------------------------------------------------------------

# Plain characters only on the pattern side (letters, ".", "-", "_", "/"), so that the
# percent-encoding both sides get before comparison (RFC 9309 s.2.2.2) cannot change
# what matches: the URL's "$", "*" and "?" become "%24", "%2A", "%3F" at most.
PIECES = ["a", "b", "ab", "ba", ".html", "x.html", "index.html", "-", "_", "/"]
PATTERN = st.tuples(
    st.lists(st.sampled_from(PIECES + ["*", "*", "/*"]), max_size=6),
    st.booleans(),
    st.booleans(),
).map(lambda t: ("" if t[0][:1] == ["*"] else "/") + "".join(t[0]) + ("$" if t[1] else ""))
URL_PATH = st.lists(st.sampled_from(PIECES + ["$", "*", "?q", "?", "=1"]), max_size=7).map(
    lambda parts: "/" + "".join(parts))
AGENT_NAMES = st.sampled_from(["*", TOKEN, TOKEN.upper(), "SluiceBot", "otherbot",
                               TOKEN[:-3], TOKEN + "x", "sluice-bot"])
GROUPS = st.lists(
    st.tuples(st.lists(AGENT_NAMES, min_size=1, max_size=2),
              st.lists(st.tuples(st.booleans(), PATTERN), max_size=6)),
    max_size=4,
)
SPELLINGS = st.tuples(st.sampled_from(["User-agent", "User-Agent", "user-agent", "USER-AGENT"]),
                      st.sampled_from(["Allow", "allow", "ALLOW"]),
                      st.sampled_from(["Disallow", "disallow", "DisAllow"]),
                      st.sampled_from([": ", ":", " : ", ":\t"]),
                      st.sampled_from(["\n", "\r\n", "\r"]),
                      st.booleans())


def render(groups: list[Group], spelling: tuple[str, str, str, str, str, bool]) -> bytes:
    """A robots.txt in RFC 9309 s.2.2 syntax; names and separators vary as s.2.2 allows."""
    ua, allow, disallow, sep, eol, comments = spelling
    lines: list[str] = []
    for names, rules in groups:
        lines += [f"{ua}{sep}{name}" for name in names]
        for is_allow, pattern in rules:
            line = f"{allow if is_allow else disallow}{sep}{pattern}"
            lines.append(line + (" # why" if comments else ""))
        lines.append("")
    return eol.join(lines).encode()


def as_read(groups: list[Group]) -> list[Group]:
    """The groups of the rendered file as RFC 9309 s.2.1's grammar reads them: user-agent
    lines with only empty lines between them open one group, so a group written without
    rules shares the next group's rules."""
    read: list[Group] = []
    names: list[str] = []
    for group_names, rules in groups:
        names = names + group_names
        if rules:
            read.append((names, rules))
            names = []
    if names:
        read.append((names, []))
    return read


@given(groups=GROUPS, spelling=SPELLINGS, paths=st.lists(URL_PATH, min_size=1, max_size=8))
@example(groups=[(["*"], [(False, "/a/"), (True, "/a/index.html")])],
         spelling=("User-agent", "Allow", "Disallow", ": ", "\n", False), paths=["/a/"])
@example(groups=[(["*"], [(False, "/a$")])],
         spelling=("User-agent", "Allow", "Disallow", ": ", "\n", False), paths=["/a$b", "/a"])
@example(groups=[(["*"], [(True, "/a*"), (False, "/ab")])],
         spelling=("User-agent", "Allow", "Disallow", ": ", "\n", False), paths=["/ab"])
@example(groups=[(["*"], [(False, "/")]), ([TOKEN[:-3]], [(True, "/")])],
         spelling=("User-agent", "Allow", "Disallow", ": ", "\n", False), paths=["/x"])
def test_generated_rule_sets_follow_rfc9309(groups: list[Group],
                                           spelling: tuple[str, str, str, str, str, bool],
                                           paths: list[str]) -> None:
    policy = RobotsRules.from_entry(200, render(groups, spelling), user_agent=UA)
    for path in paths:
        assert policy.allowed(ORIGIN + path) is rfc9309_allowed(as_read(groups), TOKEN, path), path


# --- any bytes ------------------------------------------------------------------------------

ROBOTS_NOISE = st.lists(
    st.one_of(
        st.sampled_from(["User-agent: *", "User-agent: sluicebot", "Allow: /", "Disallow: /",
                         "Disallow: *", "Disallow: $", "Allow: /*$", "Crawl-delay: 5",
                         "Crawl-delay: -1", "Crawl-delay: nan", "Crawl-delay: inf",
                         "Crawl-delay: 1e400", "Sitemap: http://site.test/s.xml",
                         "Request-rate: 1/0", "Visit-time: 2500-9999", "Host: x", "#", ":",
                         "Disallow: %", "Disallow: /%zz", "Disallow: /%C3", "Allow: /\u00e9",
                         "Disallow: /a?b=%2f", "user agent sluicebot", "\ufeff", "\x00",
                         "Disallow: /[", "Disallow: http://site.test/x"]),
        st.text(max_size=30),
    ),
    max_size=30,
).map("\n".join)


@given(body=st.one_of(st.binary(max_size=3000), ROBOTS_NOISE.map(
           lambda text: text.encode("utf-8", "surrogatepass"))),
       paths=st.lists(st.text(max_size=30), max_size=5),
       agent=st.sampled_from([UA, "otherbot/1", "a", "Sluicebot"]))
def test_any_body_parses_and_answers_without_raising(body: bytes, paths: list[str],
                                                     agent: str) -> None:
    # RFC 9309 s.2.2: lines that do not parse are skipped; nothing about a body may
    # stop the crawl. Crawl-delay (not in RFC 9309; common practice, no source) is
    # a finite number between 0 and the cap, or None.
    policy = RobotsRules.from_entry(200, body, user_agent=agent)
    can_forbid = b"disallow" in body.lower()  # s.2.2.2: only a disallow rule forbids
    for path in paths:
        verdict = policy.allowed(ORIGIN + "/" + path)
        assert verdict is True or (verdict is False and can_forbid)
    assert policy.allowed(ORIGIN + "/robots.txt")  # RFC 9309 s.2.2.2
    delay = policy.crawl_delay()
    assert delay is None or 0.0 <= delay <= DEFAULT_CRAWL_DELAY_CAP_S
