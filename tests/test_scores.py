import json

import numpy as np
import pytest
from sklearn.metrics import r2_score

from closure.derivatives import derivative
from closure.grid import Grid
from closure.scores import (
    TransferContext,
    TransferSums,
    prediction_scores,
    transfer_names,
    transfer_sums,
    transfers_pointwise,
)
from closure.stats import SufficientStats


def _data(seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(3, 500, 4))
    y = X @ np.array([1.0, 0.5, 0.0, -0.2]) + 0.8 * rng.normal(size=(3, 500)) + 0.3
    return X, y


def test_prediction_scores_equal_sklearn_and_numpy_on_the_points():
    # sklearn.metrics.r2_score (with sample weights for the pooled score) and numpy corrcoef
    X, y = _data()
    w = np.array([1.0, 2.0, 1.0])
    stats = SufficientStats.from_design(X, y, w, list("abcd"), ["xx", "xy", "yy"])
    coef = np.array([0.9, 0.4, 0.1, -0.3])
    s = prediction_scores(stats, coef)
    pred = X @ coef
    for c, name in enumerate(["xx", "xy", "yy"]):
        assert s[name]["r2"] == pytest.approx(r2_score(y[c], pred[c]), rel=1e-10)
        assert s[name]["correlation"] == pytest.approx(np.corrcoef(y[c], pred[c])[0, 1],
                                                       rel=1e-10)
        rel = np.linalg.norm(y[c] - pred[c]) / np.linalg.norm(y[c])
        assert s[name]["relative_error"] == pytest.approx(rel, rel=1e-10)
    sw = np.repeat(w, 500)
    assert s["all"]["r2"] == pytest.approx(r2_score(y.ravel(), pred.ravel(), sample_weight=sw),
                                           rel=1e-10)
    json.dumps(s)


def test_a_constant_prediction_has_no_correlation():
    X, y = _data()
    stats = SufficientStats.from_design(X[:1], y[:1], None, list("abcd"))
    s = prediction_scores(stats, np.zeros(4))
    assert s["component0"]["correlation"] is None
    assert s["component0"]["relative_error"] == pytest.approx(1.0)


def test_transfer_sums_add_up_and_score_like_numpy():
    rng = np.random.default_rng(3)
    m = rng.normal(size=(3, 40)) + 0.2
    e = 0.7 * m + rng.normal(size=(3, 40))
    parts = [TransferSums.from_fields(m[i], e[i]) for i in range(3)]
    total = sum(parts)
    whole = TransferSums.from_fields(m, e)
    for k, v in total.to_dict().items():
        assert v == pytest.approx(whole.to_dict()[k], rel=1e-12, abs=1e-12)
    s = total.scores()
    assert s["correlation"] == pytest.approx(np.corrcoef(m.ravel(), e.ravel())[0, 1], rel=1e-10)
    assert s["mean_ratio"] == pytest.approx(m.mean() / e.mean(), rel=1e-10)
    assert s["backscatter_fraction_model"] == pytest.approx(np.mean(m < 0))
    assert s["backscatter_fraction_exact"] == pytest.approx(np.mean(e < 0))
    assert s["backscatter_share_exact"] == pytest.approx(-e[e < 0].sum() / np.abs(e).sum())
    assert TransferSums.from_dict(json.loads(json.dumps(total.to_dict()))) == total


def _shear_flow(n=32):
    # u = sin(y), v = sin(x) on [0, 2 pi)^2: S_xy = (cos y + cos x) / 2, S_xx = S_yy = 0,
    # omega = d_x v - d_y u = cos x - cos y
    g = Grid.regular((n, n), 2 * np.pi)
    y, x = g.mesh()
    return g, {"u": np.sin(y), "v": np.sin(x), "vorticity": np.cos(x) - np.cos(y)}, x, y


def test_energy_transfer_of_an_eddy_viscosity_stress_is_the_closed_form():
    # tau_ij = -2 nu S_ij gives pi = 2 nu S_ij S_ij (Pope 2000, eq. 13.123 with eq. 13.127)
    g, f, x, y = _shear_flow()
    nu = 0.3
    sxy = 0.5 * (np.cos(y) + np.cos(x))
    ctx = TransferContext("stress", f, g, "spectral")
    tau = {"tau_xx": np.zeros_like(x), "tau_xy": -2 * nu * sxy, "tau_yy": np.zeros_like(x)}
    out = ctx.transfers(tau)
    np.testing.assert_allclose(out["energy_transfer"], 2 * nu * 2 * sxy**2, atol=1e-12)
    # 2-D enstrophy: f_i = d_j tau_ij = -nu lap u_i = nu u_i (modes of |k| = 1), so
    # curl f = nu omega and omega * curl f = nu omega^2 (closed form)
    np.testing.assert_allclose(out["enstrophy_transfer"], nu * f["vorticity"] ** 2, atol=1e-12)


def test_transfers_accept_stacks_of_fields():
    g, f, x, y = _shear_flow()
    ctx = TransferContext("stress", f, g, "spectral")
    rng = np.random.default_rng(0)
    comps = {k: rng.normal(size=(5, *g.shape)) for k in ("tau_xx", "tau_xy", "tau_yy")}
    stacked = ctx.transfers(comps)
    for i in range(5):
        one = ctx.transfers({k: v[i] for k, v in comps.items()})
        for k in one:
            np.testing.assert_allclose(stacked[k][i], one[k], atol=1e-12)


