"""Forced incompressible 2-D turbulence in vorticity form (pseudo-spectral, periodic).

The equation, forcing and time stepping are :class:`closure.spectral.VorticityEquation`,
the same the a posteriori coarse solver (``closure.les``) uses. A run starts from a random
vorticity field whose energy spectrum peaks at the forcing wavenumber, spins up for
``spinup`` seconds and then stores ``snapshots`` frames ``interval`` seconds apart. Each output
interval is integrated in equal steps set by the CFL number at its start, so a run is
deterministic given its parameters and seed.
"""

from __future__ import annotations

import math
import time

import numpy as np
import xarray as xr

from closure.errors import OptionError
from closure.grid import Grid
from closure.spectral import (
    Forcing,
    VorticityEquation,
    fourier,
    mean_square_hat,
    random_field_hat,
)
from closure.synth._common import (
    Progress,
    check_count,
    check_positive,
    make_dataset,
    no_progress,
    run_cost,
)

SOLVER = "turb2d"


def equation_from_attrs(attrs: dict, grid: Grid, **overrides) -> VorticityEquation:
    """The vorticity equation of a run described by a file's global attributes (our own
    turb2d files), on ``grid``; keyword ``overrides`` replace parameters."""
    params = {
        "viscosity": float(attrs.get("viscosity", 0.0)),
        "drag": float(attrs.get("drag", 0.0)),
        "hyperviscosity_order": int(attrs.get("hyperviscosity_order", 1)),
        "forcing": Forcing.from_attrs(attrs),
        "dealias": str(attrs.get("dealias", "true")).lower() == "true",
    }
    params.update(overrides)
    return VorticityEquation(grid, **params)


