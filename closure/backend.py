"""The array backend seam: numpy (default) or torch on a CPU or a GPU.

The periodic fine-grid pass (closure.residuals: FFTs, filters, spectral derivatives, products,
folding onto the coarse grid, through closure.filters.CoarseGraining.separable) and the Gram
accumulation (:func:`gram_statistics`, used by closure.stats.SufficientStats.from_design) are
written once against the few operations of :class:`NumpyBackend`; :class:`TorchBackend`
supplies the same operations with torch tensors on ``cpu`` or ``cuda``. :func:`get_backend`
picks one from a ``--device`` value::

    None or "numpy"   numpy + scipy.fft on every core (the default; no torch needed)
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
256^3 field (tests/test_backend.py bounds it by 1e-4; bench/gpu_pass.py prints it).
Outputs are float64 numpy arrays whatever the precision.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.fft

from closure.errors import UserError
from closure.threads import fft_workers, run_blocks

DEVICES = ("numpy", "cpu", "cuda", "auto")
PRECISIONS = ("float64", "float32")
TORCH_HINT = "pip install torch==2.13.0"
#: Numbers per block of rows in NumpyBackend.by_row_blocks (2 MiB of float64).
_BLOCK_NUMBERS = 1 << 18


def _workers(a) -> int:
    return fft_workers(a.size)


class NumpyBackend:
    """numpy arrays and scipy.fft (every core)."""

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

    @property
    def key(self) -> tuple[str, str, str]:
        """What the arrays of this backend depend on (caches of converted constants)."""
        return (self.name, self.device, self.precision)

    def asarray(self, a):
        """A real or complex backend array (or constant) in this backend's precision."""
        a = np.asarray(a)
        return a.astype(self._complex if np.iscomplexobj(a) else self._real, copy=False)

    def numpy(self, a) -> np.ndarray:
        """A float64 C-ordered numpy array of a backend array (no copy when it already is
        one)."""
        a = np.asarray(a, dtype=np.float64)
        return a if a.flags.c_contiguous else np.ascontiguousarray(a)

    def empty(self, shape, complex: bool = False):
        return np.empty(shape, dtype=self._complex if complex else self._real)

    def rfft(self, a):
        """Real FFT along the last axis."""
        return scipy.fft.rfft(a, axis=-1, workers=_workers(a))

    def fft(self, a, axis: int):
        return scipy.fft.fft(a, axis=axis, workers=_workers(a))

    def rfftn(self, a, ndim: int):
        """Real FFT over the trailing ``ndim`` axes."""
        return scipy.fft.rfftn(a, axes=tuple(range(a.ndim - ndim, a.ndim)),
                               workers=_workers(a))

    def irfftn(self, a, shape: Sequence[int], axes: Sequence[int] | None = None):
        """Inverse real FFT to ``shape`` over ``axes`` (default: the trailing ones; the last
        of them is the half axis)."""
        if axes is None:
            axes = tuple(range(a.ndim - len(shape), a.ndim))
        return scipy.fft.irfftn(a, s=tuple(shape), axes=tuple(axes), workers=_workers(a))

    def phase_sum(self, P, H, out=None, subscripts: str = "ibk,bk->ik"):
        """``out[i, k] = sum_b P[i, b, k] H[b, k]``, or another einsum of P and H (one pass,
        no temporaries); a new array when ``out`` is None."""
        return np.einsum(subscripts, P, H, out=out)

    def stack(self, arrays):
        return np.stack(arrays)

    def by_row_blocks(self, work, rows: int, width: int) -> None:
        """Run ``work(block)`` over slices of ``rows`` leading rows of ``width`` numbers each:
        blocks of about 2^18 numbers, whose spectra stay in the CPU's cache for the passes
        after the transform (the folds, single-threaded numpy). The blocks run side by side,
        one thread per core (closure.threads.run_blocks), so the folds use every core too;
        ``work`` must write only its own block's rows. Each block's arithmetic is its own:
        the same bits whatever the blocks and threads."""
        step = max(1, _BLOCK_NUMBERS // max(width, 1))
        run_blocks(work, [slice(start, min(start + step, rows))
                          for start in range(0, rows, step)])

    def synchronize(self) -> None:
        """Wait for queued work (GPU); nothing to wait for here."""


class TorchBackend(NumpyBackend):
    """torch tensors on ``device`` ("cpu" or "cuda"); torch.fft for the transforms."""

    name = "torch"

    def __init__(self, device: str = "cpu", precision: str = "float64"):
        super().__init__(precision)
        try:
            import torch
        except ImportError:
            raise UserError(f"--device {device} runs the fine-grid pass on torch, which is not "
                            f"installed: {TORCH_HINT} (or use --device numpy)") from None
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
            a = a.detach().cpu().numpy()
        return super().numpy(a)

    def empty(self, shape, complex: bool = False):
        return self.torch.empty(tuple(shape), dtype=self._complex if complex else self._real,
                                device=self.device)

    def rfft(self, a):
        return self.torch.fft.rfft(a, dim=-1)

    def fft(self, a, axis: int):
        return self.torch.fft.fft(a, dim=axis)

    def rfftn(self, a, ndim: int):
        return self.torch.fft.rfftn(a, dim=tuple(range(-ndim, 0)))

    def irfftn(self, a, shape: Sequence[int], axes: Sequence[int] | None = None):
        if axes is None:
            axes = tuple(range(a.ndim - len(shape), a.ndim))
        return self.torch.fft.irfftn(a, s=tuple(shape), dim=tuple(axes))

    def phase_sum(self, P, H, out=None, subscripts: str = "ibk,bk->ik"):
        result = self.torch.einsum(subscripts, P, H)
        return result if out is None else out.copy_(result)

    def stack(self, arrays):
        return self.torch.stack(list(arrays))

    def by_row_blocks(self, work, rows: int, width: int) -> None:
        work(slice(0, rows))  # torch threads (or runs on the GPU) each operation itself

    def synchronize(self) -> None:
        if self.device == "cuda":
            self.torch.cuda.synchronize()


def get_backend(device: str | None = None, precision: str = "float64") -> NumpyBackend:
    """The backend of a ``--device`` value (see the module docstring); a backend is
    returned as it is."""
    if isinstance(device, NumpyBackend):
        return device
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
                    point_weights: np.ndarray | None = None,
                    backend: NumpyBackend | None = None) -> dict[str, np.ndarray]:
    """Weighted Gram statistics of a design ``X`` (C, n, p) and target ``y`` (C, n), the
    arrays of closure.stats.SufficientStats (which calls this): ``gram`` (C, p, p) =
    w_c X_c^T P X_c, ``xy`` (C, p) = w_c X_c^T P y_c, ``yy`` (C,), ``x_sum`` (C, p) =
    w_c 1^T P X_c, ``y_sum`` (C,), with ``w`` the component ``weights`` (default 1) and ``P``
    the diagonal of ``point_weights`` (n,) (default 1). Matrix products (the Gram matrix and
    ``xy``) and sums per component on ``backend``; float64 numpy results, accumulated in
    float64 whatever the backend's precision (these are the sums that add up across
    snapshots)."""
    be = backend or NumpyBackend()
    if be.precision != "float64":
        be = type(be)(*(() if be.name == "numpy" else (be.device,)), "float64")
    C, n, p = X.shape
    w = np.ones(C) if weights is None else np.asarray(weights, dtype=np.float64)
    out = {"gram": np.empty((C, p, p)), "xy": np.empty((C, p)), "yy": np.empty(C),
           "x_sum": np.empty((C, p)), "y_sum": np.empty(C)}
    pw = None if point_weights is None else be.asarray(point_weights)
    for c in range(C):
        Xc, yc = be.asarray(X[c]), be.asarray(y[c])
        Xw, yw = (Xc, yc) if pw is None else (Xc * pw[:, None], yc * pw)
        # the sums are plain reductions, not products with a vector of ones: the BLAS
        # library serialises calls from threads mapping snapshots side by side
        parts = {"gram": Xw.T @ Xc, "xy": yc @ Xw, "yy": yw @ yc,
                 "x_sum": Xw.sum(0), "y_sum": yw.sum()}
        for name, value in parts.items():
            out[name][c] = w[c] * be.numpy(value)
    return out


__all__ = ["DEVICES", "PRECISIONS", "NumpyBackend", "TorchBackend", "get_backend",
           "gram_statistics"]
