"""Coarse statistics by slabs (closure.coarsestats) against the in-memory design, a closed form
and the pipeline without a memory limit."""

from __future__ import annotations

import numpy as np
import pytest

from closure import coarsestats, outofcore
from closure.coarsestats import (
    design_bytes,
    design_fits,
    predict_by_slabs,
    predict_within,
    statistics_by_slabs,
)
from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.library import component_weights, design, make_library, predict
from closure.stats import _ARRAYS, SufficientStats

TINY = 4_000  # bytes: first-direction derivatives go to files, slabs of one row


def _case(shape, target="stress", periodic=True, seed=0, library="default"):
    rng = np.random.default_rng(seed)
    grid = Grid.regular(shape, 2 * np.pi, periodic=periodic)
    lib = make_library(library, target, grid.dims, ("c",))
    names = ("u", "v", "w")[:len(shape)]
    fields = {k: rng.standard_normal(shape) for k in (*names, "c")}
    targets = {c: rng.standard_normal(shape) for c in lib.components}
    return grid, lib, fields, targets


def _in_memory(lib, fields, grid, scheme, delta, targets, weights, points=None):
    y = np.stack([targets[c].reshape(-1) for c in lib.components])
    return SufficientStats.from_design(design(lib, fields, grid, scheme, delta), y, weights,
                                       lib.names, lib.components, snapshot=7,
                                       point_weights=points)


def _worst(a: SufficientStats, b: SufficientStats) -> float:
    """Largest difference over the statistics, relative to each array's largest value."""
    assert (a.terms, a.components, a.snapshots) == (b.terms, b.components, b.snapshots)
    return max(float(np.abs(getattr(a, k) - getattr(b, k)).max()
                     / np.abs(getattr(a, k)).max()) for k in _ARRAYS)



@pytest.mark.parametrize("shape", [(12, 16), (10, 8, 12)])
@pytest.mark.parametrize("rows", [1, 3, None])  # 3 rows divide 12, not 10
def test_spectral_statistics_by_slabs_equal_the_in_memory_ones(shape, rows, file_stores):
    grid, lib, fields, targets = _case(shape)
    w = component_weights("stress", grid.dims)  # off-diagonal components weigh 2
    ref = _in_memory(lib, fields, grid, "spectral", 0.4, targets, w)
    got = statistics_by_slabs(lib, fields, grid, "spectral", 0.4, targets, w, snapshot=7,
                              memory_limit=TINY, rows=rows)
    assert _worst(ref, got) < 1e-12
    assert file_stores  # the tiny budget spilled the first-direction derivatives


@pytest.mark.parametrize("rows", [4, 7])  # 7 does not divide 10 rows
def test_a_non_dividing_slab_and_a_budget_that_keeps_derivatives_in_memory(rows, file_stores):
    grid, lib, fields, targets = _case((10, 8, 12), seed=3)
    w = component_weights("stress", grid.dims)
    ref = _in_memory(lib, fields, grid, "spectral", 1.0, targets, w)
    got = statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets, w, snapshot=7,
                              memory_limit=10**8, rows=rows)
    assert _worst(ref, got) < 1e-12
    assert not file_stores


@pytest.mark.parametrize(("shape", "target", "scheme", "periodic"), [
    ((12, 10, 16), "force", "fd4", True), ((14, 12), "flux:c", "fd2", False),
    ((12, 10, 9), "stress", "fd4", False), ((16, 18), "vorticity", "spectral", True)])
def test_other_targets_and_finite_differences(shape, target, scheme, periodic):
    # the first direction's derivatives are whole columns, so edges and stencils are the
    # in-memory ones whatever the slab
    grid, lib, fields, targets = _case(shape, target, periodic, seed=1)
    w = component_weights(target, grid.dims)
    ref = _in_memory(lib, fields, grid, scheme, 0.3, targets, w)
    got = statistics_by_slabs(lib, fields, grid, scheme, 0.3, targets, w, snapshot=7,
                              memory_limit=TINY, rows=3)
    assert _worst(ref, got) < 1e-12


def test_point_weights_leave_out_the_same_points():
    grid, lib, fields, targets = _case((12, 10), seed=2)
    points = np.random.default_rng(5).random(grid.shape) > 0.3
    ref = _in_memory(lib, fields, grid, "fd2", 1.0, targets, None, points.reshape(-1))
    got = statistics_by_slabs(lib, fields, grid, "fd2", 1.0, targets, snapshot=7,
                              point_weights=points, memory_limit=TINY, rows=2)
    assert _worst(ref, got) < 1e-12
    assert got.count.tolist() == [int(points.sum())] * 3