def test_force_and_vorticity_transfers_have_the_stress_transfer_means():
    # integration by parts on a periodic domain: <u_i d_j tau_ij> = -<tau_ij S_ij>
    g, f, x, y = _shear_flow()
    rng = np.random.default_rng(1)
    k = np.fft.fftfreq(32, 1 / 32)
    smooth = np.exp(-(k[:, None] ** 2 + k[None, :] ** 2) / 8)
    tau = {c: np.fft.ifft2(smooth * np.fft.fft2(rng.normal(size=g.shape))).real
           for c in ("tau_xx", "tau_xy", "tau_yy")}
    d = {c: {a: derivative(tau[c], g, a) for a in "xy"} for c in tau}
    force = {"force_x": d["tau_xx"]["x"] + d["tau_xy"]["y"],
             "force_y": d["tau_xy"]["x"] + d["tau_yy"]["y"]}
    e_stress = TransferContext("stress", f, g, "spectral").transfers(tau)
    e_force = TransferContext("force", f, g, "spectral").transfers(force)
    assert e_force["energy_transfer"].mean() == pytest.approx(
        e_stress["energy_transfer"].mean(), rel=1e-10)
    curl = derivative(force["force_y"], g, "x") - derivative(force["force_x"], g, "y")
    e_vort = TransferContext("vorticity", f, g, "spectral").transfers({"vorticity_forcing": curl})
    np.testing.assert_allclose(e_vort["enstrophy_transfer"], e_stress["enstrophy_transfer"],
                               atol=1e-12)


def test_scalar_variance_transfer_and_names():
    g, f, x, y = _shear_flow()
    f = {**f, "c": np.sin(x)}
    ctx = TransferContext("flux:c", f, g, "spectral")
    out = ctx.transfers({"flux_c_x": np.ones_like(x), "flux_c_y": np.zeros_like(x)})
    np.testing.assert_allclose(out["scalar_variance_transfer"], -np.cos(x), atol=1e-12)
    assert transfer_names("stress", ("y", "x")) == ("energy_transfer", "enstrophy_transfer")
    assert transfer_names("stress", ("z", "y", "x")) == ("energy_transfer",)
    assert transfer_names("flux:c", ("x",)) == ("scalar_variance_transfer",)
    assert ctx.names == transfer_names("flux:c", g.dims)


@pytest.mark.parametrize(("target", "names", "values"), [
    ("stress", ("energy_transfer",), ("tau_xx", "tau_xy", "tau_yy")),
    ("force", ("energy_transfer",), ("force_x", "force_y")),
    ("vorticity", ("enstrophy_transfer",), ("vorticity_forcing",)),
    ("flux:c", ("scalar_variance_transfer",), ("flux_c_x", "flux_c_y"))])
def test_rows_of_pointwise_transfers_are_the_rows_of_the_whole(target, names, values):
    g, f, x, y = _shear_flow()
    f = {**f, "c": np.sin(x) * np.cos(2 * y)}
    rng = np.random.default_rng(3)
    vals = {k: rng.normal(size=g.shape) for k in values}
    ctx = TransferContext(target, f, g, "spectral")
    whole = ctx.transfers(vals, names)
    assert transfers_pointwise(target, names)
    rows = ctx.rows(5, 12)
    assert rows.grid.shape == (7, *g.shape[1:]) and ctx.grid.shape == g.shape
    part = rows.transfers({k: v[5:12] for k, v in vals.items()}, names)
    for k in names:
        np.testing.assert_array_equal(part[k], whole[k][5:12])


def test_the_enstrophy_transfer_of_stress_and_force_differentiates_the_target():
    assert not transfers_pointwise("stress", ("energy_transfer", "enstrophy_transfer"))
    assert not transfers_pointwise("force", ("enstrophy_transfer",))
    assert transfers_pointwise("stress", ("energy_transfer",)) and transfers_pointwise("stress", ())


def test_a_perfect_model_scores_one():
    g, f, x, y = _shear_flow()
    ctx = TransferContext("stress", f, g, "spectral")
    tau = {"tau_xx": np.sin(x + y), "tau_xy": np.cos(2 * x), "tau_yy": np.sin(y)}
    s = transfer_sums(ctx, tau, tau)
    for k in ("energy_transfer", "enstrophy_transfer"):
        sc = s[k].scores()
        assert sc["correlation"] == pytest.approx(1.0)
        assert sc["mean_ratio"] == pytest.approx(1.0)
        assert sc["backscatter_fraction_model"] == sc["backscatter_fraction_exact"]


def test_transfer_context_counts_the_arrays_it_holds():
    # 3-D stress: the resolved strain S_ij for every (i, j); 2-D stress adds the vorticity
    rng = np.random.default_rng(4)
    g3 = Grid.regular((8, 8, 8), 2 * np.pi)
    f3 = {k: rng.standard_normal(g3.shape) for k in ("u", "v", "w")}
    assert TransferContext("stress", f3, g3, "spectral").nbytes() == 9 * 8 * 8**3
    g2 = Grid.regular((8, 8), 2 * np.pi)
    f2 = {k: rng.standard_normal(g2.shape) for k in ("u", "v")}
    assert TransferContext("stress", f2, g2, "spectral").nbytes() == 5 * 8 * 8**2
