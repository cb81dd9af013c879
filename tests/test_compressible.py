"""Tests for closure.synth.compressible (the compressible demo solver) and its CLI command."""

import numpy as np
import pytest
import xarray as xr

from closure.cli import main
from closure.errors import UserError
from closure.grid import Grid
from closure.synth import compressible
from closure.synth.compressible import CompressibleEquations, IdealGas
from closure.synth.turb3d import NavierStokes3D

TWO_PI = 2 * np.pi


def _totals(eq, q):
    t = eq.totals(q)
    return t["mass"], t["momentum"], t["energy"]


@pytest.mark.parametrize("shape,exponent", [((32, 32), 0.76), ((16, 16, 16), 0.0)])
def test_mass_momentum_and_energy_are_conserved_to_round_off(shape, exponent):
    # periodic flux form: d_t <q> = -<d_j F_j> = 0 exactly (common practice); here the state
    # is a strongly compressible random field (Mach 0.5, density and entropy fluctuations)
    grid = Grid.regular(shape, TWO_PI, dims=("z", "y", "x")[3 - len(shape):])
    rng = np.random.default_rng(1)
    gas = IdealGas(viscosity=0.02, temperature=300.0, exponent=exponent)
    eq = CompressibleEquations(grid, gas)
    c0 = gas.sound_speed(300.0)
    smooth = eq.fourier.dealias

    def field(rms):  # smooth random field of zero mean and the given rms
        f = eq.fourier.backward(eq.fourier.forward(rng.standard_normal(grid.shape))
                                * smooth * np.exp(-eq.fourier.k2 / 8))
        return f * rms / np.std(f)

    rho = 1.2 + field(0.15)
    vel = {"u": field(0.3 * c0), "v": field(0.3 * c0), "w": field(0.3 * c0)}
    p = 1.2 * gas.gas_constant * 300.0 * (1 + field(0.1))
    assert 0.2 < np.sqrt(np.mean(sum(vel[c] ** 2 for c in "uv"))) / c0 < 1.0
    q = eq.state(rho, vel, p)
    mass0, mom0, energy0 = _totals(eq, q)
    q, steps = eq.advance(q, 0.05 * TWO_PI / c0, 0.5)
    mass, mom, energy = _totals(eq, q)
    assert steps > 5
    assert abs(mass / mass0 - 1) < 1e-13
    assert abs(energy / energy0 - 1) < 1e-13
    momentum_scale = np.sqrt(np.mean(rho * rho * sum(vel[c] ** 2 for c in "uvw")))
    assert np.max(np.abs(mom - mom0)) / momentum_scale < 1e-13
    # the flow did change: conservation is not a frozen state
    assert np.max(np.abs(eq.primitive(q)["rho"] - rho)) > 1e-3


