"""Big pages parsed and fingerprinted in child processes, off the worker's event loop.

Parsing is CPU-bound Python and C under the GIL: a 20 MB page of 800,000 links took
2.5 s to parse here (its tree alone ~650 MB), and on the event loop that stalls every
other lease of the worker (their completions then come back expired). ``PagePool`` runs
``digest`` in child processes instead, one page per child at a time. A page that runs
past the time limit is given up and its child killed (the next page starts a new one); a
child returns its heap to the system after each page (``malloc_trim``: 690 MB resident
after such a page, 40 MB after the trim), so a big page does not keep it large.

Children start from a fork server (``multiprocessing`` "forkserver"): each is a fork of
a small clean process that imported this module, not of the worker with its threads,
sockets and heap.
"""

from __future__ import annotations

import asyncio
import ctypes
import ctypes.util
import multiprocessing
import signal
from concurrent.futures import ThreadPoolExecutor
from multiprocessing.connection import Connection
from typing import Any

from frontier.simhash import simhash64
from workers.parser import ParsedPage, parse_html

Digest = tuple[ParsedPage, int | None]  # the page without its text, and its SimHash
START_METHOD = "forkserver"
READY = "ready"


def digest(body: bytes, url: str, content_type: str | None, max_links: int) -> Digest:
    """Parse ``body`` and fingerprint its text; the text itself is not sent back."""
    page = parse_html(body, url, content_type=content_type, max_links=max_links)
    fingerprint = simhash64(page.text) if page.text else None
    page.text = ""
    return page, fingerprint


def _trim_heap() -> None:
    """Give freed heap back to the system (glibc keeps it otherwise)."""
    name = ctypes.util.find_library("c")
    if name:
        try:
            ctypes.CDLL(name).malloc_trim(0)
        except (OSError, AttributeError):
            pass


def _serve(conn: Connection) -> None:
    """A child's loop: digest pages until the parent hangs up."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides when to stop
    conn.send(READY)
    while True:
        try:
            job = conn.recv()
        except (EOFError, OSError):
            return
        try:
            reply: tuple[str, Any] = ("ok", digest(*job))
        except Exception as exc:  # a bug in parsing: the parent ends the page as a retry
            reply = ("error", f"{type(exc).__name__}: {exc}")
        del job
        conn.send(reply)
        del reply
        _trim_heap()


class _Child:
    """One child process and the parent's end of its pipe."""

    def __init__(self, context: Any) -> None:
        self.conn, theirs = context.Pipe()
        self.process = context.Process(target=_serve, args=(theirs,), daemon=True,
                                       name="sluice-page")
        self.process.start()
        theirs.close()

    @classmethod
    def started(cls, context: Any) -> _Child:
        """A new child, once it has imported the parser (not counted in a page's time)."""
        child = cls(context)
        if child.conn.recv() != READY:
            child.kill()
            child.conn.close()
            raise RuntimeError("page child did not start")
        return child

    def run(self, job: tuple[Any, ...]) -> tuple[str, Any]:
        """Send one page and block until the reply comes back (in a thread): ('ok',
        digest) or ('error', what went wrong)."""
        try:
            self.conn.send(job)
            return self.conn.recv()  # type: ignore[no-any-return]
        except (EOFError, OSError):  # killed (a page past its time) or died
            self.conn.close()
            raise

    def kill(self) -> None:
        """Kill the process; a thread blocked on its pipe then sees the pipe close (and
        closes it: the pipe is left to the thread that may be using it)."""
        self.process.kill()
        self.process.join(1)


def _consume(future: asyncio.Future[Any]) -> None:
    """Retrieve the outcome of a page's work nobody waits for any more."""
    if not future.cancelled():
        future.exception()


class PagePool:
    """Up to ``processes`` children digesting big pages, one page each at a time.

    A page gets ``timeout_s`` of a child's time (waiting for a free child, or for one to
    start, is not counted); past it, the child is killed, the next page starts a new one
    in its place, and :meth:`digest` raises ``TimeoutError``.
    """

    def __init__(self, processes: int, timeout_s: float) -> None:
        self.timeout_s = timeout_s
        self._context = multiprocessing.get_context(START_METHOD)
        self._context.set_forkserver_preload([__name__])
        # a thread per child waits on its pipe (and starts it)
        self._threads = ThreadPoolExecutor(processes, thread_name_prefix="sluice-page")
        self._slots = asyncio.Semaphore(processes)
        self._idle: list[_Child] = []
        self._children: set[_Child] = set()
        self._closed = False
        self.started = 0  # children started
        self.killed = 0  # children killed over a page that ran too long or was given up

    async def digest(self, body: bytes, url: str, content_type: str | None,
                     max_links: int) -> Digest:
        """The page's digest; raises ``TimeoutError`` past the limit, ``RuntimeError`` if
        the child failed or died."""
        async with self._slots:
            child = self._idle.pop() if self._idle else await self._start()
            loop = asyncio.get_running_loop()
            work = loop.run_in_executor(self._threads, child.run,
                                        (body, url, content_type, max_links))
            work.add_done_callback(_consume)
            try:
                status, value = await asyncio.wait_for(asyncio.shield(work), self.timeout_s)
            except (TimeoutError, asyncio.CancelledError):
                self._kill(child)  # the page is given up: so is its child's work
                raise
            except (EOFError, OSError) as exc:  # the child died (killed, out of memory)
                self._kill(child)
                raise RuntimeError(f"page child died: {exc!r}") from exc
            if self._closed:
                child.kill()
            else:
                self._idle.append(child)
        if status != "ok":
            raise RuntimeError(f"page child: {value}")
        return value  # type: ignore[no-any-return]

    async def _start(self) -> _Child:
        if self._closed:
            raise RuntimeError("page pool closed")
        loop = asyncio.get_running_loop()
        child = await loop.run_in_executor(self._threads, _Child.started, self._context)
        self.started += 1
        if self._closed:
            child.kill()
            raise RuntimeError("page pool closed")
        self._children.add(child)
        return child

    def _kill(self, child: _Child) -> None:
        self.killed += 1
        self._children.discard(child)
        child.kill()

    def close(self) -> None:
        """Kill every child now (a page still running is given up)."""
        self._closed = True
        for child in list(self._children):
            child.kill()
        self._children.clear()
        self._idle.clear()
        self._threads.shutdown(wait=False, cancel_futures=True)
