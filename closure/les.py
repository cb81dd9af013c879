"""A posteriori testing: a 2-D coarse solver that runs a closure from filtered-DNS initial fields.

The coarse solver is :class:`closure.spectral.VorticityEquation` (the same equation, 2/3-rule
dealiasing, integrating-factor RK4 and forcing as the ``turb2d`` generator) with the closure as
its explicit subgrid term. Following DEVELOPERS.md, the filtered vorticity equation reads

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

A priori skill does not guarantee a stable or accurate coarse simulation; these runs are that
check, on this flow only. Validate a posteriori on your own flows before relying on a model.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.spectral import (
    Forcing,
    StepCollapse,
    VorticityEquation,
    energy_spectrum,
    enstrophy,
    fourier,
    kinetic_energy,
    shell_spacing,
    velocity_hat_from_vorticity,
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


def _velocity_gradients(fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
    """``{"ux": d_x u, "uy": d_y u, "vx": ..., "vy": ...}`` spectrally."""
    F = fourier(grid)
    uh, vh = F.forward(np.stack([fields["u"], fields["v"]]))
    ikx, iky = F.ik_of("x"), F.ik_of("y")
    ux, uy, vx, vy = F.backward(np.stack([ikx * uh, iky * uh, ikx * vh, iky * vh]))
    return {"ux": ux, "uy": uy, "vx": vx, "vy": vy}


def _strain(g: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(S_xx, S_xy, S_yy)."""
    return g["ux"], 0.5 * (g["uy"] + g["vx"]), g["vy"]


def _strain_magnitude(sxx, sxy, syy) -> np.ndarray:
    """|S| = sqrt(2 S_ij S_ij)."""
    return np.sqrt(2.0 * (sxx**2 + 2.0 * sxy**2 + syy**2))


