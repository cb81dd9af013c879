import json
import os
import threading
import time

import numpy as np
import pytest
import sympy
import xarray as xr

from closure import pipeline
from closure.derivatives import derivative
from closure.errors import InputFileError, OptionError, UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import open_fields, sha256_file, write_netcdf
from closure.library import DELTA, design, field_symbol, make_library
from closure.model import ClosureModel
from closure.residuals import coarse_grain_snapshot
from closure.spec import parse_spec
from closure.stats import SufficientStats
from closure.threads import map_in_threads


def smooth_fields(path, n=128, snapshots=6, kmax=2, seed=0, times=None):
    """Divergence-free velocity from a streamfunction of the modes |k| <= kmax, random
    amplitudes and phases per snapshot, on [0, 2 pi)^2."""
    rng = np.random.default_rng(seed)
    g = Grid.regular((n, n), 2 * np.pi)
    y, x = g.mesh()
    us, vs = [], []
    for _ in range(snapshots):
        psi = np.zeros((n, n))
        for kx in range(-kmax, kmax + 1):
            for ky in range(0, kmax + 1):
                if (kx, ky) != (0, 0) and kx * kx + ky * ky <= kmax * kmax:
                    psi += rng.normal() * np.cos(kx * x + ky * y + rng.uniform(0, 2 * np.pi))
        us.append(derivative(psi, g, "y"))
        vs.append(-derivative(psi, g, "x"))
    c = g.coords("x")
    t = np.arange(snapshots, dtype=float) if times is None else np.asarray(times, float)
    ds = xr.Dataset({"u": (("time", "y", "x"), np.array(us)),
                     "v": (("time", "y", "x"), np.array(vs))},
                    coords={"time": t, "y": c, "x": c})
    return write_netcdf(ds, path)


@pytest.fixture(scope="module")
def smooth_file(tmp_path_factory):
    return smooth_fields(tmp_path_factory.mktemp("smooth") / "smooth.nc")


@pytest.fixture(scope="module")
def turb_file(tmp_path_factory):
    from closure.synth import turb2d, write

    return write(turb2d(n=64, snapshots=8, spinup=3.0, scalar=True),
                 tmp_path_factory.mktemp("turb") / "turb2d.nc")


def _spec(path, **kw):
    d = {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4, "width": 4}}
    for k, v in kw.items():
        if k in ("method", "test_fraction", "transfer_weight", "resamples", "seed"):
            d.setdefault("fit", {})[k] = v
        elif k in ("kind", "ratio", "width"):
            d["filter"][k] = v
        elif k in ("snapshots", "scalars", "periodic", "variables"):
            d["input"][k] = v
        else:
            d[k] = v
    return parse_spec(d)


def test_plan_is_json_with_a_blocked_split(smooth_file):
    p = pipeline.plan(_spec(smooth_file, test_fraction=0.34))
    assert json.loads(json.dumps(p)) == p
    assert p["sha256"] == sha256_file(smooth_file)
    assert p["snapshots"] == [0, 1, 2, 3, 4, 5]
    assert p["train"] == [0, 1, 2, 3] and p["test"] == [4, 5]
    assert p["components"] == ["tau_xx", "tau_xy", "tau_yy"]
    assert p["weights"] == [1.0, 2.0, 1.0]
    assert Grid.from_dict(p["coarse_grid"]).shape == (32, 32)


def test_split_follows_time_not_file_order(tmp_path):
    path = smooth_fields(tmp_path / "rev.nc", n=32, snapshots=5, times=[4.0, 3.0, 2.0, 1.0, 0.0])
    p = pipeline.plan(_spec(path, test_fraction=0.4))
    assert p["snapshots"] == [4, 3, 2, 1, 0]
    assert p["train"] == [4, 3, 2] and p["test"] == [1, 0]
    assert max(p["times"][:3]) < min(p["times"][3:])  # never mixes times


def test_plan_errors_name_the_fix(smooth_file):
    with pytest.raises(UserError, match="at least 2"):
        pipeline.plan(_spec(smooth_file, snapshots=[3]))
    with pytest.raises(OptionError, match=r"input.snapshots \[9\] are out of range"):
        pipeline.plan(_spec(smooth_file, snapshots=[0, 9]))
    with pytest.raises(UserError, match="give input.path"):
        pipeline.plan(parse_spec({"input": {"dataset_id": "abc"}}))
    with pytest.raises(UserError, match="smaller --width"):
        pipeline.plan(_spec(smooth_file, width=1000))


