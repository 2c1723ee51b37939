"""A side computation on the second core while the caller goes on.

Python's threads share one interpreter lock. A side computation made of many small numpy
operations (an optimiser's iterations) holds that lock most of the time, and a main thread
doing large array work then waits for it after every operation: measured here, a design's
analysis took 0.15 s alone, 0.32 s beside such a thread and 0.16 s beside the same work in
a separate process (``benchmarks/bench_subwoofers.py timing`` shows the whole design).

So :class:`SideJob` runs its function in a forked child process where that is cheap and
safe, and on a thread otherwise:

* **fork**: on Linux, when the calling process runs no other Python thread (forking a
  process whose other threads may hold locks can leave the child stuck; a command-line
  design has none). The child runs at a lower priority (the caller's own work, often on
  both cores for a while, goes first). It ignores Ctrl-C (the parent handles it and stops
  the child), sends its result back through a pipe and exits.
  If it dies without an answer, or sends none within :data:`CHILD_TIMEOUT_S`, the parent
  computes the result itself: the answer never depends on which way it was computed.
* **thread**: everywhere else (macOS and Windows start processes by spawning a new
  interpreter, which costs more than the work; the browser app designs on a server
  thread).

Whatever the function raises is raised again by :meth:`SideJob.result`.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

#: How long :meth:`SideJob.result` waits for a child's answer, s, before it stops the
#: child and computes the answer itself (far above any design's side work: a child that
#: has not answered by then is stuck, not slow).
CHILD_TIMEOUT_S = 300.0
#: How much lower the child's scheduling priority is than its parent's (``os.nice``).
CHILD_NICENESS = 10


def can_fork() -> bool:
    """Whether a :class:`SideJob` started now runs in a forked child: on Linux, with no
    other Python thread running in this process."""
    return (
        sys.platform.startswith("linux")
        and "fork" in multiprocessing.get_all_start_methods()
        and threading.active_count() == 1
    )


def _child(conn: Any, fn: Callable[..., Any], args: tuple) -> None:
    """Body of the forked child: ``fn(*args)`` sent back as ``(True, value)``, or what it
    raised as ``(False, exception)``."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # the caller's own work (often spread over both cores for a while) goes first; the
    # side job fills the gaps between
    try:
        os.nice(CHILD_NICENESS)
    except OSError:  # not permitted here: the same answer at the same priority
        pass
    try:
        message: tuple[bool, Any] = (True, fn(*args))
    except Exception as exc:  # sent to the parent, which raises it
        message = (False, exc)
    try:
        conn.send(message)
    except Exception as exc:  # an answer that cannot be pickled: say so instead
        conn.send((False, RuntimeError(f"side job's answer could not be sent: {exc}")))
    finally:
        conn.close()


class SideJob:
    """``fn(*args)`` computed on the second core: in a forked child when :func:`can_fork`,
    else on a thread (see the module's notes).

    Parameters
    ----------
    fn : callable
        A pure function (its answer must not depend on where it runs; a child's changes to
        module state are lost), whose answer can be pickled.
    *args
        Its arguments (a child inherits them; nothing is pickled on the way in).

    Examples
    --------
    >>> job = SideJob(sum, [1, 2, 3])
    >>> job.result()
    6
    """

    def __init__(self, fn: Callable[..., Any], *args: Any) -> None:
        self._fn, self._args = fn, args
        self._process: Any = None
        self._conn: Any = None
        self._pool: ThreadPoolExecutor | None = None
        self._future: Future | None = None
        if can_fork():
            ctx = multiprocessing.get_context("fork")
            receive, send = ctx.Pipe(duplex=False)
            try:
                process = ctx.Process(target=_child, args=(send, fn, args), daemon=True)
                process.start()
            except OSError:  # no process to be had (a limit reached): on a thread below
                receive.close()
            else:
                self._process, self._conn = process, receive
            finally:
                send.close()  # the child holds the sending end; its exit closes the pipe
        if self._process is None:
            self._pool = ThreadPoolExecutor(max_workers=1)
            self._future = self._pool.submit(fn, *args)

    @property
    def in_child(self) -> bool:
        """Whether the job runs in a forked child process."""
        return self._process is not None

    def result(self) -> Any:
        """The function's answer (waiting for it); what it raised is raised here."""
        if self._future is not None:
            return self._future.result()
        ok, value = False, None
        answered = False
        try:
            if self._conn.poll(CHILD_TIMEOUT_S):
                ok, value = self._conn.recv()
                answered = True
        except (EOFError, OSError):  # the child died without an answer
            answered = False
        finally:
            self.close()
        if not answered:  # computed here instead: the same answer, later
            return self._fn(*self._args)
        if not ok:
            raise value
        return value

    def close(self) -> None:
        """Stop the job if it still runs, and free what it holds."""
        if self._process is not None:
            if self._process.is_alive():
                self._process.kill()
            self._process.join()
            self._process.close()
            self._process = None
        if self._conn is not None:
            self._conn.close()
            self._conn = None
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


#: Threads :func:`thread_map` uses at most.
MAP_WORKERS = 4


def thread_map(
    fn: Callable[[Any], Any], items: list, cost: Callable[[Any], float] | None = None
) -> list[Any]:
    """``[fn(x) for x in items]`` on up to :data:`MAP_WORKERS` threads (one per core).

    For work that releases the interpreter lock most of its time (numpy's and scipy's FFTs
    on long arrays); with ``cost``, the costliest items start first, so that the last one
    to start is a short one. The answers keep the order of ``items``.
    """
    workers = min(MAP_WORKERS, os.cpu_count() or 1, len(items))
    if workers <= 1:
        return [fn(x) for x in items]
    order = list(range(len(items)))
    if cost is not None:
        order.sort(key=lambda i: -cost(items[i]))
    out: list[Any] = [None] * len(items)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for i, value in zip(order, pool.map(lambda i: fn(items[i]), order), strict=True):
            out[i] = value
    return out
