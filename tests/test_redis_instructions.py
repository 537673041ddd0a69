"""`sluice bench frontier --instructions`: Redis's instructions per URL, counted by valgrind's
callgrind on a real redis-server. The point of the count is that it does not move with the
machine's load, so two runs of the same tree must agree closely, and the JSON must carry
the figures the benchmarks quote."""

from __future__ import annotations

import json
import subprocess
import sys

from frontier.bench.redis_instructions import count


async def test_two_counts_of_the_same_work_agree() -> None:
    first = await count(urls=3000, hosts=60, lease_limit=1200)
    second = await count(urls=3000, hosts=60, lease_limit=1200)
    assert first["leased_and_completed"] == second["leased_and_completed"] >= 1200
    for key in ("redis_instructions_per_admitted_url",
                "redis_instructions_per_leased_and_completed_url"):
        assert first[key] > 1000  # a script call alone is thousands of instructions
        assert abs(first[key] - second[key]) <= 0.03 * first[key], (key, first[key], second[key])


def test_the_command_prints_the_figures() -> None:
    out = subprocess.run(
        [sys.executable, "-m", "frontier.cli", "bench", "frontier", "--instructions",
         "--urls", "2000", "--hosts", "40", "--lease-urls", "500"],
        capture_output=True, text=True, timeout=600, check=True).stdout
    result = json.loads(out)
    assert result["urls"] == 2000 and result["leased_and_completed"] >= 500
    assert result["server"].startswith("Redis server v=")
    assert result["redis_instructions_per_leased_and_completed_url"] > result[
        "redis_instructions_per_admitted_url"] > 0
    # the append-only file formats every write a script makes: more work, never less
    for key in ("redis_instructions_per_admitted_url",
                "redis_instructions_per_leased_and_completed_url"):
        assert result[f"{key}_with_append_only_file"] > result[key]