def _in_memory_transfers(lib, fields, grid, scheme, delta, targets, target, blocks, points):
    """The transfer blocks as closure.pipeline gathers them from the whole design."""
    from closure.scores import TransferContext

    X = design(lib, fields, grid, scheme, delta)
    p, comps = X.shape[2], lib.components
    ctx = TransferContext(target, fields, grid, scheme)
    columns = ctx.transfers({c: X[k].T.reshape(p, *grid.shape) for k, c in enumerate(comps)},
                            blocks)
    exact = ctx.transfers({c: targets[c] for c in comps}, blocks)
    return {name: SufficientStats.from_design(
        columns[name].reshape(p, -1).T[None], exact[name].reshape(1, -1), None, lib.names,
        (name,), point_weights=None if points is None else points.reshape(-1))
        for name in blocks}


@pytest.mark.parametrize(("shape", "target", "blocks", "land"), [
    ((10, 8, 12), "stress", ("energy_transfer",), True),
    ((10, 8, 12), "force", ("energy_transfer",), False),
    ((12, 10), "flux:c", ("scalar_variance_transfer",), True),
    ((12, 10), "vorticity", ("enstrophy_transfer",), False)])
def test_transfer_blocks_by_slabs_equal_the_whole_design_ones(shape, target, blocks, land):
    grid, lib, fields, targets = _case(shape, target, seed=6)
    points = (np.random.default_rng(2).random(grid.shape) > 0.2) if land else None
    w = component_weights(target, grid.dims)
    ref = _in_memory(lib, fields, grid, "spectral", 0.5, targets, w)
    ref_extra = _in_memory_transfers(lib, fields, grid, "spectral", 0.5, targets, target,
                                     blocks, points)
    got = statistics_by_slabs(lib, fields, grid, "spectral", 0.5, targets, w, snapshot=7,
                              transfers=blocks, target=target, transfer_points=points,
                              memory_limit=TINY, rows=3)
    assert _worst(ref, got) < 1e-12 and set(got.extra) == set(blocks)
    for name in blocks:
        b = got.extra[name]
        assert b.components == (name,) and b.terms == tuple(lib.names)
        assert max(float(np.abs(getattr(ref_extra[name], k) - getattr(b, k)).max()
                         / np.abs(getattr(ref_extra[name], k)).max()) for k in _ARRAYS) < 1e-12
        if land:
            assert b.count.tolist() == [int(points.sum())]


def test_a_transfer_that_differentiates_the_target_is_refused():
    grid, lib, fields, targets = _case((8, 8))
    with pytest.raises(ValueError, match="not pointwise"):
        statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets,
                            transfers=("energy_transfer", "enstrophy_transfer"),
                            target="stress", memory_limit=TINY)


def test_taylor_green_gram_matches_its_closed_form():
    # Taylor-Green vortex (Taylor & Green 1937): u = sin x cos y, v = -cos x sin y gives
    # S_xx = -S_yy = cos x cos y, S_xy = 0, |S| = 2 |cos x cos y|, so the Smagorinsky-form
    # term Delta^2 |S| S_ij has xx and yy components +-2 Delta^2 |c| c (c = cos x cos y) and
    # its Gram is 4 Delta^4 sum c^4 = 4 Delta^4 (3 Ny / 8)(3 Nx / 8): the mean of cos^4 over
    # N > 4 uniform points of a period is exactly 3/8 (common practice: cos^4 = 3/8 +
    # cos 2x / 2 + cos 4x / 8).
    ny, nx, delta = 12, 16, 0.5
    grid = Grid.regular((ny, nx), 2 * np.pi)
    y, x = grid.mesh()
    fields = {"u": np.sin(x) * np.cos(y), "v": -np.cos(x) * np.sin(y)}
    lib = make_library("minimal", "stress", grid.dims)
    c = np.cos(x) * np.cos(y)
    targets = {"tau_xx": np.abs(c) * c, "tau_xy": np.zeros_like(c), "tau_yy": -np.abs(c) * c}
    got = statistics_by_slabs(lib, fields, grid, "spectral", delta, targets, [1.0, 2.0, 1.0],
                              memory_limit=TINY, rows=5)
    quartic = (3 * ny / 8) * (3 * nx / 8)  # sum of c^4
    gram = 4 * delta**4 * quartic
    assert got.gram[:, 0, 0] == pytest.approx([gram, 0.0, gram], rel=1e-12, abs=1e-12 * gram)
    assert got.xy[:, 0] == pytest.approx([2 * delta**2 * quartic, 0.0, 2 * delta**2 * quartic],
                                         rel=1e-12, abs=1e-12 * quartic)
    assert got.yy == pytest.approx([quartic, 0.0, quartic], rel=1e-12)


