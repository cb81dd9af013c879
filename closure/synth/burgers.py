"""Viscous Burgers equation in 1-D, pseudo-spectral on a periodic line.

    d_t u + d_x (u^2 / 2) = nu d_xx u

The nonlinear flux is formed in physical space with the 2/3 rule applied to its transform; the
viscous term is integrated exactly (integrating-factor RK4, :func:`closure.spectral.ifrk4_step`).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from closure.errors import OptionError
from closure.grid import Grid
from closure.spectral import cfl_time_step, fourier, ifrk4_step, substeps
from closure.synth._common import (
    Progress,
    check_count,
    check_positive,
    make_dataset,
    no_progress,
)

SOLVER = "burgers"
INITIAL_KINDS = ("random", "cole-hopf")


class BurgersEquation:
    """Right-hand side pieces of the Burgers equation on a periodic 1-D ``grid``."""

    def __init__(self, grid: Grid, viscosity: float, dealias: bool = True):
        self.grid = grid
        self.fourier = fourier(grid)
        self.linear = -viscosity * self.fourier.k2
        self._mask = self.fourier.dealias if dealias else 1.0

    def tendency(self, uh: np.ndarray) -> np.ndarray:
        F = self.fourier
        u = F.backward(uh)
        return -0.5 * F.ik[0] * F.forward(u * u) * self._mask

    def step(self, uh: np.ndarray, dt: float) -> np.ndarray:
        return ifrk4_step(uh, dt, self.tendency, self.linear)


def initial_field(grid: Grid, kind: str, rng: np.random.Generator, amplitude: float,
                  modes: int, viscosity: float) -> np.ndarray:
    """The initial velocity (m s^-1).

    ``random``: modes 1..``modes`` with random phases and equal amplitudes, rms ``amplitude``.
    ``cole-hopf``: u = -2 nu phi_x / phi with phi = 1 + b cos(2 pi x / L), b chosen so that
    max |u| = ``amplitude`` when possible (b < 1), whose exact solution is known
    (Whitham 1974, section 4.1).
    """
    x = grid.coords("x")
    L = grid.lengths[0]
    if kind == "random":
        m = np.arange(1, modes + 1)
        phase = rng.uniform(0, 2 * np.pi, size=m.size)
        u = np.sum(np.cos(2 * np.pi * np.outer(x, m) / L + phase), axis=1)
        return u * amplitude / np.sqrt(np.mean(u**2))
    if kind == "cole-hopf":
        b = cole_hopf_b(amplitude, viscosity, L)
        k = 2 * np.pi / L
        return 2 * viscosity * b * k * np.sin(k * x) / (1 + b * np.cos(k * x))
    raise OptionError(f"unknown initial condition {kind!r}: choose one of "
                      f"{', '.join(INITIAL_KINDS)}")


def cole_hopf_b(amplitude: float, viscosity: float, length: float) -> float:
    """b in phi = 1 + b cos(k x): max |u| = 2 nu k b / sqrt(1 - b^2), capped at b = 0.9."""
    k = 2 * np.pi / length
    s = amplitude / (2 * viscosity * k) if viscosity > 0 else np.inf
    return float(min(0.9, s / np.sqrt(1 + s * s)))


def burgers(
    n: int = 2048,
    snapshots: int = 16,
    interval: float = 0.1,
    spinup: float = 0.0,
    viscosity: float = 0.01,
    seed: int = 0,
    initial: str = "random",
    amplitude: float = 1.0,
    modes: int = 8,
    length: float = 2 * np.pi,
    cfl: float = 0.5,
    dealias: bool = True,
    progress: Progress | None = None,
) -> xr.Dataset:
    """Decaying viscous Burgers turbulence on a periodic line of ``n`` points and length
    ``length`` (m); viscosity in m^2 s^-1, times in s. Returns a Dataset with ``u(time, x)``.
    """
    check_count("n", n, 8)
    check_count("snapshots", snapshots)
    check_count("modes", modes)
    check_positive("interval", interval)
    check_positive("spinup", spinup, allow_zero=True)
    check_positive("viscosity", viscosity, allow_zero=True)
    check_positive("amplitude", amplitude, allow_zero=True)
    check_positive("length", length)
    check_positive("cfl", cfl)
    if modes >= n // 3:
        raise OptionError(f"--modes {modes} is not resolved on {n} points: use fewer than "
                          f"{n // 3}")
    progress = progress or no_progress
    grid = Grid.regular((n,), length, dims=("x",), units="m")
    eq = BurgersEquation(grid, viscosity, dealias)
    F = eq.fourier
    u0 = initial_field(grid, initial, np.random.default_rng(seed), amplitude, modes, viscosity)
    uh = F.forward(u0) * (F.dealias if dealias else 1.0)

    def advance(uh, duration):
        u = F.backward(uh)
        count, dt = substeps(duration, cfl_time_step((u,), grid, cfl, max_step=duration))
        for _ in range(count):
            uh = eq.step(uh, dt)
        return uh, count

    steps = 0
    if spinup > 0:
        uh, steps = advance(uh, spinup)
    frames, times = [], []
    for j in range(snapshots):
        if j:
            uh, k = advance(uh, interval)
            steps += k
        frames.append(F.backward(uh))
        times.append(spinup + j * interval)
        progress("snapshots", j + 1, snapshots)
    attrs = {
        "title": "decaying viscous Burgers turbulence (closure demo data)",
        "solver": SOLVER,
        "method": "pseudo-spectral, 2/3-rule dealiasing, integrating-factor RK4"
                  if dealias else "pseudo-spectral, integrating-factor RK4 (no dealiasing)",
        "viscosity": float(viscosity),
        "drag": 0.0,
        "forcing": "none",
        "initial": initial,
        "amplitude": float(amplitude),
        "modes": int(modes),
        "seed": int(seed),
        "spinup": float(spinup),
        "interval": float(interval),
        "cfl": float(cfl),
        "dealias": bool(dealias),
        "steps": int(steps),
    }
    return make_dataset(grid, times, {"u": frames}, attrs)
