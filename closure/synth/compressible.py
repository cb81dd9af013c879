"""Compressible isotropic turbulence of an ideal gas in a periodic box (pseudo-spectral), 2-D/3-D.

Equations (Navier-Stokes with heat conduction, conservative variables ``rho``, ``m_i = rho u_i``,
total energy per volume ``E = p / (gamma - 1) + rho u_i u_i / 2``):

    d_t rho + d_j m_j                                        = 0
    d_t m_i + d_j (m_i u_j + p delta_ij - sigma_ij)          = A m_i
    d_t E   + d_j ((E + p) u_j - sigma_ij u_i - k d_j T)     = A m_i u_i

    p = rho R T,   sigma_ij = mu (d_j u_i + d_i u_j - 2/3 delta_ij d_k u_k)   (no bulk viscosity)
    mu = mu_0 (T / T_0)^n    (power law; n = 0 is a constant viscosity)
    k = mu c_p / Pr          (heat conduction at a constant Prandtl number)

``A`` is an optional linear forcing rate (s^-1; Lundgren 2003 in the density-weighted form of
Petersen & Livescu 2010, from memory): 0 gives decaying turbulence. Forcing has no cooling, so a
forced run heats up.

Scheme: every term is in flux form, the fluxes are formed in physical space from the
conservative variables and differentiated spectrally (``closure.spectral.Fourier``); the
tendency is multiplied by the 2/3-rule mask (Orszag 1971) and the state advanced by classical
fourth-order Runge-Kutta. Because the zero-wavenumber component of a spectral derivative is
exactly zero, the domain means of ``rho``, ``m_i`` and ``E`` are conserved to round-off (exactly
without forcing). The quotients ``u = m / rho`` and the power-law viscosity are not
polynomials, so the 2/3 rule reduces their aliasing but does not remove it. There is no shock
capturing: the solver is meant for turbulent Mach numbers up to about 0.6 with enough
viscosity; a run that develops negative density or pressure stops with a clear message.

Each output interval is integrated in equal steps, set at its start by the acoustic CFL number
``dt max(sum_j (|u_j| + c) / h_j) = cfl`` and the viscous limit of RK4.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import xarray as xr

from closure.errors import OptionError, UserError
from closure.grid import VELOCITY_OF, Grid
from closure.spectral import StepCollapse, fourier, random_field_hat, substeps
from closure.synth._common import (
    Progress,
    check_count,
    check_positive,
    make_dataset,
    no_progress,
)

SOLVER = "compressible"

#: CF attributes of the thermodynamic output variables.
THERMO_ATTRS = {
    "rho": {"long_name": "density", "standard_name": "air_density", "units": "kg m-3"},
    "p": {"long_name": "pressure", "standard_name": "air_pressure", "units": "Pa"},
    "T": {"long_name": "temperature", "standard_name": "air_temperature", "units": "K"},
}

# RK4's stability interval on the negative real axis is [-2.785, 0]; keep a margin.
_RK4_REAL_LIMIT = 2.0


@dataclass(frozen=True)
class IdealGas:
    """A calorically perfect gas: ratio of specific heats, gas constant (J kg^-1 K^-1),
    Prandtl number, and the power-law viscosity ``mu = viscosity (T / temperature)^exponent``
    (Pa s; exponent 0: constant)."""

    gamma: float = 1.4
    gas_constant: float = 287.05
    prandtl: float = 0.72
    viscosity: float = 1.8e-5
    temperature: float = 300.0
    exponent: float = 0.76

    def __post_init__(self):
        if not (np.isfinite(self.gamma) and self.gamma > 1):
            raise OptionError(f"--gamma must be > 1, got {self.gamma!r}")
        for name in ("gas_constant", "prandtl", "temperature"):
            check_positive(name, getattr(self, name))
        check_positive("viscosity", self.viscosity, allow_zero=True)
        if not np.isfinite(self.exponent):
            raise OptionError(f"--viscosity-exponent must be finite, got {self.exponent!r}")

    @property
    def cp(self) -> float:
        """Specific heat at constant pressure (J kg^-1 K^-1)."""
        return self.gamma * self.gas_constant / (self.gamma - 1.0)

    @property
    def cv(self) -> float:
        """Specific heat at constant volume (J kg^-1 K^-1)."""
        return self.gas_constant / (self.gamma - 1.0)

    def dynamic_viscosity(self, T: np.ndarray) -> np.ndarray | float:
        if self.exponent == 0:
            return self.viscosity
        return self.viscosity * (T / self.temperature) ** self.exponent

    def sound_speed(self, T: float) -> float:
        return math.sqrt(self.gamma * self.gas_constant * T)

    def to_attrs(self) -> dict:
        return {
            "gamma": float(self.gamma),
            "gas_constant": float(self.gas_constant),
            "gas_constant_units": "J kg-1 K-1",
            "specific_heat_pressure": self.cp,
            "specific_heat_volume": self.cv,
            "prandtl": float(self.prandtl),
            "viscosity_law": "power law mu = viscosity_reference * (T / "
                             "viscosity_reference_temperature) ** viscosity_exponent",
            "viscosity_reference": float(self.viscosity),
            "viscosity_reference_units": "Pa s",
            "viscosity_reference_temperature": float(self.temperature),
            "viscosity_exponent": float(self.exponent),
            "bulk_viscosity": 0.0,
            "heat_conduction": "Fourier law, conductivity mu * specific_heat_pressure / prandtl",
        }


class CompressibleEquations:
    """The compressible Navier-Stokes right-hand side on a periodic grid.

    The state is the spectral stack ``[rho, m_1 .. m_d, E]`` (rfftn layout, leading axis),
    momentum components in ``grid.dims`` order.
    """

    def __init__(self, grid: Grid, gas: IdealGas, forcing_rate: float = 0.0,
                 dealias: bool = True):
        if grid.ndim not in (2, 3) or grid.dims != ("z", "y", "x")[3 - grid.ndim:]:
            raise OptionError(f"the compressible solver needs a (y, x) or (z, y, x) grid, got "
                              f"{grid.dims}")
        self.grid = grid
        self.gas = gas
        self.forcing_rate = float(forcing_rate)
        self.fourier = fourier(grid)
        self._mask = self.fourier.dealias if dealias else np.ones(self.fourier.spectral_shape)

    @property
    def ndim(self) -> int:
        return self.grid.ndim

    def state(self, rho: np.ndarray, velocity: dict[str, np.ndarray],
              p: np.ndarray) -> np.ndarray:
        """Spectral state from density (kg m^-3), velocity ``{u, v[, w]}`` (m s^-1) and pressure
        (Pa), 2/3 rule applied."""
        rho = np.asarray(rho, dtype=float)
        vel = [np.asarray(velocity[VELOCITY_OF[d]], dtype=float) for d in self.grid.dims]
        energy = np.asarray(p, dtype=float) / (self.gas.gamma - 1.0) \
            + 0.5 * rho * sum(c * c for c in vel)
        real = np.stack([rho, *(rho * c for c in vel), energy])
        return self.fourier.forward(real) * self._mask

    def primitive(self, q: np.ndarray) -> dict[str, np.ndarray]:
        """Real fields ``rho, u, v[, w], p, T`` (and ``E``) of a state."""
        real = self.fourier.backward(q)
        return self._primitive(real)

    def _primitive(self, real: np.ndarray) -> dict[str, np.ndarray]:
        g = self.gas
        rho, E = real[0], real[-1]
        out = {"rho": rho}
        kinetic = 0.0
        for a, d in enumerate(self.grid.dims):
            u = real[1 + a] / rho
            out[VELOCITY_OF[d]] = u
            kinetic = kinetic + 0.5 * real[1 + a] * u
        out["p"] = (g.gamma - 1.0) * (E - kinetic)
        out["T"] = out["p"] / (rho * g.gas_constant)
        out["E"] = E
        return out

    def tendency(self, q: np.ndarray) -> np.ndarray:
        """d_t of the spectral state (fluxes in physical space, spectral divergence, 2/3 rule)."""
        F, g, d = self.fourier, self.gas, self.ndim
        dims = self.grid.dims
        real = F.backward(q)
        f = self._primitive(real)
        m = real[1:1 + d]
        u = np.stack([f[VELOCITY_OF[x]] for x in dims])
        p, T, E = f["p"], f["T"], real[-1]
        # gradients of u_a and T along each direction b: grad[b][a] (a = d is T)
        uT_hat = F.forward(np.concatenate([u, T[None]]))
        grad = F.backward(np.stack([ik * uT_hat for ik in F.ik]))
        mu = g.dynamic_viscosity(T)
        conductivity = mu * g.cp / g.prandtl
        dilatation = sum(grad[a][a] for a in range(d))
        # fluxes[b]: the flux along direction b of [m_1 .. m_d, E]; the mass flux is m itself
        fluxes = np.empty((d, d + 1) + self.grid.shape)
        for b in range(d):
            work = 0.0
            for a in range(d):
                sigma = mu * (grad[b][a] + grad[a][b])
                if a == b:
                    sigma = sigma - (2.0 / 3.0) * mu * dilatation
                fluxes[b, a] = m[a] * u[b] - sigma + (p if a == b else 0.0)
                work = work + sigma * u[a]
            fluxes[b, d] = (E + p) * u[b] - work - conductivity * grad[b][d]
        flux_hat = F.forward(fluxes)
        out = np.empty_like(q)
        out[0] = -sum(F.ik[b] * q[1 + b] for b in range(d))
        out[1:] = -sum(F.ik[b] * flux_hat[b] for b in range(d))
        if self.forcing_rate:
            source = np.concatenate([m, sum(m[a] * u[a] for a in range(d))[None]])
            out[1:] += self.forcing_rate * F.forward(source)
        out *= self._mask
        return out

    def step(self, q: np.ndarray, dt: float) -> np.ndarray:
        """One classical RK4 step of length ``dt`` (s)."""
        k1 = self.tendency(q)
        k2 = self.tendency(q + 0.5 * dt * k1)
        k3 = self.tendency(q + 0.5 * dt * k2)
        k4 = self.tendency(q + dt * k3)
        return q + (dt / 6.0) * (k1 + 2.0 * (k2 + k3) + k4)

    def time_step(self, q: np.ndarray, cfl: float, max_step: float = math.inf) -> float:
        """The acoustic CFL step, capped by RK4's viscous stability limit and ``max_step``."""
        g = self.gas
        f = self.primitive(q)
        check_physical(f)
        c = np.sqrt(g.gamma * f["p"] / f["rho"])
        rate = sum((np.abs(f[VELOCITY_OF[x]]) + c) / h
                   for x, h in zip(self.grid.dims, self.grid.spacing, strict=True))
        dt = min(max_step, cfl / float(np.max(rate)))
        nu = float(np.max(g.dynamic_viscosity(f["T"]) / f["rho"]))
        diffusive = nu * max(4.0 / 3.0, g.gamma / g.prandtl)
        if diffusive > 0:
            k2 = sum((np.pi / h) ** 2 for h in self.grid.spacing)
            dt = min(dt, _RK4_REAL_LIMIT / (diffusive * k2))
        return dt

    def advance(self, q: np.ndarray, duration: float, cfl: float) -> tuple[np.ndarray, int]:
        """Integrate ``duration`` seconds in equal steps set at the start; (state, steps)."""
        n, dt = substeps(duration, self.time_step(q, cfl, duration))
        # a state breaking down (negative T) is caught by check_physical below, not by warnings
        with np.errstate(invalid="ignore", over="ignore"):
            for _ in range(n):
                q = self.step(q, dt)
        check_physical(self.primitive(q))
        return q, n

    def totals(self, q: np.ndarray) -> dict[str, np.ndarray]:
        """Domain means of the conserved variables: ``mass`` (kg m^-3), ``momentum`` (kg m^-2
        s^-1, one per direction in ``grid.dims`` order), ``energy`` (J m^-3)."""
        mean = self.fourier.backward(q).mean(axis=tuple(range(1, 1 + self.ndim)))
        return {"mass": mean[0], "momentum": mean[1:-1], "energy": mean[-1]}


