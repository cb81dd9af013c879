"""Array backends for the hot path: numpy (default) or torch on a CPU or a GPU.

One code path, a small seam: :func:`coarse_grain_periodic` (the fine-grid pass of a periodic
snapshot: FFTs, filter, spectral derivatives, products, sampling) and
:func:`gram_statistics` (the Gram accumulation of a design) are written once against the few
operations of :class:`NumpyBackend`; :class:`TorchBackend` supplies the same operations with
torch tensors on ``cpu`` or ``cuda``. :func:`get_backend` picks one from a ``--device`` value::

    None or "numpy"   numpy + scipy.fft (the default; no torch needed)
    "cpu"             torch on the CPU
    "cuda"            torch on the GPU (UserError when none is visible)
    "auto"            cuda if available, else torch on the CPU, else numpy

Precision: ``"float64"`` (default) gives the numpy path's results to rounding (tested to
1e-10 relative; measured 1e-15 to 1e-14); ``"float32"`` halves memory and is faster on GPUs,
at an error of a few float32 epsilons (1.2e-7) times the cancellation of each target (the
stress ``bar(u_i u_j) - bar(u_i) bar(u_j)`` loses the ratio of the product's size to the
stress's). Measured, as the largest error over a target divided by its largest value:
5e-6 on 2-D turbulence (64^2, ratio 4; the force and vorticity forcing, derivatives of the
stress, are the worst), 1.5e-6 on 3-D turbulence (32^3), 7e-7 on the stress of a random
256^3 field (tests/test_backend.py, bench/gpu_pass.py).

Only periodic data with a box, Gaussian or sharp spectral filter take this path; the folding
onto the coarse grid is done on every axis but the last (an inverse transform on the coarse
points of those axes, then every r-th point of the last one), where closure.residuals folds
every axis; the values agree to rounding.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import scipy.fft

from closure.errors import UserError
from closure.filters import CoarseGraining
from closure.grid import VELOCITY_OF, Grid

DEVICES = ("numpy", "cpu", "cuda", "auto")
PRECISIONS = ("float64", "float32")


class NumpyBackend:
    """numpy arrays and scipy.fft (all cores)."""

    name = "numpy"
    device = "cpu"

    def __init__(self, precision: str = "float64"):
        if precision not in PRECISIONS:
            raise UserError(f"unknown precision {precision!r}: choose float64 or float32")
        self.precision = precision
        self._real = np.float64 if precision == "float64" else np.float32
        self._complex = np.complex128 if precision == "float64" else np.complex64

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.device}, {self.precision})"

    def asarray(self, a) -> np.ndarray:
        """A real or complex numpy array (or constant) in this backend's precision."""
        a = np.asarray(a)
        return a.astype(self._complex if np.iscomplexobj(a) else self._real, copy=False)

    def numpy(self, a) -> np.ndarray:
        """A float64 numpy copy of a backend array."""
        return np.ascontiguousarray(a, dtype=np.float64)

    def rfftn(self, a, ndim: int):
        return scipy.fft.rfftn(a, axes=tuple(range(a.ndim - ndim, a.ndim)), workers=-1)

    def irfftn(self, a, shape: Sequence[int]):
        n = len(shape)
        return scipy.fft.irfftn(a, s=tuple(shape), axes=tuple(range(a.ndim - n, a.ndim)),
                                workers=-1)

    def stack(self, arrays):
        return np.stack(arrays)

    def einsum(self, spec: str, *arrays):
        return np.einsum(spec, *arrays, optimize=True)

    def synchronize(self) -> None:
        """Wait for queued work (GPU); nothing to wait for here."""


class TorchBackend(NumpyBackend):
    """torch tensors on ``device`` ("cpu" or "cuda"); torch.fft for the transforms."""

    name = "torch"

    def __init__(self, device: str = "cpu", precision: str = "float64"):
        super().__init__(precision)
        from closure.neural import require_torch

        torch = require_torch()
        if device == "cuda" and not torch.cuda.is_available():
            raise UserError("--device cuda: torch sees no GPU here; use --device cpu or auto")
        self.torch = torch
        self.device = device
        self._real = torch.float64 if precision == "float64" else torch.float32
        self._complex = torch.complex128 if precision == "float64" else torch.complex64

    def asarray(self, a):
        torch = self.torch
        if isinstance(a, torch.Tensor):
            kind = self._complex if a.is_complex() else self._real
            return a.to(device=self.device, dtype=kind)
        a = np.asarray(a)
        kind = self._complex if np.iscomplexobj(a) else self._real
        return torch.as_tensor(np.ascontiguousarray(a), device=self.device).to(kind)

    def numpy(self, a) -> np.ndarray:
        if isinstance(a, self.torch.Tensor):
            return np.ascontiguousarray(a.detach().cpu().numpy(), dtype=np.float64)
        return np.ascontiguousarray(a, dtype=np.float64)

    def rfftn(self, a, ndim: int):
        return self.torch.fft.rfftn(a, dim=tuple(range(-ndim, 0)))

    def irfftn(self, a, shape: Sequence[int]):
        n = len(shape)
        return self.torch.fft.irfftn(a, s=tuple(shape), dim=tuple(range(-n, 0)))

    def stack(self, arrays):
        return self.torch.stack(list(arrays))

    def einsum(self, spec: str, *arrays):
        return self.torch.einsum(spec, *arrays)

    def synchronize(self) -> None:
        if self.device == "cuda":
            self.torch.cuda.synchronize()


