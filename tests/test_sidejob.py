"""roomcorr.sidejob: a side computation in a forked child (Linux, no other thread) or on a
thread, with the same answer either way."""

from __future__ import annotations

import contextlib
import os
import sys
import threading
import time

import numpy as np
import pytest

from roomcorr import sidejob
from roomcorr.sidejob import SideJob, can_fork, thread_map

linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork: Linux only")


def _pid_and_sum(x: np.ndarray) -> tuple[int, float]:
    return os.getpid(), float(np.sum(x))


def _fails() -> None:
    raise ValueError("from the side job")


def _dies_once(flag: str) -> int:
    # the first call (in the child) ends the process without an answer; the parent's
    # own call then finds the flag file and answers
    if not os.path.exists(flag):
        open(flag, "w").close()
        os._exit(3)
    return 42


def _sleeps_in_a_child(parent_pid: int) -> str:
    if os.getpid() != parent_pid:
        time.sleep(60.0)
        return "child"
    return "parent"


@linux
def test_runs_in_a_child_process_when_no_other_thread_runs():
    if threading.active_count() > 1:
        pytest.skip("an earlier test left a thread running")
    assert can_fork()
    x = np.arange(10.0)
    job = SideJob(_pid_and_sum, x)
    assert job.in_child
    pid, total = job.result()
    assert pid != os.getpid() and total == 45.0  # sum 0..9, by hand


@contextlib.contextmanager
def _another_thread():
    """Another thread waiting while the block runs (a process with threads: no fork)."""
    stop = threading.Event()
    other = threading.Thread(target=stop.wait)
    other.start()
    try:
        yield
    finally:
        stop.set()
        other.join()


def test_on_a_thread_while_another_thread_runs():
    with _another_thread():
        assert not can_fork()
        job = SideJob(_pid_and_sum, np.ones(4))
        assert not job.in_child
        assert job.result() == (os.getpid(), 4.0)
        job.close()


@pytest.mark.parametrize("thread", [False, True])
def test_what_the_function_raises_is_raised_again(thread):
    with _another_thread() if thread else contextlib.nullcontext():
        job = SideJob(_fails)
        with pytest.raises(ValueError, match="from the side job"):
            job.result()
        job.close()


@linux
def test_a_child_that_dies_without_an_answer_is_replaced_by_the_parent(tmp_path):
    job = SideJob(_dies_once, str(tmp_path / "flag"))
    assert job.in_child
    assert job.result() == 42


@linux
def test_a_child_that_never_answers_is_stopped(monkeypatch):
    monkeypatch.setattr(sidejob, "CHILD_TIMEOUT_S", 0.2)
    job = SideJob(_sleeps_in_a_child, os.getpid())
    t = time.perf_counter()
    assert job.result() == "parent"  # the child was stopped; the parent answered
    assert time.perf_counter() - t < 10.0


def test_thread_map_keeps_the_order_and_runs_the_costliest_first():
    started: list[int] = []
    lock = threading.Lock()

    def work(n: int) -> int:
        with lock:
            started.append(n)
        return n * n

    items = [3, 1, 4, 1, 5, 9, 2, 6]
    assert thread_map(work, items, cost=float) == [n * n for n in items]
    if (os.cpu_count() or 1) > 1:
        assert started[0] == 9  # the costliest starts first


@linux
def test_a_fork_that_fails_falls_back_to_a_thread(monkeypatch):
    import multiprocessing.process

    def refuse(self):
        raise OSError("no more processes")

    monkeypatch.setattr(multiprocessing.process.BaseProcess, "start", refuse)
    job = SideJob(_pid_and_sum, np.ones(3))
    assert not job.in_child
    assert job.result() == (os.getpid(), 3.0)
    job.close()
