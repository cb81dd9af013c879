"""Tests for the 3-D coarse solver (closure.les3d) and 3-D a posteriori runs (closure.les)."""

import json
import math

import numpy as np
import pytest

from closure.cli import main
from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.les import (
    DynamicSmagorinsky,
    GradientModel,
    LongRunPlan,
    Smagorinsky,
    coarse_data,
    run,
    simulate,
    subgrid_term,
)
from closure.les3d import Forcing3D, LESEquation3D, parse_forcing3d, vorticity
from closure.spectral import fourier, random_field_hat
from closure.synth import turb3d, write

TWO_PI = 2 * np.pi


def grid3(n=16):
    return Grid.regular((n, n, n), TWO_PI, dims=("z", "y", "x"))


def abc_flow(g, k=1, a=1.0, b=0.7, c=0.4):
    """Arnold-Beltrami-Childress flow: curl u = k u (Dombre et al. 1986, J. Fluid Mech. 167)."""
    z, y, x = g.mesh()
    return {"u": a * np.sin(k * z) + c * np.cos(k * y),
            "v": b * np.sin(k * x) + a * np.cos(k * z),
            "w": c * np.sin(k * y) + b * np.cos(k * x)}


def random_velocity(g, seed=0, energy=0.5, peak=3.0):
    uh = random_field_hat(g, lambda k: k**4 * np.exp(-2 * (k / peak) ** 2),
                          np.random.default_rng(seed), 3, True)
    w, v, u = fourier(g).backward(uh)
    scale = math.sqrt(energy / (0.5 * np.mean(u**2 + v**2 + w**2)))
    return {"u": u * scale, "v": v * scale, "w": w * scale}


