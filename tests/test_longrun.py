"""Tests for closure.longrun (long-run statistics) and the long runs of closure.les."""

import json
import math

import numpy as np
import pytest
import scipy.stats

from closure.cli import main
from closure.errors import OptionError
from closure.grid import Grid
from closure.les import (
    LongRunPlan,
    long_run_figures,
    run,
    simulate,
)
from closure.les3d import LESEquation3D
from closure.longrun import (
    FlowStatistics,
    compare_statistics,
    hellinger,
    histogram_quantile,
    octave_bands,
    symmetric_edges,
)
from closure.spectral import VorticityEquation, fourier, random_field_hat
from closure.synth import turb2d, write

TWO_PI = 2 * np.pi


def grid2(n=32):
    return Grid.regular((n, n), TWO_PI, dims=("y", "x"))


def grid3(n=16):
    return Grid.regular((n, n, n), TWO_PI, dims=("z", "y", "x"))


def normal_values(n, mu=0.0, sigma=1.0):
    """n values whose empirical distribution is N(mu, sigma^2) (its quantiles at (i+1/2)/n)."""
    return mu + sigma * scipy.stats.norm.ppf((np.arange(n) + 0.5) / n)


# --- statistics on known fields ---------------------------------------------------------------

def test_single_fourier_mode_spectrum_and_means():
    # u = A cos(m x): mean energy A^2/4, all of it in shell m (Parseval; common practice)
    g = grid2()
    y, x = g.mesh()
    A, m = 0.7, 3
    u, v = A * np.cos(m * x), np.zeros(g.shape)
    omega = A * m * np.sin(m * x)  # d_x v - d_y u
    s = FlowStatistics(g, symmetric_edges([omega]))
    s.add([u, v], omega)
    s.add([2 * u, 2 * v], 2 * omega)  # time mean of A^2/4 and 4 A^2/4
    out = s.summary()
    dk = out["k"][1] - out["k"][0]
    assert out["samples"] == 2
    np.testing.assert_allclose(out["E"][m] * dk, 2.5 * A**2 / 4, rtol=1e-12)
    np.testing.assert_allclose(np.delete(out["E"], m), 0.0, atol=1e-14)
    np.testing.assert_allclose(out["energy"], 2.5 * A**2 / 4, rtol=1e-12)
    np.testing.assert_allclose(out["enstrophy"], 2.5 * (A * m) ** 2 / 4, rtol=1e-12)


def test_gaussian_quantiles_match_the_normal_distribution():
    # 0.1 % and 99.9 % quantiles of N(0, 1) from scipy.stats.norm.ppf (reference library);
    # the histogram's linear interpolation is good to a fraction of a bin width
    g = grid3(32)
    values = normal_values(g.shape[0] ** 3).reshape(g.shape)
    edges = np.linspace(-6, 6, 401)
    s = FlowStatistics(g, edges)
    s.add([values, values, values], values)
    q = s.summary()["quantiles"]
    width = edges[1] - edges[0]
    assert abs(q[0.001] - scipy.stats.norm.ppf(0.001)) < 0.5 * width
    assert abs(q[0.999] - scipy.stats.norm.ppf(0.999)) < 0.5 * width
    # the PDF on the bins integrates to 1 and matches the normal density at the centre
    pdf = s.summary()["pdf"]
    assert abs(np.sum(pdf["density"] * np.diff(edges)) - 1) < 1e-12
    centre = np.argmin(np.abs(0.5 * (edges[1:] + edges[:-1])))
    assert abs(pdf["density"][centre] - scipy.stats.norm.pdf(0)) < 0.01


def test_quantiles_in_the_overflow_bins_are_infinite():
    edges = np.linspace(-1, 1, 5)
    assert histogram_quantile(edges, [10, 0, 0, 0, 0, 0], 0.5) == -math.inf
    assert histogram_quantile(edges, [0, 0, 0, 0, 0, 10], 0.5) == math.inf
    # uniform on the bins: the median is the centre
    assert histogram_quantile(edges, [0, 1, 1, 1, 1, 0], 0.5) == pytest.approx(0.0)
    assert math.isnan(histogram_quantile(edges, [0] * 6, 0.5))