def turb2d(
    n: int = 128,
    snapshots: int = 8,
    interval: float = 0.5,
    spinup: float = 5.0,
    viscosity: float = 1e-3,
    drag: float = 0.1,
    hyperviscosity_order: int = 1,
    forcing: str = "shell",
    forcing_wavenumber: float = 4.0,
    forcing_amplitude: float = 1.0,
    seed: int = 0,
    scalar: bool = False,
    scalar_gradient: float = 1.0,
    diffusivity: float | None = None,
    length: float = 2 * np.pi,
    cfl: float = 0.5,
    dealias: bool = True,
    initial_energy: float = 0.3,
    progress: Progress | None = None,
) -> xr.Dataset:
    """Run forced 2-D turbulence on an ``n`` x ``n`` periodic box of side ``length`` (m).

    Viscosity in m^2 s^-1 (m^(2p) s^-1 for hyperviscosity order ``p``), drag in s^-1, times
    in s. ``forcing`` is "shell" (steady, random phases in the shell around
    ``forcing_wavenumber``, seeded; amplitude = rms vorticity forcing, s^-2), "kolmogorov"
    (f_x = amplitude sin(k_f y), m s^-2) or "none". With ``scalar`` a passive scalar ``c`` is
    carried with the mean gradient ``scalar_gradient`` (along y, m^-1) and ``diffusivity``
    (default: the viscosity; Schmidt number 1), starting from zero.

    Returns a Dataset with u, v, vorticity[, c] of dims (time, y, x).
    """
    check_count("n", n, 8)
    check_count("snapshots", snapshots)
    check_positive("interval", interval)
    check_positive("spinup", spinup, allow_zero=True)
    check_positive("viscosity", viscosity, allow_zero=True)
    check_positive("drag", drag, allow_zero=True)
    check_positive("length", length)
    check_positive("cfl", cfl)
    check_positive("initial_energy", initial_energy, allow_zero=True)
    if not 0 < cfl <= 1.5:
        raise OptionError(f"--cfl must be in (0, 1.5] for the RK4 scheme, got {cfl}")
    if diffusivity is None:
        diffusivity = viscosity if viscosity > 0 and hyperviscosity_order == 1 else 1e-3
    check_positive("diffusivity", diffusivity, allow_zero=True)
    progress = progress or no_progress

    grid = Grid.regular((n, n), length, dims=("y", "x"), units="m")
    force = Forcing(forcing, forcing_wavenumber, forcing_amplitude, seed)
    eq = VorticityEquation(grid, viscosity=viscosity, drag=drag,
                           hyperviscosity_order=hyperviscosity_order, forcing=force,
                           dealias=dealias, scalar=scalar, diffusivity=diffusivity,
                           scalar_gradient=scalar_gradient)
    rng = np.random.default_rng(seed + 1)  # the forcing uses the seed itself
    q = initial_vorticity_state(eq, rng, forcing_wavenumber * 2 * np.pi / length,
                                initial_energy)

    chunks = _spinup_chunks(spinup, interval)
    start = time.perf_counter()
    total = len(chunks) + snapshots - 1
    steps = 0
    for i, chunk in enumerate(chunks):
        q, k = eq.advance(q, chunk, cfl)
        steps += k
        progress("spin-up", i + 1, total)
    times, frames = [], {name: [] for name in _names(scalar)}
    t = spinup
    for j in range(snapshots):
        if j:
            q, k = eq.advance(q, interval, cfl)
            steps += k
            t = spinup + j * interval
            progress("snapshots", len(chunks) + j, total)
        fields = eq.fields(q)
        times.append(t)
        for name in frames:
            frames[name].append(fields[name])
    wall = time.perf_counter() - start
    attrs = {
        "title": "forced 2-D turbulence (closure demo data)",
        "solver": SOLVER,
        "method": "pseudo-spectral, 2/3-rule dealiasing, integrating-factor RK4"
                  if dealias else "pseudo-spectral, integrating-factor RK4 (no dealiasing)",
        "viscosity": float(viscosity),
        "hyperviscosity_order": int(hyperviscosity_order),
        "drag": float(drag),
        **force.to_attrs(),
        "seed": int(seed),
        "spinup": float(spinup),
        "interval": float(interval),
        "cfl": float(cfl),
        "dealias": bool(dealias),
        "initial_energy": float(initial_energy),
        "steps": int(steps),
        **run_cost(wall, spinup + (snapshots - 1) * interval),
        "scalar": bool(scalar),
    }
    if scalar:
        attrs.update(scalar_gradient=float(scalar_gradient), diffusivity=float(diffusivity))
    return make_dataset(grid, times, frames, attrs)


def _names(scalar: bool) -> list[str]:
    return ["u", "v", "vorticity"] + (["c"] if scalar else [])


def _spinup_chunks(spinup: float, interval: float) -> list[float]:
    """Spin-up pieces no longer than ``interval``, the short one first, so that the stored
    snapshots start intervals of the same length as the coarse solver will take."""
    if spinup <= 0:
        return []
    whole = math.floor(spinup / interval * (1 + 1e-12))
    rest = spinup - whole * interval
    return ([rest] if rest > 1e-12 * interval else []) + [interval] * whole


def initial_vorticity_state(eq: VorticityEquation, rng: np.random.Generator, peak: float,
                            energy: float) -> np.ndarray:
    """Random vorticity with energy spectrum E(k) ~ k^4 exp(-2 (k/k_p)^2) (a common choice of
    initial spectrum; common practice) scaled to mean energy ``energy`` (m^2 s^-2); the scalar
    starts at zero."""
    grid = eq.grid
    F = fourier(grid)
    q = np.zeros((eq.n_fields,) + F.spectral_shape, dtype=complex)
    if energy <= 0:
        return q
    # for 2-D flow E_u(k) = k^2 E_psi(k): give the streamfunction the spectrum E(k) / k^2
    psi_hat = random_field_hat(
        grid, lambda k: k**2 * np.exp(-2.0 * (k / peak) ** 2), rng)[0]
    e_now = 0.5 * float(np.sum(mean_square_hat(psi_hat, grid) * F.k2))
    q[0] = F.k2 * psi_hat * np.sqrt(energy / e_now)
    return q
