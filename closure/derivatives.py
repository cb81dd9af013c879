"""Derivatives on a uniform grid: spectral, 2nd- and 4th-order central differences.

All functions take an array whose trailing axes follow ``grid.dims`` (a spatial field, or a
stack of them along leading axes) and return an array of the same shape. Periodic grids use
wrap-around stencils (or FFTs); non-periodic grids use one-sided stencils of the same order of
accuracy at the edges. The scheme is chosen to match the coarse
solver that will run the closure, so a fitted coefficient means the same thing there.
"""

from __future__ import annotations

import functools

import numpy as np
import scipy.fft

from closure.errors import UserError
from closure.grid import Grid
from closure.threads import fft_workers, side_by_side

SCHEMES = ("spectral", "fd2", "fd4")

# Central stencils, offsets -2..2 (Fornberg 1988, Table 1).
_CENTRAL = {
    ("fd2", 1): np.array([0.0, -0.5, 0.0, 0.5, 0.0]),
    ("fd2", 2): np.array([0.0, 1.0, -2.0, 1.0, 0.0]),
    ("fd4", 1): np.array([1.0, -8.0, 0.0, 8.0, -1.0]) / 12.0,
    ("fd4", 2): np.array([-1.0, 16.0, -30.0, 16.0, -1.0]) / 12.0,
}
# One-sided stencils at the first points of a non-periodic edge: the row for point i acts on
# points 0..len(row)-1 and has the same order of accuracy as the interior stencil (Fornberg 1988,
# Table 3). A 4th-order second derivative needs 6 points; 5 would give only 3rd order.
_EDGE = {
    ("fd2", 1): [np.array([-1.5, 2.0, -0.5])],
    ("fd2", 2): [np.array([2.0, -5.0, 4.0, -1.0])],
    ("fd4", 1): [np.array([-25.0, 48.0, -36.0, 16.0, -3.0]) / 12.0,
                 np.array([-3.0, -10.0, 18.0, -6.0, 1.0]) / 12.0],
    ("fd4", 2): [np.array([45.0, -154.0, 214.0, -156.0, 61.0, -10.0]) / 12.0,
                 np.array([10.0, -15.0, -4.0, 14.0, -6.0, 1.0]) / 12.0],
}


def check_scheme(scheme: str, grid: Grid) -> None:
    """Raise a UserError if ``scheme`` is unknown or cannot run on ``grid``."""
    if scheme not in SCHEMES:
        raise UserError(f"unknown derivative scheme {scheme!r}: choose one of {', '.join(SCHEMES)}")
    if scheme == "spectral" and not grid.periodic:
        raise UserError("spectral derivatives need periodic data: use --scheme fd2 or fd4")


#: fewest points per direction a scheme's first and second derivatives need: spectral keeps
#: at least one wavenumber besides the mean and Nyquist; the central stencils span 3 (fd2) and
#: 5 (fd4) points, and the one-sided edge stencils of a non-periodic grid 4 and 6 (_EDGE)
_MIN_POINTS = {("spectral", True): 3, ("fd2", True): 3, ("fd4", True): 5,
               ("spectral", False): 3, ("fd2", False): 4, ("fd4", False): 6}


def check_coarse_points(scheme: str, grid: Grid, ratio: int | None = None) -> None:
    """Raise a UserError if ``grid`` (a coarse grid) has fewer points in a direction than
    ``scheme`` needs; ``ratio`` (the coarsening ratio that made it) is named in the message."""
    need = _MIN_POINTS.get((scheme, bool(grid.periodic)))
    if need is None:
        return
    for d, n in zip(grid.dims, grid.shape, strict=True):
        if n < need:
            by = f" (the ratio {ratio} leaves {n})" if ratio is not None else ""
            raise UserError(f"the coarse grid has {n} point(s) in {d}{by}; {scheme} derivatives "
                            f"need at least {need}: use a smaller ratio")


def derivative(f: np.ndarray, grid: Grid, dim: str, order: int = 1,
               scheme: str = "spectral") -> np.ndarray:
    """The ``order``-th derivative of ``f`` along direction ``dim``.

    Orders 1 and 2 have their own stencils; higher orders apply those repeatedly.
    Spectral derivatives of odd order drop the Nyquist mode of even-length axes
    (its derivative is not representable as a real field).
    """
    check_scheme(scheme, grid)
    if order < 0:
        raise ValueError("derivative order must be >= 0")
    f = np.asarray(f, dtype=float)
    if f.ndim < grid.ndim or f.shape[f.ndim - grid.ndim:] != grid.shape:
        raise ValueError(f"array of shape {f.shape} does not end with the grid shape {grid.shape}")
    if order == 0:
        return np.array(f, dtype=float, copy=True)
    h = grid.spacing[grid.axis(dim)]
    axis = f.ndim - grid.ndim + grid.axis(dim)
    if scheme == "spectral":
        return _spectral(f, grid, dim, order)
    out = np.asarray(f, dtype=float)
    remaining = order
    while remaining:
        step = 2 if remaining >= 2 else 1
        out = _stencil(out, axis, h, scheme, step, grid.periodic)
        remaining -= step
    return out