def check_physical(fields: dict[str, np.ndarray]) -> None:
    """Raise StepCollapse if density or pressure is not positive and finite everywhere."""
    for name in ("rho", "p"):
        a = fields[name]
        if not np.all(np.isfinite(a)) or float(np.min(a)) <= 0:
            raise StepCollapse(f"the {'density' if name == 'rho' else 'pressure'} became "
                               "negative or not finite")


def initial_velocity(grid: Grid, rng: np.random.Generator, peak: float,
                     rms: float) -> dict[str, np.ndarray]:
    """Random solenoidal velocity with E(k) ~ k^4 exp(-2 (k/k_p)^2) (common practice), scaled
    so that sqrt(<u_i u_i>) = ``rms`` (m s^-1)."""
    F = fourier(grid)
    uh = random_field_hat(grid, lambda k: k**4 * np.exp(-2.0 * (k / peak) ** 2), rng,
                          components=grid.ndim, solenoidal=True)
    vel = F.backward(uh)
    now = math.sqrt(float(sum(np.mean(c * c) for c in vel)))
    vel = vel * (rms / now if now > 0 else 0.0)
    return {VELOCITY_OF[d]: vel[a] for a, d in enumerate(grid.dims)}


def compressible(
    n: int = 64,
    dims: int = 2,
    snapshots: int = 4,
    interval: float | None = None,
    spinup: float = 0.0,
    mach: float = 0.3,
    reynolds: float = 100.0,
    viscosity: float | None = None,
    viscosity_exponent: float = 0.76,
    temperature: float = 300.0,
    density: float = 1.2,
    gamma: float = 1.4,
    gas_constant: float = 287.05,
    prandtl: float = 0.72,
    peak_wavenumber: float = 3.0,
    forcing_rate: float = 0.0,
    seed: int = 0,
    length: float = 2 * np.pi,
    cfl: float = 0.5,
    dealias: bool = True,
    progress: Progress | None = None,
) -> xr.Dataset:
    """Decaying (or, with ``forcing_rate`` > 0, linearly forced) compressible turbulence on an
    ``n``^dims periodic box of side ``length`` (m).

    The gas starts at rest thermodynamically (uniform ``density`` kg m^-3 and ``temperature``
    K) with a random solenoidal velocity of turbulent Mach number ``mach`` =
    sqrt(<u_i u_i>) / c_0, c_0 = sqrt(gamma R T_0). ``viscosity`` is the kinematic viscosity
    at the mean state (m^2 s^-1); by default it follows from ``reynolds`` = u' L_0 / nu with
    u' = sqrt(<u_i u_i> / dims) and L_0 = length / (2 pi). ``interval`` and ``spinup`` are in
    s; ``interval`` defaults to half the eddy time L_0 / u'. Returns a Dataset with rho, u,
    v[, w], p, T of dims (time, [z,] y, x) and the gas constants as attributes.
    """
    check_count("n", n, 8)
    if dims not in (2, 3):
        raise OptionError(f"--dims must be 2 or 3, got {dims!r}")
    check_count("snapshots", snapshots)
    check_positive("spinup", spinup, allow_zero=True)
    check_positive("length", length)
    check_positive("peak_wavenumber", peak_wavenumber)
    check_positive("forcing_rate", forcing_rate, allow_zero=True)
    check_positive("density", density)
    check_positive("reynolds", reynolds)
    if not (np.isfinite(mach) and 0 < mach <= 1.0):
        raise OptionError(f"--mach must be in (0, 1] (the solver has no shock capturing; "
                          f"about 0.1 to 0.6 is its range), got {mach!r}")
    if not 0 < cfl <= 1.5:
        raise OptionError(f"--cfl must be in (0, 1.5] for the RK4 scheme, got {cfl}")
    if peak_wavenumber >= n / 3:
        raise OptionError(f"--peak-wavenumber {peak_wavenumber:g} is beyond what a {n}-point "
                          f"grid resolves after dealiasing: use less than {n / 3:g} or a "
                          "larger --n")
    progress = progress or no_progress

    c0 = math.sqrt(gamma * gas_constant * temperature) if gamma > 0 and gas_constant > 0 \
        and temperature > 0 else float("nan")
    rms = mach * c0
    u_prime = rms / math.sqrt(dims)
    scale = length / (2 * np.pi)
    if viscosity is None:
        viscosity = u_prime * scale / reynolds
    check_positive("viscosity", viscosity)
    if interval is None:
        interval = 0.5 * scale / u_prime
    check_positive("interval", interval)
    gas = IdealGas(gamma, gas_constant, prandtl, viscosity * density, temperature,
                   viscosity_exponent)

    grid = Grid.regular((n,) * dims, length, dims=("z", "y", "x")[3 - dims:], units="m")
    eq = CompressibleEquations(grid, gas, forcing_rate, dealias)
    vel = initial_velocity(grid, np.random.default_rng(seed),
                           peak_wavenumber * 2 * np.pi / length, rms)
    rho0 = np.full(grid.shape, float(density))
    q = eq.state(rho0, vel, rho0 * gas_constant * temperature)
    start = eq.totals(q)

    names = ["rho", *(VELOCITY_OF[d] for d in ("x", "y", "z")[:dims]), "p", "T"]
    frames = {name: [] for name in names}
    times, steps = [], 0
    drift = {"mass": 0.0, "momentum": 0.0, "energy": 0.0}
    try:
        if spinup > 0:
            q, steps = eq.advance(q, spinup, cfl)
        for j in range(snapshots):
            if j:
                q, k = eq.advance(q, interval, cfl)
                steps += k
            f = eq.primitive(q)
            for name in names:
                frames[name].append(f[name])
            times.append(spinup + j * interval)
            now = eq.totals(q)
            drift["mass"] = max(drift["mass"], abs(now["mass"] - start["mass"]) / start["mass"])
            drift["energy"] = max(drift["energy"],
                                  abs(now["energy"] - start["energy"]) / start["energy"])
            drift["momentum"] = max(drift["momentum"], float(np.max(np.abs(now["momentum"]))))
            progress("snapshots", j + 1, snapshots)
    except StepCollapse as exc:
        raise UserError(f"the compressible run broke down ({exc}): the solver has no shock "
                        "capturing; lower --mach, raise --viscosity (or lower --reynolds), or "
                        "raise --n") from None

    attrs = {
        "title": f"decaying compressible {dims}-D turbulence (closure demo data)"
                 if not forcing_rate else
                 f"linearly forced compressible {dims}-D turbulence (closure demo data)",
        "solver": SOLVER,
        "method": "pseudo-spectral Navier-Stokes in conservative variables (rho, rho u_i, E), "
                  "fluxes in physical space, spectral derivatives, 2/3-rule dealiasing of "
                  "every tendency, classical RK4 (acoustic CFL)",
        **gas.to_attrs(),
        "mach": float(mach),
        "mach_definition": "turbulent Mach number sqrt(<u_i u_i>) / c_0 of the initial field",
        "mean_density": float(density),
        "mean_temperature": float(temperature),
        "mean_pressure": float(density * gas_constant * temperature),
        "sound_speed": float(c0),
        "viscosity": float(viscosity),
        "viscosity_note": "kinematic viscosity at the mean state (m2 s-1)",
        "reynolds": float(u_prime * scale / viscosity),
        "forcing": "linear" if forcing_rate else "none",
        "forcing_rate": float(forcing_rate),
        "peak_wavenumber": float(peak_wavenumber),
        "seed": int(seed),
        "spinup": float(spinup),
        "interval": float(interval),
        "cfl": float(cfl),
        "dealias": bool(dealias),
        "steps": int(steps),
        "max_relative_mass_change": float(drift["mass"]),
        "max_relative_energy_change": float(drift["energy"]),
        "max_mean_momentum": float(drift["momentum"]),
    }
    velocity_names = [VELOCITY_OF[d] for d in ("x", "y", "z")[:dims]]
    ds = make_dataset(grid, times, {k: frames[k] for k in velocity_names}, attrs)
    axes = ("time",) + grid.dims
    for name in ("rho", "p", "T"):
        ds[name] = (axes, np.stack(frames[name]).astype(np.float64), THERMO_ATTRS[name])
    return ds[names]
