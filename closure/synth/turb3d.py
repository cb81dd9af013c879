"""Decaying incompressible 3-D turbulence in a periodic box (pseudo-spectral).

    d_t u = P[u x omega] + nu lap u,      omega = curl u

in rotational form, where P is the Leray projection onto divergence-free fields (it removes the
gradient of the total pressure p + |u|^2/2). The cross product is formed in physical space with
the 2/3 rule applied, the projection is applied at every Runge-Kutta stage, and the viscous term
goes into the integrating factor, so the spectral velocity stays solenoidal to round-off.
"""

from __future__ import annotations

import math
import time

import numpy as np
import xarray as xr

from closure.errors import OptionError
from closure.grid import Grid
from closure.spectral import (
    cfl_time_step,
    divergence_hat_norm,
    fourier,
    ifrk4_step,
    project_hat,
    random_field_hat,
    substeps,
)
from closure.synth._common import (
    Progress,
    check_count,
    check_positive,
    make_dataset,
    no_progress,
    run_cost,
)

SOLVER = "turb3d"


class NavierStokes3D:
    """The rotational-form Navier-Stokes right-hand side on a periodic (z, y, x) grid.

    The state is the spectral velocity, shape ``(3,) + spectral_shape``, components in
    ``grid.dims`` order (w, v, u).
    """

    def __init__(self, grid: Grid, viscosity: float, dealias: bool = True):
        if grid.dims != ("z", "y", "x"):
            raise OptionError(f"the 3-D solver needs a (z, y, x) grid, got {grid.dims}")
        self.grid = grid
        self.fourier = fourier(grid)
        self.linear = -viscosity * self.fourier.k2
        self._mask = self.fourier.dealias if dealias else np.ones(self.fourier.spectral_shape)
        self._mask_complex = self._mask.astype(complex)  # same products, no mixed-type loop

    def vorticity_hat(self, uh: np.ndarray) -> np.ndarray:
        """Spectral curl, components in (z, y, x) order."""
        dz, dy, dx = self.fourier.ik
        w, v, u = uh
        return np.stack([dx * v - dy * u,     # omega_z
                         dz * u - dx * w,     # omega_y
                         dy * w - dz * v])    # omega_x

    def tendency(self, uh: np.ndarray) -> np.ndarray:
        F = self.fourier
        # velocity and vorticity spectra written into one stack (no concatenated copies); the
        # operations are those of vorticity_hat, so the bits are too
        both = np.empty((6,) + uh.shape[1:], np.result_type(uh, 1j))
        both[:3] = uh
        dz, dy, dx = F.ik
        w, v, u = uh
        for out, (a, f, b, g) in zip(both[3:], ((dx, v, dy, u), (dz, u, dx, w), (dy, w, dz, v)),
                                     strict=True):
            np.multiply(a, f, out=out)
            out -= b * g
        real = F.backward(both)
        del both
        (w, v, u), (oz, oy, ox) = real[:3], real[3:]
        cross = np.empty((3,) + real.shape[1:])
        for out, (a, f, b, g) in zip(cross, ((u, oy, v, ox),     # (u x omega)_z
                                             (w, ox, u, oz),     # (u x omega)_y
                                             (v, oz, w, oy)),    # (u x omega)_x
                                     strict=True):
            np.multiply(a, f, out=out)
            out -= b * g
        del real
        h = F.forward(cross)
        h *= self._mask_complex
        return project_hat(h, self.grid)

    def step(self, uh: np.ndarray, dt: float) -> np.ndarray:
        return ifrk4_step(uh, dt, self.tendency, self.linear)

    def advance(self, uh: np.ndarray, duration: float, cfl: float) -> tuple[np.ndarray, int]:
        velocity = self.fourier.backward(uh)
        n, dt = substeps(duration, cfl_time_step(tuple(velocity), self.grid, cfl, duration))
        for _ in range(n):
            uh = self.step(uh, dt)
        return uh, n


def initial_velocity_hat(grid: Grid, rng: np.random.Generator, peak: float,
                         energy: float) -> np.ndarray:
    """Random solenoidal velocity with E(k) ~ k^4 exp(-2 (k/k_p)^2) (common practice) and
    mean kinetic energy ``energy`` (m^2 s^-2)."""
    F = fourier(grid)
    uh = random_field_hat(grid, lambda k: k**4 * np.exp(-2.0 * (k / peak) ** 2), rng,
                          components=3, solenoidal=True)
    e_now = 0.5 * float(sum(np.sum(F.half_weights * np.abs(c) ** 2) for c in uh)) / F.size**2
    return uh * math.sqrt(energy / e_now) if e_now > 0 else uh


def turb3d(
    n: int = 64,
    snapshots: int = 4,
    interval: float = 0.25,
    spinup: float = 0.0,
    viscosity: float = 0.02,
    peak_wavenumber: float = 3.0,
    initial_energy: float = 0.5,
    seed: int = 0,
    length: float = 2 * np.pi,
    cfl: float = 0.5,
    dealias: bool = True,
    progress: Progress | None = None,
) -> xr.Dataset:
    """Decaying 3-D turbulence on an ``n``^3 periodic box of side ``length`` (m); viscosity in
    m^2 s^-1, times in s, the initial spectrum peaking at ``peak_wavenumber`` (mode number).
    Returns a Dataset with u, v, w of dims (time, z, y, x)."""
    check_count("n", n, 8)
    check_count("snapshots", snapshots)
    check_positive("interval", interval)
    check_positive("spinup", spinup, allow_zero=True)
    check_positive("viscosity", viscosity, allow_zero=True)
    check_positive("peak_wavenumber", peak_wavenumber)
    check_positive("initial_energy", initial_energy, allow_zero=True)
    check_positive("length", length)
    check_positive("cfl", cfl)
    progress = progress or no_progress
    grid = Grid.regular((n, n, n), length, dims=("z", "y", "x"), units="m")
    eq = NavierStokes3D(grid, viscosity, dealias)
    uh = initial_velocity_hat(grid, np.random.default_rng(seed),
                              peak_wavenumber * 2 * np.pi / length, initial_energy)
    steps = 0
    start = time.perf_counter()
    if spinup > 0:
        uh, steps = eq.advance(uh, spinup, cfl)
    frames = {"u": [], "v": [], "w": []}
    times = []
    divergence = 0.0
    for j in range(snapshots):
        if j:
            uh, k = eq.advance(uh, interval, cfl)
            steps += k
        divergence = max(divergence, divergence_hat_norm(uh, grid))
        w, v, u = eq.fourier.backward(uh)
        for name, f in (("u", u), ("v", v), ("w", w)):
            frames[name].append(f)
        times.append(spinup + j * interval)
        progress("snapshots", j + 1, snapshots)
    wall = time.perf_counter() - start
    attrs = {
        "title": "decaying 3-D turbulence (closure demo data)",
        "solver": SOLVER,
        "method": "pseudo-spectral, rotational form, 2/3-rule dealiasing, Leray projection "
                  "at every stage, integrating-factor RK4",
        "viscosity": float(viscosity),
        "drag": 0.0,
        "forcing": "none",
        "peak_wavenumber": float(peak_wavenumber),
        "initial_energy": float(initial_energy),
        "seed": int(seed),
        "spinup": float(spinup),
        "interval": float(interval),
        "cfl": float(cfl),
        "dealias": bool(dealias),
        "steps": int(steps),
        **run_cost(wall, spinup + (snapshots - 1) * interval),
        "max_relative_divergence": float(divergence),
    }
    return make_dataset(grid, times, frames, attrs)
