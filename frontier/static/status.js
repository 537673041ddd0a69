// The sluice status page: reads the daemon's /status JSON every REFRESH_MS and redraws.
// Every value from the JSON reaches the page as text (textContent, createTextNode) or as
// a number we computed; no HTML is ever built from strings. Host names, URLs and reasons
// come from the web.
"use strict";

(function () {
  const REFRESH_MS = 2000;
  const STALE_AFTER_MS = 3 * REFRESH_MS;
  const SVG = "http://www.w3.org/2000/svg";
  const STATES = ["admitted", "queued", "leased", "fetched", "failed", "excluded", "dead"];
  const MIRROR_REASON = "mirror_host";  // frontier/mirrors.py MIRROR_REASON
  let lastOk = 0;

  const $ = (id) => document.getElementById(id);

  function text(node, value) {
    node.textContent = value === null || value === undefined ? "" : String(value);
  }

  function num(n, digits) {
    if (typeof n !== "number" || !isFinite(n)) return "–";
    return n.toLocaleString("en", {maximumFractionDigits: digits || 0,
                                   minimumFractionDigits: digits || 0});
  }

  function ago(seconds) {
    if (typeof seconds !== "number" || !isFinite(seconds)) return "–";
    if (seconds < 1) return "just now";
    if (seconds < 120) return Math.round(seconds) + " s ago";
    return Math.round(seconds / 60) + " min ago";
  }

  // a table from a header and rows; a cell is a string/number or {text, cls, tags}
  function fill(table, header, rows, empty) {
    table.replaceChildren();
    const head = document.createElement("tr");
    for (const h of header) {
      const th = document.createElement("th");
      const label = typeof h === "string" ? h : h.text;
      text(th, label);
      if (typeof h !== "string" && h.num) th.className = "num";
      head.appendChild(th);
    }
    table.appendChild(head);
    if (!rows.length) {
      const tr = document.createElement("tr");
      const td = document.createElement("td");
      td.colSpan = header.length;
      td.className = "empty";
      text(td, empty);
      tr.appendChild(td);
      table.appendChild(tr);
      return;
    }
    for (const row of rows) {
      const tr = document.createElement("tr");
      row.forEach((cell, i) => {
        const td = document.createElement("td");
        const h = header[i];
        if (typeof h !== "string" && h.num) td.className = "num";
        if (cell && typeof cell === "object" && Array.isArray(cell.tags)) {
          for (const tag of cell.tags) {
            const span = document.createElement("span");
            span.className = "tag " + (/^[a-z_]+$/.test(tag) ? tag : "");
            text(span, tag);
            td.appendChild(span);
          }
        } else {
          text(td, cell);
        }
        tr.appendChild(td);
      });
      table.appendChild(tr);
    }
  }

  function svg(tag, attrs) {
    const node = document.createElementNS(SVG, tag);
    for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, String(v));
    return node;
  }

  function chart(box, series) {
    // drawn at the box's own size, so that text keeps its proportions
    const W = Math.max(200, box.clientWidth || 800), H = Math.max(80, box.clientHeight || 180);
    const L = 44, B = 18, T = 8;
    const root = svg("svg", {viewBox: `0 0 ${W} ${H}`, role: "img",
                             "aria-label": "pages per second over time"});
    root.appendChild(svg("line", {x1: L, y1: H - B, x2: W, y2: H - B, class: "axis"}));
    root.appendChild(svg("line", {x1: L, y1: T, x2: L, y2: H - B, class: "axis"}));
    const points = series.filter((p) => isFinite(p.ago_s) && isFinite(p.pages_per_s));
    const span = Math.max(30, ...points.map((p) => p.ago_s));
    const top = Math.max(1, ...points.map((p) => p.pages_per_s)) * 1.1;
    const x = (ago_s) => L + (W - L) * (1 - ago_s / span);
    const y = (v) => H - B - (H - B - T) * (v / top);
    const label = (content, attrs) => {
      const t = svg("text", attrs);
      t.textContent = content;
      root.appendChild(t);
    };
    label(num(top, top < 10 ? 1 : 0), {x: L - 4, y: T + 10, "text-anchor": "end"});
    label("0", {x: L - 4, y: H - B, "text-anchor": "end"});
    label("now", {x: W - 2, y: H - 4, "text-anchor": "end"});
    label(span < 120 ? `−${Math.round(span)} s` : `−${Math.round(span / 6) / 10} min`,
          {x: L + 2, y: H - 4});
    if (points.length) {
      const xy = points.map((p) => `${x(p.ago_s).toFixed(1)},${y(p.pages_per_s).toFixed(1)}`);
      const first = x(points[0].ago_s).toFixed(1), last = x(points[points.length - 1].ago_s).toFixed(1);
      root.appendChild(svg("polygon", {class: "area",
        points: `${first},${H - B} ${xy.join(" ")} ${last},${H - B}`}));
      root.appendChild(svg("polyline", {class: "line", points: xy.join(" ")}));
    } else {
      label("collecting samples…", {x: W / 2, y: H / 2, "text-anchor": "middle"});
    }
    box.replaceChildren(root);
  }

  function render(s) {
    text($("job"), s.job);
    document.title = "sluice · " + s.job;
    text($("fetched"), num(s.fetched));
    const rate = s.rate || {};
    text($("rate"), rate.pages_per_s === null ? "–" : num(rate.pages_per_s, 1));
    text($("rate-note"), "mean over the last " + num(rate.window_s) + " s");

    const b = s.budget || {};
    const fill_ = $("budget-fill");
    if (b.max_pages) {
      const pct = Math.min(100, 100 * b.fetched / b.max_pages);
      fill_.style.width = pct.toFixed(1) + "%";
      fill_.className = pct >= 100 ? "fill full" : "fill";
      text($("budget-text"), `${num(b.fetched)} of ${num(b.max_pages)} pages (${num(pct, 1)}%)` +
        (b.leased ? `, ${num(b.leased)} in flight` : "") + (pct >= 100 ? ": budget spent" : ""));
    } else {
      fill_.style.width = "0";
      text($("budget-text"), `${num(b.fetched)} pages; no page budget set (budget.max_pages)`);
    }

    const bal = $("balanced");
    text(bal, s.balanced ? "balanced" : "NOT balanced");
    bal.className = "big " + (s.balanced ? "good" : "bad");
    text($("balanced-note"), s.balanced
      ? "admitted = queued + leased + fetched + failed + excluded + dead"
      : `admitted ${num(s.admitted)}, but the states add up to ${num(s.accounted)}`);

    chart($("chart"), rate.series || []);

    fill($("counts"), ["state", {text: "URLs", num: true}],
         STATES.map((k) => [k, num(s[k])]), "");

    const workers = s.workers || [];
    fill($("workers"), ["worker", "machine", {text: "pid", num: true}, {text: "pages", num: true},
                        {text: "in flight", num: true}, "last seen"],
         workers.map((w) => [w.id, w.machine, w.pid, num(w.pages), num(w.in_flight),
                             ago(w.seen_ago_s)]),
         "no worker has reported in the last 30 s");

    const h = s.hosts || {};
    const cc = h.control_counts || {};
    text($("control-counts"), ["paused", "blocked", "boosted", "delayed"]
      .map((k) => `${num(cc[k] || 0)} ${k}`).join(" · "));
    fill($("controlled"), ["host", "controls", {text: "boost", num: true},
                           {text: "operator delay (s)", num: true}, {text: "fetched", num: true}],
         (h.controlled || []).map((r) => [r.host, {tags: r.controls}, num(r.boost, 2),
                                          num(r.delay_ms / 1000, 1), num(r.fetched)]),
         "no host is paused, blocked, boosted or delayed");
    fill($("busiest"), ["host", {text: "fetched", num: true}, {text: "admitted", num: true}],
         (h.busiest || []).map((r) => [r.host, num(r.fetched), num(r.admitted)]),
         "nothing fetched yet");
    fill($("slowest"), ["host", {text: "last response (ms)", num: true},
                        {text: "crawl-delay (s)", num: true}],
         (h.slowest || []).map((r) => [r.host, num(r.rt_ms), num(r.crawl_ms / 1000, 1)]),
         "no response timed yet");
    text($("hosts-note"), `Host tables read from ${num(h.scanned)} of ${num(h.known)} host ` +
      `records, ${ago(h.read_ago_s)}.`);

    fill($("errors"), ["outcome", "reason", {text: "total", num: true},
                       {text: "last 5 min", num: true}],
         (s.errors || []).map((e) => [e.outcome, e.reason, num(e.total),
                                      e.recent === null ? "–" : num(e.recent)]),
         "no failed or dead URLs");
    const robots = s.robots || {};
    const policies = robots.policies || {};
    fill($("robots"), ["outcome (RFC 9309)", {text: "fetches", num: true}],
         [["rules", "rules (2xx)"], ["allow_all", "allow all (4xx)"],
          ["disallow_all", "disallow all (5xx, 429, unreachable)"]]
           .map(([k, label]) => [label, num(policies[k] || 0)]), "");
    const now = s.generated_at;
    fill($("robots-failures"), ["robots.txt", "why", "when"],
         (robots.failures || []).map((f) => [f.url, f.status ? "HTTP " + f.status : f.error,
                                             ago(now - f.at)]),
         "none");

    // mirror hosts (frontier/mirrors.py): pages compared, those shared with other hosts,
    // and the URLs a mirror may hold (its new pages plus the slack); the cut is job-wide
    const m = s.mirrors || {};
    const mirrors = m.hosts || [];
    const cut = (s.reasons || {})["excluded:" + MIRROR_REASON] || 0;
    text($("mirrors-note"), `${num(m.count || 0)} found · ${num(cut)} URLs cut as ` +
      MIRROR_REASON + (m.count > mirrors.length ? ` · the first ${num(mirrors.length)} shown` : ""));
    fill($("mirrors"), ["mirror host", "copies pages of", {text: "pages compared", num: true},
                        {text: "shared", num: true}, {text: "share", num: true},
                        {text: "may hold (URLs)", num: true}, {text: "admitted", num: true}],
         mirrors.map((r) => [r.host, r.mirror_of || "–", num(r.pages), num(r.copies),
                             typeof r.share === "number" ? num(100 * r.share) + "%" : "–",
                             num(r.limit), num(r.admitted)]),
         "no host found to mirror another");
  }

  function showLive() {
    const live = $("live");
    if (!lastOk) return;
    const age = Date.now() - lastOk;
    if (age <= STALE_AFTER_MS) {
      live.className = "live ok";
      text(live, "live · updated " + new Date(lastOk).toLocaleTimeString("en-GB"));
    } else {
      live.className = "live down";
      text(live, "no answer from the daemon for " + Math.round(age / 1000) + " s");
    }
  }

  async function refresh() {
    try {
      const response = await fetch("status", {cache: "no-store",
                                              headers: {Accept: "application/json"}});
      if (!response.ok) throw new Error("HTTP " + response.status);
      render(await response.json());
      lastOk = Date.now();
    } catch (err) {
      if (!lastOk) {
        $("live").className = "live down";
        text($("live"), "cannot read status: " + err.message);
      }
    } finally {
      showLive();
      setTimeout(refresh, REFRESH_MS);
    }
  }

  refresh();
})();
