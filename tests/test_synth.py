"""Tests for closure.synth (the demo-data solvers) and the ``closure synth`` command."""

import numpy as np
import pytest
import xarray as xr

from closure.cli import main
from closure.errors import UserError
from closure.grid import Grid
from closure.spectral import (
    divergence_hat_norm,
    energy_spectrum,
    fourier,
    kinetic_energy,
    vorticity_from_velocity,
)
from closure.synth import burgers, turb2d, turb3d, write
from closure.synth.turb3d import NavierStokes3D

TWO_PI = 2 * np.pi


# --- Burgers --------------------------------------------------------------------------------

def test_burgers_matches_the_cole_hopf_solution():
    # Cole-Hopf (Whitham 1974, Linear and Nonlinear Waves, sec. 4.1): u = -2 nu phi_x / phi
    # with phi_t = nu phi_xx; phi = 1 + b cos x gives phi(x, t) = 1 + b exp(-nu t) cos x
    nu, peak = 0.2, 0.5
    ds = burgers(n=128, viscosity=nu, initial="cole-hopf", amplitude=peak, snapshots=5,
                 interval=0.5)
    x = ds["x"].values
    s = peak / (2 * nu)
    b = s / np.sqrt(1 + s * s)  # so that max |u(0)| = 2 nu b / sqrt(1 - b^2) = peak
    assert np.max(np.abs(ds["u"].values[0])) == pytest.approx(peak, rel=1e-3)
    for i, t in enumerate(ds["time"].values):
        e = b * np.exp(-nu * t)
        exact = 2 * nu * e * np.sin(x) / (1 + e * np.cos(x))
        np.testing.assert_allclose(ds["u"].values[i], exact, atol=1e-7)
    assert ds["time"].values[-1] == pytest.approx(2.0)


def test_burgers_random_field_dissipates_energy():
    ds = burgers(n=256, viscosity=0.05, snapshots=6, interval=0.2, seed=3)
    energy = [kinetic_energy((u,)) for u in ds["u"].values]
    assert energy[0] == pytest.approx(0.5)  # amplitude 1 is the rms: E = 1/2
    assert np.all(np.diff(energy) < 0)
    assert ds["u"].dims == ("time", "x")


def test_burgers_rejects_unresolved_modes():
    with pytest.raises(UserError, match="--modes"):
        burgers(n=32, modes=20)
    with pytest.raises(UserError, match="initial condition"):
        burgers(n=32, initial="step")


# --- 2-D turbulence -------------------------------------------------------------------------

SMALL = dict(n=32, snapshots=3, interval=0.2, spinup=0.4, viscosity=5e-3, forcing_wavenumber=3)


def test_generators_state_their_cost():
    """turb2d and turb3d write their wall-clock time and simulated time (spin-up plus the
    snapshot span), what closure.les reads as the fine run's cost; a run's wall time is
    also bounded by the time this test took to make it."""
    import time

    for make, kwargs, simulated in ((turb2d, SMALL, 0.4 + 2 * 0.2),
                                    (turb3d, dict(n=16, snapshots=2, interval=0.1,
                                                  spinup=0.05, viscosity=0.05), 0.15)):
        t = time.perf_counter()
        ds = make(**kwargs)
        took = time.perf_counter() - t
        assert 0 < ds.attrs["wall_seconds"] <= took
        assert ds.attrs["simulated_time"] == pytest.approx(simulated, rel=1e-12)


def test_turb2d_dataset_layout_and_consistency():
    ds = turb2d(**SMALL, seed=1)
    assert ds["u"].dims == ("time", "y", "x")
    assert set(ds.data_vars) == {"u", "v", "vorticity"}
    np.testing.assert_allclose(ds["time"].values, [0.4, 0.6, 0.8])
    assert ds["x"].attrs["units"] == "m" and ds["time"].attrs["units"] == "s"
    assert ds["u"].attrs["units"] == "m s-1" and ds["vorticity"].attrs["units"] == "s-1"
    assert ds.attrs["Conventions"] == "CF-1.8"
    for key in ("solver", "viscosity", "drag", "forcing", "seed"):
        assert key in ds.attrs
    g = Grid.regular((32, 32), TWO_PI, dims=("y", "x"))
    np.testing.assert_allclose(ds["x"].values, g.coords("x"))
    F = fourier(g)
    for i in range(3):
        u, v, w = (ds[n].values[i] for n in ("u", "v", "vorticity"))
        assert divergence_hat_norm(F.forward(np.stack([v, u])), g) < 1e-13
        np.testing.assert_allclose(vorticity_from_velocity(u, v, g), w, atol=1e-10)
    # statistically non-trivial: the flow evolves between snapshots
    assert np.max(np.abs(ds["vorticity"].values[2] - ds["vorticity"].values[0])) > 0.1