def test_map_snapshot_is_the_statistics_of_the_design(smooth_file):
    spec = _spec(smooth_file)
    p = json.loads(json.dumps(pipeline.plan(spec)))  # as a queue would carry it
    s = pipeline.map_snapshot(spec, p, 2)
    with open_fields(smooth_file) as src:
        snap = src.snapshot(2)
    cg = make_coarse_graining("gaussian", snap.grid, 4, 4.0)
    cs = coarse_grain_snapshot(snap, cg)
    lib = make_library("default", "stress", snap.grid.dims)
    X = design(lib, cs.fields, cs.grid, "spectral", cg.delta)
    y = np.stack([cs.targets[c].ravel() for c in lib.components])
    ref = SufficientStats.from_design(X, y, [1.0, 2.0, 1.0], lib.names, lib.components,
                                      snapshot=2)
    assert s.equals(ref)
    with pytest.raises(UserError, match="not part of this job's plan"):
        pipeline.map_snapshot(spec, p, 17)


def test_a_changed_input_file_is_refused(tmp_path):
    path = smooth_fields(tmp_path / "f.nc", n=32, snapshots=3)
    spec = _spec(path)
    p = pipeline.plan(spec)
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    with pytest.raises(InputFileError, match="changed since the job was planned"):
        pipeline.map_snapshot(spec, p, 0)


def _effective_gradient_coefficient(model):
    """The multiplier of Delta^2 d_k u_i d_k u_j implied by the fitted gradient-model term."""
    term = model.library.term("gradient_model")
    ux, uy, vx, vy = (field_symbol(f, c) for f, c in (("u", (1, 0, 0)), ("u", (0, 1, 0)),
                                                      ("v", (1, 0, 0)), ("v", (0, 1, 0))))
    ratio = sympy.simplify(term.components["xy"] / (DELTA**2 * (ux * vx + uy * vy)))
    k = model.names.index("gradient_model")
    return float(ratio) * model.coefficients_scaled[k]


@pytest.mark.parametrize("kind", ["gaussian", "box"])
@pytest.mark.parametrize("method", ["threshold", "lasso", "ard"])
def test_smooth_fields_give_the_gradient_model(smooth_file, kind, method):
    # Leonard (1974) and Clark, Ferziger & Reynolds (1979): for a filter of second moment
    # D^2/12 (box and Gaussian, Pope 2000 Table 13.2) the leading Taylor term of the subgrid
    # stress is tau_ij = (D^2/12) d_k u_i d_k u_j. Few smooth modes on a fine grid (k D <= 0.4)
    # keep the next term (order D^4) small.
    model = pipeline.discover(_spec(smooth_file, kind=kind, method=method, resamples=4))
    active = [t.name for t in model.active_terms]
    assert "gradient_model" in active
    assert set(active) <= {"gradient_model", "second_gradient_model"}
    assert _effective_gradient_coefficient(model) == pytest.approx(1 / 12, rel=0.02)
    assert model.scores["test"]["r2"] > 0.999


def test_gaussian_fourth_order_term(smooth_file):
    # Gaussian filter: bar(f) = exp(D^2 lap / 24) f, so tau = sum_n (D^2/12)^n / n!
    # d^n u_i d^n u_j and the D^4 coefficient of d_k d_l u_i d_k d_l u_j is 1/288 (from memory:
    # the Gaussian-filter expansion, e.g. Carati, Winckelmans & Jeanmart 2001, JFM 441:119)
    model = pipeline.discover(_spec(smooth_file, kind="gaussian", resamples=0))
    k = model.names.index("second_gradient_model")
    assert model.coefficients_scaled[k] == pytest.approx(1 / 288, rel=0.02)


