"""Filters and coarse-graining: box, Gaussian and sharp spectral filters, block averaging.

Transfer functions are those of Pope, Turbulent Flows (2000), Table 13.2, with filter width D:

    box (top-hat)   G(k) = sin(k D / 2) / (k D / 2)
    Gaussian        G(k) = exp(-k^2 D^2 / 24)
    sharp spectral  G(k) = H(pi / D - |k|)

Multi-dimensional filters are tensor products of the 1-D ones, so the sharp filter cuts each
wavenumber component separately. On periodic grids they are applied spectrally with exactly these
transfer functions. On non-periodic grids the box and Gaussian filters are applied in real space
(``scipy.ndimage``) with mirror-symmetric ('reflect') extension at the edges; the sharp filter
needs periodic data. Coarsening by ratio r samples every r-th point from index 0. Block
averaging instead takes the mean of r^d fine cells, with coordinates at the block centres.

On periodic grids filtering and coarsening are one spectral step: sampling every r-th point of a
field is, in Fourier space, folding its spectrum onto the coarse wavenumbers (the coefficient of
coarse wavenumber k is the sum of the fine ones at k + m N_coarse, m = 0..r-1, divided by r per
direction), followed by an inverse FFT of coarse size (computed by polyphase:
:meth:`CoarseGraining._folded_rows`). This is exact, not an approximation, and needs no
fine-grid inverse transform. The filters being tensor products, :meth:`CoarseGraining.separable`
does it one direction at a time with 1-D FFTs, so later directions are transformed on arrays already
coarse in the earlier ones.

All operations act on the trailing ``grid.ndim`` axes, so a stack of fields (leading axes)
is filtered in one FFT pass.

Weighted filtering and land. With a nonnegative weight field ``w`` the weighted filter is
``bar_w(f) = bar(w f) / bar(w)`` (:meth:`CoarseGraining.weighted_filter`,
:meth:`CoarseGraining.weighted_block_mean`), set to 0 where ``bar(w)`` vanishes (a footprint
with no weight at all). A fluid mask as the weight gives fluid-only normalised filtering; a
density gives Favre filtering. The other land convention, land as zero velocity (Aluie, Hecht
& Vallis 2018, "Mapping the energy cascade in the North Atlantic Ocean: the coarse-graining
approach", J. Phys. Oceanogr. 48(2), doi:10.1175/JPO-D-17-0100.1; its treatment of land from
memory), is the ordinary filter of the zero-filled field (:func:`land_as_zero`): it keeps the
filter a convolution (commuting with derivatives, conserving domain means), while the
normalised filter deforms the kernel near land and gives up both. Near land every coarse
point needs a finite footprint, so with a mask the filters run in real space
(``real_space=True``: wrap-around on periodic grids) with the kernels of the non-periodic
path: the Gaussian truncated at :data:`GAUSSIAN_TRUNCATE` standard deviations, the box over
its support (:meth:`CoarseGraining.kernel_radius`, :meth:`CoarseGraining.footprint_touches`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.fft
import scipy.ndimage

from closure.backend import NumpyBackend
from closure.errors import UserError
from closure.grid import Grid

FILTER_KINDS = ("box", "gaussian", "spectral", "block")
WIDTH_UNITS = ("grid", "coordinate")
#: Land conventions: land as zero velocity, or fluid-only normalised (mask-weighted) filtering.
LAND_CONVENTIONS = ("zero", "fluid")
#: Real-space Gaussian kernels stop at this many standard deviations (sigma = D / sqrt(12)),
#: where the kernel is exp(-18) = 1.5e-8 of its peak and the mass left out is
#: erfc(6 / sqrt(2)) = 2e-9: below the accuracy of float32 input data, and a footprint of
#: about 1.7 D each side.
GAUSSIAN_TRUNCATE = 6.0
_NUMPY = NumpyBackend()


def transfer_function(kind: str, k: np.ndarray, width: float) -> np.ndarray:
    """1-D transfer function G(k) of a filter of width ``width`` at angular wavenumbers ``k``.

    For the sharp spectral filter the cutoff mode itself (|k| = pi/D) is removed, so a field
    filtered with D = r dx is exactly representable on the coarse grid.
    """
    k = np.asarray(k, dtype=float)
    if kind == "box":
        return np.sinc(k * width / (2 * np.pi))  # numpy sinc(x) = sin(pi x)/(pi x)
    if kind == "gaussian":
        return np.exp(-(k**2) * width**2 / 24.0)
    if kind == "spectral":
        # strict inequality, with a relative tolerance so the coarse Nyquist mode is cut
        return (np.abs(k) < (np.pi / width) * (1 - 1e-12)).astype(float)
    if kind == "block":
        # discrete mean of r points spaced h (width r h), phase ignored: |G| of block averaging
        raise UserError("block averaging has no continuous transfer function; use the grid form")
    raise UserError(f"unknown filter {kind!r}: choose one of {', '.join(FILTER_KINDS)}")


@dataclass(frozen=True)
class CoarseGraining:
    """Filter of a given kind and width followed by coarsening by ``ratio``, on ``fine``.

    ``widths`` are the filter widths D per direction of ``fine.dims``, in coordinate units.
    """

    kind: str
    ratio: int
    widths: tuple[float, ...]
    fine: Grid

    @cached_property
    def coarse(self) -> Grid:
        if self.kind == "block":
            return self.fine.block(self.ratio)
        return self.fine.coarsen(self.ratio)

    @property
    def delta(self) -> float:
        """One filter width for the library's powers of D: geometric mean over directions."""
        return float(np.prod(self.widths) ** (1.0 / len(self.widths)))

    def second_moment(self, dim: str) -> float | None:
        """Second moment of the filter kernel along ``dim`` (coordinate units squared).

        D^2/12 for box and Gaussian; (r^2 - 1) h^2 / 12 for block averaging of r points of
        spacing h; None for the sharp spectral filter, whose kernel sin(x)/x has no finite
        second moment. On bounded grids the box acts in real space as the discrete kernel
        :func:`box_weights`, whose moment is (D^2 + 2)/12 for an even and (D^2 - 1)/12 for an
        odd whole number of cells (in h^2): that is the moment reported there.
        """
        a = self.fine.axis(dim)
        if self.kind == "box" and not self.fine.periodic:
            w = box_weights(self.widths[a] / self.fine.spacing[a])
            j = np.arange(w.size) - (w.size - 1) / 2
            return float(np.sum(w * j**2)) * self.fine.spacing[a] ** 2
        if self.kind in ("box", "gaussian"):
            return self.widths[a] ** 2 / 12.0
        if self.kind == "block":
            return (self.ratio**2 - 1) * self.fine.spacing[a] ** 2 / 12.0
        return None

    def transfer(self, k: np.ndarray, dim: str) -> np.ndarray:
        """1-D transfer function along ``dim`` (box, Gaussian, sharp spectral)."""
        return transfer_function(self.kind, k, self.widths[self.fine.axis(dim)])

    @cached_property
    def spectral_multiplier(self) -> np.ndarray:
        """Transfer function on the fine grid's ``rfftn`` wavenumbers (periodic filters):
        real, shape ``fine.shape`` with the last axis ``n // 2 + 1``."""
        g = self.fine
        factors = []
        for i, d in enumerate(g.dims):
            k = g.wavenumbers(d, real=(i == g.ndim - 1))
            shape = [1] * g.ndim
            shape[i] = k.size
            factors.append(self.transfer(k, d).reshape(shape))
        out = factors[0]
        for f in factors[1:]:
            out = out * f
        return out

    def filter(self, f: np.ndarray, real_space: bool = False) -> np.ndarray:
        """The filtered field on the fine grid (box, Gaussian, sharp spectral).

        Periodic grids are filtered spectrally (exact transfer functions) unless
        ``real_space``: then, as on non-periodic grids, with the finite real-space kernels of
        :meth:`kernel` (wrap-around on periodic grids, mirror-symmetric edges otherwise).
        """
        if self.kind == "block":
            raise UserError("block averaging has no fine-grid filtered field; use coarse_grain")
        f = np.asarray(f, dtype=float)
        g = self.fine
        axes = tuple(range(f.ndim - g.ndim, f.ndim))
        if g.periodic and not real_space:
            fh = scipy.fft.rfftn(f, axes=axes, workers=-1)
            fh *= self.spectral_multiplier
            return scipy.fft.irfftn(fh, s=g.shape, axes=axes, workers=-1)
        if self.kind == "spectral":
            raise UserError("the sharp spectral filter needs periodic data and has no finite "
                            "footprint: use --filter box or gaussian")
        mode = "wrap" if g.periodic else "reflect"
        out = f
        for a, ax in zip(range(g.ndim), axes, strict=True):
            width_cells = self.widths[a] / g.spacing[a]
            if self.kind == "gaussian":
                out = scipy.ndimage.gaussian_filter1d(out, width_cells / np.sqrt(12.0), axis=ax,
                                                      mode=mode, truncate=GAUSSIAN_TRUNCATE)
            else:
                out = scipy.ndimage.convolve1d(out, box_weights(width_cells), axis=ax, mode=mode)
        return out

    def kernel(self, dim: str) -> np.ndarray:
        """Real-space 1-D kernel along ``dim`` on the fine grid (box, Gaussian), odd length,
        centred, summing to 1: the Gaussian of standard deviation D / sqrt(12) cut at
        :data:`GAUSSIAN_TRUNCATE` standard deviations (radius ``int(6 sigma + 0.5)`` cells, as
        ``scipy.ndimage.gaussian_filter1d`` does), the box as :func:`box_weights`."""
        a = self.fine.axis(dim)
        width_cells = self.widths[a] / self.fine.spacing[a]
        if self.kind == "gaussian":
            sigma = width_cells / np.sqrt(12.0)
            radius = int(GAUSSIAN_TRUNCATE * sigma + 0.5)
            j = np.arange(-radius, radius + 1, dtype=float)
            w = np.exp(-0.5 / sigma**2 * j**2)
            return w / w.sum()
        if self.kind == "box":
            return box_weights(width_cells)
        raise UserError(f"the {self.kind} filter has no finite real-space kernel: use --filter "
                        "box or gaussian")

    def kernel_radius(self) -> tuple[int, ...]:
        """Half-width in fine cells of the real-space kernel per direction (its footprint is
        the box of these half-widths); 0 for block averaging, whose footprint is its block."""
        if self.kind == "block":
            return (0,) * self.fine.ndim
        return tuple((self.kernel(d).size - 1) // 2 for d in self.fine.dims)

    def footprint_touches(self, land: np.ndarray, extra: int = 0) -> np.ndarray:
        """Coarse boolean array: True where the footprint of the coarse point meets ``land``
        (a boolean array of the fine grid's shape).

        Filters: the kernel's support (:meth:`kernel_radius`) widened by ``extra`` fine cells
        per side, around the fine point the coarse point samples (periodic grids wrap;
        mirror-reflected points at a non-periodic edge are never nearer than the points they
        mirror, so no edge rule is needed). Block averaging: the block, after widening ``land``
        by ``extra`` fine cells.
        """
        land = np.asarray(land, dtype=bool)
        g = self.fine
        if land.shape != g.shape:
            raise ValueError(f"land mask of shape {land.shape}, the grid {g.shape}")
        mode = "wrap" if g.periodic else "constant"
        if self.kind == "block":
            if extra:
                land = scipy.ndimage.maximum_filter(land, size=2 * extra + 1, mode=mode,
                                                    cval=False)
            return self.block_mean(land.astype(float)) > 0
        size = tuple(2 * (r + extra) + 1 for r in self.kernel_radius())
        touched = scipy.ndimage.maximum_filter(land, size=size, mode=mode, cval=False)
        return self.sample(touched)

    def weighted_filter(self, f: np.ndarray, weight: np.ndarray,
                        real_space: bool = False) -> np.ndarray:
        """``bar_w(f) = bar(w f) / bar(w)`` on the fine grid for a nonnegative ``weight`` of
        the grid's shape (``f`` may be a stack); 0 where ``bar(w)`` is at most 1e-12 of its
        largest value (footprints without weight). A fluid mask gives fluid-only normalised
        filtering, a density Favre filtering. ``real_space`` as in :meth:`filter`."""
        f, w = self._weighted_inputs(f, weight)
        both = self.filter(np.concatenate([(f * w).reshape(-1, *w.shape), w[None]]),
                           real_space)
        return _divide(both[:-1].reshape(f.shape), both[-1])

    def weighted_block_mean(self, f: np.ndarray, weight: np.ndarray) -> np.ndarray:
        """``sum(w f) / sum(w)`` over each block of r^d fine cells (0 where the block has no
        weight): block averaging weighted by ``weight`` (fine grid shape)."""
        f, w = self._weighted_inputs(f, weight)
        both = self.block_mean(np.concatenate([(f * w).reshape(-1, *w.shape), w[None]]))
        return _divide(both[:-1].reshape(*f.shape[:f.ndim - w.ndim], *both.shape[1:]), both[-1])

    def _weighted_inputs(self, f, weight):
        f = np.asarray(f, dtype=float)
        w = np.asarray(weight, dtype=float)
        if w.shape != self.fine.shape or f.shape[f.ndim - w.ndim:] != w.shape:
            raise ValueError(f"weight of shape {w.shape} and field of shape {f.shape} do not "
                             f"match the grid {self.fine.shape}")
        if not (np.isfinite(w).all() and (w >= 0).all()):
            raise UserError("filter weights must be finite and nonnegative: check the mask or "
                            "density field")
        return f, w

    def sample(self, f: np.ndarray) -> np.ndarray:
        """Every ``ratio``-th point of a fine-grid field from index 0 (trailing axes)."""
        r = self.ratio
        index = (Ellipsis,) + (slice(None, None, r),) * self.fine.ndim
        return np.ascontiguousarray(np.asarray(f)[index])

    def block_mean(self, f: np.ndarray) -> np.ndarray:
        """Mean over r^d blocks of fine cells (trailing axes)."""
        f = np.asarray(f, dtype=float)
        lead = f.shape[: f.ndim - self.fine.ndim]
        shape = list(lead)
        for n in self.fine.shape:
            shape += [n // self.ratio, self.ratio]
        blocks = f.reshape(shape)
        return blocks.mean(axis=tuple(len(lead) + 2 * i + 1 for i in range(self.fine.ndim)))

    @cached_property
    def _direction_multipliers(self) -> list[dict[str, np.ndarray]]:
        """Per direction (``fine.dims`` order), 1-D multipliers on its FFT wavenumbers (``rfft``
        ones for the last direction): ``"f"`` the transfer function, ``"d"`` the first
        derivative ``1j k`` (Nyquist mode of an even length dropped, as closure.derivatives
        does), ``"fd"`` both."""
        g = self.fine
        out = []
        for a, d in enumerate(g.dims):
            real = a == g.ndim - 1
            k = g.wavenumbers(d, real=real)
            G = self.transfer(k, d)
            ik = 1j * k
            if g.shape[a] % 2 == 0:
                ik[-1 if real else g.shape[a] // 2] = 0.0
            out.append({"f": G, "d": ik, "fd": G * ik})
        return out

    def backend_constant(self, name: str, backend=None):
        """A spectral constant as arrays of ``backend`` (closure.backend; default numpy),
        made when first asked for and kept per backend: ``"directions"``
        (:attr:`_direction_multipliers`), ``"spectral_multiplier"`` (fine-grid sized: only
        the passes that filter on the fine grid ask for it) or ``"ik"`` (``1j k_d`` per
        direction on the ``rfftn`` wavenumbers, broadcastable, Nyquist mode of even lengths
        dropped)."""
        be = backend or _NUMPY
        key = (name, be.key)
        if key not in self._backend_constants:
            if name == "directions":
                value = [{code: be.asarray(m) for code, m in d.items()}
                         for d in self._direction_multipliers]
            elif name == "spectral_multiplier":
                value = be.asarray(self.spectral_multiplier)
            elif name == "ik":
                value = {d: be.asarray(v) for d, v in _rfftn_ik(self.fine).items()}
            else:
                raise ValueError(f"no spectral constant {name!r}")
            self._backend_constants[key] = value
        return self._backend_constants[key]

    @cached_property
    def _backend_constants(self) -> dict:
        return {}

    def _polyphase_plan(self, code: str, backend, direction: int = -1):
        """The fold of ``direction`` (default the last) under ``code`` as weights of the
        polyphase transforms: ``H`` (r, h) with ``H[b, k] = (1/r) sum_q m(k + q n)
        exp(-2 pi i b (k + q n) / N)`` (``m`` the multiplier over all N fine wavenumbers,
        ``m(-k) = conj(m(k))`` for a real operator), for the ``h = n // 2 + 1`` coarse
        wavenumbers of the last (half) axis or all ``n`` of another; a ``backend`` array kept
        per backend. See :meth:`_folded_rows`."""
        direction %= self.fine.ndim
        key = ("poly", direction, code, backend.key)
        if key not in self._backend_constants:
            N, r = self.fine.shape[direction], self.ratio
            n = N // r
            given = self._direction_multipliers[direction][code]
            if direction == self.fine.ndim - 1:  # wavenumbers 0 .. N // 2 only
                j = np.arange(N)
                m = np.where(j <= N // 2, given[np.minimum(j, N - j)],
                             np.conj(given[np.minimum(j, N - j)]))
                h = n // 2 + 1
            else:  # every wavenumber, in FFT order
                m, h = given, n
            k = np.arange(h)[None, :] + n * np.arange(r)[:, None]  # (q, k)
            b = np.arange(r)[:, None, None]
            H = (m[k][None] * np.exp(-2j * np.pi * b * k[None] / N)).sum(axis=1) / r
            self._backend_constants[key] = backend.asarray(H)
        return self._backend_constants[key]

    def _folded_rows(self, f, codes: Sequence[str], be, times=None) -> dict:
        """``{code: the rows' spectra under code's last-direction multiplier, folded onto the
        coarse wavenumbers}`` (last axis ``n // 2 + 1``).

        By polyphase: with ``j = r a + b``, the fine spectrum is ``F(k + q n) = sum_b
        exp(-2 pi i b (k + q n) / N) P_b(k)``, where ``P_b`` is the length-``n`` real FFT of
        every r-th point from ``b``; so the folded spectrum ``(1/r) sum_q m(k + q n) F(k + q
        n)`` is ``sum_b H[b, k] P_b(k)`` (:meth:`_polyphase_plan`): r short transforms per row
        (cheaper than one of length N) and r products per coarse wavenumber in one pass, with
        no Hermitian mirror to fold. The rows go by blocks (:meth:`closure.backend.NumpyBackend.
        by_row_blocks`), each block's transforms folded under every code while they are in the
        CPU's cache; the same values, bit for bit, whatever the blocks. With ``times``, the
        rows are those of ``f * times``, formed block by block."""
        N, r = self.fine.shape[-1], self.ratio
        n = N // r
        h = n // 2 + 1
        lead = tuple(f.shape[:-1])
        rows = f.reshape(-1, N)
        other = None if times is None else times.reshape(-1, N)
        out = {c: be.empty((rows.shape[0], h), complex=True) for c in codes}
        plans = {c: self._polyphase_plan(c, be) for c in codes}

        def work(block):
            x = rows[block] if other is None else rows[block] * other[block]
            P = be.rfft(x.reshape(x.shape[0], n, r).swapaxes(-1, -2))  # (rows, r, h)
            for c in codes:
                be.phase_sum(P, plans[c], out[c][block])

        if codes:
            be.by_row_blocks(work, rows.shape[0], N)
        return {c: out[c].reshape(*lead, h) for c in codes}

    def separable(self, f, ops: Sequence[Sequence[str]], sample: bool = True,
                  backend=None, times=None) -> list:
        """Fields under per-direction spectral operators, each then sampled (periodic grids).

        ``f``: a field or stack (trailing axes ``fine.shape``). Each op gives, per direction of
        ``fine.dims``, one code: ``""`` nothing, ``"f"`` the filter, ``"d"`` the first
        derivative, ``"fd"`` both. ``("f",) * ndim`` is the filtered field; ``("f", "fd")`` on
        a (y, x) grid its x derivative. With ``sample`` every ``ratio``-th point is kept
        (coarse grid), else the result stays on the fine grid. Returns one array per op, as
        arrays of ``backend`` (a closure.backend backend; default numpy float64). With
        ``times`` (an array of ``f``'s shape), the field is the product ``f * times``, formed
        by blocks of rows as they are transformed, never whole on the fine grid.

        The filters are tensor products, so the directions are transformed one at a time, the
        last (x) first, and each is folded onto the coarse wavenumbers (the aliasing described
        in the module docstring, computed by polyphase: r transforms of length n and one
        weighted sum, :meth:`_folded_rows`) before the next direction is transformed: the transforms
        along y (and z) act on arrays already coarse in x. A direction without a code is
        sampled by slicing. One coarse inverse FFT per op at the end. Ops sharing codes share
        the transforms. Exact: the values of filtering and differentiating on the fine grid,
        then sampling, to round-off. Each op's arithmetic does not depend on the other ops
        asked for (the same bits).
        """
        g = self.fine
        be = backend or _NUMPY
        if not g.periodic or self.kind == "block":
            raise ValueError("separable needs a periodic grid and a filter")
        if tuple(f.shape[len(f.shape) - g.ndim:]) != g.shape:
            raise ValueError(f"array of shape {tuple(f.shape)} does not end with the grid "
                             f"shape {g.shape}")
        f = be.asarray(f)
        if times is not None:
            times = be.asarray(times)
            if tuple(times.shape) != tuple(f.shape):
                raise ValueError(f"times of shape {tuple(times.shape)} is not f's shape "
                                 f"{tuple(f.shape)}")
        ops = [tuple(op) for op in ops]
        for op in ops:
            if len(op) != g.ndim or not set(op) <= {"", "f", "d", "fd"}:
                raise ValueError(f"op {op!r}: give one of '', 'f', 'd', 'fd' per direction of "
                                 f"{g.dims}")
        out: dict[tuple[str, ...], object] = {}
        last, r = g.ndim - 1, self.ratio
        groups: dict[str, list] = {}
        for op in sorted(set(ops)):
            groups.setdefault(op[last], []).append(op)
        folded = self._folded_rows(f, [c for c in groups if c], be, times) if sample else {}
        rows = None
        for code, members in groups.items():
            if not code:  # sample the real rows first: a shorter transform, nothing to fold
                x = f[..., ::r] if sample else f
                X = be.rfft(x if times is None else x * (times[..., ::r] if sample else times))
            elif sample:
                X = folded.pop(code)
            else:
                if rows is None:  # real rows: 1-D Hermitian symmetry
                    rows = be.rfft(f if times is None else f * times)
                X = rows * self.backend_constant("directions", be)[last][code]
            self._lead_directions(X, last - 1, members, sample, (), out, be)
        return [out[op] for op in ops]

    def _lead_directions(self, X, direction, ops, sample, spectral, out, be) -> None:
        """Directions before the last, from the last but one to the first; ``X`` is real
        along the directions still to do, spectral along ``spectral`` and the last one."""
        g, r = self.fine, self.ratio
        if direction < 0:
            shape = tuple(g.shape[b] // r if sample else g.shape[b]
                          for b in (*spectral, g.ndim - 1))
            axes = tuple(X.ndim - g.ndim + b for b in (*spectral, g.ndim - 1))
            result = be.irfftn(X, shape, axes)
            for op in ops:
                out[op] = result
            return
        axis = X.ndim - g.ndim + direction
        N = g.shape[direction]
        n = N // r
        groups: dict[str, list] = {}
        for op in ops:
            groups.setdefault(op[direction], []).append(op)
        T = None
        lead = (slice(None),) * axis
        before = int(np.prod(X.shape[:axis]))
        after = int(np.prod(X.shape[axis + 1:]))
        for code, members in groups.items():
            if not code:  # real along this direction: sampling is slicing
                Y = X[(*lead, slice(None, None, r))] if sample else X
                self._lead_directions(Y, direction - 1, members, sample, spectral, out, be)
                continue
            if sample:  # by polyphase, as the rows (_folded_rows): r transforms of length n
                if T is None:
                    T = be.fft(X.reshape(before, n, r, after), 1)
                Y = be.phase_sum(T, self._polyphase_plan(code, be, direction), None,
                                 "akbc,bk->akc").reshape(*X.shape[:axis], n, *X.shape[axis + 1:])
            else:
                if T is None:
                    T = be.fft(X, axis)
                m = self.backend_constant("directions", be)[direction][code]
                Y = T * m.reshape((N,) + (1,) * (X.ndim - 1 - axis))
            self._lead_directions(Y, direction - 1, members, sample, (direction, *spectral),
                                  out, be)

    def __call__(self, f: np.ndarray) -> np.ndarray:
        """Coarse-grain: filter then sample, or block-average; returns a coarse-grid array."""
        if self.kind == "block":
            return self.block_mean(f)
        if self.fine.periodic:  # one spectral step per direction, no fine-grid inverse
            return self.separable(f, [("f",) * self.fine.ndim])[0]
        return self.sample(self.filter(f))

    def describe(self) -> dict:
        """Kind, widths, ratio and second moments, as plain types (for files and attributes)."""
        g = self.fine
        moments = {d: self.second_moment(d) for d in g.dims}
        out = {
            "kind": self.kind,
            "ratio": self.ratio,
            "width": self.delta,
            "widths": {d: w for d, w in zip(g.dims, self.widths, strict=True)},
            "width_cells": {d: w / h for d, w, h in zip(g.dims, self.widths, g.spacing,
                                                         strict=True)},
            "second_moment": moments,
        }
        if self.kind == "spectral":
            out["second_moment_note"] = ("undefined: the sharp spectral kernel sin(x)/x has no "
                                         "finite second moment")
        return out

    def warnings(self) -> list[str]:
        """Things a modeller should know about this choice (not errors)."""
        out = []
        if self.kind in ("box", "gaussian", "spectral"):
            for d, w, h in zip(self.fine.dims, self.widths, self.coarse.spacing, strict=True):
                if w < h * (1 - 1e-12):
                    out.append(f"filter width {w:g} in {d} is narrower than the coarse spacing "
                               f"{h:g}: the coarse fields alias unfiltered scales")
        return out


def _rfftn_ik(grid: Grid) -> dict[str, np.ndarray]:
    """``1j * k_d`` on the rfftn wavenumbers, broadcastable, Nyquist mode of even lengths
    dropped (as closure.derivatives does for odd derivatives)."""
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


def _divide(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """``num / den`` (den broadcast over leading axes), 0 where ``den`` is at most 1e-12 of
    its largest value."""
    top = float(np.max(den)) if den.size else 0.0
    ok = den > 1e-12 * top
    safe = np.where(ok, den, 1.0)
    return np.where(ok, num / safe, 0.0)


def land_as_zero(f: np.ndarray, fluid: np.ndarray) -> np.ndarray:
    """``f`` with every point off the ``fluid`` mask set to 0 (trailing axes of ``f`` are the
    mask's): the land-as-zero convention (Aluie, Hecht & Vallis 2018, from memory) filters
    this field with the ordinary filter. NaN on land is replaced too."""
    return np.where(np.asarray(fluid, dtype=bool), np.asarray(f, dtype=float), 0.0)


def box_weights(width_cells: float) -> np.ndarray:
    """Discrete top-hat of width ``width_cells`` spacings: the overlap of each cell with
    [-D/2, D/2], normalised (odd integer widths: uniform; even: half weights at the ends)."""
    half = width_cells / 2.0
    m = int(np.ceil(half - 0.5 - 1e-12))  # cells reaching past the centre cell
    j = np.arange(-m, m + 1, dtype=float)
    w = np.clip(np.minimum(j + 0.5, half) - np.maximum(j - 0.5, -half), 0.0, None)
    return w / w.sum()


def make_coarse_graining(kind: str, grid: Grid, ratio: int, width: float | None = None,
                         width_units: str = "grid") -> CoarseGraining:
    """Build and check a coarse-graining.

    ``width`` is D in fine-grid spacings (``width_units="grid"``, per direction) or in
    coordinate units. It defaults to ``2 * ratio`` spacings for the filters (common practice)
    and is ``ratio`` spacings for block averaging, which has no other width.
    """
    if kind not in FILTER_KINDS:
        raise UserError(f"unknown filter {kind!r}: choose one of {', '.join(FILTER_KINDS)}")
    if kind == "spectral" and not grid.periodic:
        raise UserError("the sharp spectral filter needs periodic data: use --filter box or "
                        "gaussian, or declare the data periodic")
    if width_units not in WIDTH_UNITS:
        raise UserError(f"unknown width units {width_units!r}: choose grid or coordinate")
    if not isinstance(ratio, int | np.integer) or ratio < 1:
        raise UserError(f"the coarsening ratio must be a whole number >= 1, got {ratio!r}")
    ratio = int(ratio)
    if kind == "block":
        if width is not None:
            expect = ratio if width_units == "grid" else None
            if expect is None or abs(width - expect) > 1e-9:
                raise UserError("block averaging has width equal to the ratio (in grid "
                                f"spacings): omit --width or set it to {ratio}")
        widths = tuple(ratio * h for h in grid.spacing)
    else:
        if width is None:
            width = 2.0 * ratio
            width_units = "grid"
        if not np.isfinite(width) or width <= 0:
            raise UserError(f"the filter width must be a positive number, got {width!r}")
        if width_units == "grid":
            widths = tuple(float(width) * h for h in grid.spacing)
        else:
            widths = (float(width),) * grid.ndim
    # the ratio first: the default width follows from it
    grid.block(ratio) if kind == "block" else grid.coarsen(ratio)
    for d, w, L, h, n in zip(grid.dims, widths, grid.lengths, grid.spacing, grid.shape,
                             strict=True):
        if w > L * (1 + 1e-12):
            raise UserError(f"the filter width {w:g} ({w / h:g} grid spacings) is larger than "
                            f"the domain in {d} ({L:g}, {n} points): use a smaller --width")
    cg = CoarseGraining(kind, ratio, widths, grid)
    cg.coarse  # noqa: B018  (checks the ratio against the grid now, with a clear message)
    return cg
