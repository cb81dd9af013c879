"""Small pseudo-spectral operators on periodic grids, shared by the demo solvers and ``les``.

Layout: real FFTs over the trailing ``grid.ndim`` axes (``scipy.fft.rfftn``, unnormalised
forward transform), so a spectral array has the shape ``grid.shape`` with the last axis cut to
``n // 2 + 1``. Wavenumbers are angular, ``2 pi m / L`` for the integer mode number ``m``.

2-D flows use the vorticity ``omega = d_x v - d_y u`` and the streamfunction ``psi`` with
``u = d_y psi``, ``v = -d_x psi``, so ``omega = -laplacian(psi)``.

Time stepping is the classical fourth-order Runge-Kutta scheme with the diagonal linear part
(viscosity, hyperviscosity, linear drag) integrated exactly by an integrating factor
(``ifrk4_step``): a linear mode decays exactly as ``exp(L t)`` whatever the step, the step is
limited only by the advective CFL number, and explicit terms (nonlinear advection, forcing,
closure models) are fourth-order accurate.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import cached_property, lru_cache

import numpy as np
import scipy.fft

from closure.errors import UserError
from closure.grid import Grid

#: Orszag's 2/3 rule: keep |m| < n/3 in every direction (Orszag 1971, J. Atmos. Sci. 28:1074).
DEALIAS_FRACTION = 2.0 / 3.0


class StepCollapse(RuntimeError):  # noqa: N818  (a state, not a failure of the caller)
    """The CFL time step fell below the allowed minimum (the state is blowing up)."""


@dataclass(frozen=True, eq=False)
class Fourier:
    """Wavenumbers and transforms of a periodic grid in the ``rfftn`` layout.

    ``k[i]`` is the angular wavenumber along ``grid.dims[i]``, shaped to broadcast against a
    spectral array; ``ik[i]`` is the first-derivative multiplier ``1j * k[i]`` with the Nyquist
    mode of even axes set to zero (its derivative is not a real field).
    """

    grid: Grid

    def __post_init__(self):
        if not self.grid.periodic:
            raise UserError("spectral operators need periodic data: declare the grid periodic")

    @cached_property
    def spectral_shape(self) -> tuple[int, ...]:
        return self.grid.shape[:-1] + (self.grid.shape[-1] // 2 + 1,)

    @cached_property
    def k(self) -> tuple[np.ndarray, ...]:
        g = self.grid
        out = []
        for i, d in enumerate(g.dims):
            k = g.wavenumbers(d, real=(i == g.ndim - 1))
            shape = [1] * g.ndim
            shape[i] = k.size
            out.append(k.reshape(shape))
        return tuple(out)

    @cached_property
    def ik(self) -> tuple[np.ndarray, ...]:
        out = []
        for i, k in enumerate(self.k):
            m = 1j * k
            if self.grid.shape[i] % 2 == 0:
                m = m.copy()
                index = [0] * self.grid.ndim
                index[i] = self.grid.shape[i] // 2
                m[tuple(index)] = 0.0
            out.append(m)
        return tuple(out)

    def ik_of(self, dim: str) -> np.ndarray:
        """First-derivative multiplier along direction ``dim``."""
        return self.ik[self.grid.axis(dim)]

    @cached_property
    def k2(self) -> np.ndarray:
        """|k|^2 on the full spectral shape."""
        return sum(np.broadcast_to(k**2, self.spectral_shape) for k in self.k)

    @cached_property
    def inverse_k2(self) -> np.ndarray:
        """1 / |k|^2, with 0 at k = 0 (the mean mode)."""
        k2 = self.k2
        out = np.zeros_like(k2)
        np.divide(1.0, k2, out=out, where=k2 > 0)
        return out

    @cached_property
    def k_complex(self) -> tuple[np.ndarray, ...]:
        """``k`` as complex arrays: a complex array times these gives the bits of the product
        with ``k`` without numpy's slow mixed-type (buffered casting) loop."""
        return tuple(k.astype(complex) for k in self.k)

    @cached_property
    def inverse_k2_complex(self) -> np.ndarray:
        """``inverse_k2`` as a complex array (see :attr:`k_complex`)."""
        return self.inverse_k2.astype(complex)

    @cached_property
    def modes(self) -> tuple[np.ndarray, ...]:
        """Integer mode numbers ``m`` per direction (``k = 2 pi m / L``), broadcastable."""
        return tuple(np.rint(k * L / (2 * np.pi)).astype(int)
                     for k, L in zip(self.k, self.grid.lengths, strict=True))

    @cached_property
    def dealias(self) -> np.ndarray:
        """2/3-rule mask (1 kept, 0 removed): |m_i| < n_i / 3 in every direction."""
        mask = np.ones(self.spectral_shape)
        for m, n in zip(self.modes, self.grid.shape, strict=True):
            mask = mask * (np.abs(m) < n * DEALIAS_FRACTION / 2.0)
        return mask

    @cached_property
    def half_weights(self) -> np.ndarray:
        """Weight of each stored mode in sums over the full spectrum (2 for the modes whose
        conjugate is not stored, 1 for the zero and Nyquist columns of the last axis)."""
        n = self.grid.shape[-1]
        w = np.full(n // 2 + 1, 2.0)
        w[0] = 1.0
        if n % 2 == 0:
            w[-1] = 1.0
        shape = [1] * self.grid.ndim
        shape[-1] = w.size
        return np.broadcast_to(w.reshape(shape), self.spectral_shape)

    @property
    def size(self) -> int:
        return int(np.prod(self.grid.shape))

    def _axes(self, ndim: int) -> tuple[int, ...]:
        return tuple(range(ndim - self.grid.ndim, ndim))

    def forward(self, f: np.ndarray) -> np.ndarray:
        """``rfftn`` over the trailing grid axes (leading axes are a stack)."""
        f = np.asarray(f, dtype=float)
        return scipy.fft.rfftn(f, axes=self._axes(f.ndim), workers=-1)

    def backward(self, fh: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`forward` (real output of ``grid.shape`` on the trailing axes)."""
        return scipy.fft.irfftn(fh, s=self.grid.shape, axes=self._axes(fh.ndim), workers=-1)

    def derivative(self, fh: np.ndarray, dim: str) -> np.ndarray:
        """Spectral array of the first derivative along ``dim``."""
        return self.ik_of(dim) * fh


@lru_cache(maxsize=32)
def fourier(grid: Grid) -> Fourier:
    """The (cached) spectral operators of a periodic grid."""
    return Fourier(grid)


def dealias_mask(grid: Grid) -> np.ndarray:
    """The 2/3-rule mask of ``grid`` in the ``rfftn`` layout (1 kept, 0 removed)."""
    return fourier(grid).dealias


def wavenumbers(grid: Grid) -> tuple[np.ndarray, ...]:
    """Angular wavenumber arrays per direction of ``grid``, broadcastable in the rfftn layout."""
    return fourier(grid).k


# --- 2-D: vorticity, streamfunction, velocity --------------------------------------------


def _check_2d(grid: Grid) -> None:
    if grid.dims != ("y", "x"):
        raise UserError(f"this operation needs a 2-D (y, x) grid, got dims {grid.dims}")


def streamfunction_hat(omega_hat: np.ndarray, grid: Grid) -> np.ndarray:
    """Spectral streamfunction from spectral vorticity: psi_hat = omega_hat / |k|^2."""
    _check_2d(grid)
    return omega_hat * fourier(grid).inverse_k2


def velocity_hat_from_vorticity(omega_hat: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Spectral (u, v) from spectral vorticity, via u = d_y psi, v = -d_x psi."""
    F = fourier(grid)
    psi = streamfunction_hat(omega_hat, grid)
    return F.ik_of("y") * psi, -F.ik_of("x") * psi


def velocity_from_vorticity(omega: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Velocity (u along x, v along y) of a 2-D periodic vorticity field ``omega[y, x]``.

    The mean of ``omega`` (which a periodic velocity cannot carry) is ignored, and the velocity
    has zero mean.
    """
    F = fourier(grid)
    uh, vh = velocity_hat_from_vorticity(F.forward(omega), grid)
    u, v = F.backward(np.stack([uh, vh]))
    return u, v


def vorticity_from_velocity(u: np.ndarray, v: np.ndarray, grid: Grid) -> np.ndarray:
    """omega = d_x v - d_y u, spectrally (2-D)."""
    _check_2d(grid)
    F = fourier(grid)
    return F.backward(F.ik_of("x") * F.forward(v) - F.ik_of("y") * F.forward(u))


# --- 3-D: projection -----------------------------------------------------------------------


def project_hat(velocity_hat: np.ndarray, grid: Grid) -> np.ndarray:
    """Leray projection of a spectral vector field (leading axis: components in ``grid.dims``
    order) onto divergence-free fields: u_hat - k (k . u_hat) / |k|^2."""
    F = fourier(grid)
    # complex multipliers on complex data: the bits of the real ones, several times faster
    kind = np.iscomplexobj(velocity_hat)
    ks, inverse_k2 = ((F.k_complex, F.inverse_k2_complex) if kind else (F.k, F.inverse_k2))
    kdotu = sum(k * velocity_hat[i] for i, k in enumerate(ks))
    out = np.empty(velocity_hat.shape, np.result_type(velocity_hat, kdotu))
    for i, k in enumerate(ks):  # no stacked copy
        t = k * kdotu
        t *= inverse_k2
        np.subtract(velocity_hat[i], t, out=out[i])
    return out


def project(velocity: Sequence[np.ndarray], grid: Grid) -> tuple[np.ndarray, ...]:
    """Divergence-free part of a periodic vector field (components in ``grid.dims`` order).

    The Nyquist modes of even axes, whose divergence a real field cannot represent, are removed.
    """
    F = fourier(grid)
    uh = F.forward(np.stack(velocity))
    for i, n in enumerate(grid.shape):
        if n % 2 == 0:
            index = [slice(None)] * (grid.ndim + 1)
            index[i + 1] = n // 2
            uh[tuple(index)] = 0.0
    return tuple(F.backward(project_hat(uh, grid)))


def divergence_hat_norm(velocity_hat: np.ndarray, grid: Grid) -> float:
    """max |k . u_hat| / max(|k| |u_hat|): the relative spectral divergence (0 when solenoidal)."""
    F = fourier(grid)
    kdotu = sum(k * velocity_hat[i] for i, k in enumerate(F.k))
    scale = np.sqrt(F.k2) * np.sqrt(sum(np.abs(velocity_hat[i]) ** 2
                                        for i in range(len(F.k))))
    top = float(np.max(scale))
    return float(np.max(np.abs(kdotu))) / top if top > 0 else 0.0


# --- diagnostics ---------------------------------------------------------------------------


def mean_square_hat(fh: np.ndarray, grid: Grid) -> np.ndarray:
    """Per-mode contribution to the spatial mean of f^2 (Parseval), in the rfftn layout."""
    F = fourier(grid)
    return F.half_weights * np.abs(fh) ** 2 / F.size**2


def kinetic_energy(velocity: Sequence[np.ndarray]) -> float:
    """Mean kinetic energy per unit mass, 0.5 <u_i u_i> (m^2 s^-2)."""
    return float(0.5 * sum(np.mean(np.asarray(c) ** 2) for c in velocity))


def enstrophy(omega: np.ndarray | Sequence[np.ndarray]) -> float:
    """Mean enstrophy 0.5 <omega_i omega_i> (s^-2); a 2-D vorticity is one array."""
    comps = [omega] if isinstance(omega, np.ndarray) else list(omega)
    return float(0.5 * sum(np.mean(np.asarray(c) ** 2) for c in comps))


def shell_spacing(grid: Grid) -> float:
    """Width of the isotropic wavenumber shells: the smallest fundamental wavenumber 2 pi / L."""
    return 2 * np.pi / max(grid.lengths)


def energy_spectrum(velocity: Sequence[np.ndarray], grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Isotropic (shell-summed) kinetic energy spectrum.

    Returns ``(k, E)``: shell centres ``k_j = j dk`` (``dk = 2 pi / L``, rad m^-1) and the
    spectral density ``E_j`` (m^3 s^-2) of the modes with ``|k|`` in ``[k_j - dk/2,
    k_j + dk/2)``, normalised so that ``sum(E) * dk`` is the mean kinetic energy
    ``0.5 <u_i u_i>`` (Parseval). A stack of components is given in any order.
    """
    F = fourier(grid)
    velocity = [np.asarray(c, dtype=float) for c in velocity]
    if not velocity or any(c.shape != grid.shape for c in velocity):
        raise UserError(f"energy_spectrum needs velocity components of shape {grid.shape}")
    density = 0.5 * sum(mean_square_hat(F.forward(c), grid) for c in velocity)
    return spectrum_of_density(density, grid)


def scalar_spectrum(f: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Shell-summed spectrum of 0.5 <f^2> (same shells and normalisation as energy_spectrum)."""
    return spectrum_of_density(0.5 * mean_square_hat(fourier(grid).forward(f), grid), grid)


def spectrum_of_density(density: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Bin a per-mode density (rfftn layout) into isotropic shells; see ``energy_spectrum``."""
    dk = shell_spacing(grid)
    shell = np.rint(np.sqrt(fourier(grid).k2) / dk).astype(int)
    sums = np.bincount(shell.ravel(), weights=np.asarray(density).ravel())
    return dk * np.arange(sums.size), sums / dk


# --- time stepping -------------------------------------------------------------------------


def ifrk4_step(q: np.ndarray, dt: float, tendency: Callable[[np.ndarray], np.ndarray],
               linear: np.ndarray | None = None) -> np.ndarray:
    """One step of dq/dt = L q + N(q): classical RK4 with L (diagonal, ``linear``) integrated
    exactly by an integrating factor; ``linear=None`` is plain RK4 on N.

    ``q`` is any array (e.g. a spectral state); ``tendency(q)`` returns N(q) of the same shape.
    """
    if linear is None:
        k1 = tendency(q)
        k2 = tendency(q + 0.5 * dt * k1)
        k3 = tendency(q + 0.5 * dt * k2)
        k4 = tendency(q + dt * k3)
        return q + (dt / 6.0) * (k1 + 2.0 * (k2 + k3) + k4)
    half = np.exp(0.5 * dt * linear)
    if np.iscomplexobj(q) and not np.iscomplexobj(half):
        half = half.astype(q.dtype)  # the same products, without mixed-type loops
    full = half * half
    k1 = tendency(q)
    k2 = tendency(half * (q + 0.5 * dt * k1))
    k3 = tendency(half * q + 0.5 * dt * k2)
    k4 = tendency(full * q + dt * half * k3)
    return full * q + (dt / 6.0) * (full * k1 + 2.0 * half * (k2 + k3) + k4)


def cfl_time_step(velocity: Sequence[np.ndarray], grid: Grid, cfl: float,
                  max_step: float = math.inf) -> float:
    """The time step with ``dt * max(sum_i |u_i| / h_i) = cfl`` (capped at ``max_step``).

    ``velocity`` components are in ``grid.dims`` order. Infinite when the fluid is at rest and
    no cap is given.
    """
    rate = sum(np.abs(c) / h for c, h in zip(velocity, grid.spacing, strict=True))
    peak = float(np.max(rate))
    if not np.isfinite(peak):
        return 0.0
    return min(max_step, cfl / peak) if peak > 0 else max_step


def substeps(interval: float, step: float, max_substeps: int = 1_000_000) -> tuple[int, float]:
    """Split ``interval`` into ``n`` equal steps no longer than ``step``: returns (n, dt).

    Raises StepCollapse when that would need more than ``max_substeps`` steps.
    """
    if interval <= 0:
        return 0, 0.0
    if not step > 0:
        raise StepCollapse("the CFL time step is zero or not finite")
    n = max(1, math.ceil(interval / step * (1 - 1e-12)))
    if n > max_substeps:
        raise StepCollapse(f"the CFL time step {step:.3g} s would need {n} steps for "
                           f"{interval:.3g} s")
    return n, interval / n


# --- 2-D forcing ---------------------------------------------------------------------------

FORCING_KINDS = ("none", "shell", "kolmogorov")


@dataclass(frozen=True)
class Forcing:
    """A steady vorticity forcing, defined by mode numbers so it is the same field on any grid
    that resolves it.

    ``shell``: random complex amplitudes (seeded, Gaussian) on the integer wavevectors ``m``
    with ``| |m| - wavenumber | <= 1``, scaled so that the forcing's rms is ``amplitude``
    (s^-2). ``kolmogorov``: the body force ``f_x = F sin(k_f y)`` (``k_f = 2 pi wavenumber /
    L_y``), i.e. the vorticity forcing ``-F k_f cos(k_f y)``, with ``F = amplitude`` (m s^-2).
    """

    kind: str = "none"
    wavenumber: float = 4.0
    amplitude: float = 0.0
    seed: int = 0

    def __post_init__(self):
        if self.kind not in FORCING_KINDS:
            raise UserError(f"unknown forcing {self.kind!r}: choose one of "
                            f"{', '.join(FORCING_KINDS)}")
        if not np.isfinite(self.amplitude) or not np.isfinite(self.wavenumber):
            raise UserError("the forcing amplitude and wavenumber must be finite numbers")
        if self.kind != "none" and self.wavenumber <= 0:
            raise UserError(f"the forcing wavenumber must be positive, got {self.wavenumber}")

    @property
    def active(self) -> bool:
        return self.kind != "none" and self.amplitude != 0.0

    def vorticity_hat(self, grid: Grid) -> np.ndarray | None:
        """The forcing of the vorticity equation on ``grid`` (rfftn layout), or None."""
        if not self.active:
            return None
        _check_2d(grid)
        F = fourier(grid)
        out = np.zeros(F.spectral_shape, dtype=complex)
        ny, nx = grid.shape
        if self.kind == "kolmogorov":
            m = int(round(self.wavenumber))
            if abs(m - self.wavenumber) > 1e-9 or m >= ny * DEALIAS_FRACTION / 2:
                raise UserError(f"the Kolmogorov forcing wavenumber must be a whole number "
                                f"below {ny / 3:.0f} on this grid, got {self.wavenumber}")
            kf = 2 * np.pi * m / grid.lengths[0]
            # -F kf cos(kf y): coefficient -F kf / 2 at +-m, times the unnormalised size
            out[m, 0] = out[-m, 0] = -0.5 * self.amplitude * kf * F.size
            return out
        modes = shell_modes(self.wavenumber)
        top = max(max(abs(a), abs(b)) for a, b in modes)
        if top >= min(ny, nx) * DEALIAS_FRACTION / 2:
            raise UserError(f"the forcing shell reaches mode {top}, beyond what a {ny}x{nx} "
                            "grid resolves after dealiasing: use a smaller forcing wavenumber "
                            "or a finer grid")
        rng = np.random.default_rng(self.seed)
        coef = rng.standard_normal(len(modes)) + 1j * rng.standard_normal(len(modes))
        # full-spectrum mean square = 2 sum over the half-plane representatives
        coef *= self.amplitude / np.sqrt(2.0 * np.sum(np.abs(coef) ** 2))
        for (my, mx), c in zip(modes, coef, strict=True):
            out[my % ny, mx] = c * F.size
            if mx == 0:
                out[-my % ny, 0] = np.conj(c) * F.size
        return out

    def to_attrs(self) -> dict:
        return {"forcing": self.kind, "forcing_wavenumber": float(self.wavenumber),
                "forcing_amplitude": float(self.amplitude), "forcing_seed": int(self.seed)}

    @classmethod
    def from_attrs(cls, attrs: dict) -> Forcing:
        return cls(str(attrs.get("forcing", "none")),
                   float(attrs.get("forcing_wavenumber", 4.0)),
                   float(attrs.get("forcing_amplitude", 0.0)),
                   int(attrs.get("forcing_seed", attrs.get("seed", 0))))


def shell_modes(wavenumber: float) -> list[tuple[int, int]]:
    """Half-plane integer wavevectors (m_y, m_x) with ``| |m| - wavenumber | <= 1``, in a fixed
    order (m_x > 0, or m_x = 0 and m_y > 0)."""
    top = int(np.ceil(wavenumber + 1))
    out = []
    for mx in range(0, top + 1):
        for my in range(-top, top + 1):
            if mx == 0 and my <= 0:
                continue
            if abs(math.hypot(mx, my) - wavenumber) <= 1.0 + 1e-12:
                out.append((my, mx))
    return out


# --- the 2-D vorticity equation ------------------------------------------------------------


@dataclass(eq=False)
class VorticityEquation:
    """Incompressible 2-D flow in vorticity form on a periodic (y, x) grid:

        d_t omega + u . grad omega = -nu (-lap)^p omega - mu omega + F_omega + S(omega)

    with linear drag ``mu`` (s^-1), viscosity ``nu`` (m^2 s^-1 for ``p = 1``; m^(2p) s^-1 for
    hyperviscosity order ``p``), a steady ``forcing`` and an optional explicit ``subgrid`` term
    S (a callable of the real fields ``{"u", "v", "vorticity"}`` returning the vorticity
    tendency on the grid: a real array, or a complex one already in the rfftn layout).
    With ``scalar`` a passive scalar ``c`` is carried too:

        d_t c + u . grad c = kappa lap c - G v       (G = ``scalar_gradient``, a mean
                                                      gradient of the total scalar along y)

    The state is the spectral array of ``[omega]`` or ``[omega, c]`` (leading axis). Nonlinear
    terms are products in physical space with the 2/3 rule applied to the tendency (when
    ``dealias``); the linear part goes into the integrating factor.
    """

    grid: Grid
    viscosity: float = 0.0
    drag: float = 0.0
    hyperviscosity_order: int = 1
    forcing: Forcing = field(default_factory=Forcing)
    dealias: bool = True
    scalar: bool = False
    diffusivity: float = 0.0
    scalar_gradient: float = 0.0
    subgrid: Callable[[dict[str, np.ndarray]], np.ndarray] | None = None

    def __post_init__(self):
        _check_2d(self.grid)
        if self.viscosity < 0 or self.drag < 0 or self.diffusivity < 0:
            raise UserError("viscosity, drag and diffusivity must be >= 0")
        if int(self.hyperviscosity_order) != self.hyperviscosity_order or \
                self.hyperviscosity_order < 1:
            raise UserError("the hyperviscosity order must be a whole number >= 1")
        self.fourier = fourier(self.grid)
        self._forcing_hat = self.forcing.vorticity_hat(self.grid)
        F = self.fourier
        omega_linear = -self.viscosity * F.k2 ** int(self.hyperviscosity_order) - self.drag
        rows = [omega_linear]
        if self.scalar:
            rows.append(-self.diffusivity * F.k2)
        self.linear = np.stack(rows)
        self._mask = F.dealias if self.dealias else np.ones(F.spectral_shape)

    @property
    def n_fields(self) -> int:
        return 2 if self.scalar else 1

    def initial_state(self, omega: np.ndarray, c: np.ndarray | None = None) -> np.ndarray:
        """Spectral state from real fields (mean vorticity removed; 2/3 rule when ``dealias``)."""
        F = self.fourier
        rows = [F.forward(omega)]
        if self.scalar:
            rows.append(F.forward(np.zeros(self.grid.shape) if c is None else c))
        q = np.stack(rows) * self._mask
        q[(0,) + (0,) * self.grid.ndim] = 0.0
        return q

    def fields(self, q: np.ndarray) -> dict[str, np.ndarray]:
        """Real fields u, v, vorticity (and c) of a state."""
        F = self.fourier
        uh, vh = velocity_hat_from_vorticity(q[0], self.grid)
        stack = [uh, vh, q[0]] + ([q[1]] if self.scalar else [])
        real = F.backward(np.stack(stack))
        out = {"u": real[0], "v": real[1], "vorticity": real[2]}
        if self.scalar:
            out["c"] = real[3]
        return out

    def tendency(self, q: np.ndarray) -> np.ndarray:
        """The explicit part N(q): advection, forcing, mean-gradient source, subgrid term."""
        F = self.fourier
        ikx, iky = F.ik_of("x"), F.ik_of("y")
        omega_hat = q[0]
        psi = omega_hat * F.inverse_k2
        stack = [iky * psi, -ikx * psi, ikx * omega_hat, iky * omega_hat]
        if self.scalar:
            stack += [ikx * q[1], iky * q[1]]
        if self.subgrid is not None:
            stack.append(omega_hat)
        real = F.backward(np.stack(stack))
        u, v = real[0], real[1]
        products = [u * real[2] + v * real[3]]
        if self.scalar:
            products.append(u * real[4] + v * real[5])
        out = -F.forward(np.stack(products))
        if self.subgrid is not None:
            term = self.subgrid({"u": u, "v": v, "vorticity": real[-1]})
            out[0] += term if np.iscomplexobj(term) else F.forward(term)
        if self.scalar and self.scalar_gradient:
            out[1] -= self.scalar_gradient * F.forward(v)
        out *= self._mask
        if self._forcing_hat is not None:
            out[0] += self._forcing_hat
        return out

    def step(self, q: np.ndarray, dt: float) -> np.ndarray:
        """One integrating-factor RK4 step of length ``dt`` (s)."""
        return ifrk4_step(q, dt, self.tendency, self.linear)

    def time_step(self, q: np.ndarray, cfl: float, max_step: float = math.inf) -> float:
        """The CFL time step of the current state."""
        uh, vh = velocity_hat_from_vorticity(q[0], self.grid)
        u, v = self.fourier.backward(np.stack([uh, vh]))
        return cfl_time_step((v, u), self.grid, cfl, max_step)

    def advance(self, q: np.ndarray, duration: float, cfl: float, max_step: float = math.inf,
                on_step: Callable[[np.ndarray, float], bool] | None = None,
                max_substeps: int = 1_000_000) -> tuple[np.ndarray, int]:
        """Integrate for ``duration`` seconds in equal steps set by the CFL number at the start.

        ``on_step(q, elapsed)`` is called after every step; returning False stops early.
        Returns the new state and the number of steps taken.
        """
        n, dt = substeps(duration, self.time_step(q, cfl, max_step), max_substeps)
        for i in range(n):
            q = self.step(q, dt)
            if on_step is not None and on_step(q, (i + 1) * dt) is False:
                return q, i + 1
        return q, n


def random_field_hat(grid: Grid, spectrum: Callable[[np.ndarray], np.ndarray],
                     rng: np.random.Generator, components: int = 1,
                     solenoidal: bool = False) -> np.ndarray:
    """Random real field(s) with the prescribed isotropic spectrum, in the rfftn layout.

    White noise is transformed, projected (``solenoidal``), and each shell rescaled so that
    ``energy_spectrum`` (of the stack of ``components``) equals ``spectrum(k)`` at the shell
    centres ``k`` (rad m^-1); modes beyond the 2/3 rule are removed.
    """
    F = fourier(grid)
    noise = rng.standard_normal((components,) + grid.shape)
    fh = F.forward(noise) * F.dealias
    if solenoidal:
        fh = project_hat(fh, grid)
    fh[(slice(None),) + (0,) * grid.ndim] = 0.0
    dk = shell_spacing(grid)
    shell = np.rint(np.sqrt(F.k2) / dk).astype(int)
    density = 0.5 * sum(mean_square_hat(fh[i], grid) for i in range(components))
    have = np.bincount(shell.ravel(), weights=density.ravel()) / dk
    centres = dk * np.arange(have.size)
    want = np.asarray(spectrum(centres), dtype=float)
    scale = np.zeros_like(have)
    np.divide(want, have, out=scale, where=have > 0)
    return fh * np.sqrt(scale)[shell]
