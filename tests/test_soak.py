"""An hour-long crawl of the synthetic web with the crawl process's memory sampled.

Not in CI (``-m soak``): ``./test.sh -m soak -s``; ``SLUICE_SOAK_S`` sets the length
(default 3600 s). The crawl runs as a real ``sluice crawl`` process on the embedded
Redis against the synthetic web served by another process; the test samples the RSS
of the crawl process (scheduler + worker; the embedded Redis, which holds the frontier
and grows with it by design, is sampled apart) and prints the figures as JSON.

The claim: after the first minutes the worker's memory is flat. Checked as: the median
RSS of the last fifth of the run is within 25 % (+ 32 MiB) of the median over minutes
5 to 10 (a bound of our own: common practice, no source), while the crawl kept fetching
to the end.
"""

from __future__ import annotations

import json
import os
import signal
import statistics
import subprocess
import sys
import time
from pathlib import Path

import pytest

SOAK_S = float(os.environ.get("SLUICE_SOAK_S", "3600"))
SAMPLE_EVERY_S = 10.0
UA = "sluice-soak/0.1 (+http://operator.test/contact)"
HOSTS = 100
PAGES = 400_000  # more than one hour at one fetch a second per host
WARM_UP_S = (300.0, 600.0)


def rss_kib(pid: int) -> int:
    """Resident set size of a process (kB, from /proc)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def children(pid: int) -> list[int]:
    path = Path(f"/proc/{pid}/task/{pid}/children")
    return [int(x) for x in path.read_text().split()] if path.exists() else []


def fetched_lines(log: Path) -> int:
    if not log.exists():
        return 0
    with log.open("rb") as f:
        return sum(chunk.count(b"\n") for chunk in iter(lambda: f.read(1 << 20), b""))


@pytest.mark.soak
@pytest.mark.timeout(int(SOAK_S) + 900)
def test_an_hour_of_crawling_keeps_the_worker_flat(tmp_path: Path) -> None:
    bin_dir = Path(sys.executable).parent
    web = subprocess.Popen(
        [sys.executable, "-m", "synthweb", "--hosts", str(HOSTS), "--pages", str(PAGES),
         "--plain", "--seed", "7"], stdout=subprocess.PIPE, text=True)
    crawl = None
    try:
        assert web.stdout is not None
        port = int(web.stdout.readline().split()[1])
        seeds = [web.stdout.readline().strip() for _ in range(5)]
        (tmp_path / "seeds.txt").write_text("\n".join(seeds) + "\n")
        out = tmp_path / "out"
        crawl = subprocess.Popen(
            [str(bin_dir / "sluice"), "crawl", "--out", str(out),
             "--seeds", str(tmp_path / "seeds.txt"), "--user-agent", UA,
             "--map-hosts", f"*.test=127.0.0.1:{port}", "--allow-host", "*.test",
             "--min-delay", "1.0", "--max-pages-per-host", str(PAGES), "--quiet"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        samples: list[dict[str, float]] = []
        started = time.monotonic()
        while (elapsed := time.monotonic() - started) < SOAK_S:
            assert crawl.poll() is None, crawl.stderr.read() if crawl.stderr else ""
            redis_kib = sum(rss_kib(c) for c in children(crawl.pid))
            samples.append({"t_s": round(elapsed, 1), "crawl_rss_mib": rss_kib(crawl.pid) / 1024,
                            "redis_rss_mib": redis_kib / 1024,
                            "logged": fetched_lines(out / "fetches.jsonl")})
            time.sleep(SAMPLE_EVERY_S)
        crawl.send_signal(signal.SIGINT)
        stdout, stderr = crawl.communicate(timeout=120)
        assert crawl.returncode == 0, stderr
        summary = json.loads(stdout)
    finally:
        for proc in (crawl, web):
            if proc is not None and proc.poll() is None:
                proc.kill()
                proc.wait()
        if web.stdout is not None:
            web.stdout.close()

    def window(lo: float, hi: float, key: str) -> list[float]:
        return [s[key] for s in samples if lo <= s["t_s"] < hi]

    warm = window(*WARM_UP_S, "crawl_rss_mib") if SOAK_S >= 1200 else window(
        SOAK_S / 4, SOAK_S / 2, "crawl_rss_mib")
    late = window(SOAK_S * 0.8, SOAK_S + 1, "crawl_rss_mib")
    figures = {
        "soak_s": SOAK_S, "fetched": summary["fetched"], "balanced": summary["balanced"],
        "pages_per_s": round(summary["fetched"] / SOAK_S, 1),
        "crawl_rss_mib_first_sample": round(samples[0]["crawl_rss_mib"], 1),
        "crawl_rss_mib_warm_median": round(statistics.median(warm), 1),
        "crawl_rss_mib_last_fifth_median": round(statistics.median(late), 1),
        "crawl_rss_mib_max": round(max(s["crawl_rss_mib"] for s in samples), 1),
        "redis_rss_mib_last": round(samples[-1]["redis_rss_mib"], 1),
        "samples": samples[:: max(1, len(samples) // 60)],
    }
    print(json.dumps(figures))
    (Path(os.environ.get("SLUICE_SOAK_REPORT", tmp_path / "soak.json"))).write_text(
        json.dumps(figures, indent=1))
    assert summary["balanced"]
    assert statistics.median(late) <= statistics.median(warm) * 1.25 + 32
    before_late = window(0, SOAK_S * 0.8, "logged")
    assert samples[-1]["logged"] > before_late[-1]  # still crawling at the end