@pytest.mark.parametrize("exponent", [0.0, 0.76])
def test_acoustic_wave_speed_and_decay_match_the_linear_theory(exponent):
    # Linear viscous, heat-conducting sound wave (Stokes-Kirchhoff; Landau & Lifshitz, Fluid
    # Mechanics, 2nd ed. 1987, sec. 79, eq. 79.6, from memory): the amplitude of a plane wave
    # of wavenumber k decays at the rate k^2 / (2 rho) [4/3 mu + zeta + kappa (1/c_v - 1/c_p)]
    # = k^2 / 2 (4/3 nu + (gamma - 1) kappa / (rho c_p)) with no bulk viscosity zeta, and
    # travels at c = sqrt(gamma p / rho) (up to O((nu k / c)^2) = 1e-4 here). With
    # kappa = mu c_p / Pr: rate = k^2 nu / 2 (4/3 + (gamma - 1) / Pr). Linearised about the
    # mean state, a power-law viscosity acts as its mean value.
    grid = Grid.regular((4, 32), TWO_PI, dims=("y", "x"))
    _, x = grid.mesh()
    T0, rho0, mode, eps = 300.0, 1.2, 2, 1e-6
    k = TWO_PI * mode / grid.lengths[1]
    c0 = IdealGas().sound_speed(T0)
    nu = 0.01 * c0 / k
    gas = IdealGas(viscosity=nu * rho0, temperature=T0, exponent=exponent)
    assert c0 == pytest.approx(np.sqrt(gas.gamma * rho0 * gas.gas_constant * T0 / rho0))
    p0 = rho0 * gas.gas_constant * T0
    wave = np.cos(k * x)
    eq = CompressibleEquations(grid, gas)
    # a right-running isentropic wave: rho' / rho0 = u' / c0 = p' / (gamma p0)
    q = eq.state(rho0 * (1 + eps * wave), {"u": eps * c0 * wave, "v": 0 * x},
                 p0 * (1 + gas.gamma * eps * wave))
    rate = 0.5 * k**2 * nu * (4.0 / 3.0 + (gas.gamma - 1) / gas.prandtl)
    duration, chunks = 0.5 / rate, 40
    phases = [0.0]
    for _ in range(chunks):
        q, _ = eq.advance(q, duration / chunks, 0.5)
        a = 2 * np.mean(eq.primitive(q)["u"] / (eps * c0) * np.exp(-1j * k * x))
        phases.append(np.angle(a))
    # a(t) = exp(-rate t) exp(-i c k t): about 17 periods, amplitude down to exp(-0.5)
    speed = -np.unwrap(phases)[-1] / (k * duration)
    assert speed == pytest.approx(c0, rel=1e-3)
    assert -np.log(abs(a)) / duration == pytest.approx(rate, rel=0.01)


def test_taylor_green_energy_at_mach_0_1_follows_the_incompressible_solver():
    # Taylor-Green vortex (Taylor & Green 1937; compressible set-up with the incompressible
    # pressure and uniform temperature as in DeBonis 2013, NASA TM-2013-217850, from memory):
    # at Mach 0.1 compressibility changes the kinetic energy by O(M^2) = 1e-2 at most, so the
    # history must follow closure's incompressible 3-D solver on the same grid within 1 %.
    n, T0, rho0 = 16, 300.0, 1.0
    grid = Grid.regular((n,) * 3, TWO_PI, dims=("z", "y", "x"))
    z, y, x = grid.mesh()
    U = 0.1 * IdealGas().sound_speed(T0)
    nu = U / 100.0  # Reynolds number U L / nu = 100 with L = 1 m
    gas = IdealGas(viscosity=nu * rho0, temperature=T0, exponent=0.0)
    u = U * np.sin(x) * np.cos(y) * np.cos(z)
    v = -U * np.cos(x) * np.sin(y) * np.cos(z)
    w = np.zeros_like(u)
    p = rho0 * gas.gas_constant * T0 + rho0 * U**2 / 16 * (np.cos(2 * x) + np.cos(2 * y)) * (
        np.cos(2 * z) + 2)
    eq = CompressibleEquations(grid, gas)
    q = eq.state(p / (gas.gas_constant * T0), {"u": u, "v": v, "w": w}, p)
    inc = NavierStokes3D(grid, nu)
    uh = inc.fourier.forward(np.stack([w, v, u]))
    history = []
    for _ in range(6):
        q, _ = eq.advance(q, 0.5 / U, 0.5)
        uh, _ = inc.advance(uh, 0.5 / U, 0.5)
        f = eq.primitive(q)
        compressible_ke = 0.5 * np.mean(f["rho"] * sum(f[c] ** 2 for c in "uvw")) / np.mean(
            f["rho"])
        history.append((compressible_ke, 0.5 * np.mean(np.sum(inc.fourier.backward(uh) ** 2,
                                                               axis=0))))
    history = np.array(history)
    assert history[-1, 1] < 0.85 * (U**2 / 8)  # it decays: mean KE starts at U^2 / 8
    np.testing.assert_allclose(history[:, 0], history[:, 1], rtol=0.01)