def test_hellinger_of_normals_matches_the_closed_form():
    # H^2 = 1 - sqrt(2 s1 s2 / (s1^2 + s2^2)) exp(-(m1 - m2)^2 / (4 (s1^2 + s2^2)))
    # (e.g. Pardo 2006, Statistical Inference Based on Divergence Measures, from memory)
    g = grid2(64)
    edges = np.linspace(-8, 8, 161)
    a, b = FlowStatistics(g, edges), FlowStatistics(g, edges)
    n = 50 * g.shape[0] ** 2  # 50 samples of the grid's size
    a.add([np.zeros(g.shape)] * 2, normal_values(n, 0.0, 1.0))
    b.add([np.zeros(g.shape)] * 2, normal_values(n, 0.5, 1.5))
    s1, s2, dm = 1.0, 1.5, 0.5
    exact = math.sqrt(1 - math.sqrt(2 * s1 * s2 / (s1**2 + s2**2))
                      * math.exp(-dm**2 / (4 * (s1**2 + s2**2))))
    got = hellinger(a.summary()["pdf"]["counts"], b.summary()["pdf"]["counts"])
    assert got == pytest.approx(exact, rel=0.01)


def test_compare_statistics_of_a_scaled_field():
    # velocity x sqrt(2): every band energy and the mean energy double -> band errors 1,
    # energy and enstrophy ratios 2; same shape of PDF -> distance small but > 0 (bins)
    g = grid2()
    uh = random_field_hat(g, lambda k: k**2 * np.exp(-k / 4), np.random.default_rng(1), 2, True)
    v, u = fourier(g).backward(uh)
    eq = VorticityEquation(g)
    w = eq.fields(eq.initial_state(
        fourier(g).backward(fourier(g).ik_of("x") * uh[0] - fourier(g).ik_of("y") * uh[1])))
    omega = w["vorticity"]
    edges = symmetric_edges([omega], margin=2.0)
    ref, run_ = FlowStatistics(g, edges), FlowStatistics(g, edges)
    ref.add([u, v], omega)
    r2 = math.sqrt(2)
    run_.add([r2 * u, r2 * v], r2 * omega)
    out = compare_statistics(run_.summary(), ref.summary(), g)
    errs = [e for e in out["spectrum_band_error"].values() if e is not None]
    np.testing.assert_allclose(errs, 1.0, rtol=1e-10)
    assert out["spectrum_error"] == pytest.approx(1.0, rel=1e-10)
    assert out["mean_energy_ratio"] == pytest.approx(2.0, rel=1e-12)
    assert out["mean_enstrophy_ratio"] == pytest.approx(2.0, rel=1e-12)
    assert 0 < out["vorticity_pdf_distance"] < 0.5
    assert len(out["spectrum_band_error"]) == len(octave_bands(g))


def test_resolved_transfer_conserves_energy():
    # the nonlinear term moves energy between scales only: sum_k T(k) = 0 (Kraichnan 1967 in
    # 2-D, common practice in 3-D), with 2/3-rule dealiasing exactly
    from closure.les import _flow

    g2 = grid2()
    f2 = _flow(g2)
    uh = random_field_hat(g2, lambda k: k**2 * np.exp(-k / 3), np.random.default_rng(2), 1)
    q = f2.initial_state({"vorticity": fourier(g2).backward(uh[0])})
    t2 = f2.transfer_density(q)
    assert abs(t2.sum()) < 1e-12 * np.abs(t2).sum()
    g3 = grid3()
    eq = LESEquation3D(g3)
    vh = random_field_hat(g3, lambda k: k**2 * np.exp(-k / 3), np.random.default_rng(3), 3, True)
    w, v, u = fourier(g3).backward(vh)
    q3 = eq.initial_state({"u": u, "v": v, "w": w})
    t3 = eq.transfer_density(q3)
    assert np.abs(t3).sum() > 0
    assert abs(t3.sum()) < 1e-12 * np.abs(t3).sum()