def _check_fields(fields: Mapping[str, np.ndarray], grid: Grid) -> None:
    if grid.dims != ("y", "x"):
        raise UserError(f"the coarse solver runs 2-D (y, x) flows, not {grid.dims}")
    for name in ("u", "v"):
        if name not in fields:
            raise UserError(f"the closure needs the field {name!r}")


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
        sxx, sxy, syy = _strain(_velocity_gradients(fields, grid))
        nu_t = (self.constant * self.delta) ** 2 * _strain_magnitude(sxx, sxy, syy)
        return {"tau_xx": -2 * nu_t * sxx, "tau_xy": -2 * nu_t * sxy, "tau_yy": -2 * nu_t * syy}


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
        u, v = np.asarray(fields["u"]), np.asarray(fields["v"])
        sxx, sxy, syy = _strain(_velocity_gradients(fields, grid))
        mag = _strain_magnitude(sxx, sxy, syy)
        hat = self.test_filter(np.stack([u, v, u * u, u * v, v * v,
                                         mag * sxx, mag * sxy, mag * syy]), grid)
        uh, vh = hat[0], hat[1]
        L = (hat[2] - uh * uh, hat[3] - uh * vh, hat[4] - vh * vh)
        ht = _strain(_velocity_gradients({"u": uh, "v": vh}, grid))
        hmag = _strain_magnitude(*ht)
        a2, d2 = self.test_ratio**2, self.delta**2
        M = tuple(2 * d2 * (hat[5 + i] - a2 * hmag * ht[i]) for i in range(3))
        weights = (1.0, 2.0, 1.0)  # tau_xy stands for tau_xy and tau_yx
        num = sum(w * np.mean(l_ * m) for w, l_, m in zip(weights, L, M, strict=True))
        den = sum(w * np.mean(m * m) for w, m in zip(weights, M, strict=True))
        return float(num / den) if den > 0 else 0.0

    def evaluate(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        c = self.constant(fields, grid)
        self.last_constant = c
        sxx, sxy, syy = _strain(_velocity_gradients(fields, grid))
        nu_t = max(c, 0.0) * self.delta**2 * _strain_magnitude(sxx, sxy, syy)
        return {"tau_xx": -2 * nu_t * sxx, "tau_xy": -2 * nu_t * sxy, "tau_yy": -2 * nu_t * syy}


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
        g = _velocity_gradients(fields, grid)
        c = self.delta**2 / 12.0
        tau = {"tau_xx": c * (g["ux"] ** 2 + g["uy"] ** 2),
               "tau_xy": c * (g["ux"] * g["vx"] + g["uy"] * g["vy"]),
               "tau_yy": c * (g["vx"] ** 2 + g["vy"] ** 2)}
        if self.clip:
            sxx, sxy, syy = _strain(g)
            transfer = -(tau["tau_xx"] * sxx + 2 * tau["tau_xy"] * sxy + tau["tau_yy"] * syy)
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


# --- closures as vorticity tendencies -------------------------------------------------------


def subgrid_term(model, grid: Grid) -> SubgridTerm | None:
    """The vorticity tendency of a closure on the coarse ``grid``, as the solver's subgrid term.

    ``model`` is None, an object with ``target`` ("stress", "force" or "vorticity") and
    ``evaluate(fields, grid) -> dict`` (e.g. closure.model.ClosureModel or a baseline), or a
    plain callable ``f(fields, grid)`` that returns the vorticity tendency itself (s^-2).
    The returned callable maps ``{"u", "v", "vorticity"}`` to the tendency in the rfftn layout.
    """
    if model is None:
        return None
    F = fourier(grid)
    ikx, iky = F.ik_of("x"), F.ik_of("y")
    if not hasattr(model, "evaluate"):
        if not callable(model):
            raise UserError("a closure must have target and evaluate(fields, grid), or be a "
                            "callable returning the vorticity tendency")
        return lambda fields: F.forward(model(fields, grid))
    target = getattr(model, "target", None)
    need = {"stress": ("tau_xx", "tau_xy", "tau_yy"), "force": ("force_x", "force_y"),
            "vorticity": ("vorticity_forcing",)}
    if target not in need:
        raise UserError(f"the coarse solver runs stress, force or vorticity closures, not "
                        f"{target!r}: fit a model of one of those targets")

    def term(fields: dict[str, np.ndarray]) -> np.ndarray:
        out = model.evaluate(fields, grid)
        missing = [k for k in need[target] if k not in out]
        if missing:
            raise UserError(f"the {target} closure returned {sorted(out)}, not {missing}")
        h = F.forward(np.stack([np.asarray(out[k], dtype=float) for k in need[target]]))
        if target == "vorticity":
            vf = h[0]
        elif target == "force":
            vf = ikx * h[1] - iky * h[0]
        else:  # curl of div tau: (d_xx - d_yy) tau_xy + d_x d_y (tau_yy - tau_xx)
            vf = (ikx * ikx - iky * iky) * h[1] + ikx * iky * (h[2] - h[0])
        return -vf

    return term


# --- runs -----------------------------------------------------------------------------------


@dataclass
class Trajectory:
    """One coarse run (or the filtered reference) at its output times.

    ``fields`` maps "u", "v", "vorticity" to arrays (n_times, ny, nx); ``energy`` (m^2 s^-2)
    and ``enstrophy`` (s^-2) are spatial means of 0.5 u_i u_i and 0.5 omega^2. ``status`` is
    "completed", "blew up" or "reference"; ``blowup_time`` (s) and ``message`` say why a run
    stopped. ``times`` holds only the outputs reached.
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

    @property
    def blew_up(self) -> bool:
        return self.status == "blew up"


def _energy_weights(grid: Grid) -> np.ndarray:
    F = fourier(grid)
    return 0.5 * F.half_weights * F.inverse_k2 / F.size**2


def run(initial: Mapping[str, np.ndarray], grid: Grid, times: Sequence[float], *,
        closure=None, viscosity: float = 0.0, drag: float = 0.0,
        hyperviscosity_order: int = 1, forcing: Forcing | None = None, dealias: bool = True,
        cfl: float = 0.5, max_step: float = math.inf, energy_bound: float = 10.0,
        max_substeps: int = 100_000, name: str = "run",
        progress: Callable[[str, int, int], None] | None = None) -> Trajectory:
    """Run the coarse solver from ``initial`` fields and record it at ``times`` (s).

    ``initial`` has "vorticity" (s^-1) or "u" and "v" (m s^-1) on ``grid`` (2-D, periodic);
    ``times[0]`` is the initial time and later times are output times (increasing). ``closure``
    is anything :func:`subgrid_term` accepts. The run stops early, without raising, when the
    energy exceeds ``energy_bound`` times its initial value, a value turns non-finite or the
    CFL step collapses; ``Trajectory.status`` and ``blowup_time`` report it.
    """
    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or times.size < 1 or np.any(np.diff(times) <= 0):
        raise OptionError("the output times must be increasing")
    if not energy_bound > 1:
        raise OptionError(f"the energy bound must be > 1 (a multiple of the initial energy), "
                          f"got {energy_bound}")
    if "vorticity" in initial:
        omega0 = np.asarray(initial["vorticity"], dtype=float)
    else:
        omega0 = vorticity_from_velocity(np.asarray(initial["u"], dtype=float),
                                         np.asarray(initial["v"], dtype=float), grid)
    if omega0.shape != grid.shape:
        raise UserError(f"the initial field has shape {omega0.shape}, not the grid's "
                        f"{grid.shape}")
    if not np.all(np.isfinite(omega0)):
        raise UserError("the initial field has NaN or Inf values")
    eq = VorticityEquation(grid, viscosity=viscosity, drag=drag,
                           hyperviscosity_order=hyperviscosity_order,
                           forcing=forcing or Forcing(), dealias=dealias,
                           subgrid=subgrid_term(closure, grid))
    q = eq.initial_state(omega0)
    weights = _energy_weights(grid)
    e0 = float(np.sum(weights * np.abs(q[0]) ** 2))
    limit = energy_bound * e0 if e0 > 0 else math.inf
    frames = {"u": [], "v": [], "vorticity": []}
    kept_times, constants = [], []
    state = {"status": "completed", "time": None, "message": ""}

    def record(q, t):
        f = eq.fields(q)
        for k in frames:
            frames[k].append(f[k])
        kept_times.append(t)
        if isinstance(closure, DynamicSmagorinsky):
            constants.append(closure.constant(f, grid))

    def blown(q, t_now) -> bool:
        e = float(np.sum(weights * np.abs(q[0]) ** 2))
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
    with np.errstate(all="ignore"):
        record(q, float(times[0]))
        for j in range(1, times.size):
            t0, dt_out = float(times[j - 1]), float(times[j] - times[j - 1])
            try:
                q, n = eq.advance(q, dt_out, cfl, max_step,
                                  on_step=lambda q, t, t0=t0: not blown(q, t0 + t),
                                  max_substeps=max_substeps)
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
            record(q, float(times[j]))
            if progress is not None:
                progress(name, j, times.size - 1)
    arrays = {k: np.stack(v) for k, v in frames.items()}
    traj = Trajectory(
        name=name, grid=grid, times=np.asarray(kept_times),
        fields=arrays,
        energy=np.array([kinetic_energy((u, v)) for u, v in zip(arrays["u"], arrays["v"],
                                                                    strict=True)]),
        enstrophy=np.array([enstrophy(w) for w in arrays["vorticity"]]),
        status=state["status"], blowup_time=state["time"], message=state["message"],
        steps=steps)
    if constants:
        # C = C_s^2 at each output time (before clipping)
        traj.diagnostics["dynamic_constant"] = [float(c) for c in constants]
    return traj


def reference_trajectory(fields: Sequence[Mapping[str, np.ndarray]], times: Sequence[float],
                         grid: Grid, dealias: bool = True, name: str = REFERENCE) -> Trajectory:
    """The filtered DNS as a Trajectory on the coarse grid, projected onto the modes the
    coarse solver carries (its 2/3-rule modes when ``dealias``; velocity from vorticity)."""
    F = fourier(grid)
    mask = F.dealias if dealias else 1.0
    frames = {"u": [], "v": [], "vorticity": []}
    for f in fields:
        if "vorticity" in f:
            w = np.asarray(f["vorticity"], dtype=float)
        else:
            w = vorticity_from_velocity(f["u"], f["v"], grid)
        wh = F.forward(w) * mask
        wh[0, 0] = 0.0
        uh, vh = velocity_hat_from_vorticity(wh, grid)
        u, v, w = F.backward(np.stack([uh, vh, wh]))
        frames["u"].append(u)
        frames["v"].append(v)
        frames["vorticity"].append(w)
    arrays = {k: np.stack(v) for k, v in frames.items()}
    return Trajectory(
        name=name, grid=grid, times=np.asarray(times, dtype=float), fields=arrays,
        energy=np.array([kinetic_energy((u, v)) for u, v in zip(arrays["u"], arrays["v"],
                                                                    strict=True)]),
        enstrophy=np.array([enstrophy(w) for w in arrays["vorticity"]]),
        status=REFERENCE)


# --- metrics --------------------------------------------------------------------------------


def hellinger(p: np.ndarray, q: np.ndarray) -> float:
    """Hellinger distance sqrt(1 - sum sqrt(p_i q_i)) of two histograms (normalised here)."""
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    if p.sum() <= 0 or q.sum() <= 0:
        return math.nan
    bc = float(np.sum(np.sqrt(p / p.sum() * q / q.sum())))
    return math.sqrt(max(0.0, 1.0 - bc))


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
    top = int(np.ceil(np.sqrt(sum((n // 2) ** 2 for n in grid.shape))))
    bands, lo = [], 1
    while lo <= top:
        bands.append((lo, 2 * lo))
        lo *= 2
    return bands


def band_energies(u: np.ndarray, v: np.ndarray, grid: Grid,
                  bands: Sequence[tuple[int, int]]) -> np.ndarray:
    """Kinetic energy (m^2 s^-2) in each band of shells [lo, hi)."""
    k, E = energy_spectrum((u, v), grid)
    j = np.rint(k / shell_spacing(grid)).astype(int)
    dk = shell_spacing(grid)
    return np.array([float(np.sum(E[(j >= lo) & (j < hi)]) * dk) for lo, hi in bands])


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
        eb = band_energies(run_.fields["u"][i], run_.fields["v"][i], grid, bands)
        rb = band_energies(reference.fields["u"][r], reference.fields["v"][r], grid, bands)
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
    baselines), the filtered ``reference`` (or None) and ``metrics`` per run label."""

    runs: dict[str, Trajectory]
    reference: Trajectory | None
    metrics: dict[str, dict]
    settings: dict = field(default_factory=dict)

    def to_json(self) -> str:
        """:meth:`to_dict` as JSON text; NaN and Inf (a blown-up run) become null."""
        import json

        return json.dumps(_finite(self.to_dict()), indent=1, allow_nan=False)

    def to_dict(self) -> dict:
        """Plain JSON: {"runs": {label: {"time", "energy", "enstrophy", "spectrum": {"k",
        "E"}, "vorticity_pdf": {"x", "density"}, "blowup_time", "status", "message",
        "steps", "metrics"}}, "reference", "spectrum_time", "settings", "note"}; the spectra
        and PDFs are those at ``spectrum_time``, the last time every run reached."""
        everyone = list(self.runs.values()) + ([self.reference] if self.reference else [])
        common = min(float(t.times[-1]) for t in everyone)
        values = [t.fields["vorticity"][_index_at(t, common)] for t in everyone]
        lo = min(float(v.min()) for v in values)
        hi = max(float(v.max()) for v in values)
        edges = np.linspace(lo, hi if hi > lo else lo + 1.0, 65)
        out = {}
        for t in everyone:
            i = _index_at(t, common)
            k, E = energy_spectrum((t.fields["u"][i], t.fields["v"][i]), t.grid)
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
            if t.diagnostics:
                entry["diagnostics"] = t.diagnostics
            if t.name in self.metrics:
                entry["metrics"] = self.metrics[t.name]
            out[t.name] = entry
        return {
            "runs": out,
            "reference": self.reference.name if self.reference else None,
            "spectrum_time": common,
            "settings": self.settings,
            "note": "A priori skill does not guarantee a stable or accurate coarse "
                    "simulation; these runs test this flow only. Validate a posteriori on "
                    "your own flows before relying on a model.",
        }

    def table(self) -> str:
        """A text table: one row per run, errors against the reference."""
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
        widths = [max(len(str(r[i])) for r in [head, *lines]) for i in range(len(head))]
        text = ["  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)).rstrip()
                for r in [head, *lines]]
        legend = ("errors: time-mean relative error against the filtered DNS of kinetic energy "
                  "(E), enstrophy (Z) and band energy per octave of mode numbers; PDF dist: "
                  "Hellinger distance of the vorticity PDFs" if self.reference else
                  "no reference: errors not computed")
        return "\n".join([*text, legend])


def _index_at(t: Trajectory, time: float) -> int:
    return int(np.argmin(np.abs(t.times - time)))


def _fmt(v) -> str:
    return "-" if v is None or not np.isfinite(v) else f"{v:.3g}"


def compare_runs(initial: Mapping[str, np.ndarray], grid: Grid, times: Sequence[float],
                 closures: Mapping[str, object], reference: Trajectory | None = None,
                 progress: Callable[[str, int, int], None] | None = None,
                 **solver) -> Comparison:
    """Run each closure (label -> closure, None for no model) from ``initial`` at ``times``
    with the same ``solver`` options (see :func:`run`) and score them against ``reference``."""
    runs, metrics = {}, {}
    for label, closure in closures.items():
        runs[label] = run(initial, grid, times, closure=closure, name=label, progress=progress,
                          **solver)
        if reference is not None:
            metrics[label] = compare(runs[label], reference)
    return Comparison(runs, reference, metrics)


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
    """Read 2-D fine fields from ``path`` (closure.io; ``input_options`` as in
    :func:`simulate`) and coarse-grain them as the discovery pipeline does
    (closure.residuals); ``kind="none"`` keeps the fields as they are (ratio 1), and the
    baselines then use the grid spacing as their width."""
    from closure.filters import make_coarse_graining
    from closure.pipeline import refuse_land_mask
    from closure.residuals import coarse_grain_snapshot

    if kind not in FILTER_CHOICES:
        raise OptionError(f"unknown filter {kind!r}: choose one of {', '.join(FILTER_CHOICES)}")
    src, level = _open_input(path, input_options)
    with src:
        grid = src.grid
        if grid.dims != ("y", "x"):
            raise UserError(f"{path} holds {grid.dims} fields: the coarse solver runs 2-D "
                            "(y, x) periodic flows")
        if not grid.periodic:
            raise UserError(f"{path}: the coarse solver needs periodic data")
        if "time" in src.units and src.units["time"].strip() not in ("s", "second", "seconds"):
            raise UserError(f"{path}: time is in {src.units['time']!r}; the coarse solver "
                            "needs seconds")
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
            if cg is None:
                u, v = snap.fields["u"], snap.fields["v"]
                f = {"u": u, "v": v, "vorticity": vorticity_from_velocity(u, v, grid)}
            else:
                cs = coarse_grain_snapshot(snap, cg)
                f = {k: cs.fields[k] for k in ("u", "v", "vorticity")}
            fields.append(f)
            times.append(snap.time)
        return CoarseData(coarse, times, fields, dict(src.attrs), float(delta), described,
                          str(path), chosen)


def parse_forcing(text: str | None, attrs: Mapping) -> Forcing:
    """``file`` (the file's turb2d forcing attributes, else none), ``none``,
    ``shell:K:A[:SEED]`` or ``kolmogorov:K:A``."""
    text = (text or "file").strip()
    if text == "file":
        return Forcing.from_attrs(attrs) if "forcing" in attrs else Forcing()
    if text == "none":
        return Forcing()
    parts = text.split(":")
    try:
        if parts[0] == "shell" and len(parts) in (3, 4):
            seed = int(parts[3]) if len(parts) == 4 else int(attrs.get("forcing_seed", 0))
            return Forcing("shell", float(parts[1]), float(parts[2]), seed)
        if parts[0] == "kolmogorov" and len(parts) == 3:
            return Forcing("kolmogorov", float(parts[1]), float(parts[2]))
    except ValueError:
        pass
    raise OptionError(f"--forcing {text!r}: use file, none, shell:K:A[:SEED] or kolmogorov:K:A")


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
             input_options: Mapping | None = None) -> Comparison:
    """Run ``model`` (None: no model) and ``baselines`` from snapshot ``initial_index`` of the
    file ``initial``, coarse-grained, and score them against the coarse-grained ``reference``
    file (default: the initial file when it has later snapshots).

    ``input_options`` (both files): ``variables`` (our name -> the file's), ``group``,
    ``mask``, ``levels`` (one level of a level stack) and ``spacing``, as closure.io reads them.

    The coarse-graining defaults to the model's own (its ``filter``), else Gaussian, ratio 4,
    width 2 x ratio. Viscosity (m^2 s^-1), drag (s^-1), hyperviscosity order, forcing and
    dealiasing default to the initial file's attributes (our turb2d files carry them).
    Output times are the reference's snapshot times within ``duration`` (s) of the start, or
    every ``interval`` s without a reference.
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
    init = coarse_data(initial, filter_kind, ratio, width, width_units, [initial_index],
                       input_options)
    attrs = init.attrs
    t_start = init.times[0] if init.times[0] is not None else 0.0

    ref_data = None
    if reference is None:
        src, _ = _open_input(initial, input_options)
        with src:
            later = len(src) > initial_index + 1
        if later:
            reference = initial
    if reference is not None:
        ref_data = coarse_data(reference, filter_kind, ratio, width, width_units,
                               input_options=input_options)
        if ref_data.grid.shape != init.grid.shape:
            raise UserError(f"the reference {reference} coarse-grains to {ref_data.grid.shape},"
                            f" the initial file to {init.grid.shape}: use files on the same grid")
        if any(t is None for t in ref_data.times):
            raise UserError(f"the reference {reference} has no time coordinate: add one (s)")
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
    else:
        if duration is None:
            raise OptionError("without a reference give --time (the run length in s)")
        if not duration > 0:
            raise OptionError(f"--time must be > 0, got {duration}")
        step = interval if interval is not None else duration / 10
        if not step > 0:
            raise OptionError(f"--interval must be > 0, got {interval}")
        count = max(1, int(round(duration / step)))
        times = list(t_start + np.linspace(0.0, duration, count + 1))

    nu = _attr_float(attrs, "viscosity", "--viscosity", viscosity)
    mu = drag if drag is not None else float(attrs.get("drag", 0.0))
    order = hyperviscosity_order if hyperviscosity_order is not None else \
        int(attrs.get("hyperviscosity_order", 1))
    if dealias is None:
        dealias = str(attrs.get("dealias", "true")).lower() == "true"
    force = parse_forcing(forcing, attrs)
    grid = init.grid
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
    ref_traj = (reference_trajectory(ref_data.fields, ref_data.times, grid, dealias)
                if ref_data is not None else None)
    comparison = compare_runs(init.fields[0], grid, times, closures, ref_traj,
                              progress=progress, viscosity=nu, drag=mu,
                              hyperviscosity_order=order, forcing=force, dealias=dealias,
                              cfl=cfl, energy_bound=energy_bound)
    comparison.settings = {
        "initial": str(initial), "initial_index": int(initial_index),
        "reference": None if reference is None else str(reference),
        "coarse_graining": init.coarse_graining, "grid": grid.to_dict(),
        "delta": init.delta, "viscosity": nu, "drag": mu, "hyperviscosity_order": order,
        "forcing": force.to_attrs(), "dealias": bool(dealias), "cfl": cfl,
        "energy_bound": energy_bound, "smagorinsky_constant": smagorinsky_constant,
        "times": [float(t) for t in times], "warnings": warnings,
    }
    return comparison


def write_run(comparison: Comparison, path, label: str | None = None):
    """Write the coarse trajectory of run ``label`` (default: the first) to netCDF: u, v,
    vorticity (time, y, x) at every output time (NaN after a blow-up), plus energy and
    enstrophy series (run, time) of every run and the reference. Atomic."""
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

    data = {name: (("time", "y", "x"), on_times(main, main.fields[name]),
                   {**VARIABLE_ATTRS[name], "long_name": VARIABLE_ATTRS[name]["long_name"]
                    + f" (coarse run: {label})"})
            for name in ("u", "v", "vorticity")}
    data["energy"] = (("run", "time"), np.stack([on_times(t, t.energy) for t in everyone]),
                      {"long_name": "mean kinetic energy 0.5 <u_i u_i>", "units": "m2 s-2"})
    data["enstrophy"] = (("run", "time"), np.stack([on_times(t, t.enstrophy)
                                                    for t in everyone]),
                         {"long_name": "mean enstrophy 0.5 <omega^2>", "units": "s-2"})
    coords = {"time": ("time", times, COORD_ATTRS["time"]),
              "y": ("y", grid.coords("y"), COORD_ATTRS["y"]),
              "x": ("x", grid.coords("x"), COORD_ATTRS["x"]),
              "run": ("run", np.array([t.name for t in everyone], dtype=object))}
    status = {t.name: {"status": t.status, "blowup_time": t.blowup_time, "message": t.message}
              for t in everyone}
    attrs = {"Conventions": "CF-1.8", "title": "a posteriori coarse run (closure les)",
             "run": label, "status": main.status,
             "blowup_time": "none" if main.blowup_time is None else float(main.blowup_time),
             "runs": json.dumps(status), "settings": json.dumps(comparison.settings),
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