def get_backend(device: str | None = None, precision: str = "float64") -> NumpyBackend:
    """The backend of a ``--device`` value (see the module docstring)."""
    if device in (None, "numpy"):
        return NumpyBackend(precision)
    if device not in DEVICES:
        raise UserError(f"unknown device {device!r}: choose numpy, cpu, cuda or auto")
    if device == "auto":
        try:
            import torch
        except ImportError:
            return NumpyBackend(precision)
        return TorchBackend("cuda" if torch.cuda.is_available() else "cpu", precision)
    return TorchBackend(device, precision)


# ---------------------------------------------------------------------- Gram accumulation
def gram_statistics(X, y, weights: Sequence[float] | None = None,
                    backend: NumpyBackend | None = None) -> dict[str, np.ndarray]:
    """Weighted Gram statistics of a design ``X`` (C, n, p) and target ``y`` (C, n), as
    closure.stats.SufficientStats.from_design accumulates them: ``gram`` (C, p, p) = w_c
    X_c^T X_c, ``xy`` (C, p), ``yy`` (C,), ``x_sum`` (C, p), ``y_sum`` (C,); float64 numpy."""
    be = backend or NumpyBackend()
    X, y = be.asarray(X), be.asarray(y)
    C = X.shape[0]
    w = be.asarray(np.ones(C) if weights is None else np.asarray(weights, dtype=float))
    out = {
        "gram": be.einsum("c,cnp,cnq->cpq", w, X, X),
        "xy": be.einsum("c,cn,cnp->cp", w, y, X),
        "yy": be.einsum("c,cn,cn->c", w, y, y),
        "x_sum": be.einsum("c,cnp->cp", w, X),
        "y_sum": be.einsum("c,cn->c", w, y),
    }
    return {k: be.numpy(v) for k, v in out.items()}


# ---------------------------------------------------------------------- the fine-grid pass
def _directions(dims: Sequence[str]) -> tuple[str, ...]:
    return tuple(d for d in ("x", "y", "z") if d in dims)


def _pairs(dims: Sequence[str]) -> list[tuple[str, str]]:
    order = (("x", "x"), ("x", "y"), ("y", "y"), ("x", "z"), ("y", "z"), ("z", "z"))
    return [(i, j) for i, j in order if i in dims and j in dims]


