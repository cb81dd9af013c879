"""The cores a process's passes use: FFT workers, row blocks side by side, snapshots side by side.

numpy's loops and scipy.fft release the GIL, so threads of one process run the fine-grid pass's
transforms, folds and products on every core. Two levels, never nested:

- a pass alone spreads its large transforms (:func:`fft_workers`) and its blocks of rows
  (:func:`block_pool`, used by closure.backend.NumpyBackend.by_row_blocks) over the cores;
- snapshots mapped side by side (:func:`map_in_threads`, ``discover --jobs N``) each run on one
  thread (:func:`one_thread`), which is more efficient on few cores than splitting each pass:
  no thread waits for another within a pass.

Each transform and each row's arithmetic is the same whatever the threads, so results do not
depend on them, bit for bit.
"""

from __future__ import annotations

import os
import threading
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager

#: Transforms of at least this many elements use every core (unless the thread runs single);
#: smaller ones run on one thread, where waking the others costs about as much as the work.
_THREADED_SIZE = 1 << 18

_local = threading.local()  # ``single``: this thread's work runs on this thread alone
_pool_lock = threading.Lock()
_pool: ThreadPoolExecutor | None = None


def cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def single() -> bool:
    """Whether this thread runs its work alone (a block of a pass, or one of several
    snapshots mapped side by side)."""
    return getattr(_local, "single", False)


@contextmanager
def one_thread():
    """Run the enclosed work on this thread alone: transforms with one worker, row blocks in
    turn."""
    before = single()
    _local.single = True
    try:
        yield
    finally:
        _local.single = before


def fft_workers(size: int) -> int:
    """The ``workers`` of a scipy.fft transform of ``size`` elements: every core for large
    transforms, unless this thread runs single."""
    return -1 if size >= _THREADED_SIZE and not single() else 1


def block_pool() -> ThreadPoolExecutor | None:
    """The threads that run blocks of rows side by side (one per core), made at first use and
    kept; None on one core or in a thread that runs single."""
    global _pool
    if single() or cores() < 2:
        return None
    if _pool is None:
        with _pool_lock:
            if _pool is None:
                _pool = ThreadPoolExecutor(cores(), thread_name_prefix="closure-blocks")
    return _pool


def run_blocks(work: Callable, blocks: list) -> None:
    """``work(block)`` for each block: side by side on :func:`block_pool`, each block on one
    thread, or in turn where there is no pool. Every block runs; the first error (in block
    order) is raised after."""
    pool = block_pool()
    if pool is None or len(blocks) < 2:
        for block in blocks:
            work(block)
        return

    def run(block):
        with one_thread():
            work(block)

    futures = [pool.submit(run, block) for block in blocks]
    errors = [f.exception() for f in futures]
    for error in errors:
        if error is not None:
            raise error


def side_by_side(calls: list[Callable[[], object]]) -> list:
    """The results of zero-argument ``calls``, in order, run side by side on
    :func:`block_pool` (each on one thread), or in turn where there is no pool (one core, or
    a thread that runs single). The first error (in call order) is raised after all ran."""
    results: list = [None] * len(calls)

    def work(k):
        results[k] = calls[k]()

    run_blocks(work, list(range(len(calls))))
    return results


def map_in_threads(fn: Callable, items: Iterable, jobs: int) -> Iterator[tuple[object, object]]:
    """``(item, fn(item))`` in the order of ``items``, with up to ``jobs`` calls running side by
    side, each on one thread (:func:`one_thread`); at most ``jobs`` results wait unread, so
    memory grows with ``jobs``, not with the number of items. ``jobs`` 1: in turn, in this
    thread, each call free to use every core. On an error no further call starts; the calls
    already running finish and the error is raised."""
    if jobs <= 1:
        for item in items:
            yield item, fn(item)
        return

    def run(item):
        with one_thread():
            return fn(item)

    with ThreadPoolExecutor(jobs, thread_name_prefix="closure-map") as pool:
        window: deque = deque()
        try:
            for item in items:
                window.append((item, pool.submit(run, item)))
                if len(window) >= jobs:
                    item0, future = window.popleft()
                    yield item0, future.result()
            while window:
                item0, future = window.popleft()
                yield item0, future.result()
        finally:
            for _, future in window:  # an error, or the caller stopped reading
                future.cancel()


__all__ = ["block_pool", "cores", "fft_workers", "map_in_threads", "one_thread", "run_blocks",
           "side_by_side", "single"]
