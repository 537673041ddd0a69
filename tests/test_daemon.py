"""The daemon's loops stop when asked, even when a cancellation gets absorbed on the way."""

from __future__ import annotations

import asyncio
import random

from prometheus_client import CollectorRegistry

from frontier.daemon import Daemon, wait_or_timeout
from frontier.job import open_job
from frontier.settings import load_settings
from tests.servers import RedisServer

STOP_WITHIN_S = 2.0


async def test_wait_or_timeout_reports_which_came_first() -> None:
    event = asyncio.Event()
    assert await wait_or_timeout(event, 0.01) is False
    asyncio.get_running_loop().call_later(0.01, event.set)
    assert await wait_or_timeout(event, 5.0) is True


async def test_loop_ends_on_stop_when_its_step_absorbs_the_cancellation() -> None:
    """A step that swallows CancelledError (as a client library may) must not keep the loop alive."""
    stop = asyncio.Event()
    steps = 0

    async def absorbing_step() -> None:
        nonlocal steps
        steps += 1
        try:
            await asyncio.sleep(0.05)
        except asyncio.CancelledError:
            pass  # absorbed: the loop is not told

    task = asyncio.create_task(Daemon._every(0.001, absorbing_step, stop))
    await asyncio.sleep(0.02)  # inside the step's sleep
    stop.set()
    task.cancel()
    done, _ = await asyncio.wait([task], timeout=STOP_WITHIN_S)
    assert task in done
    assert steps == 1


async def test_daemon_run_returns_after_stop_at_any_moment(redis_server: RedisServer) -> None:
    """Stopped at random moments (often mid-command on a real Redis), run() always returns.

    Before the loops watched the stop event, redis-py 8.1 absorbed about one such
    cancellation in two and the crawl that owned the daemon never finished.
    """
    settings = load_settings(None, {"name": "loops", "redis": {"url": redis_server.url},
                                    "fetch": {"user_agent": "t/1 (+http://op.test/)"}})
    rng = random.Random(7)
    async with open_job(settings) as job:
        for _ in range(40):
            daemon = Daemon(job, CollectorRegistry())
            stop = asyncio.Event()
            runner = asyncio.create_task(daemon.run(stop))
            await asyncio.sleep(rng.random() * 0.003)
            stop.set()
            done, _ = await asyncio.wait([runner], timeout=STOP_WITHIN_S)
            assert runner in done
