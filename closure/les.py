"""A posteriori testing: 2-D and 3-D coarse solvers that run a closure from filtered-DNS fields.

In 3-D the coarse solver is :class:`closure.les3d.LESEquation3D` (the ``turb3d`` operators
plus forcing, drag, hyper/hypoviscosity) and a stress or force closure enters the momentum
equation as ``-d_j tau_ij`` (or ``-force_i``), projected. In 2-D the coarse solver is
:class:`closure.spectral.VorticityEquation` (the same equation, 2/3-rule dealiasing,
integrating-factor RK4 and forcing as the ``turb2d`` generator) with the closure as its
explicit subgrid term. Following DEVELOPERS.md, the filtered vorticity equation reads

    d_t omega + u . grad omega = ... - vorticity_forcing

so a model of target ``vorticity`` enters as ``-vorticity_forcing``, a ``force`` model as
``-(d_x force_y - d_y force_x)`` and a ``stress`` model as ``-curl(div tau)`` with
``force_i = d_j tau_ij`` (derivatives spectral on the coarse grid).

Baselines (all ``stress`` models with filter width ``D``, spectral derivatives):

- Smagorinsky: ``tau_ij^dev = -2 (C_s D)^2 |S| S_ij``, ``|S| = sqrt(2 S_ij S_ij)``
  (Smagorinsky 1963).
- dynamic Smagorinsky: ``C = (C_s)^2`` from the Germano identity (Germano et al. 1991) with
  Lilly's least-squares average over the domain (Lilly 1992): ``C = <L_ij M_ij> / <M_ij M_ij>``,
  ``L_ij = hat(u_i u_j) - hat(u_i) hat(u_j)``, ``M_ij = 2 D^2 (hat(|S| S_ij) - a^2 |hat S|
  hat(S)_ij)``, test-to-grid width ratio ``a = 2``; negative ``C`` is clipped to 0 (common
  practice). The test filter is a Gaussian on the coarse grid of width ``sqrt(a^2 - 1) D``, so
  that the grid and test Gaussians compose to width ``a D``.
- gradient model: ``tau_ij = (D^2 / 12) d_k u_i d_k u_j`` (Clark et al. 1979), and the same
  with backscatter clipped: where the local transfer ``-tau_ij S_ij`` is negative, tau is 0.

A run stops and reports (instead of raising) when the kinetic energy exceeds ``energy_bound``
times its initial value, a value turns non-finite, or the CFL step collapses. Metrics compare a
run with the filtered DNS at the same times, both on the modes the coarse solver carries.

Long runs (``long_duration``) continue far past the reference and compare, after a spin-up,
time-averaged statistics (closure.longrun: spectrum per octave band, vorticity PDF with its
tails, mean energy and enstrophy, resolved transfer spectrum) with those of every filtered-DNS
snapshot, and say whether the run stayed stable; statistics are accumulated on the fly. When
the input file does not state its physics (files not made by closure), what is assumed is
listed loudly in ``settings`` and the comparison is qualitative.

A priori skill does not guarantee a stable or accurate coarse simulation; these runs are that
check, on this flow only. Validate a posteriori on your own flows before relying on a model.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from closure.errors import OptionError, UserError
from closure.grid import VELOCITY_OF, Grid
from closure.library import component_keys
from closure.longrun import band_energies_of_spectrum, hellinger, octave_bands
from closure.spectral import (
    Forcing,
    StepCollapse,
    VorticityEquation,
    cfl_time_step,
    energy_spectrum,
    enstrophy,
    fourier,
    kinetic_energy,
    vorticity_from_velocity,
)

BASELINES = ("none", "smagorinsky", "dynamic", "gradient", "gradient-clipped")
#: Smagorinsky constant for the fixed-coefficient baseline (Lilly 1967's estimate for 3-D
#: inertial-range turbulence, about 0.17; from memory).
SMAGORINSKY_CONSTANT = 0.17
REFERENCE = "reference"
#: bands holding less than this fraction of the reference energy get no relative error
BAND_FLOOR = 1e-10
SubgridTerm = Callable[[dict[str, np.ndarray]], np.ndarray]


# --- baseline closures ----------------------------------------------------------------------


def velocity_names(grid: Grid) -> list[str]:
    """Velocity component names in direction order x, y[, z]: ["u", "v"] or ["u", "v", "w"]."""
    return [VELOCITY_OF[d] for d in ("x", "y", "z") if d in grid.dims]


def _directions(grid: Grid) -> list[str]:
    return [d for d in ("x", "y", "z") if d in grid.dims]


def _check_fields(fields: Mapping[str, np.ndarray], grid: Grid) -> None:
    if grid.dims not in (("y", "x"), ("z", "y", "x")):
        raise UserError(f"the coarse solver runs 2-D (y, x) or 3-D (z, y, x) flows, not "
                        f"{grid.dims}")
    for name in velocity_names(grid):
        if name not in fields:
            raise UserError(f"the closure needs the field {name!r}")


def velocity_gradient(fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
    """``{"ij": d_j u_i}`` for directions i, j in x, y[, z] (e.g. "xy" is d_y u), spectrally."""
    F = fourier(grid)
    dirs = _directions(grid)
    uh = F.forward(np.stack([np.asarray(fields[n], dtype=float) for n in velocity_names(grid)]))
    stack = [F.ik_of(j) * uh[a] for a in range(len(dirs)) for j in dirs]
    real = F.backward(np.stack(stack))
    keys = [i + j for i in dirs for j in dirs]
    return dict(zip(keys, real, strict=True))


def _stress_keys(grid: Grid) -> list[str]:
    """Stress component keys in the library's order (xx, xy, yy[, xz, yz, zz])."""
    return component_keys("stress", grid.dims)


