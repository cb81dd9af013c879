"""Shell-summed spectra of resolved fields and of their exchange with a subgrid term.

All spectra here are *shell sums of a cross-spectral density*, normalised so that the sum over
shells equals a domain mean (Parseval). For real fields ``a`` and ``b`` on a periodic grid of N
points, with unnormalised discrete Fourier transforms ``a_hat`` and ``b_hat``,

    mean_x(a b) = sum_k Re(conj(a_hat(k)) b_hat(k)) / N^2,

and the shell spectrum S(k_n) is the part of that sum over wavevectors with
``(n - 1/2) dk <= |k| < (n + 1/2) dk``, ``dk = 2 pi / L`` for the longest side L.

Energy transfer. The filtered momentum equation reads ``d_t u_i = ... - force_i`` with
``force_i = d_j tau_ij``, so the subgrid term changes the resolved energy density at wavenumber
k at the rate ``-Re(conj(u_hat_i) force_hat_i) / N^2``. We plot the opposite sign,

    T(k) = shell sum of Re(conj(u_hat_i(k)) force_hat_i(k)) / N^2,

the rate at which resolved energy at k is *drained* to the subgrid scales (positive: forward
transfer, negative: backscatter), matching the sign of the pointwise ``pi = -tau_ij S_ij``:
on a periodic grid sum_k T(k) = mean(u_i force_i) = mean(pi).

Enstrophy transfer (2-D). With ``d_t omega = ... - g`` (``g`` the vorticity forcing),
Z(k) = shell sum of Re(conj(omega_hat) g_hat) / N^2 sums to mean(omega g) = mean of the
pointwise ``enstrophy_transfer``. From a force, ``g = d_x force_y - d_y force_x``. The energy
transfer from a vorticity forcing uses the streamfunction, ``psi_hat = omega_hat / |k|^2``:
T(k) = shell sum of Re(conj(psi_hat) g_hat) / N^2.

Shells and transforms are those of :mod:`closure.spectral` (its ``energy_spectrum`` is a
density, sum(E) dk = mean energy; the transfers here are plain shell sums, sum(T) = mean).
These are spectra of the exchange between the resolved field and the subgrid term, not spectra
of the pointwise transfer field ``pi(x)``.
"""

from __future__ import annotations

import numpy as np

from closure.derivatives import derivative
from closure.grid import Grid
from closure.spectral import fourier, shell_spacing


def _forward(f: np.ndarray, grid: Grid) -> np.ndarray:
    f = np.asarray(f, dtype=float)
    if f.shape != grid.shape:
        raise ValueError(f"field shape {f.shape} is not the grid shape {grid.shape}")
    return fourier(grid).forward(f)


def _shell_sum(density: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Sum a per-mode density (rfftn layout, conjugate weights applied here) over shells."""
    F = fourier(grid)
    dk = shell_spacing(grid)
    shell = np.rint(np.sqrt(F.k2) / dk).astype(int)
    total = np.bincount(shell.ravel(), weights=(F.half_weights * density).ravel())
    return dk * np.arange(total.size), total


def cross_spectrum(a: np.ndarray, b: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Shell sums of Re(conj(a_hat) b_hat) / N^2 for two fields of ``grid.shape``.

    Returns ``(k, S)``, k the shell-centre angular wavenumbers (1/coordinate units) starting at
    0; ``S.sum() == mean(a * b)`` (Parseval). Periodic grids only (UserError otherwise).
    """
    n_points = float(np.prod(grid.shape))
    density = np.real(np.conj(_forward(a, grid)) * _forward(b, grid)) / n_points**2
    return _shell_sum(density, grid)


def energy_transfer_spectrum(velocity: dict[str, np.ndarray], force: dict[str, np.ndarray],
                             grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Subgrid energy drain T(k) = shell sum of Re(conj(u_hat_i) force_hat_i) / N^2.

    ``velocity`` and ``force`` are keyed by the same component names (``u``/``force_x`` pairs
    are matched by direction: give ``{"x": u, "y": v}`` and ``{"x": fx, "y": fy}``).
    ``T.sum() == mean(u_i force_i)``, which on a periodic grid equals mean(pi).
    """
    if set(velocity) != set(force):
        raise ValueError(f"velocity directions {sorted(velocity)} differ from force "
                         f"directions {sorted(force)}")
    k, total = None, 0.0
    for d in velocity:
        k, s = cross_spectrum(velocity[d], force[d], grid)
        total = total + s
    return k, total


def enstrophy_transfer_spectrum(vorticity: np.ndarray, vorticity_forcing: np.ndarray,
                                grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """2-D subgrid enstrophy drain Z(k) = shell sum of Re(conj(omega_hat) g_hat) / N^2."""
    return cross_spectrum(vorticity, vorticity_forcing, grid)


def energy_transfer_from_vorticity(vorticity: np.ndarray, vorticity_forcing: np.ndarray,
                                   grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """2-D subgrid energy drain from a vorticity forcing, via psi_hat = omega_hat / |k|^2."""
    if grid.ndim != 2:
        raise ValueError("the streamfunction form of the energy transfer is 2-D only")
    psi_hat = _forward(vorticity, grid) * fourier(grid).inverse_k2
    n_points = float(np.prod(grid.shape))
    density = np.real(np.conj(psi_hat) * _forward(vorticity_forcing, grid)) / n_points**2
    return _shell_sum(density, grid)


def stress_divergence(tau: dict[str, np.ndarray], grid: Grid,
                      scheme: str = "spectral") -> dict[str, np.ndarray]:
    """force_i = d_j tau_ij from components named ``tau_xx``, ``tau_xy``, ... (by direction)."""
    out = {}
    for i in grid.dims:
        total = 0.0
        for j in grid.dims:
            total = total + derivative(tau[stress_name(i, j)], grid, j, 1, scheme)
        out[i] = total
    return out


def curl_2d(force: dict[str, np.ndarray], grid: Grid, scheme: str = "spectral") -> np.ndarray:
    """d_x f_y - d_y f_x of a 2-D vector keyed by direction."""
    return (derivative(force["y"], grid, "x", 1, scheme)
            - derivative(force["x"], grid, "y", 1, scheme))


def stress_name(i: str, j: str) -> str:
    """Our name of the symmetric stress component (i, j): tau_xy, never tau_yx."""
    return "tau_" + "".join(sorted(i + j))
