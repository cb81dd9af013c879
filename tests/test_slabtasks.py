"""One snapshot's pass split into slab tasks (closure.slabtasks) against the in-memory path
(closure.residuals.coarse_grain_snapshot), and the pipeline's slab hooks against map_snapshot.

The reference is the in-memory coarse-graining, itself checked against direct FFTs and closed
forms in tests/test_residuals.py and tests/test_filters.py; here the split must reproduce it to
round-off (the same engine steps, on pieces).
"""

from __future__ import annotations

import numpy as np
import pytest
from test_outofcore import _snapshot, _worst  # the same random snapshot and measure

from closure import slabtasks
from closure.errors import OptionError, UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.outofcore import ArraySlabs
from closure.residuals import coarse_grain_snapshot
from closure.slabtasks import MissingPieces, coarse_grain_by_tasks, run_phase

TINY = 20_000  # bytes: slabs of one or a few rows, column chunks of a few columns


CASES = [  # (shape, kind, ratio, targets, tasks): None = every target (force: fine phases too)
    ((8, 12, 16), "gaussian", 2, None, 3),
    ((8, 12, 16), "box", 4, ["tau_xx", "tau_xy", "tau_zz"], 8),
    ((8, 12, 16), "spectral", 2, ["force_x", "force_y", "force_z"], 2),
    ((16, 24), "gaussian", 2, None, 5),  # 2-D: vorticity forcing, enstrophy transfer
    ((16, 24), "spectral", 2, ["flux_c_x", "flux_c_y"], 16),  # one row per task
]


@pytest.mark.parametrize(("shape", "kind", "ratio", "targets", "tasks"), CASES)
def test_split_pass_equals_the_in_memory_path(shape, kind, ratio, targets, tasks, tmp_path):
    snap = _snapshot(shape)
    cg = make_coarse_graining(kind, snap.grid, ratio)
    ref = coarse_grain_snapshot(snap, cg, ("c",), targets=targets)
    fine = targets is None or any(t.startswith("force_") for t in targets)
    assert slabtasks.phases(cg, ("c",), targets) == (
        ["fine-rows", "fine-columns", "rows", "columns"] if fine else ["rows", "columns"])
    got = coarse_grain_by_tasks(ArraySlabs(snap), cg, tasks, ("c",), targets, TINY, tmp_path)
    assert got.index == 3 and got.time == 1.5
    assert _worst(ref, got) < 1e-12
    assert list(tmp_path.iterdir()) == []  # the pieces went with their folder


def test_float32_pass_is_bounded_as_documented(tmp_path):
    snap = _snapshot((8, 12, 16), scalars=())
    cg = make_coarse_graining("gaussian", snap.grid, 2)
    ref = coarse_grain_snapshot(snap, cg, targets=["tau_xx", "tau_xy", "force_x"])
    got = coarse_grain_by_tasks(ArraySlabs(snap), cg, 3, (), ["tau_xx", "tau_xy", "force_x"],
                                TINY, tmp_path, dtype=np.float32)
    # closure.outofcore's docstring: about 1e-6 of the largest value, bounded by 1e-4
    assert 1e-9 < _worst(ref, got) < 1e-4


def _phases_in_order(snap, cg, folder, tasks, order, targets=("tau_xx", "tau_xy")):
    for phase in slabtasks.phases(cg, (), targets):
        for k in order:
            run_phase(ArraySlabs(snap), cg, folder, phase, k, tasks, (), targets, TINY)


def test_tasks_run_in_any_order_and_a_rerun_changes_nothing(tmp_path):
    snap = _snapshot((8, 12, 16), scalars=())
    cg = make_coarse_graining("box", snap.grid, 2)
    targets = ["tau_xx", "tau_xy"]
    ref = coarse_grain_snapshot(snap, cg, targets=targets)
    _phases_in_order(snap, cg, tmp_path, 4, [3, 0, 2, 1, 2])  # task 2 twice, as a retry would
    got = slabtasks.finish(cg, tmp_path, 4, 3, 1.5, (), targets, TINY)
    assert _worst(ref, got) < 1e-12
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".tmp")]


def test_a_task_that_left_no_pieces_is_named(tmp_path):
    snap = _snapshot((8, 12, 16), scalars=())
    cg = make_coarse_graining("gaussian", snap.grid, 2)
    targets = ["tau_xx"]
    for k in (0, 2):  # task 1 of the rows phase "died" before it committed anything
        run_phase(ArraySlabs(snap), cg, tmp_path, "rows", k, 3, (), targets, TINY)
    with pytest.raises(MissingPieces, match=r"the rows slab task\(s\) 1 left no result") as e:
        run_phase(ArraySlabs(snap), cg, tmp_path, "columns", 0, 3, (), targets, TINY)
    assert e.value.phase == "rows" and e.value.tasks == [1]
    with pytest.raises(MissingPieces, match=r"columns slab task\(s\) 0, 1, 2"):
        slabtasks.finish(cg, tmp_path, 3, 3, None, (), targets, TINY)


def test_a_task_killed_half_way_leaves_nothing_that_is_read(tmp_path, monkeypatch):
    snap = _snapshot((8, 12, 16), scalars=())
    cg = make_coarse_graining("gaussian", snap.grid, 2)

    def die(*a, **k):
        raise KeyboardInterrupt  # stands for the process dying mid-write

    monkeypatch.setattr(slabtasks._Piece, "commit", die)
    with pytest.raises(KeyboardInterrupt):
        run_phase(ArraySlabs(snap), cg, tmp_path, "rows", 0, 2, (), ["tau_xx"], TINY)
    assert list(tmp_path.iterdir()) == []