def _ik(grid: Grid) -> dict[str, np.ndarray]:
    """``1j k_d`` on the rfftn wavenumbers, broadcastable, with the Nyquist mode of even
    lengths set to zero (the odd-derivative convention of closure.derivatives)."""
    out = {}
    for a, d in enumerate(grid.dims):
        real = a == grid.ndim - 1
        k = grid.wavenumbers(d, real=real)
        if grid.shape[a] % 2 == 0:
            k[-1 if real else grid.shape[a] // 2] = 0.0
        shape = [1] * grid.ndim
        shape[a] = k.size
        out[d] = (1j * k).reshape(shape)
    return out


def periodic_target_names(dims: Sequence[str], scalars: Sequence[str] = ()) -> list[str]:
    """Targets :func:`coarse_grain_periodic` computes (closure.residuals.target_names order)."""
    dirs = _directions(dims)
    out = [f"tau_{i}{j}" for i, j in _pairs(dims)] + [f"force_{i}" for i in dirs]
    out += [f"flux_{c}_{j}" for c in scalars for j in dirs] + ["pi"]
    if tuple(dims) == ("y", "x"):
        out += ["vorticity_forcing", "enstrophy_transfer"]
    return out


def coarse_grain_periodic(fields: Mapping[str, np.ndarray], cg: CoarseGraining,
                          scalars: Sequence[str] = (), targets: Sequence[str] | None = None,
                          backend: NumpyBackend | None = None
                          ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The fine-grid pass of one periodic snapshot on ``backend``: filtered fields and exact
    subgrid terms on the coarse grid (the definitions of closure.residuals), as float64 numpy
    arrays ``(fields, targets)``.

    ``fields``: fine-grid ``u, v[, w]`` and the ``scalars``; ``targets``: names from
    :func:`periodic_target_names` (None: all). As in closure.residuals, one forward transform
    per field or product; a filtered (differentiated) field sampled on the coarse grid is its
    spectrum folded onto the coarse wavenumbers of every axis but the last, then an inverse
    transform of r^(d-1) times fewer points and every r-th point of the last axis; the stress
    and fluxes are differences of sampled fields; the force and the vorticity forcing are
    fine-grid derivatives of the filtered terms, which need the filtered velocity (and
    vorticity) on the fine grid. Memory on the backend's device: the velocity, its spectra
    and a few fine-grid work arrays.
    """
    fine = cg.fine
    if not fine.periodic or cg.kind == "block":
        raise UserError("the array-backend pass handles periodic data with a box, gaussian or "
                        "spectral filter; other data take the numpy path")
    every = periodic_target_names(fine.dims, scalars)
    want = set(every if targets is None else targets)
    unknown = sorted(want - set(every))
    if unknown:
        raise UserError(f"unknown target variable(s) {', '.join(unknown)}: choose from "
                        f"{', '.join(every)}")
    be = backend or NumpyBackend()
    nd, shape, r = fine.ndim, fine.shape, cg.ratio
    dirs, pairs = _directions(fine.dims), _pairs(fine.dims)
    two_d = tuple(fine.dims) == ("y", "x")
    T = be.asarray(cg.spectral_multiplier)
    ik = {d: be.asarray(v) for d, v in _ik(fine).items()}
    foldable = all(n % r == 0 for n in shape[:-1])
    coarse_shape = tuple(n // r for n in shape[:-1]) + (shape[-1],)

    def spectrum(a):
        return be.rfftn(a, nd)

    def back(h):
        return be.irfftn(h, shape)

    def coarse(h):
        """The field of spectrum ``h`` at every r-th fine point, float64 numpy."""
        if not foldable:
            return be.numpy(back(h)[(Ellipsis,) + (slice(None, None, r),) * nd])
        for a in range(nd - 1):  # alias the full-FFT axes onto the coarse wavenumbers
            n, ax = shape[a], h.ndim - nd + a
            h = h.reshape(*h.shape[:ax], r, n // r, *h.shape[ax + 1:]).sum(ax)
        g = be.irfftn(h, coarse_shape) / float(r ** (nd - 1))
        return be.numpy(g[..., ::r])

    vel = {i: be.asarray(fields[VELOCITY_OF[i]]) for i in dirs}
    U = {i: spectrum(vel[i]) for i in dirs}
    ubar = {i: coarse(T * U[i]) for i in dirs}
    out_fields = {VELOCITY_OF[i]: ubar[i] for i in dirs}
    cbar = {}
    for c in scalars:
        cbar[c] = out_fields[c] = coarse(T * spectrum(be.asarray(fields[c])))
    grad = {}
    if "pi" in want or two_d:
        grad = {(i, j): coarse(ik[j] * T * U[i]) for i in dirs for j in dirs
                if "pi" in want or i != j}
    if two_d:
        out_fields["vorticity"] = grad["y", "x"] - grad["x", "y"]

    out = {}
    need_force = any(t.startswith("force_") for t in want)
    need_vf = two_d and "vorticity_forcing" in want
    fine_ubar = ({i: back(T * U[i]) for i in dirs} if need_force or need_vf else {})
    if want & {*(f"tau_{i}{j}" for i, j in pairs), "pi"} or need_force:
        force = {}
        for i, j in pairs:
            bar_p = T * spectrum(vel[i] * vel[j])
            out[f"tau_{i}{j}"] = coarse(bar_p) - ubar[i] * ubar[j]
            if need_force:
                th = bar_p - spectrum(fine_ubar[i] * fine_ubar[j])  # tau_ij on the fine grid
                force[i] = force.get(i, 0) + ik[j] * th
                if i != j:
                    force[j] = force.get(j, 0) + ik[i] * th
                del th
            del bar_p
        for i in dirs if need_force else ():
            out[f"force_{i}"] = coarse(force.pop(i))
        if "pi" in want:
            total = 0.0
            for i, j in pairs:
                strain = 0.5 * (grad[i, j] + grad[j, i])
                total = total + (1.0 if i == j else 2.0) * out[f"tau_{i}{j}"] * strain
            out["pi"] = -total
    for c in scalars:
        if not want & {f"flux_{c}_{j}" for j in dirs}:
            continue
        field = be.asarray(fields[c])
        for j in dirs:
            out[f"flux_{c}_{j}"] = coarse(T * spectrum(vel[j] * field)) - ubar[j] * cbar[c]
    if two_d and want & {"vorticity_forcing", "enstrophy_transfer"}:
        W = ik["x"] * U["y"] - ik["y"] * U["x"]  # omega = d_x v - d_y u
        omega = back(W)
        omega_bar = coarse(T * W)
        fine_omega_bar = back(T * W) if need_vf else None
        sigma, vf = {}, 0
        for j in dirs:
            bar_s = T * spectrum(vel[j] * omega)
            sigma[j] = coarse(bar_s) - ubar[j] * omega_bar
            if need_vf:
                vf = vf + ik[j] * (bar_s - spectrum(fine_ubar[j] * fine_omega_bar))
        if need_vf:
            out["vorticity_forcing"] = coarse(vf)
        if "enstrophy_transfer" in want:
            out["enstrophy_transfer"] = -sum(sigma[j] * coarse(ik[j] * T * W) for j in dirs)
    return out_fields, {k: out[k] for k in every if k in want}


__all__ = ["DEVICES", "NumpyBackend", "TorchBackend", "coarse_grain_periodic", "get_backend",
           "gram_statistics", "periodic_target_names"]