def test_turb2d_is_deterministic_given_the_seed():
    a = turb2d(**SMALL, seed=5)
    b = turb2d(**SMALL, seed=5)
    c = turb2d(**SMALL, seed=6)
    np.testing.assert_array_equal(a["vorticity"].values, b["vorticity"].values)
    assert not np.allclose(a["vorticity"].values, c["vorticity"].values)


def test_turb2d_passive_scalar_keeps_its_mean():
    ds = turb2d(**SMALL, scalar=True, scalar_gradient=2.0)
    c = ds["c"].values
    assert c.shape == ds["u"].shape and ds["c"].attrs["long_name"]
    assert np.std(c[-1]) > 1e-3  # the mean gradient stirred into fluctuations
    np.testing.assert_allclose(c.mean(axis=(1, 2)), 0.0, atol=1e-12)
    assert ds.attrs["scalar_gradient"] == 2.0


def test_turb2d_options_are_checked():
    with pytest.raises(UserError, match="--snapshots"):
        turb2d(n=32, snapshots=0)
    with pytest.raises(UserError, match="--viscosity"):
        turb2d(n=32, viscosity=-1)
    with pytest.raises(UserError, match="forcing"):
        turb2d(n=32, forcing="gusty")


def test_turb2d_kolmogorov_and_hyperviscosity_run():
    ds = turb2d(n=32, snapshots=2, interval=0.2, spinup=0.0, forcing="kolmogorov",
                forcing_wavenumber=2, hyperviscosity_order=2, viscosity=1e-5)
    assert ds.attrs["forcing"] == "kolmogorov" and ds.attrs["hyperviscosity_order"] == 2
    assert np.all(np.isfinite(ds["u"].values))


@pytest.mark.slow
def test_turb2d_default_flow_has_substantial_subgrid_stress():
    # ratio 4, Gaussian filter of width 8 fine spacings, as in the demo discovery job
    from closure.filters import make_coarse_graining

    ds = turb2d(snapshots=2)
    g = Grid.regular((128, 128), TWO_PI, dims=("y", "x"))
    cg = make_coarse_graining("gaussian", g, 4, 8.0)
    u, v = ds["u"].values[-1], ds["v"].values[-1]
    ub, vb = cg(u), cg(v)
    tau_xy = cg(u * v) - ub * vb
    resolved_xy = ub * vb - np.mean(ub * vb)
    ratio = np.sqrt(np.mean(tau_xy**2) / np.mean(resolved_xy**2))
    assert ratio > 0.02
    k, E = energy_spectrum((u, v), g)
    assert E[8:16].sum() > 1e-3 * E.sum()  # energy around the filter scale


# --- 3-D turbulence -------------------------------------------------------------------------

def test_turb3d_is_divergence_free_and_decays_monotonically():
    ds = turb3d(n=24, snapshots=4, interval=0.1, viscosity=0.05)
    assert ds["u"].dims == ("time", "z", "y", "x")
    g = Grid.regular((24, 24, 24), TWO_PI)
    F = fourier(g)
    energy = []
    for i in range(4):
        vel = tuple(ds[n].values[i] for n in ("w", "v", "u"))
        assert divergence_hat_norm(F.forward(np.stack(vel)), g) < 1e-13
        energy.append(kinetic_energy(vel))
    assert energy[0] == pytest.approx(0.5)
    assert np.all(np.diff(energy) < 0)
    assert ds.attrs["max_relative_divergence"] < 1e-13


