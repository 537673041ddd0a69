"""`sluice bench frontier --cluster` on a fresh 3-master loopback Cluster.

Its admits send calls to many partitions at once while no master has the scripts yet:
each call met NOSCRIPT and reloaded its script, and redis-py 8.1's Cluster client then
wrote on a connection it was reconnecting ("'NoneType' object has no attribute
'writelines'"), so the bench stopped with "Redis unavailable during admit" (three runs of
three at these sizes). The scripts are now loaded on every master before the first calls
from a client (frontier/scripts.py)."""

from __future__ import annotations

import json
import subprocess
import sys


def test_the_cluster_bench_admits_on_a_fresh_cluster() -> None:
    for _ in range(2):
        run = subprocess.run(
            [sys.executable, "-m", "frontier.cli", "bench", "frontier", "--cluster",
             "--urls", "20000", "--hosts", "200", "--lease-urls", "2000"],
            capture_output=True, text=True, timeout=600)
        assert run.returncode == 0, run.stderr[-2000:]
        result = json.loads(run.stdout)
        assert result["cluster"]["queued"] == 20000 and result["cluster"]["balanced"]
        assert result["cluster"]["fetched"] >= 2000
