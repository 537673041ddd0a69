"""Process-wide settings for a crawl: the event loop, Python's cyclic collector, and
glibc's allocator.

Both were measured on a 10,000-page bench crawl (``sluice bench crawl``) of one worker:

* The cyclic GC at its default first threshold (700) ran about once a page and cost
  ~87 microseconds a page, a fourteenth of the worker's CPU; with the start-up objects
  frozen and the thresholds below, ~9 (timed with ``gc.callbacks``).
* uvloop, where installed, runs the crawl's event loop: about a tenth less CPU a page
  than asyncio's own loop (median CPU per page over three crawls, ~990 against ~1,100
  microseconds).
* glibc returns freed heap to the kernel as soon as 128 KiB sit free at its top, then
  faults it back in on the next page: ~100,000 minor page faults in a first crawl
  against ~12,000 in a second one in the same process, once glibc's own adaptive
  thresholds had grown. Fixed thresholds give the steady state from the start.
"""

from __future__ import annotations

import asyncio
import contextlib
import ctypes
import ctypes.util
import gc
from collections.abc import Coroutine, Iterator
from typing import Any, TypeVar

T = TypeVar("T")

CRAWL_GC_THRESHOLDS = (20_000, 20, 20)
M_TRIM_THRESHOLD = -1  # mallopt parameter numbers, from glibc's malloc.h
M_MMAP_THRESHOLD = -3
TRIM_THRESHOLD_BYTES = 128 * 1024 * 1024  # free heap kept before it goes back to the kernel
MMAP_THRESHOLD_BYTES = 32 * 1024 * 1024  # glibc's maximum; smaller blocks come from the heap


def run(main: Coroutine[Any, Any, T]) -> T:
    """Run ``main`` to completion on uvloop where it is installed, else on asyncio's loop."""
    try:
        import uvloop
    except ImportError:
        return asyncio.run(main)
    return uvloop.run(main)


def tune_malloc() -> bool:
    """Fixed glibc malloc thresholds for this process; False where that is not glibc."""
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES)) and bool(
        mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))


@contextlib.contextmanager
def crawl_process() -> Iterator[None]:
    """Tune the allocator (for good) and the cyclic GC (restored on exit) for a crawl."""
    tune_malloc()
    before = gc.get_threshold()
    gc.freeze()  # everything imported and built so far lives as long as the process
    gc.set_threshold(*CRAWL_GC_THRESHOLDS)
    try:
        yield
    finally:
        gc.set_threshold(*before)
        gc.unfreeze()