def test_the_slab_path_holds_no_more_than_its_budget(monkeypatch, file_stores):
    grid, lib, fields, targets = _case((24, 24, 24))
    budget = 1_500_000  # half of it holds 6 of the 9 first-direction derivatives
    assert design_bytes(lib, grid) > 5 * budget  # the in-memory design would not fit
    slab = {"derivatives": 0}
    seen = {"slab": 0, "kept": 0, "slabs": 0}
    real_derivatives = coarsestats.evaluation.derivative_fields
    real_from_design = SufficientStats.from_design.__func__
    real_empty = outofcore._Stores.empty

    def derivatives_spy(symbols, f, g, scheme):
        out = real_derivatives(symbols, f, g, scheme)
        slab["derivatives"] += sum(a.nbytes for a in out.values())
        return out

    def from_design_spy(cls, X, *a, **k):  # a slab's derivative fields and its design
        seen["slab"] = max(seen["slab"], slab["derivatives"] + X.nbytes)
        seen["slabs"] += 1
        slab["derivatives"] = 0
        return real_from_design(cls, X, *a, **k)

    def empty_spy(self, shape, dtype):  # first-direction derivatives kept in memory
        out = real_empty(self, shape, dtype)
        if isinstance(out, np.ndarray):
            seen["kept"] += out.nbytes
        return out

    monkeypatch.setattr(coarsestats.evaluation, "derivative_fields", derivatives_spy)
    monkeypatch.setattr(SufficientStats, "from_design", classmethod(from_design_spy))
    monkeypatch.setattr(outofcore._Stores, "empty", empty_spy)
    statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets, memory_limit=budget)
    assert 0 < seen["slab"] <= budget // 2 and 0 < seen["kept"] <= budget // 2
    assert seen["slabs"] > 1 and len(file_stores) == 3  # the rest went to files


def test_predict_by_slabs_equals_predict():
    grid, lib, fields, _ = _case((10, 8, 12), seed=4)
    coef = np.linspace(-1.0, 2.0, len(lib.terms))
    coef[2] = 0.0  # a term left out
    ref = predict(lib, coef, fields, grid, "spectral", 0.7)
    for rows in (1, 3, None):
        got = predict_by_slabs(lib, coef, fields, grid, "spectral", 0.7, memory_limit=TINY,
                               rows=rows)
        assert list(got) == list(ref)
        for k in ref:
            assert np.abs(got[k] - ref[k]).max() < 1e-12 * np.abs(ref[k]).max()
    within = predict_within(lib, coef, fields, grid, "spectral", 0.7, TINY)
    assert all(np.abs(within[k] - ref[k]).max() < 1e-12 * np.abs(ref[k]).max() for k in ref)
    # a small problem takes the in-memory path: the same bits
    same = predict_within(lib, coef, fields, grid, "spectral", 0.7, None)
    assert all(np.array_equal(same[k], ref[k]) for k in ref)
    zero = predict_by_slabs(lib, np.zeros(len(lib.terms)), fields, grid, memory_limit=TINY)
    assert all(not a.any() for a in zero.values())


def test_design_bytes_counts_derivatives_design_and_target():
    # the 3-D default stress library: 54 derivative fields, 8 terms of 6 components
    lib = make_library("default", "stress", ("z", "y", "x"))
    grid = Grid.regular((256, 256, 256), 2 * np.pi)
    assert (len(lib.symbols), len(lib.terms), len(lib.keys)) == (54, 8, 6)
    # derivative fields, design, target and four arrays of margin (the terms go by chunks)
    assert design_bytes(lib, grid) == 8 * 256**3 * (54 + 48 + 6 + 4)
    assert not design_fits(lib, grid, 13 * 2**30) and design_fits(lib, grid, 14 * 2**30)  # 14 GiB


@pytest.mark.filterwarnings("ignore:invalid value:RuntimeWarning")  # the infinite field
def test_user_errors_name_the_fix():
    grid, lib, fields, targets = _case((8, 8), "flux:c")
    del fields["c"]
    with pytest.raises(UserError, match="the terms need the field 'c'"):
        statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets, memory_limit=TINY)
    grid, lib, fields, targets = _case((8, 8))
    with pytest.raises(OptionError, match="memory limit must be positive"):
        statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets, memory_limit=0)
    with pytest.raises(UserError, match="spectral derivatives need periodic data"):
        statistics_by_slabs(lib, fields, Grid.regular((8, 8), 1.0, periodic=False),
                            "spectral", 1.0, targets, memory_limit=TINY)
    with pytest.raises(UserError, match="filter width Delta must be a positive number"):
        statistics_by_slabs(lib, fields, grid, "spectral", 0.0, targets, memory_limit=TINY)
    fields["u"][0, 0] = np.inf
    with pytest.raises(UserError, match="non-finite values"):
        statistics_by_slabs(lib, fields, grid, "spectral", 1.0, targets, memory_limit=TINY)
    with pytest.raises(UserError, match="NaN or infinite coefficients"):
        predict_by_slabs(lib, [np.nan] * len(lib.terms), fields, grid, memory_limit=TINY)