def test_queued_run_equals_in_process_run(smooth_file, tmp_path):
    spec = _spec(smooth_file, resamples=5)
    in_process = pipeline.discover(spec)
    p = json.loads(json.dumps(pipeline.plan(spec)))
    # maps in another order, each saved and loaded as a worker would
    stats = {}
    for i in reversed(p["snapshots"]):
        path = pipeline.map_snapshot(spec, p, i).save(tmp_path / f"{i}.npz")
        stats[str(i)] = SufficientStats.load(path)
    queued = pipeline.reduce(spec, p, stats)
    np.testing.assert_allclose(queued.coefficients_scaled, in_process.coefficients_scaled,
                               rtol=1e-10, atol=1e-14)
    for split in ("train", "test"):
        for k, v in in_process.scores[split].items():
            assert queued.scores[split][k] == pytest.approx(v, rel=1e-10, abs=1e-12)


def test_progress_phases_and_model_file(smooth_file, tmp_path):
    seen = []
    model = pipeline.discover(_spec(smooth_file, resamples=2),
                              progress=lambda ph, d, t: seen.append((ph, d, t)))
    phases = [s[0] for s in seen]
    for ph in ("plan", "map", "fit", "score"):
        assert ph in phases
    assert ("map", 6, 6) in seen
    back = ClosureModel.load(model.save(tmp_path / "m.json"))
    np.testing.assert_array_equal(back.coefficients_scaled, model.coefficients_scaled)
    assert back.provenance["sha256"] == sha256_file(smooth_file)
    assert back.provenance["snapshots"] == {"train": [0, 1, 2, 3], "test": [4, 5]}
    assert any("optimistic" in w for w in back.warnings)


@pytest.mark.slow
def test_turb2d_model_beats_smagorinsky_held_out(turb_file):
    spec = _spec(turb_file, width=None, resamples=4)
    model = pipeline.discover(spec)
    smag = pipeline.discover(_spec(turb_file, width=None, resamples=4, library="minimal"))
    assert [t.name for t in smag.terms] == ["smagorinsky"]
    assert model.scores["test"]["correlation"] > smag.scores["test"]["correlation"] + 0.2
    # the reference fit stored beside the model is the same Smagorinsky-only fit
    ref = model.scores["smagorinsky_only_test"]
    assert ref["correlation"] == pytest.approx(smag.scores["test"]["correlation"], rel=1e-8)
    assert model.scores["test"]["energy_transfer_correlation"] > \
        ref["energy_transfer_correlation"]


@pytest.mark.slow
@pytest.mark.parametrize("target", ["force", "vorticity", "flux:c"])
def test_other_targets_run_end_to_end(turb_file, target):
    model = pipeline.discover(_spec(turb_file, width=None, resamples=2, target=target,
                                    library="classic"))
    assert model.target == target
    assert model.scores["test"]["correlation"] is not None
    names = {"force": "energy_transfer", "vorticity": "enstrophy_transfer",
             "flux:c": "scalar_variance_transfer"}
    assert f"{names[target]}_correlation" in model.scores["test"]


def test_transfer_weight_gathers_transfer_statistics(turb_file):
    spec = _spec(turb_file, width=None, resamples=0, transfer_weight=1.0, snapshots=[0, 1, 2])
    p = pipeline.plan(spec)
    assert p["transfers"] == ["energy_transfer", "enstrophy_transfer"]
    s = pipeline.map_snapshot(spec, p, 0)
    assert sorted(s.extra) == ["energy_transfer", "enstrophy_transfer"]
    model = pipeline.reduce(spec, p, {i: pipeline.map_snapshot(spec, p, i) for i in (0, 1, 2)})
    assert model.settings["transfer_weight"] == 1.0


def test_non_periodic_data_need_finite_differences(tmp_path):
    path = smooth_fields(tmp_path / "np.nc", n=32, snapshots=3)
    with pytest.raises(UserError, match="use --scheme fd2 or fd4"):
        pipeline.plan(_spec(path, periodic=False, width=2, ratio=2))
    model = pipeline.discover(_spec(path, periodic=False, width=2, ratio=2, scheme="fd4",
                                    resamples=0))
    assert model.scheme == "fd4" and not model.grid.periodic