def test_3d_taylor_green_initial_dissipation():
    # Taylor-Green vortex u = sin x cos y cos z, v = -cos x sin y cos z, w = 0:
    # E(0) = 1/8 and dE/dt(0) = -3 nu / 4 (Brachet et al. 1983, J. Fluid Mech. 130:411)
    g = Grid.regular((16, 16, 16), TWO_PI)
    z, y, x = g.mesh()
    nu, dt = 0.1, 1e-3
    eq = NavierStokes3D(g, nu)
    F = eq.fourier
    uh = F.forward(np.stack([0 * x, -np.cos(x) * np.sin(y) * np.cos(z),
                             np.sin(x) * np.cos(y) * np.cos(z)]))

    def energy(h):
        return kinetic_energy(tuple(F.backward(h)))

    assert energy(uh) == pytest.approx(1 / 8)
    rate = (energy(eq.step(uh, dt)) - energy(eq.step(uh, -dt))) / (2 * dt)
    assert rate == pytest.approx(-3 * nu / 4, rel=1e-6)


def test_3d_shear_wave_decays_at_the_viscous_rate():
    # u = sin(2 z) x-hat: its nonlinear term is a pure gradient (removed by the projection),
    # so u(t) = exp(-nu k^2 t) sin(2 z) exactly
    g = Grid.regular((16, 16, 16), TWO_PI)
    z, y, x = g.mesh()
    nu, T = 0.05, 1.0
    eq = NavierStokes3D(g, nu)
    uh = eq.fourier.forward(np.stack([0 * x, 0 * x, np.sin(2 * z)]))
    uh, steps = eq.advance(uh, T, cfl=0.5)
    w, v, u = eq.fourier.backward(uh)
    np.testing.assert_allclose(u, np.exp(-4 * nu * T) * np.sin(2 * z), atol=1e-12)
    np.testing.assert_allclose(w, 0.0, atol=1e-12)


# --- files and the command line -------------------------------------------------------------

def test_write_is_reopenable_with_units(tmp_path):
    ds = turb2d(**SMALL, scalar=True)
    path = write(ds, tmp_path / "sub" / "run.nc")
    with xr.open_dataset(path) as back:
        assert back["u"].attrs["units"] == "m s-1"
        assert back["y"].attrs["units"] == "m"
        assert back["time"].attrs["units"] == "s"
        assert back.attrs["solver"] == "turb2d"
        np.testing.assert_array_equal(back["vorticity"].values, ds["vorticity"].values)
        np.testing.assert_array_equal(back["c"].values, ds["c"].values)
    assert [p.name for p in (tmp_path / "sub").iterdir()] == ["run.nc"]  # no temp files left


def test_cli_writes_each_scenario_and_prints_a_summary(tmp_path, capsys):
    out = tmp_path / "t.nc"
    assert main(["synth", "turb2d", "-o", str(out), "--n", "32", "--snapshots", "2",
                 "--spinup", "0.2", "--interval", "0.1", "--forcing-wavenumber", "3",
                 "--scalar"]) == 0
    text = capsys.readouterr().out
    assert "32 x 32" in text and "2 snapshots" in text and str(out) in text
    with xr.open_dataset(out) as ds:
        assert set(ds.data_vars) == {"u", "v", "vorticity", "c"}
    assert main(["synth", "burgers", "-o", str(tmp_path / "b.nc"), "--n", "64",
                 "--snapshots", "2"]) == 0
    assert main(["synth", "turb3d", "-o", str(tmp_path / "c.nc"), "--n", "16",
                 "--snapshots", "2", "--interval", "0.05", "-q"]) == 0
    with xr.open_dataset(tmp_path / "c.nc") as ds:
        assert ds["w"].dims == ("time", "z", "y", "x")


def test_cli_reports_bad_options(tmp_path, capsys):
    assert main(["synth", "turb2d", "-o", str(tmp_path / "x.nc"), "--n", "32",
                 "--forcing-wavenumber", "12"]) == 2
    assert "smaller forcing wavenumber" in capsys.readouterr().err
    assert main(["synth", "turb2d", "-o", str(tmp_path), "--n", "32"]) == 2
    assert "is a folder" in capsys.readouterr().err
    assert not list(tmp_path.glob("*.nc"))
