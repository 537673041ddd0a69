"""The synthetic web's sitemaps (an opt-in variant: :func:`add_sitemaps`).

Five ordinary hosts get ``Sitemap:`` lines in their robots.txt and pages no link
reaches (``/hidden/``), some listed with a stale ``lastmod``:

* ``plain``: a plain XML urlset at ``/sitemap.xml``, one of its URLs with an escaped
  ``&amp;`` in the query, some in each W3C Datetime form; a second sitemap in ``/deep/``
  that lists a URL outside its directory (refused: the location rule) and one inside;
  and a URL of the ``foreign`` host it may not list (refused);
* ``gzipped``: a gzip file ``/sitemap-pages.xml.gz``;
* ``index``: a sitemap index listing a plain child, a child served with
  ``Content-Encoding: gzip``, and itself (a loop);
* ``foreign``: its robots.txt names a sitemap on the ``index`` host that lists its
  hidden pages (a cross submit: allowed);
* ``hostile``: its sitemap is an entity bomb; its hidden pages are listed nowhere else.

A text sitemap (``/operator/sitemap.txt`` on the ``plain`` host) is named by no robots
file: it is for ``--sitemap``. Nothing of the default web changes unless this is called.
"""

from __future__ import annotations

import gzip
from dataclasses import dataclass, field
from xml.sax.saxutils import escape

from synthweb.graph import SyntheticWeb
from synthweb.model import Page

NS = "http://www.sitemaps.org/schemas/sitemap/0.9"
XML_TYPE = "application/xml"
HIDDEN_PER_HOST = 6
STALE_LASTMOD = "2003-02-01"
# one form each of the W3C Datetime profile the protocol names for <lastmod>
FRESH_LASTMODS = ("2026-11", "2026-11-30", "2026-11-30T09:15+01:00",
                  "2026-11-30T09:15:30Z", "2026-11-30T09:15:30.25-05:00", "2026")

ENTITY_BOMB = (
    '<?xml version="1.0"?>\n<!DOCTYPE urlset [\n <!ENTITY a "aaaaaaaaaa">\n'
    + "".join(f' <!ENTITY {chr(98 + i)} "{("&" + chr(97 + i) + ";") * 10}">\n'
              for i in range(8))
    + f']>\n<urlset xmlns="{NS}"><url><loc>http://HOST/hidden/0?&i;</loc></url></urlset>\n')


@dataclass
class SitemapPlan:
    """Ground truth of the sitemap variant."""

    roles: dict[str, str] = field(default_factory=dict)  # role -> host
    hidden: set[str] = field(default_factory=set)  # reachable only through sitemaps
    refused: set[str] = field(default_factory=set)  # listed, but against the location rule
    unlisted: set[str] = field(default_factory=set)  # listed only in the hostile sitemap
    stale: dict[str, str] = field(default_factory=dict)  # URL -> its stale lastmod
    lastmod: dict[str, str] = field(default_factory=dict)  # URL -> lastmod as written
    sitemaps: dict[str, str] = field(default_factory=dict)  # sitemap URL -> expected reason
    operator_sitemap: str = ""
    operator_pages: set[str] = field(default_factory=set)


def urlset(entries: list[tuple[str, str | None]]) -> bytes:
    """A urlset of (URL, lastmod or None), entity-escaped as the protocol asks."""
    rows = []
    for loc, lastmod in entries:
        mod = f"<lastmod>{lastmod}</lastmod>" if lastmod else ""
        rows.append(f"<url><loc>{escape(loc)}</loc>{mod}</url>")
    return (f'<?xml version="1.0" encoding="UTF-8"?>\n<urlset xmlns="{NS}">\n'
            + "\n".join(rows) + "\n</urlset>\n").encode()


def sitemap_index(locs: list[str]) -> bytes:
    rows = "\n".join(f"<sitemap><loc>{escape(loc)}</loc></sitemap>" for loc in locs)
    return (f'<?xml version="1.0" encoding="UTF-8"?>\n<sitemapindex xmlns="{NS}">\n{rows}\n'
            "</sitemapindex>\n").encode()


def _page(host: str, path: str, home: str) -> Page:
    from synthweb.model import Link
    return Page(url=f"http://{host}{path}", host=host, path=path,
                title=f"Hidden {path}", text=f"A page at {path} that no link reaches.",
                links=[Link(home, "home")])


def _eligible(web: SyntheticWeb) -> list[str]:
    """Plain hosts (no crawl delay, not slow or failing), seed hosts first."""
    bad = set(web.slow_hosts) | set(web.failing_hosts) | set(web.crawl_delays)
    seeded = [h for h in dict.fromkeys(s.split("/")[2] for s in web.seeds)]
    order = seeded + [h for h in web.site_hosts if h not in seeded]
    plain = [h for h in order if h in web.site_hosts and h not in bad]
    return sorted(plain, key=lambda h: web.robots.get(h) is not None)  # no robots.txt first