# --- long runs --------------------------------------------------------------------------------

def test_a_long_run_keeps_no_fields_beyond_the_outputs_and_samples_after_spinup():
    g = grid2(24)
    y, x = g.mesh()
    init = {"u": np.sin(2 * y), "v": np.zeros(g.shape)}  # shear: decays, exact
    nu = 0.05
    plan = LongRunPlan(duration=2.0, spinup=1.0, sample_interval=0.25,
                       edges=np.linspace(-3, 3, 61))
    out = run(init, g, [0.0, 0.5], viscosity=nu, long_run=plan)
    assert out.fields["u"].shape[0] == 2  # only the two output times
    assert out.statistics["samples"] == 5  # t = 1.0, 1.25, ..., 2.0
    # the time mean of the energy 0.25 exp(-2 nu k^2 t) over the samples (direct computation)
    ts = np.arange(1.0, 2.0 + 1e-9, 0.25)
    assert out.statistics["energy"] == pytest.approx(np.mean(0.25 * np.exp(-8 * nu * ts)),
                                                     rel=1e-10)
    assert out.long_series["time"][-1] == pytest.approx(2.0)
    fig = long_run_figures(out, None)
    assert fig["stable"] and fig["blowup_time"] is None and fig["duration"] == 2.0
    assert fig["spectrum_error"] is None  # no reference statistics


def test_a_growing_model_is_unstable_in_a_long_run():
    g = grid2(24)
    y, x = g.mesh()
    init = {"u": np.sin(2 * y), "v": np.zeros(g.shape)}
    rate = 2.0  # vorticity grows as exp(rate t): energy passes 10 x at t = ln(10) / (2 rate)
    plan = LongRunPlan(5.0, 0.0, 0.1, np.linspace(-5, 5, 11))
    out = run(init, g, [0.0, 0.1], closure=lambda f, grid: rate * f["vorticity"],
              long_run=plan, max_step=0.01)
    fig = long_run_figures(out, None)
    assert not fig["stable"]
    assert fig["blowup_time"] == pytest.approx(math.log(10) / (2 * rate), abs=0.011)


def test_long_run_plan_rejects_bad_options():
    edges = np.linspace(-1, 1, 3)
    with pytest.raises(OptionError, match="--duration"):
        LongRunPlan(0.0, 0.0, 0.1, edges)
    with pytest.raises(OptionError, match="--spinup"):
        LongRunPlan(1.0, 1.0, 0.1, edges)
    with pytest.raises(OptionError, match="sample interval"):
        LongRunPlan(1.0, 0.5, 0.6, edges)


@pytest.fixture(scope="module")
def dns2(tmp_path_factory):
    path = tmp_path_factory.mktemp("dns") / "dns.nc"
    write(turb2d(n=48, snapshots=4, interval=0.3, spinup=0.6, viscosity=2e-3,
                 forcing_wavenumber=3, seed=2), path)
    return path