def test_map_computes_only_the_fitted_target(smooth_file, monkeypatch):
    # the scores' transfers come from the coarse fields, so the map asks closure.residuals
    # for the target components alone (the force, vorticity and transfer terms cost fine-grid
    # transforms that a stress fit never reads)
    import closure.residuals

    asked = []
    real = closure.residuals.coarse_grain_snapshot

    def spy(*args, **kwargs):
        cs = real(*args, **kwargs)
        asked.append((kwargs.get("targets"), sorted(cs.targets), sorted(cs.fields)))
        return cs

    monkeypatch.setattr(closure.residuals, "coarse_grain_snapshot", spy)
    spec = _spec(smooth_file)
    p = pipeline.plan(spec)
    pipeline.map_snapshot(spec, p, 1)
    assert asked == [(p["components"], sorted(p["components"]), ["u", "v", "vorticity"])]


def test_job_functions_run_blas_single_threaded(smooth_file, monkeypatch):
    # idle BLAS threads spin after each call and take the cores from the FFT threads; the
    # job's BLAS work (Gram matrices of a few terms) gains nothing from more threads
    import threadpoolctl

    import closure.library

    def blas_threads():
        return {i["num_threads"] for i in threadpoolctl.threadpool_info()
                if i["user_api"] == "blas"}

    seen = []
    real = closure.library.design

    def spy(*args, **kwargs):
        seen.append(blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(closure.library, "design", spy)
    with threadpoolctl.threadpool_limits(limits=2, user_api="blas"):
        before = blas_threads()
        spec = _spec(smooth_file)
        pipeline.map_snapshot(spec, pipeline.plan(spec), 0)
        assert seen == [{1}]
        assert blas_threads() == before  # restored afterwards


def test_discover_hashes_while_mapping_and_stops_the_hash_on_failure(smooth_file, monkeypatch):
    import closure.io

    events = []
    real = closure.io.sha256_file

    def spy(path, *args, cancel=None, **kwargs):
        events.append(cancel)
        return real(path, *args, cancel=cancel, **kwargs)

    monkeypatch.setattr(closure.io, "sha256_file", spy)
    model = pipeline.discover(_spec(smooth_file, resamples=0))
    assert model.provenance["sha256"] == real(smooth_file)
    assert len(events) == 1 and not events[0].is_set()

    def broken(*args, **kwargs):
        raise UserError("map failed")

    monkeypatch.setattr(pipeline, "_map", broken)
    with pytest.raises(UserError, match="map failed"):
        pipeline.discover(_spec(smooth_file, resamples=0))
    assert len(events) == 2 and events[1].is_set()


def test_compressible_velocity_warns_about_the_incompressible_pruning(smooth_file, tmp_path):
    # The 2-D default library leaves out S S and R R because, with tr S = 0, S S = (|S|^2/4) I
    # and R R = -(omega^2/4) I are isotropic (Cayley-Hamilton for 2x2 matrices:
    # A^2 = tr(A) A - det(A) I).
    # A divergent velocity breaks that, so the plan must say so; a solenoidal one must not.
    assert pipeline.plan(_spec(smooth_file))["warnings"] == []
    with xr.open_dataset(smooth_file) as ds:
        ds = ds.load()
    x = ds["x"].values
    ds["u"] = ds["u"] + 0.5 * np.sin(x)[None, None, :]  # d_x u != 0 with v unchanged
    divergent = write_netcdf(ds, tmp_path / "divergent.nc")
    warnings = pipeline.plan(_spec(divergent))["warnings"]
    assert len(warnings) == 1
    assert "not divergence-free" in warnings[0]
    assert "strain_squared" in warnings[0] and "rotation_squared" in warnings[0]


@pytest.mark.parametrize("n", [48, 64])
def test_divergence_check_discounts_the_schemes_own_error_on_bounded_grids(n):
    # An exactly solenoidal velocity from a stream function, u = d_y psi, v = -d_x psi
    # (div u = 0 identically), with modes up to a third of the grid's Nyquist wavenumber, read
    # as bounded (non-periodic) data: fourth-order differences alone then give rms div u /
    # rms |grad u| of order 0.5 % (barely resolved scales and one-sided edge stencils), which
    # must not count as divergence; a divergent part of 5 % of the gradient must.
    from closure.grid import Grid
    from closure.pipeline import DIVERGENCE_TOLERANCE, divergence_ratio

    rng = np.random.default_rng(3)
    x = np.arange(n) * (2 * np.pi / n)
    X, Y = np.meshgrid(x, x)  # (y, x)
    u = np.zeros((n, n))
    v = np.zeros((n, n))
    for kx in range(-n // 3, n // 3 + 1):
        for ky in range(0, n // 3 + 1):
            k2 = kx * kx + ky * ky
            if k2 == 0 or k2 > (n // 3) ** 2:
                continue
            a, phase = rng.standard_normal() * k2 ** -2.0, rng.uniform(0, 2 * np.pi)
            arg = kx * X + ky * Y + phase   # psi += a cos(arg)
            u += -a * ky * np.sin(arg)      # d_y psi
            v += a * kx * np.sin(arg)       # -d_x psi
    grid = Grid(dims=("y", "x"), shape=(n, n), spacing=(x[1], x[1]), periodic=False)
    from closure.derivatives import derivative

    raw = derivative(u, grid, "x", 1, "fd4") + derivative(v, grid, "y", 1, "fd4")
    gradient = np.sqrt(sum(np.mean(derivative(f, grid, d, 1, "fd4") ** 2)
                           for f in (u, v) for d in ("x", "y")))
    assert np.sqrt(np.mean(raw ** 2)) / gradient > DIVERGENCE_TOLERANCE  # the false alarm
    assert divergence_ratio({"u": u, "v": v}, grid, ["u", "v"]) <= DIVERGENCE_TOLERANCE
    divergent = u + 0.05 * gradient * np.sin(X)   # adds d_x u = 0.05 |grad u| cos(x)
    assert divergence_ratio({"u": divergent, "v": v}, grid, ["u", "v"]) > 0.02


def test_snapshots_mapped_side_by_side_give_the_same_bits(smooth_file, monkeypatch):
    # each snapshot's statistics are their own arithmetic and the reduce adds them in index
    # order, so mapping them side by side changes nothing, bit for bit
    ran_on = set()
    real = pipeline._map

    def spy(*args, **kwargs):
        ran_on.add(threading.current_thread().name)
        return real(*args, **kwargs)

    monkeypatch.setattr(pipeline, "_map", spy)
    one = pipeline.discover(_spec(smooth_file, resamples=3, jobs=1))
    assert len(ran_on) == 1
    ran_on.clear()
    for jobs in (2, 3):
        many = pipeline.discover(_spec(smooth_file, resamples=3, jobs=jobs))
        np.testing.assert_array_equal(many.coefficients_scaled, one.coefficients_scaled)
        assert many.scores == one.scores
    assert len(ran_on) >= 2  # the maps ran on threads of their own


def test_map_jobs_follows_cores_snapshots_and_memory(smooth_file, monkeypatch):
    import closure.outofcore

    monkeypatch.setattr(pipeline, "cores", lambda: 4)
    with open_fields(smooth_file) as src:
        spec = _spec(smooth_file)
        assert pipeline.map_jobs(spec, src, 6) == 4
        assert pipeline.map_jobs(spec, src, 3) == 3
        assert pipeline.map_jobs(_spec(smooth_file, jobs=8), src, 6) == 6
        assert pipeline.map_jobs(_spec(smooth_file, jobs=2), src, 6) == 2
        assert pipeline.map_jobs(_spec(smooth_file, device="cpu"), src, 6) == 1
        # each snapshot's pass takes closure.outofcore.in_memory_bytes; half the machine
        # holds two of them here
        each = closure.outofcore.in_memory_bytes(src.grid, 2, ["tau_xx", "tau_xy", "tau_yy"])
        monkeypatch.setattr(closure.outofcore, "default_memory_limit", lambda: 2 * each + 1)
        assert pipeline.map_jobs(spec, src, 6) == 2
        monkeypatch.setattr(closure.outofcore, "default_memory_limit", lambda: each // 2)
        assert pipeline.map_jobs(spec, src, 6) == 1


def test_one_reader_takes_the_input_one_thread_at_a_time():
    class Source:
        grid = "the grid"

        def __init__(self):
            self.inside, self.most = 0, 0

        def snapshot(self, i):
            self.inside += 1
            self.most = max(self.most, self.inside)
            time.sleep(0.01)
            self.inside -= 1
            return i

    src = Source()
    reader = pipeline._OneReader(src)
    assert reader.grid == "the grid" and not hasattr(reader, "coarse_graining")
    out = list(map_in_threads(reader.snapshot, range(8), 4))
    assert [r for _, r in out] == list(range(8))
    assert src.most == 1