def add_sitemaps(web: SyntheticWeb) -> SitemapPlan:
    """Give ``web`` the sitemap variant (in place) and return its ground truth."""
    hosts = _eligible(web)
    if len(hosts) < 5:
        raise ValueError("the sitemap variant needs five plain site hosts")
    plan = SitemapPlan(roles=dict(zip(("plain", "gzipped", "index", "foreign", "hostile"),
                                      hosts)))
    r = plan.roles
    named: dict[str, list[str]] = {h: [] for h in r.values()}

    def serve(url: str, body: bytes, headers: dict[str, str] | None = None) -> None:
        web.files[url] = (200, body, headers or {"Content-Type": XML_TYPE})

    def hidden(host: str, prefix: str = "/hidden/", n: int = HIDDEN_PER_HOST) -> list[str]:
        urls = []
        for i in range(n):
            page = _page(host, f"{prefix}{i}", f"http://{host}/")
            web.pages[page.url] = page
            urls.append(page.url)
        return urls

    def listing(urls: list[str]) -> list[tuple[str, str | None]]:
        out: list[tuple[str, str | None]] = []
        for i, url in enumerate(urls):
            mod = STALE_LASTMOD if i % 3 == 0 else FRESH_LASTMODS[i % len(FRESH_LASTMODS)]
            out.append((url, mod))
            plan.lastmod[url] = mod
            if mod == STALE_LASTMOD:
                plan.stale[url] = mod
        return out

    # plain: an XML urlset, an escaped query, a foreign URL it may not list
    host = r["plain"]
    pages = hidden(host)
    query = _page(host, "/hidden/q?x=1&y=2", f"http://{host}/")
    web.pages[query.url] = query
    pages.append(query.url)
    plan.hidden.update(pages)
    foreign_bad = hidden(r["foreign"], "/listed-elsewhere/", 2)
    plan.refused.update(foreign_bad)
    sm = f"http://{host}/sitemap.xml"
    serve(sm, urlset(listing(pages) + [(u, None) for u in foreign_bad]))
    plan.sitemaps[sm] = "sitemap_urlset,sitemap_off_location"
    named[host].append(sm)
    # plain, /deep/: one URL in its directory, one outside it
    inside, outside = hidden(host, "/deep/", 1), hidden(host, "/outside/", 1)
    plan.hidden.update(inside)
    plan.refused.update(outside)
    deep = f"http://{host}/deep/sitemap.xml"
    serve(deep, urlset([(inside[0], None), (outside[0], None)]))
    plan.sitemaps[deep] = "sitemap_urlset,sitemap_off_location"
    named[host].append(deep)
    # plain: a text sitemap for --sitemap
    plan.operator_pages = set(hidden(host, "/operator/", 3))
    plan.operator_sitemap = f"http://{host}/operator/sitemap.txt"
    web.files[plan.operator_sitemap] = (
        200, ("\n".join(sorted(plan.operator_pages)) + "\n").encode(),
        {"Content-Type": "text/plain; charset=utf-8"})
    plan.sitemaps[plan.operator_sitemap] = "sitemap_urlset"

    # gzipped: a .gz file
    host = r["gzipped"]
    pages = hidden(host)
    plan.hidden.update(pages)
    sm = f"http://{host}/sitemap-pages.xml.gz"
    serve(sm, gzip.compress(urlset(listing(pages)), mtime=0),
          {"Content-Type": "application/gzip"})
    plan.sitemaps[sm] = "sitemap_urlset"
    named[host].append(sm)

    # index: a plain child, a child sent with Content-Encoding: gzip, itself
    host = r["index"]
    first, second = hidden(host, "/hidden/a", 3), hidden(host, "/hidden/b", 3)
    plan.hidden.update(first + second)
    index = f"http://{host}/sitemap_index.xml"
    children = [f"http://{host}/sitemap-1.xml", f"http://{host}/sitemap-2.xml"]
    serve(index, sitemap_index(children + [index]))
    serve(children[0], urlset(listing(first)))
    serve(children[1], gzip.compress(urlset(listing(second)), mtime=0),
          {"Content-Type": XML_TYPE, "Content-Encoding": "gzip"})
    plan.sitemaps[index] = "sitemap_index"
    plan.sitemaps.update({c: "sitemap_urlset" for c in children})
    named[host].append(index)

    # foreign: its robots.txt names a sitemap on the index host that lists its pages
    host = r["foreign"]
    pages = hidden(host)
    plan.hidden.update(pages)
    cross = f"http://{r['index']}/cross/{host}.xml"
    serve(cross, urlset(listing(pages)))
    plan.sitemaps[cross] = "sitemap_urlset"
    named[host].append(cross)

    # hostile: an entity bomb
    host = r["hostile"]
    plan.unlisted.update(hidden(host, "/hidden/", 2))
    sm = f"http://{host}/sitemap.xml"
    serve(sm, ENTITY_BOMB.replace("HOST", host).encode())
    plan.sitemaps[sm] = "sitemap_xml_refused"
    named[host].append(sm)

    for host, urls in named.items():
        body = web.robots.get(host)
        base = body if isinstance(body, str) and body and not body.startswith("\x00") \
            else "User-agent: *\nDisallow: /private/\n"
        web.robots[host] = base.rstrip("\n") + "\n\n" + "".join(
            f"Sitemap: {u}\n" for u in urls)
    return plan