def derivatives(f: np.ndarray, grid: Grid, dim: str, orders, scheme: str = "spectral"
                ) -> list[np.ndarray]:
    """:func:`derivative` of ``f`` along ``dim`` for each of ``orders``, the same values; the
    spectral scheme transforms ``f`` once for all orders."""
    orders = [int(n) for n in orders]
    if scheme != "spectral" or len(orders) < 2 or min(orders) < 1:
        return [derivative(f, grid, dim, n, scheme) for n in orders]
    check_scheme(scheme, grid)
    f = np.asarray(f, dtype=float)
    if f.ndim < grid.ndim or f.shape[f.ndim - grid.ndim:] != grid.shape:
        raise ValueError(f"array of shape {f.shape} does not end with the grid shape {grid.shape}")
    axis = f.ndim - grid.ndim + grid.axis(dim)
    n = f.shape[axis]
    k = grid.wavenumbers(dim, real=True)
    shape = [1] * f.ndim
    shape[axis] = k.size
    workers = fft_workers(f.size)
    fh = scipy.fft.rfft(f, axis=axis, workers=workers)

    def inverse(order):  # the multiplier of _spectral
        mult = (1j * k) ** order
        if order % 2 == 1 and n % 2 == 0:
            mult[-1] = 0.0
        return scipy.fft.irfft(fh * mult.reshape(shape), n=n, axis=axis,
                               workers=fft_workers(f.size))

    # the orders' inverse transforms are independent: side by side
    return side_by_side([functools.partial(inverse, order) for order in orders])


def _spectral(f, grid, dim, order):
    axis = f.ndim - grid.ndim + grid.axis(dim)
    n = f.shape[axis]
    k = grid.wavenumbers(dim, real=True)
    mult = (1j * k) ** order
    if order % 2 == 1 and n % 2 == 0:
        mult[-1] = 0.0
    shape = [1] * f.ndim
    shape[axis] = k.size
    workers = fft_workers(f.size)
    fh = scipy.fft.rfft(f, axis=axis, workers=workers)
    return scipy.fft.irfft(fh * mult.reshape(shape), n=n, axis=axis, workers=workers)


def _stencil(f, axis, h, scheme, order, periodic):
    weights = _CENTRAL[(scheme, order)]
    n = f.shape[axis]
    out = np.zeros_like(f, dtype=float)
    if periodic:
        for offset, w in zip(range(-2, 3), weights, strict=True):
            if w:
                out += w * np.roll(f, -offset, axis=axis)
        return out / h**order
    rows = _EDGE[(scheme, order)]
    need = max(len(r) for r in rows)
    if n < need:
        raise UserError(f"{scheme} derivatives on a non-periodic axis need at least {need} points, "
                        f"got {n}: use more points along this axis (a finer grid or a smaller "
                        "--ratio) or a lower-order scheme")
    fm = np.moveaxis(f, axis, 0)
    om = np.moveaxis(out, axis, 0)
    edge = len(rows)
    for offset, w in zip(range(-2, 3), weights, strict=True):
        if w:
            om[edge:n - edge] += w * fm[edge + offset:n - edge + offset]
    for i, row in enumerate(rows):
        m = len(row)
        om[i] = np.tensordot(row, fm[:m], axes=(0, 0))
        # mirrored stencil at the far edge: odd derivatives change sign
        om[n - 1 - i] = (-1) ** order * np.tensordot(row, fm[::-1][:m], axes=(0, 0))
    return out / h**order


def gradient(f: np.ndarray, grid: Grid, scheme: str = "spectral") -> dict[str, np.ndarray]:
    """First derivatives along every direction of the grid, keyed by direction."""
    return {d: derivative(f, grid, d, 1, scheme) for d in grid.dims}


def laplacian(f: np.ndarray, grid: Grid, scheme: str = "spectral") -> np.ndarray:
    """Sum of second derivatives (compact 3- or 5-point stencils for fd2 / fd4)."""
    return sum(derivative(f, grid, d, 2, scheme) for d in grid.dims)


def divergence(components: dict[str, np.ndarray], grid: Grid,
               scheme: str = "spectral") -> np.ndarray:
    """d_j F_j for a vector keyed by direction (``{"x": Fx, "y": Fy}``)."""
    return sum(derivative(components[d], grid, d, 1, scheme) for d in grid.dims)