def test_simulate_long_runs_against_every_reference_snapshot(dns2, tmp_path, capsys):
    c = simulate(None, dns2, baselines=["smagorinsky"], ratio=2, long_duration=2.0, spinup=0.5,
                 sample_interval=0.25)
    assert set(c.long_runs) == {"none", "smagorinsky"}
    assert c.reference_statistics["samples"] == 4  # all snapshots of the file
    for f in c.long_runs.values():
        assert f["stable"] and f["duration"] == 2.0
        assert f["spectrum_error"] is not None and f["vorticity_pdf_distance"] is not None
        assert f["mean_energy_ratio"] > 0 and f["mean_enstrophy_ratio"] > 0
    # short-horizon trajectory errors stay
    assert c.metrics["none"]["times"] == c.settings["times"]
    d = json.loads(c.to_json())
    lr = d["runs"]["none"]["long_run"]
    for key in ("duration", "stable", "blowup_time", "spectrum_error",
                "vorticity_pdf_distance", "mean_energy_ratio", "mean_enstrophy_ratio"):
        assert key in lr
    assert "statistics" in d["runs"]["reference"]["long_run"]
    assert "Long-run statistics" in d["note"]
    assert "spectrum err" in c.table()
    # the CLI
    out = tmp_path / "run.nc"
    js = tmp_path / "run.json"
    assert main(["les", "none", "--initial", str(dns2), "-o", str(out), "--json", str(js),
                 "--baselines", "", "--ratio", "2", "--duration", "1.0", "--spinup",
                 "0.5"]) == 0
    text = capsys.readouterr().out
    assert "stable for 1 s" in text and "spectrum err" in text
    assert json.loads(js.read_text())["runs"]["none"]["long_run"]["stable"] is True
    assert main(["les", "none", "--initial", str(dns2), "-o", str(out), "--baselines", "",
                 "--spinup", "0.5"]) == 2
    assert "--duration" in capsys.readouterr().err
    assert main(["les", "none", "--initial", str(dns2), "-o", str(out), "--baselines", "",
                 "--duration", "1.0", "--spinup", "2"]) == 2
    assert "--spinup" in capsys.readouterr().err


def test_a_file_without_its_physics_is_run_with_loud_assumptions(dns2, tmp_path, capsys):
    import xarray as xr

    foreign = tmp_path / "foreign.nc"
    with xr.open_dataset(dns2) as ds:
        keep = {"viscosity": ds.attrs["viscosity"]}
        ds.load().assign_attrs(keep).drop_attrs(deep=False).assign_attrs(keep).to_netcdf(
            foreign)
    c = simulate(None, foreign, baselines=[], ratio=2)
    assert c.settings["qualitative"] is True
    assert any("no linear drag" in a for a in c.settings["assumed_physics"])
    assert main(["les", "none", "--initial", str(foreign), "-o", str(tmp_path / "r.nc"),
                 "--baselines", "", "--ratio", "2", "-q"]) == 0
    err = capsys.readouterr().err
    assert "ASSUMED PHYSICS" in err and "qualitative" in err
    # stating it on the command line removes the assumption
    c = simulate(None, foreign, baselines=[], ratio=2, drag=0.0, hyperviscosity_order=1,
                 hypoviscosity=0.0, forcing="none")
    assert c.settings["qualitative"] is False


def test_a_long_run_reaches_its_whole_duration():
    plan = LongRunPlan(1.0, 0.0, 0.3, np.linspace(-1, 1, 3))
    np.testing.assert_allclose(plan.sample_times(2.0), [2.3, 2.6, 2.9, 3.0])
    np.testing.assert_allclose(LongRunPlan(1.0, 0.0, 0.25, plan.edges).sample_times(0.0),
                               [0.25, 0.5, 0.75, 1.0])


def test_the_overall_spectrum_error_leaves_out_the_corner_bands():
    # 2/3 rule on 16^3: |m_i| <= 5 in every direction, so shell 5 is the last complete one;
    # bands [1,2), [2,4), [4,8) count, [8,16) (corners only) does not
    from closure.longrun import resolved_shell

    g = grid3(16)
    assert resolved_shell(g) == 5 and resolved_shell(grid2(64)) == 21
    k = np.arange(20.0)
    ref = {"samples": 1, "k": k, "E": np.ones(20), "energy": 20.0, "enstrophy": 1.0,
           "T": None, "pdf": {"counts": np.ones(4)}, "quantiles": {0.001: 0, 0.999: 0}}
    run_ = {**ref, "E": np.where(k >= 8, 100.0, 1.0)}
    out = compare_statistics(run_, ref, g)
    assert out["spectrum_bands_counted"] == ["1-2", "2-4", "4-8"]
    assert out["spectrum_band_error"]["8-16"] == pytest.approx(99.0)
    assert out["spectrum_error"] == 0.0
