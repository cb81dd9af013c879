"""Tests for closure.sweep: per-width specs, the sweep over closure.pipeline.discover, its JSON
file, and the ``closure sweep`` command."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import xarray as xr

from closure.errors import OptionError, UserError
from closure.spec import parse_spec
from closure.sweep import SweepResult, run_sweep, sweep_specs

#: the gradient model alone: tau_ij = C Delta^2/12 d_k u_i d_k u_j, expected C = 1
GRADIENT_ONLY = {"target": "stress", "terms": [{
    "name": "grad", "delta_power": 2,
    "expression": "Delta**2/12 * (A_{i}x*A_{j}x + A_{i}y*A_{j}y)"}]}


def smooth_flow_file(path, n=32, snapshots=4, seed=0):
    """Divergence-free flows of |k| <= sqrt(2) modes with random phases on [0, 2 pi)^2."""
    x = np.arange(n) * (2 * np.pi / n)
    Y, X = np.meshgrid(x, x, indexing="ij")
    rng = np.random.default_rng(seed)
    us, vs = [], []
    for _ in range(snapshots):
        a, b, c, d = rng.uniform(0, 2 * np.pi, 4)
        # streamfunction sin(x+a) + 0.7 cos(y+b) + 0.5 sin(x+y+c) + 0.3 cos(x-y+d);
        # u = d_y psi, v = -d_x psi
        us.append(-0.7 * np.sin(Y + b) + 0.5 * np.cos(X + Y + c) + 0.3 * np.sin(X - Y + d))
        vs.append(-(np.cos(X + a) + 0.5 * np.cos(X + Y + c) - 0.3 * np.sin(X - Y + d)))
    xr.Dataset({"u": (("time", "y", "x"), np.array(us)), "v": (("time", "y", "x"), np.array(vs))},
               coords={"time": np.arange(float(snapshots)), "y": x, "x": x}).to_netcdf(path)
    return path


@pytest.fixture
def smooth(tmp_path):
    data = smooth_flow_file(tmp_path / "smooth.nc")
    lib = tmp_path / "grad.json"
    lib.write_text(json.dumps(GRADIENT_ONLY))
    return {"input": {"path": str(data)}, "library": str(lib), "fit": {"resamples": 0}}


def base_spec(**kw):
    d = {"input": {"path": "data.nc"}}
    d.update(kw)
    return parse_spec(d)


# ---------------------------------------------------------------- specs per width


def test_sweep_specs_default_ratio_is_half_the_width():
    specs = sweep_specs(base_spec(), [4, 8, 16])
    assert [(s.filter.width, s.filter.ratio) for s in specs] == [(4, 2), (8, 4), (16, 8)]
    assert all(s.library == "default" and s.target == "stress" for s in specs)


def test_sweep_specs_ratios_one_or_per_width():
    assert [s.filter.ratio for s in sweep_specs(base_spec(), [4, 8], [2])] == [2, 2]
    assert [s.filter.ratio for s in sweep_specs(base_spec(), [4, 8], [1, 4])] == [1, 4]
    with pytest.raises(OptionError, match="2 ratios for 3 widths"):
        sweep_specs(base_spec(), [4, 8, 16], [1, 2])


def test_sweep_specs_keep_everything_else():
    spec = base_spec(target="force", scheme="fd4", fit={"method": "lasso", "seed": 3},
                     filter={"kind": "box"})
    for s in sweep_specs(spec, [3, 6]):
        assert (s.target, s.scheme, s.fit.method, s.fit.seed, s.filter.kind) == \
            ("force", "fd4", "lasso", 3, "box")


def test_sweep_specs_block_widths_are_ratios():
    specs = sweep_specs(base_spec(filter={"kind": "block"}), [2, 4])
    assert [(s.filter.width, s.filter.ratio) for s in specs] == [(None, 2), (None, 4)]
    with pytest.raises(OptionError, match="block"):
        sweep_specs(base_spec(filter={"kind": "block"}), [2, 4], [2])


@pytest.mark.parametrize("widths,match", [([], "at least one"), ([4, -1], "positive"),
                                          ([4, 4], "repeat")])
def test_sweep_specs_bad_widths(widths, match):
    with pytest.raises(OptionError, match=match):
        sweep_specs(base_spec(), widths)


def test_sweep_specs_coordinate_widths_need_ratios():
    spec = base_spec(filter={"width_units": "coordinate"})
    with pytest.raises(OptionError, match="--ratios"):
        sweep_specs(spec, [0.5, 1.0])
    assert [s.filter.ratio for s in sweep_specs(spec, [0.5, 1.0], [2, 4])] == [2, 4]


# ---------------------------------------------------------------- the sweep


def test_sweep_entries_are_the_models_scaled_coefficients(smooth):
    models = []

    def discover(spec, progress=None):
        from closure.pipeline import discover as real

        models.append(real(spec, progress))
        return models[-1]

    phases = []
    result = run_sweep(smooth, [2, 4], progress=lambda p, d, t: phases.append((p, d, t)),
                       discover=discover)
    assert len(result.entries) == len(models) == 2
    for entry, model in zip(result.entries, models, strict=True):
        record = next(t for t in model.to_dict()["terms"] if t["name"] == "grad")
        assert entry.terms["grad"]["coefficient_scaled"] == record["coefficient_scaled"]
        assert entry.terms["grad"]["std_error_scaled"] == record["std_error_scaled"]
        assert entry.delta == pytest.approx(model.delta)
        assert entry.test_scores["r2"] == model.scores["test"]["r2"]
    assert [e.ratio for e in result.entries] == [1, 2]
    h = 2 * np.pi / 32
    assert [e.delta for e in result.entries] == pytest.approx([2 * h, 4 * h])
    assert ("sweep", 2, 2) in phases
    assert any(p.startswith("D=2: ") for p, _, _ in phases)


def test_sweep_gradient_model_is_scale_invariant_to_second_order(smooth):
    # Gaussian filter, G(k) = exp(-k^2 D^2 / 24) (Pope 2000, Table 13.2): the Taylor expansion
    # of the filtered product gives tau_ij = (D^2/12) d_k u_i d_k u_j + O(D^4) (Leonard 1974,
    # Adv. Geophys. 18A; Clark, Ferziger & Reynolds 1979, JFM 91), so the scaled coefficient of
    # the D^2/12 gradient term tends to 1 with an error that shrinks as D^2.
    result = run_sweep(smooth, [2, 4, 8])
    c = np.array(result.coefficients()["grad"])
    assert np.all(np.abs(c - 1) < 0.1)
    err = np.abs(c - 1)
    ratios = err[1:] / err[:-1]
    assert np.all((ratios > 3.0) & (ratios < 5.0)), (c, ratios)  # doubling D: 4x the error


def test_sweep_file_round_trip_is_plain_json(smooth, tmp_path):
    result = run_sweep(smooth, [2, 4])
    path = result.save(tmp_path / "out" / "sweep.json")

    def no_nan(name):
        raise AssertionError(f"{name} in the sweep file")

    data = json.loads(path.read_text(), parse_constant=no_nan)
    assert data["kind"] == "sweep" and len(data["entries"]) == 2
    back = SweepResult.load(path)
    assert back.coefficients() == result.coefficients()
    assert back.entries[1].model["delta"] == result.entries[1].delta
    assert [p.name for p in (tmp_path / "out").iterdir()] == ["sweep.json"]


def test_sweep_load_refuses_other_json(tmp_path):
    p = tmp_path / "model.json"
    p.write_text('{"format": "closure-model"}')
    with pytest.raises(UserError, match="not a sweep result"):
        SweepResult.load(p)
    with pytest.raises(UserError, match="no sweep file"):
        SweepResult.load(tmp_path / "missing.json")


def test_sweep_checks_every_width_before_fitting(smooth):
    calls = []
    with pytest.raises(UserError, match=r"filter width 6 \(ratio 3\).*multiple of the ratio"):
        run_sweep(smooth, [2, 6], discover=lambda s, progress=None: calls.append(s))
    assert calls == []


# ---------------------------------------------------------------- the command


def test_sweep_command_writes_result_and_report(smooth, tmp_path, capsys):
    from closure.cli import main

    out = tmp_path / "sweep.json"
    rc = main(["sweep", smooth["input"]["path"], "--widths", "2,4", "--library",
               smooth["library"], "--resamples", "0", "-o", str(out), "--report",
               str(tmp_path / "rep")])
    assert rc == 0
    result = SweepResult.load(out)
    assert [e.ratio for e in result.entries] == [1, 2]
    assert all(math.isclose(v, 1.0, abs_tol=0.05) for v in result.coefficients()["grad"])
    page = (tmp_path / "rep" / "index.html").read_text()
    assert "sweep_coefficients.png" in page
    assert (tmp_path / "rep" / "sweep_coefficients.png").exists()
    assert str(out) in capsys.readouterr().out


@pytest.mark.parametrize("args,message", [
    (["--widths", "4,x"], "--widths expects comma-separated numbers"),
    (["--widths", "4,8", "--ratios", "2,2,2"], "3 ratios for 2 widths"),
    (["--widths", "4", "--method", "magic"], "fit.method"),
])
def test_sweep_command_user_errors(smooth, tmp_path, capsys, args, message):
    from closure.cli import main

    rc = main(["sweep", smooth["input"]["path"], "-o", str(tmp_path / "s.json"), *args])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and message in err
    assert not (tmp_path / "s.json").exists()