def spectral_d(f, axis, g):
    """Independent spectral derivative (numpy.fft, full complex transform) along an axis."""
    n = g.shape[axis]
    k = np.fft.fftfreq(n, d=g.spacing[axis]) * TWO_PI
    if n % 2 == 0:
        k[n // 2] = 0.0
    shape = [1, 1, 1]
    shape[axis] = n
    return np.real(np.fft.ifftn(1j * k.reshape(shape) * np.fft.fftn(f)))


# --- the solver -------------------------------------------------------------------------------

def test_abc_flow_decays_at_the_viscous_rate_without_a_model():
    # An ABC flow is a Beltrami field (omega = k u), so u x omega = 0 and the nonlinear term
    # u . grad u = grad(|u|^2 / 2) is a pure gradient, removed by the pressure: the flow decays
    # as exp(-nu k^2 t) exactly (Dombre et al. 1986, J. Fluid Mech. 167:353)
    g = grid3(16)
    nu, k = 0.05, 2
    abc = abc_flow(g, k)
    out = run(abc, g, [0.0, 0.5, 1.0], viscosity=nu)
    assert out.status == "completed"
    for i, t in enumerate(out.times):
        decay = np.exp(-nu * k**2 * t)
        for name in ("u", "v", "w"):
            exact = abc[name] * decay
            err = np.max(np.abs(out.fields[name][i] - exact)) / np.max(np.abs(exact))
            assert err < 1e-10
    np.testing.assert_allclose(out.fields["vorticity"][0][0], k * abc["u"], atol=1e-12)


def test_hyper_hypoviscosity_and_drag_damp_a_mode_at_their_rate():
    # linear terms only (Beltrami field): rate nu k^(2p) + mu + nu_h k^(-2q) (integrating factor)
    g = grid3(16)
    k, nu, p, mu, nuh, q = 2, 1e-3, 2, 0.1, 0.3, 1
    abc = abc_flow(g, k)
    out = run(abc, g, [0.0, 0.7], viscosity=nu, hyperviscosity_order=p, drag=mu,
              hypoviscosity=nuh, hypoviscosity_order=q)
    rate = nu * k ** (2 * p) + mu + nuh * k ** (-2 * q)
    np.testing.assert_allclose(out.fields["u"][-1], abc["u"] * np.exp(-rate * 0.7), atol=1e-12)


def test_smagorinsky_dissipation_in_the_solver_equals_minus_tau_s():
    # the energy tendency of the Smagorinsky term is <u_i (-d_j tau_ij)> = <tau_ij S_ij>
    # = -(C_s D)^2 <|S|^3>; the right-hand side is computed here with numpy.fft derivatives
    # (Smagorinsky 1963; Lilly 1967). The nonlinear term conserves energy, so the whole
    # right-hand side of the solver without viscosity has that energy tendency.
    g = grid3(16)
    f = random_velocity(g, seed=1)
    D, C = 2 * g.spacing[0], 0.17
    eq = LESEquation3D(g, subgrid=subgrid_term(Smagorinsky(D, C), g))
    uh = eq.initial_state(f)
    real = eq.velocity(uh)  # the dealiased, solenoidal field the solver carries
    F = fourier(g)
    rate = float(np.sum(F.half_weights * np.real(np.conj(uh) * eq.tendency(uh)))) / F.size**2
    vel = [real["u"], real["v"], real["w"]]
    axis = {"x": 2, "y": 1, "z": 0}
    grad = [[spectral_d(vel[i], axis[d], g) for d in "xyz"] for i in range(3)]
    s = [[0.5 * (grad[i][j] + grad[j][i]) for j in range(3)] for i in range(3)]
    mag = np.sqrt(2 * sum(s[i][j] ** 2 for i in range(3) for j in range(3)))
    tau_s = sum(-2 * (C * D) ** 2 * mag * s[i][j] * s[i][j] for i in range(3) for j in range(3))
    assert rate < 0
    assert rate == pytest.approx(float(np.mean(tau_s)), rel=1e-10)
    assert rate == pytest.approx(-(C * D) ** 2 * float(np.mean(mag**3)), rel=1e-10)


@pytest.fixture(scope="module")
def decaying(tmp_path_factory):
    """Decaying 3-D turbulence from closure's own generator, spun up so the cascade exists."""
    path = tmp_path_factory.mktemp("dns3") / "dns3.nc"
    write(turb3d(n=32, snapshots=3, interval=0.1, spinup=2.0, viscosity=0.005,
                 peak_wavenumber=3, seed=0), path)
    return path


def test_dynamic_constant_on_decaying_3d_turbulence(decaying):
    # Germano et al. 1991 with Lilly 1992's least squares: on resolved decaying isotropic
    # turbulence C = C_s^2 > 0 with C_s in the usual range 0.1 .. 0.2 (from memory: Lilly 1967's
    # inertial-range estimate 0.17; lower values near the dissipation range, Meneveau & Katz
    # 2000, Annu. Rev. Fluid Mech. 32)
    data = coarse_data(decaying, "gaussian", 2)
    assert data.grid.shape == (16, 16, 16)
    for f in data.fields:
        c = DynamicSmagorinsky(data.delta).constant(f, data.grid)
        assert c > 0
        assert 0.1 <= math.sqrt(c) <= 0.2


def test_gradient_model_in_3d_on_a_shear_flow():
    # tau_ij = (D^2/12) d_k u_i d_k u_j (Clark et al. 1979): u = sin y -> tau_xx = D^2/12 cos^2 y
    g = grid3(16)
    z, y, x = g.mesh()
    f = {"u": np.sin(y), "v": np.zeros(g.shape), "w": np.zeros(g.shape)}
    D = 0.5
    tau = GradientModel(D).evaluate(f, g)
    assert sorted(tau) == ["tau_xx", "tau_xy", "tau_xz", "tau_yy", "tau_yz", "tau_zz"]
    np.testing.assert_allclose(tau["tau_xx"], D**2 / 12 * np.cos(y) ** 2, atol=1e-12)
    for k in ("tau_xy", "tau_xz", "tau_yy", "tau_yz", "tau_zz"):
        np.testing.assert_allclose(tau[k], 0.0, atol=1e-12)
    # Smagorinsky of the same shear: S_xy = cos(y)/2, |S| = |cos y|
    sm = Smagorinsky(D, 0.2).evaluate(f, g)
    np.testing.assert_allclose(sm["tau_xy"], -2 * (0.2 * D) ** 2 * np.abs(np.cos(y))
                               * 0.5 * np.cos(y), atol=1e-12)
    # clipped gradient model: no point with backscatter left
    r = random_velocity(g, seed=4)
    clipped = GradientModel(D, clip=True).evaluate(r, g)
    from closure.les import contract, strain_rate, velocity_gradient

    s = strain_rate(velocity_gradient(r, g), g)
    transfer = -contract({k[4:]: v for k, v in clipped.items()}, s, g)
    assert np.all(transfer >= -1e-14)
    assert np.mean(np.all([clipped[k] == 0 for k in clipped], axis=0)) > 0.01


def test_blow_up_is_detected_in_3d():
    g = grid3(12)
    f = abc_flow(g, 1)
    rate = 2.0  # momentum tendency +rate u: energy x10 at t = ln(10) / (2 rate)

    def grow(fields, grid):
        return np.stack([rate * fields[n] for n in ("w", "v", "u")])

    out = run(f, g, [0.0, 2.0], closure=grow, max_step=0.005)
    assert out.blew_up
    assert out.blowup_time == pytest.approx(math.log(10) / (2 * rate), abs=0.006)
    assert "exceeded" in out.message

    def nan(fields, grid):
        return np.full((3,) + grid.shape, np.nan)

    out = run(f, g, [0.0, 0.1], closure=nan)
    assert out.blew_up and "non-finite" in out.message


def test_forcing_3d():
    g = grid3(16)
    f = random_velocity(g, seed=2)
    # constant power: the forcing injects exactly P (the rest of the tendency conserves energy)
    P = 0.3
    eq = LESEquation3D(g, forcing=Forcing3D("power", 2, P))
    uh = eq.initial_state(f)
    F = fourier(g)
    rate = float(np.sum(F.half_weights * np.real(np.conj(uh) * eq.tendency(uh)))) / F.size**2
    assert rate == pytest.approx(P, rel=1e-10)
    # steady low-wavenumber force: solenoidal, rms A, only on shells 1..K
    A = 0.5
    fh = Forcing3D("steady", 2, A, seed=3).steady_hat(g)
    kdotf = sum(k * fh[i] for i, k in enumerate(F.k))
    assert np.max(np.abs(kdotf)) < 1e-10 * np.max(np.abs(fh))
    w, v, u = F.backward(fh)
    assert math.sqrt(np.mean(u**2 + v**2 + w**2)) == pytest.approx(A, rel=1e-10)
    shell = np.sqrt(F.k2)
    assert np.all(np.abs(fh[:, (shell > 2.5) | (shell < 0.5)]) == 0)
    # parsing
    assert parse_forcing3d("power:2:0.1", {}) == Forcing3D("power", 2.0, 0.1)
    assert parse_forcing3d("steady:3:1:7", {}) == Forcing3D("steady", 3.0, 1.0, 7)
    assert parse_forcing3d("file", {"forcing": "none"}) == Forcing3D()
    with pytest.raises(OptionError, match="power:K:P"):
        parse_forcing3d("shell:4:1", {})
    with pytest.raises(UserError, match="finer grid"):
        Forcing3D("steady", 6, 1.0).band(g)


def test_a_stored_3d_stress_model_runs_like_the_same_baseline(decaying, tmp_path, capsys):
    # a ClosureModel holding only the gradient-model term with coefficient 1 is the gradient
    # baseline: same trajectory, in 3-D
    from closure.filters import make_coarse_graining
    from closure.library import make_library
    from closure.model import ClosureModel

    fine = grid3(32)
    cg = make_coarse_graining("gaussian", fine, 2, 4.0)
    lib = make_library("default", "stress", ("z", "y", "x"))
    coef = [1.0 if t.name == "gradient_model" else 0.0 for t in lib.terms]
    assert sum(coef) == 1
    model = ClosureModel(lib, coef, filter=cg, grid=cg.coarse, scheme="spectral",
                         delta=cg.delta)
    c = simulate(model, decaying, baselines="gradient")
    assert c.settings["grid"]["shape"] == [16, 16, 16]
    for name in ("u", "v", "w"):
        np.testing.assert_allclose(c.runs["model"].fields[name],
                                   c.runs["gradient"].fields[name], atol=1e-10)
    model_file = model.save(tmp_path / "model3.json")
    js = tmp_path / "r3.json"
    assert main(["les", str(model_file), "--initial", str(decaying), "-o",
                 str(tmp_path / "m3.nc"), "--baselines", "smagorinsky,dynamic",
                 "--duration", "0.4", "--spinup", "0.1", "--json", str(js)]) == 0
    out = capsys.readouterr().out
    assert "16 x 16 x 16" in out and "spectrum err" in out
    d = json.loads(js.read_text())
    for label in ("model", "smagorinsky", "dynamic"):
        lr = d["runs"][label]["long_run"]
        assert lr["stable"] is True and lr["spectrum_error"] is not None
    # a 2-D model refuses 3-D data
    lib2 = make_library("default", "stress", ("y", "x"))
    m2 = ClosureModel(lib2, [1.0] + [0.0] * (len(lib2.terms) - 1),
                      filter=make_coarse_graining("gaussian", Grid.regular((32, 32), TWO_PI),
                                                  2, 4.0),
                      grid=Grid.regular((16, 16), TWO_PI), scheme="spectral", delta=0.4)
    with pytest.raises(UserError, match="dims|dimension"):
        simulate(m2, decaying, baselines=[])


def test_3d_results_feed_the_report(decaying, tmp_path):
    # the report's a posteriori figures read 3-D results like 2-D ones
    from closure.report import plots
    from closure.report.aposteriori import as_runs

    c = simulate(None, decaying, ratio=2, baselines=["smagorinsky"], long_duration=0.3,
                 spinup=0.1)
    runs = as_runs(json.loads(c.to_json()))
    assert set(runs.runs) == {"none", "smagorinsky", "reference"}
    for label in ("none", "smagorinsky"):
        r = runs.runs[label]
        assert r.spectrum is not None and r.vorticity_pdf is not None
        assert r.metrics["long_run_stable"] is True
        assert r.metrics["long_run_spectrum_error"] is not None
    curves = {k: r.spectrum for k, r in runs.runs.items() if r.spectrum}
    plots.save_png(plots.aposteriori_spectra(curves, runs.reference), tmp_path / "s.png")
    assert (tmp_path / "s.png").stat().st_size > 0
    # the time-mean long-run curves, the reference's included, for the report's figures
    means = runs.long_run_curves("spectrum")
    assert set(means) == {"none", "smagorinsky", "reference"}
    plots.save_png(plots.aposteriori_spectra(means, runs.reference), tmp_path / "m.png")
    assert set(runs.long_run_curves("vorticity_pdf")) == set(means)
    assert set(runs.long_run_curves("transfer")) == set(means)


def test_vorticity_helper_and_long_run_in_3d():
    g = grid3(12)
    abc = abc_flow(g, 1)
    np.testing.assert_allclose(vorticity(abc, g)[0], abc["u"], atol=1e-12)  # omega = k u
    plan = LongRunPlan(0.4, 0.1, 0.1, np.linspace(-3, 3, 31))
    out = run(abc, g, [0.0, 0.1], viscosity=0.1, long_run=plan)
    assert out.statistics["samples"] == 4
    ts = np.array([0.1, 0.2, 0.3, 0.4])
    e0 = 0.5 * np.mean(abc["u"] ** 2 + abc["v"] ** 2 + abc["w"] ** 2)
    assert out.statistics["energy"] == pytest.approx(np.mean(e0 * np.exp(-0.2 * ts)),
                                                     rel=1e-10)
    assert out.statistics["enstrophy"] == pytest.approx(out.statistics["energy"], rel=1e-10)


def test_forcing_from_a_file_of_fourier_modes(tmp_path):
    # a steady force along x varying in y only drives a shear flow that advection leaves alone:
    # from rest, with drag mu, u = F (1 - exp(-mu t)) / mu sin(y) (exact; 2-D and 3-D alike)
    from closure.les import ModeForcing, parse_forcing

    mu, t = 0.5, 0.8
    growth = (1 - math.exp(-mu * t)) / mu
    table3 = tmp_path / "f3.txt"
    table3.write_text("# m_z m_y m_x component a b\n0 1 0 x 0.0 1.0\n")
    g = grid3(12)
    z, y, x = g.mesh()
    rest = {n: np.zeros(g.shape) for n in ("u", "v", "w")}
    out = run(rest, g, [0.0, t], drag=mu, forcing=parse_forcing3d(f"modes:{table3}", {}),
              max_step=0.01)
    np.testing.assert_allclose(out.fields["u"][-1], growth * np.sin(y), atol=1e-12)
    np.testing.assert_allclose(out.fields["w"][-1], 0.0, atol=1e-12)
    # 2-D: vorticity forcing sin(3 x) -> omega = growth sin(3 x)
    table2 = tmp_path / "f2.txt"
    table2.write_text("0, 3, 0.0, 1.0\n")
    g2 = Grid.regular((24, 24), TWO_PI, dims=("y", "x"))
    y2, x2 = g2.mesh()
    force = parse_forcing(f"modes:{table2}", {})
    assert isinstance(force, ModeForcing) and force.to_attrs()["forcing_modes"] == 1
    out = run({"vorticity": np.zeros(g2.shape)}, g2, [0.0, t], drag=mu, forcing=force,
              max_step=0.01)
    np.testing.assert_allclose(out.fields["vorticity"][-1], growth * np.sin(3 * x2),
                               atol=1e-12)
    # what a user gets wrong
    bad = tmp_path / "bad.txt"
    bad.write_text("0 1 0 q 1 1\n")
    with pytest.raises(UserError, match="component x, y or z"):
        parse_forcing3d(f"modes:{bad}", {})
    bad.write_text("0 1 1\n")
    with pytest.raises(UserError, match="expected 4 columns"):
        parse_forcing(f"modes:{bad}", {})
    with pytest.raises(UserError, match="does not exist"):
        parse_forcing(f"modes:{tmp_path / 'missing.txt'}", {})
    bad.write_text("0 9 0 x 1 1\n")
    with pytest.raises(UserError, match="dealiasing"):
        run(rest, g, [0.0, 0.1], forcing=parse_forcing3d(f"modes:{bad}", {}))