def test_user_errors_name_the_fix(tmp_path):
    snap = _snapshot((8, 12, 16), scalars=())
    for kind, periodic in (("block", True), ("gaussian", False)):
        grid = Grid.regular((8, 12, 16), 2 * np.pi, periodic=periodic)
        cg = make_coarse_graining(kind, grid, 2)
        with pytest.raises(UserError, match=f"not a {kind} filter on a "
                           f"{'periodic' if periodic else 'non-periodic'} grid"):
            run_phase(ArraySlabs(snap), cg, tmp_path, "rows", 0, 2)
    cg = make_coarse_graining("gaussian", snap.grid, 2)
    with pytest.raises(OptionError, match="9 slab tasks for 8 rows: at most one task per row"):
        run_phase(ArraySlabs(snap), cg, tmp_path, "rows", 0, 9)
    with pytest.raises(UserError, match="no field 'c'.*--scalar"):
        run_phase(ArraySlabs(snap), cg, tmp_path, "rows", 0, 2, ("c",))
    with pytest.raises(OptionError, match="float64 or float32"):
        run_phase(ArraySlabs(snap), cg, tmp_path, "rows", 0, 2, dtype=np.int32)


def test_part_covers_every_row_once():
    for n, tasks in ((7, 3), (16, 16), (5, 8), (1024, 7)):
        parts = [slabtasks.part(n, tasks, k) for k in range(tasks)]
        assert parts[0][0] == 0 and parts[-1][1] == n
        assert all(a[1] == b[0] for a, b in zip(parts, parts[1:], strict=False))
        assert max(b - a for a, b in parts) - min(b - a for a, b in parts) <= 1


# ---------------------------------------------------------------------- pipeline hooks
def _spec(path, **extra):
    from closure.spec import parse_spec

    return parse_spec({"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 2},
                       "library": "minimal", "fit": {"resamples": 2}, **extra})


@pytest.mark.parametrize("target", ["stress", "force"])
def test_slab_hooks_give_the_map_tasks_statistics(three_d_file, tmp_path, target):
    from closure import pipeline

    spec = _spec(three_d_file, target=target, memory_limit=TINY, slab_tasks=3)
    plan = pipeline.plan(spec)
    assert plan["slabs"] == {"refused": None, "over_budget": True, "rows": 16}
    folder = tmp_path / "pieces"
    for phase in pipeline.slab_phases(spec, plan):
        for k in range(3):
            pipeline.run_slab_task(spec, plan, 1, phase, k, 3, folder)
    stats, cs = pipeline.finish_slab_tasks(spec, plan, 1, 3, folder)
    ref = pipeline.map_snapshot(_spec(three_d_file, target=target), plan, 1)
    assert stats.snapshots == ref.snapshots == (1,) and cs.time == 0.5
    for a, b in ((stats.gram, ref.gram), (stats.xy, ref.xy), (stats.yy, ref.yy)):
        assert np.abs(np.asarray(a) - np.asarray(b)).max() <= 1e-12 * np.abs(b).max()


def test_slab_split_decision(three_d_file):
    from closure import pipeline

    plan = pipeline.plan(_spec(three_d_file))
    assert plan["slabs"] == {"refused": None, "over_budget": False, "rows": 16}
    assert pipeline.slab_split(_spec(three_d_file), plan, workers=4) == 1  # fits: no split
    assert pipeline.slab_split(_spec(three_d_file, slab_tasks=5), plan, workers=1) == 5
    tight = _spec(three_d_file, memory_limit=TINY)
    plan = pipeline.plan(tight)
    # past the budget: about two tasks per worker over the job's 3 snapshots
    assert pipeline.slab_split(tight, plan, workers=1) == 1
    assert pipeline.slab_split(tight, plan, workers=4) == 3
    assert pipeline.slab_split(tight, plan, workers=100) == 16  # at most a row per task
    one = _spec(three_d_file, memory_limit=TINY, slab_tasks=1)
    assert pipeline.slab_split(one, pipeline.plan(one), workers=100) == 1


def test_slab_tasks_that_cannot_be_made_are_refused_at_planning(three_d_file):
    from closure import pipeline

    with pytest.raises(UserError, match="slab_tasks 2: slab tasks split the periodic spectral "
                       "pass .* not a block filter on a periodic grid, so each snapshot runs "
                       r"in one task: leave slab_tasks out \(or set it to 1\)"):
        pipeline.plan(_spec(three_d_file, slab_tasks=2, filter={"kind": "block", "ratio": 2}))
    with pytest.raises(OptionError, match="slab_tasks 17 is more than the 16 rows of the first "
                       r"direction \(z\): give at most 16"):
        pipeline.plan(_spec(three_d_file, slab_tasks=17))
    # a block filter without slab_tasks plans as before, and is never split
    spec = _spec(three_d_file, memory_limit=TINY, filter={"kind": "block", "ratio": 2})
    plan = pipeline.plan(spec)
    assert plan["slabs"]["refused"].startswith("slab tasks split the periodic spectral pass")
    assert pipeline.slab_split(spec, plan, workers=100) == 1


def test_slab_tasks_leave_the_fingerprint_alone(three_d_file):
    assert _spec(three_d_file, slab_tasks=4).fingerprint() == _spec(three_d_file).fingerprint()
    with pytest.raises(OptionError, match="invalid job spec: slab_tasks: must be at least 1 "
                       r"\(got 0\)"):
        _spec(three_d_file, slab_tasks=0)