@pytest.fixture
def slab_calls(monkeypatch):
    calls = {"statistics": 0, "predict": 0}
    real_stats, real_predict = coarsestats.statistics_by_slabs, coarsestats.predict_by_slabs

    def stats_spy(*a, **k):
        calls["statistics"] += 1
        return real_stats(*a, **k)

    def predict_spy(*a, **k):
        calls["predict"] += 1
        return real_predict(*a, **k)

    monkeypatch.setattr(coarsestats, "statistics_by_slabs", stats_spy)
    monkeypatch.setattr(coarsestats, "predict_by_slabs", predict_spy)
    return calls


def test_discover_past_the_memory_limit_gives_the_same_model(three_d_file, slab_calls):
    from closure import pipeline
    from closure.spec import parse_spec

    def spec(**extra):
        return parse_spec({"input": {"path": str(three_d_file)}, "target": "stress",
                           "filter": {"kind": "gaussian", "ratio": 2}, "library": "default",
                           "fit": {"resamples": 0}, **extra})

    ref = pipeline.discover(spec())
    assert slab_calls == {"statistics": 0, "predict": 0}  # small problems stay in memory
    got = pipeline.discover(spec(memory_limit=TINY))
    assert slab_calls["statistics"] == 3 and slab_calls["predict"] >= 1
    a, b = np.asarray(ref.coefficients), np.asarray(got.coefficients)
    assert np.abs(a - b).max() <= 1e-10 * np.abs(a).max()
    for key in ("r2", "correlation", "energy_transfer_correlation"):
        assert got.scores["test"][key] == pytest.approx(ref.scores["test"][key], abs=1e-10)


def test_a_transfer_weighted_fit_past_the_memory_limit_gives_the_same_model(three_d_file,
                                                                          slab_calls):
    from closure import pipeline
    from closure.spec import parse_spec

    def spec(**extra):
        return parse_spec({"input": {"path": str(three_d_file)}, "target": "stress",
                           "filter": {"kind": "gaussian", "ratio": 2}, "library": "classic",
                           "fit": {"resamples": 0, "transfer_weight": 0.5}, **extra})

    ref = pipeline.discover(spec())
    got = pipeline.discover(spec(memory_limit=TINY))
    assert slab_calls["statistics"] == 3
    a, b = np.asarray(ref.coefficients), np.asarray(got.coefficients)
    assert np.abs(a - b).max() <= 1e-10 * np.abs(a).max()


def test_the_statistics_get_what_the_limit_leaves_beside_the_coarse_snapshot(three_d_file,
                                                                            slab_calls):
    # a limit the whole design fits, but not beside the coarse snapshot (3 fields and 6
    # targets) the run holds meanwhile: the statistics go by slabs, the model is the same
    from closure import pipeline
    from closure.spec import parse_spec

    def spec(**extra):
        return parse_spec({"input": {"path": str(three_d_file)}, "target": "stress",
                           "filter": {"kind": "gaussian", "ratio": 2}, "library": "default",
                           "fit": {"resamples": 0}, **extra})

    coarse = Grid.regular((8, 8, 8), 2 * np.pi)
    lib = make_library("default", "stress", coarse.dims)
    held = 9 * 8 * 8**3
    limit = design_bytes(lib, coarse) + held // 2
    assert design_fits(lib, coarse, limit) and not design_fits(lib, coarse, limit - held)
    ref = pipeline.discover(spec())
    got = pipeline.discover(spec(memory_limit=limit))
    assert slab_calls["statistics"] == 3
    a, b = np.asarray(ref.coefficients), np.asarray(got.coefficients)
    assert np.abs(a - b).max() <= 1e-10 * np.abs(a).max()


def test_remaining_budget_leaves_at_least_a_quarter():
    from closure.outofcore import default_memory_limit
    from closure.pipeline import remaining_budget

    assert remaining_budget(1000, 300) == 700
    assert remaining_budget(1000, 900) == 250  # a pass can always make progress
    assert remaining_budget(None, 0) == default_memory_limit()