def strain_rate(g: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
    """``{"ij": S_ij}`` on the stress keys, S_ij = (d_j u_i + d_i u_j) / 2."""
    return {k: 0.5 * (g[k] + g[k[::-1]]) for k in _stress_keys(grid)}


def _weights(grid: Grid) -> dict[str, float]:
    """2 for off-diagonal keys (each stands for ij and ji), else 1."""
    return {k: (1.0 if k[0] == k[1] else 2.0) for k in _stress_keys(grid)}


def contract(a: Mapping[str, np.ndarray], b: Mapping[str, np.ndarray], grid: Grid) -> np.ndarray:
    """a_ij b_ij of two symmetric tensors given on the stress keys."""
    return sum(w * a[k] * b[k] for k, w in _weights(grid).items())


def strain_magnitude(s: Mapping[str, np.ndarray], grid: Grid) -> np.ndarray:
    """|S| = sqrt(2 S_ij S_ij)."""
    return np.sqrt(2.0 * contract(s, s, grid))


def _tau(tensor: Mapping[str, np.ndarray], scale) -> dict[str, np.ndarray]:
    return {f"tau_{k}": scale * a for k, a in tensor.items()}


class Smagorinsky:
    """tau_ij^dev = -2 (C_s D)^2 |S| S_ij; ``delta`` is the filter width D (m)."""

    target = "stress"

    def __init__(self, delta: float, constant: float = SMAGORINSKY_CONSTANT):
        if not (delta > 0 and constant >= 0):
            raise OptionError("the Smagorinsky constant must be >= 0 and the width > 0")
        self.delta = float(delta)
        self.constant = float(constant)

    def evaluate(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        _check_fields(fields, grid)
        s = strain_rate(velocity_gradient(fields, grid), grid)
        nu_t = (self.constant * self.delta) ** 2 * strain_magnitude(s, grid)
        return _tau(s, -2 * nu_t)


class DynamicSmagorinsky:
    """Smagorinsky with C = C_s^2 from the Germano identity, Lilly's domain least squares.

    ``last_constant`` is the C of the latest evaluation (before clipping); ``test_ratio`` is
    the test-to-grid filter width ratio.
    """

    target = "stress"

    def __init__(self, delta: float, test_ratio: float = 2.0):
        if not (delta > 0 and test_ratio > 1):
            raise OptionError("the dynamic model needs a width > 0 and a test ratio > 1")
        self.delta = float(delta)
        self.test_ratio = float(test_ratio)
        self.last_constant: float | None = None

    def test_filter(self, f: np.ndarray, grid: Grid) -> np.ndarray:
        """Gaussian of width sqrt(a^2 - 1) D on the coarse grid (trailing axes)."""
        F = fourier(grid)
        width = math.sqrt(self.test_ratio**2 - 1.0) * self.delta
        return F.backward(F.forward(f) * np.exp(-F.k2 * width**2 / 24.0))

    def constant(self, fields: Mapping[str, np.ndarray], grid: Grid) -> float:
        """Lilly's least-squares C = <L_ij M_ij> / <M_ij M_ij> (unclipped)."""
        _check_fields(fields, grid)
        names = velocity_names(grid)
        dirs = _directions(grid)
        vel = {d: np.asarray(fields[n], dtype=float) for d, n in zip(dirs, names, strict=True)}
        keys = _stress_keys(grid)
        s = strain_rate(velocity_gradient(fields, grid), grid)
        mag = strain_magnitude(s, grid)
        stack = ([vel[d] for d in dirs] + [vel[k[0]] * vel[k[1]] for k in keys]
                 + [mag * s[k] for k in keys])
        hat = self.test_filter(np.stack(stack), grid)
        nd, nk = len(dirs), len(keys)
        vh = dict(zip(dirs, hat[:nd], strict=True))
        L = {k: hat[nd + a] - vh[k[0]] * vh[k[1]] for a, k in enumerate(keys)}
        hs = strain_rate(velocity_gradient(dict(zip(names, hat[:nd], strict=True)), grid), grid)
        hmag = strain_magnitude(hs, grid)
        a2, d2 = self.test_ratio**2, self.delta**2
        M = {k: 2 * d2 * (hat[nd + nk + a] - a2 * hmag * hs[k]) for a, k in enumerate(keys)}
        num = float(np.mean(contract(L, M, grid)))
        den = float(np.mean(contract(M, M, grid)))
        return num / den if den > 0 else 0.0

    def evaluate(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        c = self.constant(fields, grid)
        self.last_constant = c
        s = strain_rate(velocity_gradient(fields, grid), grid)
        nu_t = max(c, 0.0) * self.delta**2 * strain_magnitude(s, grid)
        return _tau(s, -2 * nu_t)


def dynamic_mixed_constant(model, snapshots: Sequence[Mapping[str, np.ndarray]], grid: Grid,
                           delta: float, test_ratio: float = 2.0) -> float:
    """The eddy-viscosity constant C of the mixed closure ``model - 2 C D^2 |S| S_ij`` from the
    Germano identity on resolved fields (the dynamic mixed model of Zang, Street & Koseff 1993;
    Vreman, Geurts & Kuerten 1994), Lilly's least squares over every point of ``snapshots``:

        C = <(L_ij - H_ij) M_ij> / <M_ij M_ij>,
        H_ij = tau^model_ij(hat u; a D) - hat(tau^model_ij(u; D))

    with L, M and the test filter (Gaussian, ratio ``a``) of :class:`DynamicSmagorinsky`.
    ``model`` is a stress closure with ``with_delta`` (closure.model.ClosureModel) or None
    (then C is the dynamic Smagorinsky constant). Unclipped; 0 when M vanishes."""
    dyn = DynamicSmagorinsky(delta, test_ratio)
    test_model = None if model is None else model.with_delta(test_ratio * model.delta)
    names, dirs, keys = velocity_names(grid), _directions(grid), _stress_keys(grid)
    num = den = 0.0
    for fields in snapshots:
        f = {n: np.asarray(fields[n], dtype=float) for n in names}
        _check_fields(f, grid)
        vel = dict(zip(dirs, (f[n] for n in names), strict=True))
        s = strain_rate(velocity_gradient(f, grid), grid)
        mag = strain_magnitude(s, grid)
        stack = ([vel[d] for d in dirs] + [vel[k[0]] * vel[k[1]] for k in keys]
                 + [mag * s[k] for k in keys])
        if model is not None:
            tau = model.evaluate(f, grid)
            stack += [tau[f"tau_{k}"] for k in keys]
        hat = dyn.test_filter(np.stack(stack), grid)
        nd, nk = len(dirs), len(keys)
        vh = dict(zip(dirs, hat[:nd], strict=True))
        fh = dict(zip(names, hat[:nd], strict=True))
        hs = strain_rate(velocity_gradient(fh, grid), grid)
        hmag = strain_magnitude(hs, grid)
        a2, d2 = test_ratio**2, delta**2
        resid = {k: hat[nd + a] - vh[k[0]] * vh[k[1]] for a, k in enumerate(keys)}
        if model is not None:
            tau_test = test_model.evaluate(fh, grid)
            resid = {k: resid[k] - (tau_test[f"tau_{k}"] - hat[nd + 2 * nk + a])
                     for a, k in enumerate(keys)}
        M = {k: 2 * d2 * (hat[nd + nk + a] - a2 * hmag * hs[k]) for a, k in enumerate(keys)}
        num += float(np.mean(contract(resid, M, grid)))
        den += float(np.mean(contract(M, M, grid)))
    return num / den if den > 0 else 0.0


class GradientModel:
    """tau_ij = (D^2 / 12) d_k u_i d_k u_j; with ``clip`` backscatter (-tau_ij S_ij < 0) is
    set to zero point by point."""

    target = "stress"

    def __init__(self, delta: float, clip: bool = False):
        if not delta > 0:
            raise OptionError("the gradient model needs a filter width > 0")
        self.delta = float(delta)
        self.clip = bool(clip)

    def evaluate(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        _check_fields(fields, grid)
        g = velocity_gradient(fields, grid)
        c = self.delta**2 / 12.0
        dirs = _directions(grid)
        tensor = {k: sum(g[k[0] + d] * g[k[1] + d] for d in dirs) for k in _stress_keys(grid)}
        tau = _tau(tensor, c)
        if self.clip:
            scaled = {k: c * a for k, a in tensor.items()}
            transfer = -contract(scaled, strain_rate(g, grid), grid)
            keep = transfer >= 0
            tau = {k: np.where(keep, a, 0.0) for k, a in tau.items()}
        return tau


def baseline(name: str, delta: float, smagorinsky_constant: float = SMAGORINSKY_CONSTANT):
    """The baseline closure called ``name`` (one of BASELINES) for filter width ``delta`` (m);
    None for "none"."""
    if name == "none":
        return None
    if name == "smagorinsky":
        return Smagorinsky(delta, smagorinsky_constant)
    if name == "dynamic":
        return DynamicSmagorinsky(delta)
    if name == "gradient":
        return GradientModel(delta)
    if name == "gradient-clipped":
        return GradientModel(delta, clip=True)
    raise OptionError(f"unknown baseline {name!r}: choose from {', '.join(BASELINES)}")


def parse_baselines(text: str | Sequence[str] | None) -> list[str]:
    """``"smagorinsky,dynamic"`` -> names, checked; "" or None -> []."""
    if text is None:
        return []
    names = [t.strip() for t in text.split(",")] if isinstance(text, str) else list(text)
    names = [n for n in names if n]
    for n in names:
        if n not in BASELINES:
            raise OptionError(f"unknown baseline {n!r}: choose from {', '.join(BASELINES)}")
    return list(dict.fromkeys(names))


# --- closures as tendencies -----------------------------------------------------------------


def subgrid_term(model, grid: Grid) -> SubgridTerm | None:
    """The tendency of a closure on the coarse ``grid``, as the solver's subgrid term.

    ``model`` is None, an object with ``target`` ("stress", "force" or, in 2-D, "vorticity")
    and ``evaluate(fields, grid) -> dict`` (e.g. closure.model.ClosureModel or a baseline), or
    a plain callable ``f(fields, grid)`` that returns the tendency itself (2-D: the vorticity
    tendency, s^-2; 3-D: the momentum tendency (3, nz, ny, nx) in (z, y, x) component order,
    m s^-2). In 2-D the returned callable maps ``{"u", "v", "vorticity"}`` to the vorticity
    tendency, in 3-D ``{"u", "v", "w"}`` to the momentum tendency ``-d_j tau_ij``
    (or ``-force_i``), both in the rfftn layout.
    """
    if model is None:
        return None
    F = fourier(grid)
    three = grid.ndim == 3
    if not hasattr(model, "evaluate"):
        if not callable(model):
            raise UserError("a closure must have target and evaluate(fields, grid), or be a "
                            "callable returning the tendency")
        return lambda fields: F.forward(model(fields, grid))
    target = getattr(model, "target", None)
    dirs = _directions(grid)
    need = {"stress": tuple(f"tau_{k}" for k in _stress_keys(grid)),
            "force": tuple(f"force_{d}" for d in dirs)}
    if not three:
        need["vorticity"] = ("vorticity_forcing",)
    if target not in need:
        kinds = "stress or force" if three else "stress, force or vorticity"
        raise UserError(f"the {grid.ndim}-D coarse solver runs {kinds} closures, not "
                        f"{target!r}: fit a model of one of those targets")
    model_dims = getattr(model, "dims", None)
    if model_dims is not None and tuple(model_dims) != tuple(grid.dims):
        raise UserError(f"the model is for {tuple(model_dims)} fields and the coarse run is on "
                        f"{tuple(grid.dims)}: run it on data of its own dimension")
    keys = _stress_keys(grid)

    def term(fields: dict[str, np.ndarray]) -> np.ndarray:
        out = model.evaluate(fields, grid)
        missing = [k for k in need[target] if k not in out]
        if missing:
            raise UserError(f"the {target} closure returned {sorted(out)}, not {missing}")
        h = F.forward(np.stack([np.asarray(out[k], dtype=float) for k in need[target]]))
        if three:
            if target == "force":
                by_dir = dict(zip(dirs, h, strict=True))
            else:
                comp = dict(zip(keys, h, strict=True))
                by_dir = {i: sum(F.ik_of(j) * comp["".join(sorted(i + j))] for j in dirs)
                          for i in dirs}
            return -np.stack([by_dir[d] for d in grid.dims])
        ikx, iky = F.ik_of("x"), F.ik_of("y")
        if target == "vorticity":
            vf = h[0]
        elif target == "force":
            vf = ikx * h[1] - iky * h[0]
        else:  # curl of div tau: (d_xx - d_yy) tau_xy + d_x d_y (tau_yy - tau_xx)
            vf = (ikx * ikx - iky * iky) * h[1] + ikx * iky * (h[2] - h[0])
        return -vf

    return term


# --- the flows the solver runs --------------------------------------------------------------


class _Flow2D:
    """The 2-D coarse solver (closure.spectral.VorticityEquation) behind the interface the run
    loop uses: initial_state, fields, energy, transfer_density, advance."""

    def __init__(self, grid: Grid, closure, *, viscosity, drag, hyperviscosity_order,
                 hypoviscosity, hypoviscosity_order, forcing, dealias):
        if forcing is not None and not hasattr(forcing, "vorticity_hat"):
            raise OptionError("a 2-D run takes a closure.spectral.Forcing (shell, kolmogorov) "
                              "or a ModeForcing")
        self.eq = VorticityEquation(grid, viscosity=viscosity, drag=drag,
                                    hyperviscosity_order=hyperviscosity_order,
                                    forcing=forcing or Forcing(), dealias=dealias,
                                    subgrid=subgrid_term(closure, grid))
        if hypoviscosity:
            F = fourier(grid)
            self.eq.linear = self.eq.linear - hypoviscosity * \
                F.inverse_k2 ** int(hypoviscosity_order)
        self._bare = VorticityEquation(grid, dealias=dealias)
        self._weights = _energy_weights(grid)
        self.grid = grid

    def initial_state(self, fields: Mapping[str, np.ndarray]) -> np.ndarray:
        if "vorticity" in fields:
            omega = np.asarray(fields["vorticity"], dtype=float)
        else:
            omega = vorticity_from_velocity(np.asarray(fields["u"], dtype=float),
                                            np.asarray(fields["v"], dtype=float), self.grid)
        if omega.shape != self.grid.shape:
            raise UserError(f"the initial field has shape {omega.shape}, not the grid's "
                            f"{self.grid.shape}")
        return self.eq.initial_state(omega)

    def fields(self, q: np.ndarray) -> dict[str, np.ndarray]:
        return self.eq.fields(q)

    def energy(self, q: np.ndarray) -> float:
        return float(np.sum(self._weights * np.abs(q[0]) ** 2))

    def transfer_density(self, q: np.ndarray) -> np.ndarray:
        """Per-mode resolved nonlinear energy transfer Re(conj(omega_hat) N_hat) / |k|^2 with
        N = -u . grad omega (Parseval weights)."""
        F = fourier(self.grid)
        n = self._bare.tendency(q)[0]
        return F.half_weights * np.real(np.conj(q[0]) * n) * F.inverse_k2 / F.size**2

    def advance(self, q, duration, cfl, max_step, on_step, max_substeps):
        return self.eq.advance(q, duration, cfl, max_step, on_step=on_step,
                               max_substeps=max_substeps)


def _flow(grid: Grid, closure=None, *, viscosity=0.0, drag=0.0, hyperviscosity_order=1,
          hypoviscosity=0.0, hypoviscosity_order=1, forcing=None, dealias=True):
    if grid.dims == ("y", "x"):
        return _Flow2D(grid, closure, viscosity=viscosity, drag=drag,
                       hyperviscosity_order=hyperviscosity_order, hypoviscosity=hypoviscosity,
                       hypoviscosity_order=hypoviscosity_order, forcing=forcing,
                       dealias=dealias)
    if grid.dims == ("z", "y", "x"):
        from closure.les3d import Forcing3D, LESEquation3D

        if forcing is not None and not isinstance(forcing, Forcing3D):
            raise OptionError("a 3-D run takes a closure.les3d.Forcing3D (steady, power)")
        return LESEquation3D(grid, viscosity=viscosity, drag=drag,
                             hyperviscosity_order=hyperviscosity_order,
                             hypoviscosity=hypoviscosity,
                             hypoviscosity_order=hypoviscosity_order, forcing=forcing,
                             dealias=dealias, subgrid=subgrid_term(closure, grid))
    raise UserError(f"the coarse solver runs 2-D (y, x) or 3-D (z, y, x) flows, not "
                    f"{grid.dims}")


# --- runs -----------------------------------------------------------------------------------


@dataclass
class LongRunPlan:
    """A long run: ``duration`` (s from the initial time), statistics sampled every
    ``sample_interval`` s after ``spinup`` s, the vorticity histogram on ``edges``."""

    duration: float
    spinup: float
    sample_interval: float
    edges: np.ndarray

    def __post_init__(self):
        if not (self.duration > 0 and math.isfinite(self.duration)):
            raise OptionError(f"--duration must be a positive number of seconds, got "
                              f"{self.duration}")
        if not (0 <= self.spinup < self.duration):
            raise OptionError(f"--spinup must be >= 0 and shorter than --duration "
                              f"({self.duration:g} s), got {self.spinup}")
        if not (self.sample_interval > 0 and self.sample_interval <= self.duration
                - self.spinup):
            raise OptionError(f"the sample interval must be > 0 and at most duration - spinup "
                              f"({self.duration - self.spinup:g} s), got {self.sample_interval}")

    def sample_times(self, t0: float) -> np.ndarray:
        """Output times of the long run: every sample_interval from t0, and t0 + duration."""
        count = int(math.floor(self.duration / self.sample_interval * (1 + 1e-12)))
        out = self.sample_interval * np.arange(1, count + 1)
        if out.size == 0 or out[-1] < self.duration * (1 - 1e-12):
            out = np.append(out, self.duration)
        return t0 + out


@dataclass
class Trajectory:
    """One coarse run (or the filtered reference) at its output times.

    ``fields`` maps "u", "v" (and "w" in 3-D) and "vorticity" to arrays (n_times, *grid.shape)
    (3-D vorticity: (n_times, 3, nz, ny, nx), components x, y, z); ``energy`` (m^2 s^-2) and
    ``enstrophy`` (s^-2) are spatial means of 0.5 u_i u_i and 0.5 omega_i omega_i.
    ``status`` is "completed", "blew up" or "reference"; ``blowup_time`` (s) and ``message``
    say why a run stopped. ``times`` holds only the outputs reached. ``statistics`` is the
    long run's :meth:`closure.longrun.FlowStatistics.summary` and ``long_series`` its
    {"time", "energy", "enstrophy"} (both None without a long run).
    """

    name: str
    grid: Grid
    times: np.ndarray
    fields: dict[str, np.ndarray]
    energy: np.ndarray
    enstrophy: np.ndarray
    status: str = "completed"
    blowup_time: float | None = None
    message: str = ""
    steps: int = 0
    diagnostics: dict = field(default_factory=dict)
    #: wall-clock seconds the run took (set by compare_runs)
    wall_seconds: float | None = None
    statistics: dict | None = None
    long_series: dict | None = None
    long_plan: LongRunPlan | None = None

    @property
    def blew_up(self) -> bool:
        return self.status == "blew up"

    @property
    def velocity(self) -> list[np.ndarray]:
        """Velocity stacks (n_times, ...) in direction order x, y[, z]."""
        return [self.fields[n] for n in velocity_names(self.grid)]


def _energy_weights(grid: Grid) -> np.ndarray:
    F = fourier(grid)
    return 0.5 * F.half_weights * F.inverse_k2 / F.size**2


def _stack_frames(frames: dict[str, list], grid: Grid) -> dict[str, np.ndarray]:
    out = {}
    for k, v in frames.items():
        if v:
            out[k] = np.stack(v)
        else:
            shape = (0, 3, *grid.shape) if (k == "vorticity" and grid.ndim == 3) else \
                (0, *grid.shape)
            out[k] = np.zeros(shape)
    return out


def run(initial: Mapping[str, np.ndarray], grid: Grid, times: Sequence[float], *,
        closure=None, viscosity: float = 0.0, drag: float = 0.0,
        hyperviscosity_order: int = 1, forcing=None, dealias: bool = True,
        cfl: float = 0.5, max_step: float = math.inf, energy_bound: float = 10.0,
        max_substeps: int = 100_000, name: str = "run",
        progress: Callable[[str, int, int], None] | None = None,
        hypoviscosity: float = 0.0, hypoviscosity_order: int = 1,
        long_run: LongRunPlan | None = None) -> Trajectory:
    """Run the coarse solver from ``initial`` fields and record it at ``times`` (s).

    2-D: ``initial`` has "vorticity" (s^-1) or "u" and "v" (m s^-1) on a periodic (y, x)
    ``grid``, ``forcing`` is a :class:`closure.spectral.Forcing`. 3-D: "u", "v", "w" on a
    periodic (z, y, x) grid, ``forcing`` a :class:`closure.les3d.Forcing3D`. ``times[0]`` is
    the initial time and later times are output times (increasing). ``closure`` is anything
    :func:`subgrid_term` accepts. With ``long_run`` the run continues to ``times[0] +
    long_run.duration`` and accumulates statistics after the spin-up (fields are kept only
    at ``times``, so memory does not grow with the duration). The run stops early, without
    raising, when the energy exceeds ``energy_bound`` times its initial value, a value turns
    non-finite or the CFL step collapses; ``Trajectory.status`` and ``blowup_time`` report it.
    """
    from closure.longrun import FlowStatistics

    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or times.size < 1 or np.any(np.diff(times) <= 0):
        raise OptionError("the output times must be increasing")
    if not energy_bound > 1:
        raise OptionError(f"the energy bound must be > 1 (a multiple of the initial energy), "
                          f"got {energy_bound}")
    for k, a in initial.items():
        if not np.all(np.isfinite(np.asarray(a, dtype=float))):
            raise UserError(f"the initial field {k} has NaN or Inf values")
    flow = _flow(grid, closure, viscosity=viscosity, drag=drag,
                 hyperviscosity_order=hyperviscosity_order, hypoviscosity=hypoviscosity,
                 hypoviscosity_order=hypoviscosity_order, forcing=forcing, dealias=dealias)
    q = flow.initial_state(initial)
    e0 = flow.energy(q)
    limit = energy_bound * e0 if e0 > 0 else math.inf
    names = velocity_names(grid)
    frames = {**{n: [] for n in names}, "vorticity": []}
    kept_times, constants = [], []
    state = {"status": "completed", "time": None, "message": ""}
    t_init = float(times[0])
    stats = series = None
    events = [(float(t), True) for t in times[1:]]
    if long_run is not None:
        stats = FlowStatistics(grid, long_run.edges)
        series = {"time": [t_init], "energy": [e0], "enstrophy": []}
        events += [(float(t), False) for t in long_run.sample_times(t_init)]
        events.sort()
    # merge an output time and a sample time that coincide
    merged: list[list] = []
    for t, rec in events:
        if merged and abs(merged[-1][0] - t) <= 1e-9 * max(1.0, abs(t)):
            merged[-1][1] = merged[-1][1] or rec
            merged[-1][2] = True
        else:
            merged.append([t, rec, not rec])
    stat_start = t_init + (long_run.spinup if long_run else 0.0) - 1e-9 * max(1.0, t_init)

    def record(q, t):
        f = flow.fields(q)
        for k in frames:
            frames[k].append(f[k])
        kept_times.append(t)
        if isinstance(closure, DynamicSmagorinsky):
            constants.append(closure.constant(f, grid))
        return f

    def sample(q, t, f=None):
        f = f or flow.fields(q)
        series["time"].append(t)
        series["energy"].append(flow.energy(q))
        series["enstrophy"].append(enstrophy(list(f["vorticity"]) if grid.ndim == 3
                                             else f["vorticity"]))
        if t >= stat_start:
            stats.add([f[n] for n in names], f["vorticity"], flow.transfer_density(q))

    def blown(q, t_now) -> bool:
        e = flow.energy(q)
        if not np.isfinite(e) or not np.all(np.isfinite(q)):
            state.update(status="blew up", time=t_now,
                         message=f"non-finite values at t = {t_now:.6g} s")
            return True
        if e > limit:
            state.update(status="blew up", time=t_now,
                         message=f"kinetic energy {e:.4g} exceeded {energy_bound:g} x the "
                                 f"initial {e0:.4g} at t = {t_now:.6g} s")
            return True
        return False

    steps = 0
    t_prev = t_init
    with np.errstate(all="ignore"):
        f0 = record(q, t_init)
        if series is not None:
            series["enstrophy"].append(enstrophy(list(f0["vorticity"]) if grid.ndim == 3
                                                 else f0["vorticity"]))
            if long_run.spinup <= 0:
                stats.add([f0[n] for n in names], f0["vorticity"], flow.transfer_density(q))
        for j, (t_next, rec, samp) in enumerate(merged):
            t0, dt_out = t_prev, t_next - t_prev
            try:
                q, n = flow.advance(q, dt_out, cfl, max_step,
                                    lambda q, t, t0=t0: not blown(q, t0 + t), max_substeps)
            except StepCollapse as exc:
                state.update(status="blew up", time=t0, message=f"{exc} at t = {t0:.6g} s")
                break
            except ArithmeticError as exc:
                state.update(status="blew up", time=t0,
                             message=f"arithmetic error after t = {t0:.6g} s: {exc}")
                break
            steps += n
            if state["status"] != "completed":
                break
            f = record(q, t_next) if rec else None
            if samp:
                sample(q, t_next, f)
            t_prev = t_next
            if progress is not None:
                progress(name, j + 1, len(merged))
    arrays = _stack_frames(frames, grid)
    vel = [arrays[n] for n in names]
    traj = Trajectory(
        name=name, grid=grid, times=np.asarray(kept_times), fields=arrays,
        energy=np.array([kinetic_energy([c[i] for c in vel]) for i in range(len(kept_times))]),
        enstrophy=np.array([_enstrophy_of(w, grid) for w in arrays["vorticity"]]),
        status=state["status"], blowup_time=state["time"], message=state["message"],
        steps=steps)
    if constants:
        # C = C_s^2 at each output time (before clipping)
        traj.diagnostics["dynamic_constant"] = [float(c) for c in constants]
    if long_run is not None:
        traj.statistics = stats.summary()
        traj.long_series = {k: [float(x) for x in v] for k, v in series.items()}
        traj.long_plan = long_run
    return traj


def _enstrophy_of(w: np.ndarray, grid: Grid) -> float:
    return enstrophy(list(w) if grid.ndim == 3 else w)


def _projected_fields(flow, f: Mapping[str, np.ndarray]) -> tuple[np.ndarray, dict]:
    q = flow.initial_state(f)
    return q, flow.fields(q)


def reference_trajectory(fields: Sequence[Mapping[str, np.ndarray]], times: Sequence[float],
                         grid: Grid, dealias: bool = True, name: str = REFERENCE) -> Trajectory:
    """The filtered DNS as a Trajectory on the coarse grid, projected onto the modes the
    coarse solver carries (its 2/3-rule modes when ``dealias``; 2-D: velocity from vorticity,
    3-D: solenoidal projection)."""
    flow = _flow(grid, dealias=dealias)
    names = velocity_names(grid)
    frames = {**{n: [] for n in names}, "vorticity": []}
    for f in fields:
        _, out = _projected_fields(flow, f)
        for k in frames:
            frames[k].append(out[k])
    arrays = _stack_frames(frames, grid)
    vel = [arrays[n] for n in names]
    return Trajectory(
        name=name, grid=grid, times=np.asarray(times, dtype=float), fields=arrays,
        energy=np.array([kinetic_energy([c[i] for c in vel]) for i in range(len(fields))]),
        enstrophy=np.array([_enstrophy_of(w, grid) for w in arrays["vorticity"]]),
        status=REFERENCE)


def reference_statistics(fields: Sequence[Mapping[str, np.ndarray]], grid: Grid,
                         edges: np.ndarray, dealias: bool = True) -> dict:
    """Statistics (closure.longrun.FlowStatistics.summary) of every filtered-DNS snapshot,
    projected as in :func:`reference_trajectory`, with the resolved transfer spectrum."""
    from closure.longrun import FlowStatistics

    flow = _flow(grid, dealias=dealias)
    stats = FlowStatistics(grid, edges)
    spectra = []
    for f in fields:
        q, out = _projected_fields(flow, f)
        velocity = [out[n] for n in velocity_names(grid)]
        stats.add(velocity, out["vorticity"], flow.transfer_density(q))
        spectra.append(energy_spectrum(velocity, grid)[1])
    summary = stats.summary()
    if spectra:  # the band the snapshots span, drawn around the time-mean in reports
        summary["E_min"] = np.min(spectra, axis=0)
        summary["E_max"] = np.max(spectra, axis=0)
    return summary


def long_run_edges(fields: Sequence[Mapping[str, np.ndarray]], grid: Grid,
                   dealias: bool = True, bins: int | None = None) -> np.ndarray:
    """Vorticity histogram edges for a long run: symmetric, 1.5 x the largest |vorticity| of
    the (projected) ``fields``."""
    from closure.longrun import PDF_BINS, symmetric_edges

    flow = _flow(grid, dealias=dealias)
    values = [_projected_fields(flow, f)[1]["vorticity"] for f in fields]
    return symmetric_edges(values, bins or PDF_BINS)


# --- metrics --------------------------------------------------------------------------------


def vorticity_hellinger(a: np.ndarray, b: np.ndarray, bins: int = 64) -> float:
    """Hellinger distance between the one-point PDFs of two fields, histogrammed on ``bins``
    common bins spanning both."""
    a, b = np.ravel(a), np.ravel(b)
    lo, hi = float(min(a.min(), b.min())), float(max(a.max(), b.max()))
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return math.nan
    if hi <= lo:
        return 0.0
    edges = np.linspace(lo, hi, bins + 1)
    return hellinger(np.histogram(a, edges)[0], np.histogram(b, edges)[0])


def spectral_bands(grid: Grid) -> list[tuple[int, int]]:
    """Octave bands of shell index (mode number) [1, 2), [2, 4), ... covering every shell of
    the grid (the corners included)."""
    return octave_bands(grid)


def band_energies(u: np.ndarray, v: np.ndarray, grid: Grid,
                  bands: Sequence[tuple[int, int]], w: np.ndarray | None = None) -> np.ndarray:
    """Kinetic energy (m^2 s^-2) in each band of shells [lo, hi) (``w``: the third component
    in 3-D)."""
    k, E = energy_spectrum((u, v) if w is None else (u, v, w), grid)
    return band_energies_of_spectrum(k, E, grid, bands)


def compare(run_: Trajectory, reference: Trajectory, pdf_bins: int = 64) -> dict:
    """A posteriori errors of ``run_`` against ``reference`` at their common times.

    Returns plain types: per-time relative errors of energy and enstrophy
    (|run - ref| / ref), the energy error per octave band ``|E_b - E_b^ref| / E_b^ref``
    (time-mean over common times, keyed "lo-hi"), the vorticity PDF Hellinger distance per
    time and their means, the status and blow-up time.
    """
    grid = reference.grid
    bands = spectral_bands(grid)
    idx_run, idx_ref = [], []
    for i, t in enumerate(run_.times):
        hit = np.flatnonzero(np.isclose(reference.times, t, rtol=0, atol=1e-9 * max(1, abs(t))))
        if hit.size:
            idx_run.append(i)
            idx_ref.append(int(hit[0]))
    times = [float(run_.times[i]) for i in idx_run]
    energy_err, enstrophy_err, hell, band_err = [], [], [], []
    for i, r in zip(idx_run, idx_ref, strict=True):
        energy_err.append(_relative(run_.energy[i], reference.energy[r]))
        enstrophy_err.append(_relative(run_.enstrophy[i], reference.enstrophy[r]))
        hell.append(vorticity_hellinger(run_.fields["vorticity"][i],
                                        reference.fields["vorticity"][r], pdf_bins))
        eb = band_energies(*[c[i] for c in run_.velocity[:2]], grid, bands,
                           *[c[i] for c in run_.velocity[2:]])
        rb = band_energies(*[c[r] for c in reference.velocity[:2]], grid, bands,
                           *[c[r] for c in reference.velocity[2:]])
        # bands the reference leaves (numerically) empty have no relative error
        floor = BAND_FLOOR * reference.energy[r]
        band_err.append([_relative(a, b) if b > floor else None
                         for a, b in zip(eb, rb, strict=True)])
    band_err = np.asarray([[math.nan if e is None else e for e in row] for row in band_err],
                          dtype=float).reshape(len(times), len(bands))
    with np.errstate(all="ignore"):
        band_mean = [float(np.nanmean(band_err[:, b])) if times and
                     np.any(np.isfinite(band_err[:, b])) else None for b in range(len(bands))]
    return {
        "times": times,
        "energy_relative_error": energy_err,
        "enstrophy_relative_error": enstrophy_err,
        "vorticity_pdf_hellinger": hell,
        "spectrum_band_error": {f"{lo}-{hi}": e for (lo, hi), e in
                                zip(bands, band_mean, strict=True)},
        "mean_energy_error": _mean(energy_err),
        "mean_enstrophy_error": _mean(enstrophy_err),
        "mean_hellinger": _mean(hell),
        "status": run_.status,
        "blowup_time": run_.blowup_time,
    }


def _relative(a: float, b: float) -> float | None:
    if not (np.isfinite(a) and np.isfinite(b)) or b == 0:
        return None
    return float(abs(a - b) / abs(b))


def _mean(values) -> float | None:
    v = [x for x in values if x is not None and np.isfinite(x)]
    return float(np.mean(v)) if v else None


def vorticity_pdf(omega: np.ndarray, edges: np.ndarray) -> dict:
    """Histogram density of a vorticity field on given bin edges: {"x": centres, "density"}."""
    density, _ = np.histogram(np.ravel(omega), edges, density=True)
    return {"x": (0.5 * (edges[1:] + edges[:-1])).tolist(), "density": density.tolist()}


# --- a whole comparison ---------------------------------------------------------------------


@dataclass
class Comparison:
    """The runs of one a posteriori comparison: ``runs`` by label (model first, then
    baselines), the filtered ``reference`` (or None) and ``metrics`` per run label;
    ``long_runs`` holds each run's long-run figures (:func:`long_run_figures`) and
    ``reference_statistics`` the filtered DNS's statistics, when long runs were made."""

    runs: dict[str, Trajectory]
    reference: Trajectory | None
    metrics: dict[str, dict]
    settings: dict = field(default_factory=dict)
    long_runs: dict[str, dict] = field(default_factory=dict)
    reference_statistics: dict | None = None

    def to_json(self) -> str:
        """:meth:`to_dict` as JSON text; NaN and Inf (a blown-up run) become null."""
        import json

        return json.dumps(_finite(self.to_dict()), indent=1, allow_nan=False)

    def to_dict(self) -> dict:
        """Plain JSON: {"runs": {label: {"time", "energy", "enstrophy", "spectrum": {"k",
        "E"}, "vorticity_pdf": {"x", "density"}, "blowup_time", "status", "message",
        "steps", "metrics"[, "long_run"]}}, "reference", "spectrum_time", "settings",
        "note"}; the spectra and PDFs are those at ``spectrum_time``, the last time every run
        reached. ``long_run`` (see :func:`long_run_figures`) holds duration, stable,
        blowup_time, spectrum_error, vorticity_pdf_distance, mean_energy_ratio,
        mean_enstrophy_ratio and the time-mean spectra, PDF, quantiles and transfer spectrum
        behind them; the reference's entry has its own statistics."""
        everyone = list(self.runs.values()) + ([self.reference] if self.reference else [])
        common = min(float(t.times[-1]) for t in everyone)
        values = [t.fields["vorticity"][_index_at(t, common)] for t in everyone]
        lo = min(float(v.min()) for v in values)
        hi = max(float(v.max()) for v in values)
        edges = np.linspace(lo, hi if hi > lo else lo + 1.0, 65)
        out = {}
        for t in everyone:
            i = _index_at(t, common)
            k, E = energy_spectrum([c[i] for c in t.velocity], t.grid)
            entry = {
                "time": t.times.tolist(),
                "energy": t.energy.tolist(),
                "enstrophy": t.enstrophy.tolist(),
                "spectrum": {"k": k.tolist(), "E": E.tolist()},
                "vorticity_pdf": vorticity_pdf(t.fields["vorticity"][i], edges),
                "blowup_time": t.blowup_time,
                "status": t.status,
                "message": t.message,
                "steps": t.steps,
            }
            if t.wall_seconds is not None:
                entry["wall_seconds"] = t.wall_seconds
            if t.diagnostics:
                entry["diagnostics"] = t.diagnostics
            if t.name in self.metrics:
                entry["metrics"] = self.metrics[t.name]
            if t.name in self.long_runs:
                entry["long_run"] = self.long_runs[t.name]
            elif t is self.reference and self.reference_statistics is not None:
                entry["long_run"] = {"statistics": statistics_json(self.reference_statistics)}
            out[t.name] = entry
        return {
            "runs": out,
            "reference": self.reference.name if self.reference else None,
            "spectrum_time": common,
            "settings": self.settings,
            "note": LONG_RUN_NOTE if self.long_runs else SHORT_NOTE,
        }

    def table(self) -> str:
        """A text table: one row per run, errors against the reference (and, after long
        runs, a second table of the long-run figures)."""
        rows = [(name, t, self.metrics.get(name, {})) for name, t in self.runs.items()]
        bands = []
        for _, _, m in rows:
            for b, e in m.get("spectrum_band_error", {}).items():
                if e is not None and b not in bands:
                    bands.append(b)
        head = ["run", "status", "blow-up t", "E err", "Z err", "PDF dist"]
        head += [f"E[{b}]" for b in bands]
        lines = []
        for name, t, m in rows:
            cells = [name, t.status,
                     "-" if t.blowup_time is None else f"{t.blowup_time:.4g}",
                     _fmt(m.get("mean_energy_error")), _fmt(m.get("mean_enstrophy_error")),
                     _fmt(m.get("mean_hellinger"))]
            cells += [_fmt(m.get("spectrum_band_error", {}).get(b)) for b in bands]
            lines.append(cells)
        legend = ("errors: time-mean relative error against the filtered DNS of kinetic energy "
                  "(E), enstrophy (Z) and band energy per octave of mode numbers; PDF dist: "
                  "Hellinger distance of the vorticity PDFs" if self.reference else
                  "no reference: errors not computed")
        text = [*_aligned([head, *lines]), legend]
        if self.long_runs:
            text += ["", self.long_run_table()]
        cost = self.cost_text()
        if cost:
            text += ["", cost]
        return "\n".join(text)

    def cost_ratios(self) -> dict[str, float]:
        """Per run: the fine run's wall seconds per simulated second over the coarse run's,
        when the initial file states the fine run's cost (``wall_seconds`` and
        ``simulated_time``, as closure.synth writes them); {} otherwise."""
        fine = self.settings.get("fine_cost") or {}
        if not (fine.get("wall_seconds") and fine.get("simulated_time")):
            return {}
        fine_rate = float(fine["wall_seconds"]) / float(fine["simulated_time"])
        out = {}
        for name, t in self.runs.items():
            simulated = float(t.times[-1] - t.times[0]) if len(t.times) > 1 else 0.0
            if name in self.long_runs:
                simulated = float(self.long_runs[name].get("reached") or simulated)
            if t.wall_seconds and simulated > 0:
                out[name] = fine_rate / (t.wall_seconds / simulated)
        return out

    def cost_text(self) -> str:
        """One line on the coarse runs' cost against the fine run's ("" when not known)."""
        ratios = self.cost_ratios()
        if not ratios:
            return ""
        fine = self.settings["fine_cost"]
        parts = ", ".join(f"{name} {r:.3g}" for name, r in ratios.items())
        return (f"cost: fine run {fine['wall_seconds']:.4g} s wall for "
                f"{fine['simulated_time']:.4g} s simulated (as its file states); wall time per "
                f"simulated second, fine over coarse: {parts} (times measured on different "
                "runs and perhaps machines)")

    def long_run_table(self) -> str:
        """The long-run figures, one row per run (and the reference's quantiles)."""
        head = ["run", "stable", "blow-up t", "spectrum err", "PDF dist", "E ratio",
                "Z ratio", "transfer err", "q0.1%", "q99.9%"]
        lines = []
        for name, f in self.long_runs.items():
            q = (f.get("vorticity_quantiles") or {}).get("run") or [None, None]
            lines.append([name, "yes" if f["stable"] else "no",
                          "-" if f["blowup_time"] is None else f"{f['blowup_time']:.4g}",
                          _fmt(f["spectrum_error"]), _fmt(f["vorticity_pdf_distance"]),
                          _fmt(f["mean_energy_ratio"]), _fmt(f["mean_enstrophy_ratio"]),
                          _fmt(f.get("transfer_error")), _fmt_quantile(q[0]),
                          _fmt_quantile(q[1])])
        ref = self.reference_statistics
        if ref and ref.get("samples"):
            from closure.longrun import TAIL_QUANTILES

            lines.append([REFERENCE, "-", "-", "-", "-", "1", "1", "-",
                          *[_fmt(ref["quantiles"][x]) for x in TAIL_QUANTILES]])
        first = next(iter(self.long_runs.values()))
        legend = (f"long runs of {first['duration']:.4g} s, statistics after a "
                  f"{first['spinup']:.4g} s spin-up"
                  + (" against every snapshot of the filtered DNS" if ref else "")
                  + ": spectrum err = mean over octave bands (up to the last complete shell) "
                  "of |E_b - E_b^ref| / E_b^ref of the time-mean spectra; PDF dist = "
                  "Hellinger distance of the vorticity PDFs; "
                  "E, Z ratio = time-mean energy, enstrophy / reference; transfer err = "
                  "sum |T - T_ref| / sum |T_ref| of the resolved transfer spectra; q = "
                  "vorticity quantiles (beyond: outside the histogram, 1.5 x the largest "
                  "|vorticity| of the reference). Evidence on this flow, not a guarantee.")
        return "\n".join([*_aligned([head, *lines]), legend])


SHORT_NOTE = ("A priori skill does not guarantee a stable or accurate coarse simulation; these "
              "runs test this flow only. Validate a posteriori on your own flows before "
              "relying on a model.")
LONG_RUN_NOTE = (SHORT_NOTE + " Long-run statistics compare time averages after the spin-up "
                 "with the filtered DNS: a stable run with close statistics on one flow is "
                 "evidence, not a guarantee, for other flows, resolutions or run lengths.")


def _aligned(table: list[list]) -> list[str]:
    widths = [max(len(str(r[i])) for r in table) for i in range(len(table[0]))]
    return ["  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)).rstrip()
            for r in table]


def statistics_json(s: dict) -> dict:
    """A FlowStatistics summary in plain JSON: spectrum {k, E}, transfer {k, T} (or None),
    vorticity_pdf {x, density, edges, underflow, overflow}, quantiles, energy, enstrophy,
    samples."""
    if not s.get("samples"):
        return {"samples": 0}
    from closure.longrun import TAIL_QUANTILES

    edges = np.asarray(s["pdf"]["edges"])
    counts = np.asarray(s["pdf"]["counts"])
    return {
        "samples": int(s["samples"]),
        "spectrum": {"k": np.asarray(s["k"]).tolist(), "E": np.asarray(s["E"]).tolist(),
                     **{key: np.asarray(s[key]).tolist() for key in ("E_min", "E_max")
                        if key in s}},
        "transfer": None if s["T"] is None else {"k": np.asarray(s["k"]).tolist(),
                                                 "T": np.asarray(s["T"]).tolist()},
        "vorticity_pdf": {"x": (0.5 * (edges[1:] + edges[:-1])).tolist(),
                          "density": np.asarray(s["pdf"]["density"]).tolist(),
                          "edges": edges.tolist(),
                          "underflow": float(counts[0] / counts.sum()),
                          "overflow": float(counts[-1] / counts.sum())},
        "quantiles": {str(q): s["quantiles"][q] for q in TAIL_QUANTILES},
        "energy": s["energy"], "enstrophy": s["enstrophy"],
    }


def long_run_figures(run_: Trajectory, reference: dict | None) -> dict:
    """The long-run record of a run: ``duration`` (s asked), ``spinup``, ``stable`` (ran the
    whole duration), ``blowup_time``, ``reached`` (s), the comparison with the reference
    statistics (:func:`closure.longrun.compare_statistics`: spectrum_error,
    spectrum_band_error, vorticity_pdf_distance, vorticity_quantiles, mean_energy_ratio,
    mean_enstrophy_ratio, transfer_error; None without a reference), the time series and the
    run's own statistics."""
    from closure.longrun import compare_statistics

    plan = run_.long_plan
    if plan is None or run_.statistics is None:
        raise ValueError(f"run {run_.name!r} was not a long run")
    series = run_.long_series or {"time": []}
    reached = (series["time"][-1] - series["time"][0]) if series["time"] else 0.0
    figures = compare_statistics(run_.statistics, reference or {}, run_.grid)
    return {
        "duration": float(plan.duration),
        "spinup": float(plan.spinup),
        "sample_interval": float(plan.sample_interval),
        "stable": not run_.blew_up,
        "blowup_time": run_.blowup_time,
        "reached": float(reached),
        **figures,
        "series": series,
        "statistics": statistics_json(run_.statistics),
    }


def _is_number(v) -> bool:
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _fmt_quantile(v) -> str:
    if v is not None and math.isinf(v):
        return "beyond"
    return _fmt(v)


def _index_at(t: Trajectory, time: float) -> int:
    return int(np.argmin(np.abs(t.times - time)))


def _fmt(v) -> str:
    return "-" if v is None or not np.isfinite(v) else f"{v:.3g}"


def compare_runs(initial: Mapping[str, np.ndarray], grid: Grid, times: Sequence[float],
                 closures: Mapping[str, object], reference: Trajectory | None = None,
                 progress: Callable[[str, int, int], None] | None = None,
                 reference_stats: dict | None = None, **solver) -> Comparison:
    """Run each closure (label -> closure, None for no model) from ``initial`` at ``times``
    with the same ``solver`` options (see :func:`run`, ``long_run`` included) and score them
    against ``reference`` (and, after long runs, against ``reference_stats``)."""
    import time

    runs, metrics, long_runs = {}, {}, {}
    for label, closure in closures.items():
        start = time.perf_counter()
        runs[label] = run(initial, grid, times, closure=closure, name=label, progress=progress,
                          **solver)
        runs[label].wall_seconds = time.perf_counter() - start
        if reference is not None:
            metrics[label] = compare(runs[label], reference)
        if runs[label].long_plan is not None:
            long_runs[label] = long_run_figures(runs[label], reference_stats)
    return Comparison(runs, reference, metrics, long_runs=long_runs,
                      reference_statistics=reference_stats)


# --- from files -----------------------------------------------------------------------------

FILTER_CHOICES = ("none", "box", "gaussian", "spectral", "block")


@dataclass
class CoarseData:
    """Coarse-grained fields of a file: ``fields[i]`` has u, v, vorticity on ``grid`` at
    ``times[i]`` (s, or None); ``delta`` is the filter width (m) the baselines use."""

    grid: Grid
    times: list[float | None]
    fields: list[dict[str, np.ndarray]]
    attrs: dict
    delta: float
    coarse_graining: dict
    path: str
    indices: list[int]


def _open_input(path, input_options: Mapping | None):
    """closure.io.open_fields of ``path`` with the input options (``variables``, ``group``,
    ``mask``, ``levels`` (one level), ``spacing``) and the level to read."""
    from closure.io import open_fields

    opts = dict(input_options or {})
    levels = opts.get("levels")
    if levels is not None and (isinstance(levels, str) or len(levels) != 1):
        raise OptionError("the coarse solver runs one 2-D level: give one level, e.g. --levels 0")
    src = open_fields(path, opts.get("variables") or None, group=opts.get("group"),
                      mask=opts.get("mask"), levels=levels, spacing=opts.get("spacing"))
    return src, (None if levels is None else int(levels[0]))


def coarse_data(path, kind: str = "gaussian", ratio: int = 4, width: float | None = None,
                width_units: str = "grid", indices: Sequence[int] | None = None,
                input_options: Mapping | None = None) -> CoarseData:
    """Read 2-D (y, x) or 3-D (z, y, x) fine fields from ``path`` (closure.io;
    ``input_options`` as in :func:`simulate`) and coarse-grain them as the discovery pipeline
    does (closure.residuals); ``kind="none"`` keeps the fields as they are (ratio 1), and the
    baselines then use the grid spacing as their width. 2-D fields carry u, v, vorticity; 3-D
    ones u, v, w."""
    from closure.filters import make_coarse_graining
    from closure.pipeline import refuse_land_mask
    from closure.residuals import coarse_grain_snapshot

    if kind not in FILTER_CHOICES:
        raise OptionError(f"unknown filter {kind!r}: choose one of {', '.join(FILTER_CHOICES)}")
    src, level = _open_input(path, input_options)
    with src:
        grid = src.grid
        if grid.dims not in (("y", "x"), ("z", "y", "x")):
            raise UserError(f"{path} holds {grid.dims} fields: the coarse solver runs 2-D "
                            "(y, x) or 3-D (z, y, x) periodic flows")
        if not grid.periodic:
            raise UserError(f"{path}: the coarse solver needs periodic data")
        if "time" in src.units and src.units["time"].strip() not in ("s", "second", "seconds"):
            raise UserError(f"{path}: time is in {src.units['time']!r}; the coarse solver "
                            "needs seconds")
        names = velocity_names(grid)
        if kind == "none":
            if ratio != 1:
                raise OptionError(f"--filter none keeps the fine grid: use --ratio 1 (got "
                                  f"{ratio}), or choose a filter")
            if width is not None:
                raise OptionError("--filter none has no width: drop --width")
            cg, coarse, delta, described = None, grid, min(grid.spacing), {"kind": "none",
                                                                             "ratio": 1}
        else:
            cg = make_coarse_graining(kind, grid, int(ratio), width, width_units)
            coarse, delta, described = cg.coarse, cg.delta, cg.describe()
        chosen = list(range(len(src))) if indices is None else [int(i) for i in indices]
        fields, times = [], []
        for i in chosen:
            snap = src.snapshot(i, level)
            refuse_land_mask(snap)
            missing = [n for n in names if n not in snap.fields]
            if missing:
                raise UserError(f"{path} has no velocity {', '.join(missing)}: the coarse "
                                f"solver needs {', '.join(names)}")
            if cg is None:
                f = {n: snap.fields[n] for n in names}
            else:
                cs = coarse_grain_snapshot(snap, cg, targets=())
                f = {n: cs.fields[n] for n in names}
                if grid.ndim == 2:
                    f["vorticity"] = cs.fields["vorticity"]
            if grid.ndim == 2 and "vorticity" not in f:
                f["vorticity"] = vorticity_from_velocity(f["u"], f["v"], coarse)
            fields.append(f)
            times.append(snap.time)
        return CoarseData(coarse, times, fields, dict(src.attrs), float(delta), described,
                          str(path), chosen)


@dataclass(frozen=True)
class ModeForcing:
    """A steady 2-D vorticity forcing from a table of Fourier modes
    (:func:`closure.les3d.read_forcing_modes`); ``source`` names the file."""

    modes: tuple
    source: str = ""
    kind: str = "modes"

    @property
    def active(self) -> bool:
        return bool(self.modes)

    def vorticity_hat(self, grid: Grid) -> np.ndarray:
        from closure.les3d import modes_field

        return fourier(grid).forward(modes_field(self.modes, grid, 2))

    def to_attrs(self) -> dict:
        return {"forcing": "modes", "forcing_file": self.source,
                "forcing_modes": len(self.modes)}


def parse_forcing(text: str | None, attrs: Mapping) -> Forcing | ModeForcing:
    """``file`` (the file's turb2d forcing attributes, else none), ``none``,
    ``shell:K:A[:SEED]``, ``kolmogorov:K:A`` or ``modes:FILE`` (a table of Fourier modes,
    :func:`closure.les3d.read_forcing_modes`)."""
    text = (text or "file").strip()
    if text == "file":
        kind = str(attrs.get("forcing", "none"))
        if kind not in ("none", "shell", "kolmogorov"):
            raise UserError(f"the file's forcing {kind!r} is not one the 2-D solver knows: "
                            "give --forcing none, shell:K:A[:SEED], kolmogorov:K:A or "
                            "modes:FILE")
        return Forcing.from_attrs(attrs) if "forcing" in attrs else Forcing()
    if text == "none":
        return Forcing()
    if text.startswith("modes:"):
        from closure.les3d import read_forcing_modes

        path = text[len("modes:"):]
        return ModeForcing(read_forcing_modes(path, 2), path)
    parts = text.split(":")
    try:
        if parts[0] == "shell" and len(parts) in (3, 4):
            seed = int(parts[3]) if len(parts) == 4 else int(attrs.get("forcing_seed", 0))
            return Forcing("shell", float(parts[1]), float(parts[2]), seed)
        if parts[0] == "kolmogorov" and len(parts) == 3:
            return Forcing("kolmogorov", float(parts[1]), float(parts[2]))
    except ValueError:
        pass
    raise OptionError(f"--forcing {text!r}: use file, none, shell:K:A[:SEED], kolmogorov:K:A "
                      "or modes:FILE")


def _attr_float(attrs: Mapping, key: str, option: str, given):
    if given is not None:
        return float(given)
    if key in attrs:
        return float(attrs[key])
    raise OptionError(f"the initial file does not say its {key}: give {option}")


def model_filter(model) -> dict | None:
    """The coarse-graining a stored model was fitted with (kind, ratio, width in grid
    spacings), or None."""
    f = getattr(model, "filter", None)
    if not isinstance(f, Mapping) or "kind" not in f:
        return None
    width = None
    cells = f.get("width_cells")
    if isinstance(cells, Mapping) and cells:
        width = float(next(iter(cells.values())))
    out = {"kind": str(f["kind"]), "ratio": int(f.get("ratio", 1)), "width": width}
    if out["kind"] == "block":
        out["width"] = None
    return out


def simulate(model, initial, reference=None, *, model_label: str = "model",
             filter_kind: str | None = None, ratio: int | None = None,
             width: float | None = None, width_units: str = "grid", initial_index: int = 0,
             viscosity: float | None = None, drag: float | None = None,
             hyperviscosity_order: int | None = None, forcing: str | None = "file",
             duration: float | None = None, interval: float | None = None,
             baselines: Sequence[str] = (), smagorinsky_constant: float = SMAGORINSKY_CONSTANT,
             dealias: bool | None = None, cfl: float = 0.5, energy_bound: float = 10.0,
             progress: Callable[[str, int, int], None] | None = None,
             input_options: Mapping | None = None,
             long_duration: float | None = None, spinup: float | None = None,
             sample_interval: float | None = None, hypoviscosity: float | None = None,
             hypoviscosity_order: int | None = None,
             reference_net: bool = False) -> Comparison:
    """Run ``model`` (None: no model) and ``baselines`` from snapshot ``initial_index`` of the
    file ``initial`` (2-D or 3-D), coarse-grained, and score them against the coarse-grained
    ``reference`` file (default: the initial file when it has later snapshots).

    ``input_options`` (both files): ``variables`` (our name -> the file's), ``group``,
    ``mask``, ``levels`` (one level of a level stack) and ``spacing``, as closure.io reads them.

    The coarse-graining defaults to the model's own (its ``filter``), else Gaussian, ratio 4,
    width 2 x ratio. Viscosity (m^2 s^-1), drag (s^-1), hyper- and hypoviscosity, forcing and
    dealiasing default to the initial file's attributes (our turb2d/turb3d files carry them);
    what a file made elsewhere does not state is assumed (no drag, Laplacian viscosity, no
    forcing) and said in ``settings["warnings"]`` and ``settings["assumed_physics"]``: the
    comparison is then qualitative. Output times are the reference's snapshot times within
    ``duration`` (s) of the start, or every ``interval`` s without a reference.

    With ``long_duration`` (s) every run continues that long and its statistics after
    ``spinup`` s (default 0), sampled every ``sample_interval`` s (default: 200 samples, or
    one per initial CFL step if that is longer), are
    compared with those of every snapshot of the reference (``Comparison.long_runs``).
    ``reference_net``: also run the model's stored neural reference closure (closure.neural,
    torch on CPU) as the run "reference network".
    """
    fdef = model_filter(model) if model is not None else None
    warnings = []
    if filter_kind is None:
        filter_kind = fdef["kind"] if fdef else "gaussian"
        if ratio is None:
            ratio = fdef["ratio"] if fdef else 4
        if width is None and fdef:
            width, width_units = fdef["width"], "grid"
    elif fdef and (filter_kind, ratio) != (fdef["kind"], fdef["ratio"]):
        warnings.append(f"the model was fitted with filter {fdef['kind']} ratio {fdef['ratio']}"
                        f"; this run uses {filter_kind} ratio {ratio}")
    if ratio is None:
        ratio = 1 if filter_kind == "none" else 4
    if long_duration is not None and not (long_duration > 0 and math.isfinite(long_duration)):
        raise OptionError(f"--duration must be a positive number of seconds, got "
                          f"{long_duration}")
    init = coarse_data(initial, filter_kind, ratio, width, width_units, [initial_index],
                       input_options)
    attrs = init.attrs
    t_start = init.times[0] if init.times[0] is not None else 0.0
    grid = init.grid

    ref_data = None
    if reference is None:
        src, _ = _open_input(initial, input_options)
        with src:
            later = len(src) > initial_index + 1
        if later:
            reference = initial
    all_reference = None
    if reference is not None:
        ref_data = coarse_data(reference, filter_kind, ratio, width, width_units,
                               input_options=input_options)
        if ref_data.grid.shape != init.grid.shape:
            raise UserError(f"the reference {reference} coarse-grains to {ref_data.grid.shape},"
                            f" the initial file to {init.grid.shape}: use files on the same grid")
        if any(t is None for t in ref_data.times):
            raise UserError(f"the reference {reference} has no time coordinate: add one (s)")
        all_reference = list(ref_data.fields)
        keep = [i for i, t in enumerate(ref_data.times)
                if t >= t_start - 1e-9 and (duration is None or t <= t_start + duration + 1e-9)]
        ref_data.fields = [ref_data.fields[i] for i in keep]
        ref_data.times = [float(ref_data.times[i]) for i in keep]
        ref_data.indices = [ref_data.indices[i] for i in keep]
        later_times = [t for t in ref_data.times if t > t_start + 1e-9]
        if not later_times:
            raise UserError(f"the reference {reference} has no snapshot after the initial time "
                            f"{t_start:g} s (within --time): choose an earlier --initial-index "
                            "or a longer --time")
        times = [t_start, *later_times]
    elif duration is None and long_duration is not None:
        times = [t_start]
    else:
        if duration is None:
            raise OptionError("without a reference give --time (the run length in s) or "
                              "--duration (a long run)")
        if not duration > 0:
            raise OptionError(f"--time must be > 0, got {duration}")
        step = interval if interval is not None else duration / 10
        if not step > 0:
            raise OptionError(f"--interval must be > 0, got {interval}")
        count = max(1, int(round(duration / step)))
        times = list(t_start + np.linspace(0.0, duration, count + 1))

    physics = _physics(attrs, grid, viscosity, drag, hyperviscosity_order, hypoviscosity,
                       hypoviscosity_order, forcing, dealias)
    warnings.extend(physics.pop("warnings"))
    if model is not None and callable(getattr(model, "grid_warnings", None)):
        warnings.extend(model.grid_warnings(grid) or [])
    names = parse_baselines(baselines)
    closures: dict[str, object] = {model_label: model}
    for b in names:
        if b == "none" and model is None and model_label in ("none", "model"):
            continue
        closures[b] = baseline(b, init.delta, smagorinsky_constant)
    if model is None:
        closures = {("none" if k == model_label else k): v for k, v in closures.items()}
    if reference_net:  # the model's neural reference closure beside it (torch on CPU)
        if model is None or not callable(getattr(model, "reference_network", None)):
            raise OptionError("--reference-net runs a model's stored network: give a model "
                              "discovered with --reference-net")
        closures["reference network"] = model.reference_network()
    dealias = physics["dealias"]
    ref_traj = (reference_trajectory(ref_data.fields, ref_data.times, grid, dealias)
                if ref_data is not None else None)
    plan, ref_stats = None, None
    if long_duration is not None:
        spin = 0.0 if spinup is None else float(spinup)
        if sample_interval is not None:
            every = float(sample_interval)
        else:
            # 200 samples, but no closer than the initial CFL step: each sample ends a step
            f0 = init.fields[0]
            step = cfl_time_step([f0[VELOCITY_OF[d]] for d in grid.dims], grid, cfl)
            every = max((long_duration - spin) / 200, min(step, long_duration - spin)) \
                if long_duration > spin else long_duration
        edges = long_run_edges(all_reference or init.fields, grid, dealias)
        plan = LongRunPlan(float(long_duration), spin, float(every), edges)
        if all_reference is not None:
            ref_stats = reference_statistics(all_reference, grid, edges, dealias)
    elif spinup is not None or sample_interval is not None:
        raise OptionError("--spinup and --sample-interval belong to a long run: give "
                          "--duration too")
    comparison = compare_runs(init.fields[0], grid, times, closures, ref_traj,
                              progress=progress, reference_stats=ref_stats,
                              viscosity=physics["viscosity"], drag=physics["drag"],
                              hyperviscosity_order=physics["hyperviscosity_order"],
                              hypoviscosity=physics["hypoviscosity"],
                              hypoviscosity_order=physics["hypoviscosity_order"],
                              forcing=physics["forcing"], dealias=dealias,
                              cfl=cfl, energy_bound=energy_bound, long_run=plan)
    comparison.settings = {
        "initial": str(initial), "initial_index": int(initial_index),
        "reference": None if reference is None else str(reference),
        "coarse_graining": init.coarse_graining, "grid": grid.to_dict(),
        "delta": init.delta, "viscosity": physics["viscosity"], "drag": physics["drag"],
        "hyperviscosity_order": physics["hyperviscosity_order"],
        "hypoviscosity": physics["hypoviscosity"],
        "hypoviscosity_order": physics["hypoviscosity_order"],
        "forcing": physics["forcing"].to_attrs(), "dealias": bool(dealias), "cfl": cfl,
        "energy_bound": energy_bound, "smagorinsky_constant": smagorinsky_constant,
        "times": [float(t) for t in times], "warnings": warnings,
        "assumed_physics": physics["assumed"], "qualitative": bool(physics["assumed"]),
        # the fine run's cost, when the file states it (wall seconds, steps, grid points)
        "fine_cost": {k: attrs[k] for k in ("wall_seconds", "steps", "simulated_time")
                      if k in attrs and _is_number(attrs[k])} or None,
        "fine_points": int(np.prod(grid.shape)) * int(init.coarse_graining.get("ratio", 1))
        ** grid.ndim,
        "long_run": None if plan is None else {
            "duration": plan.duration, "spinup": plan.spinup,
            "sample_interval": plan.sample_interval,
            "reference_snapshots": None if all_reference is None else len(all_reference)},
    }
    return comparison


#: solvers whose files state their whole physics (closure's own generators)
OWN_SOLVERS = ("turb2d", "turb3d")


def _physics(attrs: Mapping, grid: Grid, viscosity, drag, hyperviscosity_order, hypoviscosity,
             hypoviscosity_order, forcing, dealias) -> dict:
    """The coarse run's physics from the options, else the file's attributes, else assumed
    (listed in "assumed", with a loud warning that the comparison is qualitative)."""
    own = str(attrs.get("solver", "")) in OWN_SOLVERS
    assumed, warnings = [], []

    def pick(given, key, default, text):
        if given is not None:
            return given
        if key in attrs:
            return attrs[key]
        if not own:
            assumed.append(text)
        return default

    nu = _attr_float(attrs, "viscosity", "--viscosity", viscosity)
    mu = float(pick(drag, "drag", 0.0, "no linear drag (--drag 0)"))
    order = int(pick(hyperviscosity_order, "hyperviscosity_order", 1,
                     "Laplacian viscosity (--hyperviscosity-order 1)"))
    hypo = float(pick(hypoviscosity, "hypoviscosity", 0.0, "no hypoviscosity "
                      "(--hypoviscosity 0)"))
    hypo_order = int(hypoviscosity_order if hypoviscosity_order is not None else
                     attrs.get("hypoviscosity_order", 1))
    if dealias is None:
        dealias = str(attrs.get("dealias", "true")).lower() == "true"
    text = (forcing or "file").strip()
    if text == "file" and "forcing" not in attrs and not own:
        assumed.append("no forcing (--forcing none)")
    if grid.ndim == 3:
        from closure.les3d import parse_forcing3d

        force = parse_forcing3d(text, attrs)
        if text == "file" and str(attrs.get("forcing", "none")) not in ("none", "steady",
                                                                        "power"):
            raise UserError(f"the file's forcing {attrs.get('forcing')!r} is not one the 3-D "
                            "solver knows: give --forcing none, steady:K:A[:SEED] or power:K:P")
    else:
        force = parse_forcing(text, attrs)
    if assumed:
        warnings.append("ASSUMED PHYSICS: the initial file does not state its physics; this "
                        "run assumes " + "; ".join(assumed) + ". The comparison with this "
                        "reference is qualitative: give these options to match its physics.")
    return {"viscosity": nu, "drag": mu, "hyperviscosity_order": order,
            "hypoviscosity": hypo, "hypoviscosity_order": hypo_order, "dealias": dealias,
            "forcing": force, "assumed": assumed, "warnings": warnings}


def write_run(comparison: Comparison, path, label: str | None = None):
    """Write the coarse trajectory of run ``label`` (default: the first) to netCDF: u, v,
    vorticity (time, y, x) in 2-D, u, v, w (time, z, y, x) in 3-D, at every output time (NaN
    after a blow-up), plus energy and enstrophy series (run, time) of every run and the
    reference, and the long-run figures (scalars) in the ``long_runs`` attribute. Atomic."""
    import json

    import xarray as xr

    from closure.io import write_netcdf
    from closure.synth._common import COORD_ATTRS, VARIABLE_ATTRS

    label = label or next(iter(comparison.runs))
    main = comparison.runs[label]
    times = np.asarray(comparison.settings.get("times") or main.times, dtype=float)
    everyone = list(comparison.runs.values()) + (
        [comparison.reference] if comparison.reference else [])
    grid = main.grid

    def on_times(t: Trajectory, values: np.ndarray) -> np.ndarray:
        out = np.full((times.size,) + values.shape[1:], np.nan)
        for i, s in enumerate(t.times):
            hit = np.flatnonzero(np.isclose(times, s, rtol=0, atol=1e-9 * max(1, abs(s))))
            if hit.size:
                out[hit[0]] = values[i]
        return out

    names = velocity_names(grid) + (["vorticity"] if grid.ndim == 2 else [])
    data = {name: (("time", *grid.dims), on_times(main, main.fields[name]),
                   {**VARIABLE_ATTRS[name], "long_name": VARIABLE_ATTRS[name]["long_name"]
                    + f" (coarse run: {label})"})
            for name in names}
    data["energy"] = (("run", "time"), np.stack([on_times(t, t.energy) for t in everyone]),
                      {"long_name": "mean kinetic energy 0.5 <u_i u_i>", "units": "m2 s-2"})
    data["enstrophy"] = (("run", "time"), np.stack([on_times(t, t.enstrophy)
                                                    for t in everyone]),
                         {"long_name": "mean enstrophy 0.5 <omega_i omega_i>", "units": "s-2"})
    coords = {"time": ("time", times, COORD_ATTRS["time"]),
              **{d: (d, grid.coords(d), COORD_ATTRS[d]) for d in grid.dims},
              "run": ("run", np.array([t.name for t in everyone], dtype=object))}
    status = {t.name: {"status": t.status, "blowup_time": t.blowup_time, "message": t.message}
              for t in everyone}
    attrs = {"Conventions": "CF-1.8", "title": "a posteriori coarse run (closure les)",
             "run": label, "status": main.status,
             "blowup_time": "none" if main.blowup_time is None else float(main.blowup_time),
             "runs": json.dumps(status), "settings": json.dumps(_finite(comparison.settings)),
             "long_runs": json.dumps(_finite({
                 k: {m: v for m, v in f.items() if m not in ("series", "statistics")}
                 for k, f in comparison.long_runs.items()})),
             "note": "A priori skill does not guarantee a stable or accurate coarse "
                     "simulation; validate a posteriori before relying on a model."}
    return write_netcdf(xr.Dataset(data, coords=coords, attrs=attrs), path)


def _finite(obj):
    """NaN and Inf become null (JSON has no NaN); numpy values become Python ones."""
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_finite(v) for v in obj]
    if hasattr(obj, "tolist"):  # numpy scalars and arrays
        return _finite(obj.tolist())
    return obj
