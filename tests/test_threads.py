"""closure.threads: snapshots side by side, row blocks side by side, one thread per task."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from closure import threads
from closure.filters import make_coarse_graining
from closure.grid import Grid


def test_map_in_threads_keeps_the_order_and_runs_side_by_side():
    running, most = [0], [0]
    lock = threading.Lock()

    def work(i):
        with lock:
            running[0] += 1
            most[0] = max(most[0], running[0])
        time.sleep(0.02 * (5 - i))  # the first items finish last
        with lock:
            running[0] -= 1
        return i * i, threads.single(), threads.fft_workers(1 << 30)

    out = list(threads.map_in_threads(work, range(5), 3))
    assert [i for i, _ in out] == list(range(5))
    assert [r[0] for _, r in out] == [i * i for i in range(5)]
    # each call runs on one thread: its transforms take one worker
    assert all(r[1] and r[2] == 1 for _, r in out)
    assert 2 <= most[0] <= 3


def test_map_in_threads_holds_at_most_jobs_results():
    started = []

    def work(i):
        started.append(i)
        return i

    seen = []
    for i, _ in threads.map_in_threads(work, range(10), 2):
        seen.append((i, len(started)))
    # when item i is handed over, no more than i + 2 items were started
    assert all(n <= i + 2 for i, n in seen)


def test_map_in_threads_raises_the_first_error_and_starts_no_more():
    started = []

    def work(i):
        started.append(i)
        if i == 1:
            raise ValueError("snapshot 1 is bad")
        time.sleep(0.01)
        return i

    with pytest.raises(ValueError, match="snapshot 1 is bad"):
        list(threads.map_in_threads(work, range(20), 2))
    assert len(started) <= 4


def test_one_job_runs_in_this_thread_with_every_core():
    out = list(threads.map_in_threads(lambda i: (threading.current_thread(), threads.single()),
                                      range(2), 1))
    assert all(t is threading.current_thread() and not single for _, (t, single) in out)
    big = 1 << 30
    assert threads.fft_workers(big) == -1 and threads.fft_workers(16) == 1
    with threads.one_thread():
        assert threads.fft_workers(big) == 1 and threads.block_pool() is None
    assert threads.fft_workers(big) == -1


def test_run_blocks_runs_every_block_and_raises_the_first_error(monkeypatch):
    monkeypatch.setattr(threads, "cores", lambda: 2)
    done = []

    def work(b):
        done.append(b)
        assert threads.single()  # a block runs on one thread
        if b in (1, 3):
            raise RuntimeError(f"block {b}")

    with pytest.raises(RuntimeError, match="block 1"):
        threads.run_blocks(work, [0, 1, 2, 3])
    assert sorted(done) == [0, 1, 2, 3]


def test_the_pass_has_the_same_bits_on_one_thread_and_on_every_core(monkeypatch):
    # each row's transform and fold is its own arithmetic: the block pool and the FFT
    # workers change nothing, bit for bit
    import closure.backend

    monkeypatch.setattr(threads, "cores", lambda: 2)
    monkeypatch.setattr(closure.backend, "_BLOCK_NUMBERS", 8 * 96)  # 16 blocks of 8 rows
    grid = Grid.regular((64, 96), 2 * np.pi)
    cg = make_coarse_graining("gaussian", grid, 4, None, "grid")
    f = np.random.default_rng(3).standard_normal((2, *grid.shape))
    ops = [("f", "f"), ("fd", "f"), ("f", "fd")]
    pooled = cg.separable(f, ops)
    with threads.one_thread():
        alone = cg.separable(f, ops)
    for a, b in zip(pooled, alone, strict=True):
        np.testing.assert_array_equal(a, b)


def test_side_by_side_gives_the_results_in_order_and_the_first_error():
    assert threads.side_by_side([lambda k=k: k * 10 for k in range(5)]) == [0, 10, 20, 30, 40]

    def bad():
        raise KeyError("second")

    with pytest.raises(KeyError, match="second"):
        threads.side_by_side([lambda: 1, bad, lambda: 3])


@pytest.mark.parametrize("shape", [(32, 48), (16, 12, 20)])
def test_coarse_graining_has_the_same_bits_with_its_transforms_side_by_side(shape, monkeypatch):
    # the velocity, scalar and product transforms of one snapshot run side by side on the
    # block pool; alone on one thread they give the very same targets and fields
    from closure.fields import Snapshot
    from closure.residuals import coarse_grain_snapshot

    monkeypatch.setattr(threads, "cores", lambda: 2)
    grid = Grid.regular(shape, 2 * np.pi)
    rng = np.random.default_rng(len(shape))
    names = ("u", "v", "w")[:len(shape)]
    fields = {c: rng.standard_normal(shape) for c in (*names, "c")}
    cg = make_coarse_graining("gaussian", grid, 4, None, "grid")
    pooled = coarse_grain_snapshot(Snapshot(fields, grid, 0, 0.0), cg, ("c",))
    with threads.one_thread():
        alone = coarse_grain_snapshot(Snapshot(fields, grid, 0, 0.0), cg, ("c",))
    assert set(pooled.targets) == set(alone.targets) and "force_x" in pooled.targets
    for k in pooled.targets:
        np.testing.assert_array_equal(pooled.targets[k], alone.targets[k], err_msg=k)
    for k in pooled.fields:
        np.testing.assert_array_equal(pooled.fields[k], alone.fields[k], err_msg=k)