def test_dataset_layout_units_and_gas_constants():
    ds = compressible(n=16, dims=2, snapshots=2, mach=0.3, peak_wavenumber=2.0, seed=2)
    assert list(ds.data_vars) == ["rho", "u", "v", "p", "T"]
    assert ds["rho"].dims == ("time", "y", "x")
    units = {name: ds[name].attrs["units"] for name in ds.data_vars}
    assert units == {"rho": "kg m-3", "u": "m s-1", "v": "m s-1", "p": "Pa", "T": "K"}
    for key in ("gamma", "gas_constant", "prandtl", "viscosity_reference", "viscosity_exponent",
                "viscosity_law", "method", "mach"):
        assert key in ds.attrs
    assert ds.attrs["Conventions"] == "CF-1.8"
    # the equation of state holds in the file: p = rho R T
    np.testing.assert_allclose(ds["p"].values, ds["rho"].values * ds.attrs["gas_constant"]
                               * ds["T"].values, rtol=1e-12)
    # the initial turbulent Mach number is the one asked for
    c0 = np.sqrt(1.4 * 287.05 * 300.0)
    u2 = np.mean(ds["u"].values[0] ** 2 + ds["v"].values[0] ** 2)
    assert np.sqrt(u2) / c0 == pytest.approx(0.3, rel=1e-6)
    assert ds.attrs["max_relative_mass_change"] < 1e-13
    assert ds.attrs["max_relative_energy_change"] < 1e-13
    # the flow develops density fluctuations of order M^2
    assert 1e-3 < float(np.std(ds["rho"].values[1])) / 1.2 < 0.2


def test_forced_run_keeps_mass_and_injects_energy():
    ds = compressible(n=16, dims=2, snapshots=2, mach=0.2, peak_wavenumber=2.0,
                      forcing_rate=5.0, interval=0.002)
    assert ds.attrs["forcing"] == "linear"
    assert ds.attrs["max_relative_mass_change"] < 1e-13
    e = [np.mean(ds["p"].values[i] / 0.4 + 0.5 * ds["rho"].values[i]
                 * (ds["u"].values[i] ** 2 + ds["v"].values[i] ** 2)) for i in range(2)]
    assert e[1] > e[0]


def test_options_out_of_range_are_user_errors():
    with pytest.raises(UserError, match="--mach"):
        compressible(n=16, mach=1.5)
    with pytest.raises(UserError, match="--dims"):
        compressible(n=16, dims=1)
    with pytest.raises(UserError, match="--peak-wavenumber"):
        compressible(n=16, peak_wavenumber=6.0)
    with pytest.raises(UserError, match="--gamma"):
        compressible(n=16, peak_wavenumber=2.0, gamma=1.0)


def test_breakdown_says_what_to_change():
    with pytest.raises(UserError, match="lower --mach"):
        compressible(n=32, dims=2, mach=1.0, reynolds=1e6, snapshots=3, interval=0.05)


def test_cli_synth_compressible(tmp_path):
    out = tmp_path / "c.nc"
    assert main(["synth", "compressible", "-o", str(out), "--dims", "3", "--n", "16",
                 "--snapshots", "2", "--peak-wavenumber", "2", "--mach", "0.2", "-q"]) == 0
    with xr.open_dataset(out) as ds:
        assert list(ds.data_vars) == ["rho", "u", "v", "w", "p", "T"]
        assert ds["rho"].dims == ("time", "z", "y", "x")
        assert float(ds.attrs["gamma"]) == 1.4
    assert main(["synth", "compressible", "-o", str(tmp_path / "x.nc"), "--mach", "2"]) == 2


def test_mach_range_and_density_fluctuations_grow_like_mach_squared():
    # for near-incompressible turbulence the density fluctuation scales as M^2 (pressure
    # fluctuations ~ rho u'^2 and rho' ~ p' / c^2; common practice); from 0.1 to 0.6 that is
    # a factor 36: require more than 10
    rms = {}
    for mach in (0.1, 0.6):
        ds = compressible(n=16, dims=2, snapshots=2, mach=mach, peak_wavenumber=2.0, seed=4)
        u2 = np.mean(ds["u"].values[0] ** 2 + ds["v"].values[0] ** 2)
        assert np.sqrt(u2) / ds.attrs["sound_speed"] == pytest.approx(mach, rel=1e-9)
        assert all(np.all(np.isfinite(ds[n].values)) for n in ds.data_vars)
        rms[mach] = float(np.std(ds["rho"].values[1])) / 1.2
    assert rms[0.6] > 10 * rms[0.1]
