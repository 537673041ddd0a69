"""robots.txt bodies served by the synthetic web: RFC 9309 examples, ordinary variants,
an oversized file and a file that is not a robots file at all.
"""

from __future__ import annotations

# RFC 9309 section 5.1 ("Simple Example"), reproduced with its comments; the example
# host name is changed to this web's host. Reproduced from memory of the RFC text and
# checked against a public copy; any wording slip in comments does not change rules.
RFC_9309_SIMPLE_EXAMPLE = """\
# robots.txt for http://rfc-example.test/
User-Agent: *
Disallow: *.gif$
Disallow: /example/
Allow: /publications/

# Foobot is only allowed on specific pages
User-Agent: foobot
Disallow:/
Allow:/example/page.html
Allow:/example/allowed.gif

# Both barbot and bazbot apply
User-Agent: barbot
User-Agent: bazbot
Disallow: /example/page.html

# Unrestricted
User-Agent: quxbot
"""
RFC_EXAMPLE_PATHS = (
    "/",
    "/publications/",
    "/publications/paper-1.html",
    "/publications/figure.gif",
    "/example/page.html",
    "/example/allowed.gif",
    "/example/x.gif",
    "/image.gif",
)

# RFC 9309 section 5.2 ("Longest Match"); the RFC places it under "foobot", here
# it is the "*" group so every crawler is bound by it.
RFC_9309_LONGEST_MATCH_EXAMPLE = """\
User-Agent: *
Allow: /example/page/
Disallow: /example/page/disallowed.gif
"""
RFC_LONGEST_MATCH_PATHS = (
    "/",
    "/example/page/",
    "/example/page/allowed.html",
    "/example/page/disallowed.gif",
)

ROBOTS_VARIANTS: tuple[str, ...] = (
    "User-agent: *\n{delay}Disallow: /private/\n",
    "User-agent: *\n{delay}Disallow: /private/\nDisallow: /p/*7.html$\n\n"
    "User-agent: otherbot\nDisallow: /\n",
    "User-agent: *\n{delay}Disallow: /private/\nAllow: /private/1\n",
)

BIG_ROBOTS_BYTES = 2 * 1024 * 1024
BIG_ROBOTS_HEAD = "User-agent: *\nDisallow: /private/\n"
BIG_ROBOTS_FILLER_LINE = "# {:07d} " + "kalo vasdor tuquin " * 5 + "\n"  # ~100-byte comment
BIG_ROBOTS_RULE_LINE = "Disallow: /filler/{}/\n"
BIG_ROBOTS_RULE_EVERY = 10  # one real (harmless) rule per this many filler lines
GARBAGE_ROBOTS = (
    "<html><head><title>Kalo vasdor</title></head>\n<body><h1>Tuquin</h1>\n"
    "<p>This file is not a robots file at all.</p>\x00\x01\x02\ufffd\udcff\udcfe"
    "\n{{{{ ]]]] ;;;; \x7f\x1b[31m\n</body></html>\n"
)
