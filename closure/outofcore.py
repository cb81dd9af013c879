"""Out-of-core coarse-graining: one snapshot within a memory budget, slab by slab.

The result is that of :func:`closure.residuals.coarse_grain_snapshot` (to round-off: the same
per-direction operators in the same order), but the fine grid is never held whole. The fine
fields are read in slabs along the first grid direction (z in 3-D, y in 2-D); every product is
formed slab by slab; intermediates that do not fit the budget live in memory-mapped files in a
temporary folder (deleted afterwards); only the coarse result is kept in memory.

Periodic filters (box, Gaussian, sharp spectral): the operators are tensor products, so each
slab is transformed along its complete directions (x, and y in 3-D) and folded onto the coarse
wavenumbers there (closure.filters.CoarseGraining._folded_rows), which shrinks it by the ratio per
direction; the first direction is then transformed column chunk by column chunk of that smaller
store. Fine-grid fields that the force and vorticity terms need (the filtered velocity, the
vorticity) are built the same way without folding and kept in files.

Block averaging: block means of slabs ``ratio`` points thick land on the coarse grid directly.
Non-periodic box and Gaussian filters: each slab is filtered along its complete directions, then
along the first direction with a halo of the kernel's radius (the file's edges reflect as in
the in-memory path); the fourth-order derivatives of the terms use a halo of two points (at least
six points per window, for the one-sided edge stencils), and each slab is sampled at once.

Float32 (``dtype=np.float32``): the fine-grid pass in single precision (half the memory and
bandwidth), the coarse result in float64. Its error against float64 is that of single-precision
FFTs: about 1e-6 of the field's largest value (tests bound it by 1e-4).
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import scipy.fft
import scipy.ndimage

from closure.backend import NumpyBackend
from closure.errors import OptionError, UserError
from closure.filters import CoarseGraining, box_weights
from closure.grid import VELOCITY_OF, Grid

#: the default budget: this fraction of the machine's memory
DEFAULT_MEMORY_FRACTION = 0.5
#: peak memory of the in-memory path per byte of the snapshot's fields, with a margin:
#: measured (bench/outofcore_3d.py, 256^3) 2.0x for the stress, 5.3x with the force (which
#: holds the fine filtered velocity and its products)
IN_MEMORY_FACTOR = 3.0
IN_MEMORY_FACTOR_FINE = 6.5
_UNITS = {"": 1, "b": 1, "k": 2**10, "kb": 10**3, "kib": 2**10, "m": 2**20, "mb": 10**6,
          "mib": 2**20, "g": 2**30, "gb": 10**9, "gib": 2**30, "t": 2**40, "tb": 10**12,
          "tib": 2**40}


# ---------------------------------------------------------------------------------- budgets
def machine_memory() -> int:
    """Bytes of memory this process may use: the machine's, or its cgroup limit if smaller."""
    total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    for path in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            text = Path(path).read_text().strip()
        except OSError:
            continue
        if text.isdigit() and 0 < int(text) < total:
            total = int(text)
    return int(total)


def default_memory_limit() -> int:
    """``DEFAULT_MEMORY_FRACTION`` (half) of :func:`machine_memory`."""
    return int(DEFAULT_MEMORY_FRACTION * machine_memory())


def parse_memory(text: str | int | float | None) -> int | None:
    """``"4G"``, ``"512MB"``, ``"2GiB"``, ``"0.25"`` (a fraction of the machine's memory) or a
    number of bytes -> bytes. None stays None (the default applies). OptionError otherwise."""
    if text is None:
        return None
    if isinstance(text, int | float) and not isinstance(text, bool):
        value, unit = float(text), ""
    else:
        s = str(text).strip().lower().replace(" ", "")
        num = s.rstrip("abcdefghijklmnopqrstuvwxyz")
        value, unit = (float(num) if num else float("nan")), s[len(num):]
        if unit not in _UNITS:
            value = float("nan")
    if not np.isfinite(value) or value <= 0:
        raise OptionError(f"--memory-limit expects a size such as 4G, 512MB or 2GiB, or a "
                          f"fraction of the machine's memory such as 0.5; got {text!r}")
    if unit == "" and value < 1:
        return int(value * machine_memory())
    return int(value * _UNITS[unit])


def snapshot_bytes(grid: Grid, n_fields: int) -> int:
    """Bytes of one snapshot's fine fields in float64."""
    return 8 * int(np.prod(grid.shape)) * int(n_fields)


def in_memory_bytes(grid: Grid, n_fields: int, targets: Sequence[str] | None = None) -> int:
    """Estimated peak bytes of the in-memory pass (closure.residuals.coarse_grain_snapshot)
    for ``targets`` (None: every one, the force included)."""
    fine = targets is None or any(t.startswith("force_") or t == "vorticity_forcing"
                                  for t in targets)
    factor = IN_MEMORY_FACTOR_FINE if fine else IN_MEMORY_FACTOR
    return int(factor * snapshot_bytes(grid, n_fields))


def needs_out_of_core(grid: Grid, n_fields: int, memory_limit: int | None,
                      targets: Sequence[str] | None = None) -> bool:
    """Whether the in-memory pass over a snapshot of ``n_fields`` fields, computing
    ``targets`` (None: all), would exceed the budget (None: the default budget)."""
    limit = default_memory_limit() if memory_limit is None else int(memory_limit)
    return in_memory_bytes(grid, n_fields, targets) > limit


# ---------------------------------------------------------------------------------- sources
class ArraySlabs:
    """Slabs of an in-memory snapshot (closure.io.Snapshot or anything with fields, grid,
    index, time)."""

    def __init__(self, snapshot):
        self.grid, self.index, self.time = snapshot.grid, snapshot.index, snapshot.time
        self._fields = snapshot.fields
        self.names = tuple(snapshot.fields)

    def read(self, name: str, start: int, stop: int) -> np.ndarray:
        return np.asarray(self._fields[name][start:stop], dtype=float)


class SourceSlabs:
    """Slabs of snapshot ``index`` of an open closure.io.FieldSource, read from the file."""

    def __init__(self, source, index: int):
        self.grid, self.index = source.grid, int(index)
        self.time = source.time_of(self.index)
        self._source = source
        self.names = (*source.velocity, *source.scalars)

    def read(self, name: str, start: int, stop: int) -> np.ndarray:
        return self._source.read_slab(name, self.index, start, stop)


# ---------------------------------------------------------------------------------- storage
class _FileArray:
    """An array in a file, mapped only while it is read or written (so its pages count in the
    page cache, not in this process's resident memory)."""

    def __init__(self, path: str, shape, dtype):
        self.path, self.shape, self.dtype = path, tuple(int(n) for n in shape), np.dtype(dtype)
        with open(path, "wb") as fh:
            fh.truncate(int(np.prod(self.shape)) * self.dtype.itemsize)

    def _map(self, mode: str) -> np.memmap:
        return np.memmap(self.path, dtype=self.dtype, mode=mode, shape=self.shape)

    def __getitem__(self, index) -> np.ndarray:
        mm = self._map("r")
        try:
            return np.array(mm[index])
        finally:
            del mm

    def __setitem__(self, index, value) -> None:
        mm = self._map("r+")
        try:
            mm[index] = value
        finally:
            del mm

    def cols(self, c0: int, c1: int) -> np.ndarray:
        mm = self._map("r")
        try:
            return np.array(mm.reshape(self.shape[0], -1)[:, c0:c1])
        finally:
            del mm

    def set_cols(self, c0: int, c1: int, value) -> None:
        mm = self._map("r+")
        try:
            mm.reshape(self.shape[0], -1)[:, c0:c1] = value
        finally:
            del mm


class _MemArray(np.ndarray):
    """An in-memory store with the column access of :class:`_FileArray`."""

    def cols(self, c0: int, c1: int) -> np.ndarray:
        return np.asarray(self).reshape(self.shape[0], -1)[:, c0:c1]

    def set_cols(self, c0: int, c1: int, value) -> None:
        np.asarray(self).reshape(self.shape[0], -1)[:, c0:c1] = value


class _Stores:
    """Intermediate arrays: in memory while they fit half the budget, else files in a
    temporary folder."""

    def __init__(self, budget: int, folder: str):
        self.budget, self.folder, self.used, self.count = budget, folder, 0, 0

    def empty(self, shape, dtype):
        nbytes = int(np.prod(shape)) * np.dtype(dtype).itemsize
        if self.used + nbytes <= self.budget // 2:
            self.used += nbytes
            return np.empty(shape, dtype).view(_MemArray)
        self.count += 1
        return _FileArray(os.path.join(self.folder, f"store{self.count}.dat"), shape, dtype)


def _steps(n: int, per: int, multiple: int = 1):
    """(start, stop) ranges covering 0..n, ``per`` long (rounded down to ``multiple``)."""
    per = max(multiple, (max(1, int(per)) // multiple) * multiple)
    for s in range(0, n, per):
        yield s, min(n, s + per)


# ---------------------------------------------------------------------------------- engine
class _Engine:
    """Per-direction spectral operators applied to slab-produced fine fields (periodic)."""

    def __init__(self, cg: CoarseGraining, budget: int, stores: _Stores, dtype):
        self.cg, self.g, self.r = cg, cg.fine, cg.ratio
        self.budget, self.stores = budget, stores
        self.real = np.dtype(dtype)
        self.complex = np.result_type(self.real, np.complex64)
        self.backend = NumpyBackend("float32" if self.real == np.float32 else "float64")
        if cg.kind == "block":
            mults = []
            for a, d in enumerate(self.g.dims):
                real = a == self.g.ndim - 1
                ik = 1j * self.g.wavenumbers(d, real=real)
                if self.g.shape[a] % 2 == 0:
                    ik[-1 if real else self.g.shape[a] // 2] = 0.0
                mults.append({"d": ik})
        else:
            mults = cg._direction_multipliers
        # the multipliers in the pass's precision (float32: kept single)
        self.m = [{k: v.astype(self.complex if np.iscomplexobj(v) else self.real)
                   for k, v in m.items()} for m in mults]

    def rows_per_slab(self, fields_per_row: float) -> int:
        row = 8 * int(np.prod(self.g.shape[1:])) * max(fields_per_row, 1.0)
        return max(1, int(self.budget // 4 // row))

    # -------------------------------------------------------------- sampled (coarse) outputs
    def coarse_per_slab(self, requests, n_inputs: int) -> int:
        """Rows per slab of the sampled pass over ``requests``."""
        return self.rows_per_slab(n_inputs + 6.0 * max(1, len(requests)))

    def coarse_rows(self, requests, read: Callable, s0: int, s1: int):
        """The directions other than the first over rows ``s0:s1``: yields (request number,
        rest codes, X, spectral axes) for every request (see :meth:`coarse`)."""
        last = self.g.ndim - 1
        cache: dict = {}

        def slab(name):
            if name not in cache:
                cache[name] = np.asarray(read(name, s0, s1), dtype=self.real)
            return cache[name]

        for n, (_, producer, ops) in enumerate(requests):
            f = producer(slab)
            for rest, (X, spectral) in self._slab_forward(f, ops, last).items():
                yield n, rest, X, spectral
            del f

    def coarse(self, requests, read: Callable, n_inputs: int) -> dict:
        """``requests``: list of (key, producer, ops); ``producer(slab)`` makes the fine field
        of a slab from ``slab(name)`` (the named inputs over the slab's rows). Returns
        ``{(key, op): coarse array}``, as CoarseGraining.separable(..., sample=True)."""
        g = self.g
        partial: dict = {}  # (request, rest codes) -> store (N0, ...)
        spectral_of: dict = {}
        for s0, s1 in _steps(g.shape[0], self.coarse_per_slab(requests, n_inputs)):
            for n, rest, X, spectral in self.coarse_rows(requests, read, s0, s1):
                if (n, rest) not in partial:
                    partial[(n, rest)] = self.stores.empty((g.shape[0], *X.shape[1:]), X.dtype)
                    spectral_of[(n, rest)] = spectral
                partial[(n, rest)][s0:s1] = X
        out = {}
        for n, (key, _, ops) in enumerate(requests):
            for rest in {op[1:] for op in ops}:
                members = [op for op in ops if op[1:] == rest]
                store = partial.pop((n, rest))
                res = self._first_direction(store, members, spectral_of[(n, rest)])
                out.update({(key, op): a for op, a in res.items()})
                if isinstance(store, _FileArray):  # free its disk now, not at the end
                    os.unlink(store.path)
        return out

    def _slab_forward(self, f, ops, last) -> dict:
        """Directions other than the first over one slab: {codes of dirs 1..: (X, spectral)}."""
        r = self.r
        results: dict = {}
        codes = sorted({op[last] for op in ops})
        # the in-memory pass's polyphase folds, by blocks of rows on every core
        folded = self.cg._folded_rows(f, [c for c in codes if c], self.backend)
        for code in codes:
            members = [op for op in ops if op[last] == code]
            X = scipy.fft.rfft(f[..., ::r], axis=-1, workers=-1) if not code else folded[code]
            self._middle(X, last - 1, members, (), results)
        return results

    def _middle(self, X, direction, ops, spectral, results) -> None:
        g, r = self.g, self.r
        if direction < 1:
            for op in ops:
                results[op[1:]] = (X, spectral)
            return
        axis = direction  # a slab has the grid's axes
        N = g.shape[direction]
        n = N // r
        groups: dict = {}
        for op in ops:
            groups.setdefault(op[direction], []).append(op)
        T = None
        for code, members in groups.items():
            if not code:
                Y = X[(slice(None),) * axis + (slice(None, None, r),)]
                self._middle(Y, direction - 1, members, spectral, results)
                continue
            if T is None:
                T = scipy.fft.fft(X, axis=axis, workers=-1)
            m = self.m[direction][code]
            shape = [1] * X.ndim
            shape[axis] = n
            Y = T[(slice(None),) * axis + (slice(0, n),)] * m[:n].reshape(shape)
            for q in range(1, r):
                Y += (T[(slice(None),) * axis + (slice(q * n, (q + 1) * n),)]
                      * m[q * n:(q + 1) * n].reshape(shape))
            Y *= 1.0 / r
            self._middle(Y, direction - 1, members, (direction, *spectral), results)

    def columns_per_chunk(self) -> int:
        """Columns per chunk of the first direction's pass."""
        return max(1, int(self.budget // 4 // (self.g.shape[0] * 16 * 3)))

    def first_columns(self, block, code: str) -> np.ndarray:
        """The first direction of a column block (N0, c) of a partial store: sampled every
        r-th row (no operator along it) or transformed, multiplied by the operator ``code``
        and folded onto the coarse wavenumbers; (N0 / r, c)."""
        r, N0 = self.r, self.g.shape[0]
        n0 = N0 // r
        if not code:
            return np.array(block[::r])
        m = self.m[0][code]
        T = scipy.fft.fft(block, axis=0, workers=-1)
        Y = T[:n0] * m[:n0, None]
        for q in range(1, r):
            Y += T[q * n0:(q + 1) * n0] * m[q * n0:(q + 1) * n0, None]
        Y *= 1.0 / r
        return Y

    def coarse_inverse(self, X, code: str, rest_shape, spectral) -> np.ndarray:
        """The coarse field from the first direction's result ``X`` (N0 / r, columns) of a
        store whose rows have ``rest_shape`` and are spectral along ``spectral``."""
        g, r = self.g, self.r
        X = X.reshape(g.shape[0] // r, *rest_shape)
        axes = (*((0, *spectral) if code else spectral), g.ndim - 1)
        shape = tuple(g.shape[b] // r for b in axes)
        return np.asarray(scipy.fft.irfftn(X, s=shape, axes=axes, workers=-1), dtype=float)

    def _first_direction(self, store, ops, spectral) -> dict:
        """The first direction over column chunks of ``store`` (N0, ...), then the coarse
        inverse transform; {op: coarse array}."""
        n0 = self.g.shape[0] // self.r
        cols = int(np.prod(store.shape[1:]))
        out = {}
        groups: dict = {}
        for op in ops:
            groups.setdefault(op[0], []).append(op)
        per = self.columns_per_chunk()
        for code, members in groups.items():
            X = np.empty((n0, cols), dtype=np.result_type(store.dtype, self.complex))
            for c0, c1 in _steps(cols, per):
                X[:, c0:c1] = self.first_columns(store.cols(c0, c1), code)
            result = self.coarse_inverse(X, code, store.shape[1:], spectral)
            for op in members:
                out[op] = result
        return out

    # -------------------------------------------------------------- fine-grid outputs
    @property
    def half(self) -> tuple[int, ...]:
        """Shape of a fine field's spectrum along every direction but the first."""
        g = self.g
        return (*g.shape[:-1], g.shape[-1] // 2 + 1)

    def fine_per_slab(self, key_terms, n_inputs: int) -> int:
        return self.rows_per_slab(n_inputs + 4.0 * len(key_terms))

    def fine_rows(self, key_terms, read: Callable, s0: int, s1: int) -> list[np.ndarray]:
        """Rows ``s0:s1`` of each term's spectrum along every direction but the first, its
        operators along them applied (see :meth:`fine`)."""
        d = self.g.ndim
        rest_axes = tuple(range(1, d))
        cache: dict = {}

        def slab(name):
            if name not in cache:
                cache[name] = np.asarray(read(name, s0, s1), dtype=self.real)
            return cache[name]

        out = []
        for sign, producer, op in key_terms:
            X = scipy.fft.rfftn(producer(slab), axes=rest_axes, workers=-1)
            for a in rest_axes:
                if op[a]:
                    shape = [1] * d
                    shape[a] = -1
                    X = X * self.m[a][op[a]].reshape(shape)
            out.append(X if sign == 1 else sign * X)
        return out

    def fine_columns_per_chunk(self, n_terms: int) -> int:
        return max(1, int(self.budget // 4 // (self.g.shape[0] * 16 * (2 + n_terms))))

    def fine_columns(self, blocks, key_terms) -> np.ndarray:
        """The first direction over one column block (N0, c) of every term's spectrum: the
        sum of the terms, transformed back along the first direction."""
        acc = None
        for block, (_, _, op) in zip(blocks, key_terms, strict=True):
            T = scipy.fft.fft(block, axis=0, workers=-1)
            if op[0]:
                T *= self.m[0][op[0]][:, None]
            acc = T if acc is None else acc + T
        return scipy.fft.ifft(acc, axis=0, workers=-1)

    def fine_inverse(self, rows) -> np.ndarray:
        """Fine-grid rows from their spectrum along every direction but the first."""
        g = self.g
        return scipy.fft.irfftn(np.asarray(rows), s=g.shape[1:], axes=tuple(range(1, g.ndim)),
                                workers=-1)

    def fine(self, key_terms, read: Callable, n_inputs: int):
        """A fine-grid field ``sum(sign * op(producer))`` over ``key_terms`` (sign, producer,
        op), every direction transformed (an n-D FFT, multiply, inverse); a store."""
        g = self.g
        half = self.half
        specs = [self.stores.empty(half, self.complex) for _ in key_terms]
        per = self.fine_per_slab(key_terms, n_inputs)
        for s0, s1 in _steps(g.shape[0], per):
            for spec, X in zip(specs, self.fine_rows(key_terms, read, s0, s1), strict=True):
                spec[s0:s1] = X
        cols = int(np.prod(half[1:]))
        for c0, c1 in _steps(cols, self.fine_columns_per_chunk(len(key_terms))):
            specs[0].set_cols(c0, c1, self.fine_columns([s.cols(c0, c1) for s in specs],
                                                        key_terms))
        out = self.stores.empty(g.shape, self.real)
        for s0, s1 in _steps(g.shape[0], per):
            out[s0:s1] = self.fine_inverse(specs[0][s0:s1])
        return out


# ---------------------------------------------------------------------------------- driver
def coarse_grain_out_of_core(slabs, cg: CoarseGraining, scalars: Sequence[str] = (),
                             targets: Sequence[str] | None = None,
                             memory_limit: int | None = None, workdir: str | None = None,
                             dtype=np.float64):
    """:func:`closure.residuals.coarse_grain_snapshot` of one snapshot read by slabs.

    ``slabs``: :class:`SourceSlabs` (a file) or :class:`ArraySlabs` (in memory), with ``grid``,
    ``index``, ``time`` and ``read(name, start, stop)``. ``memory_limit``: bytes (None: half
    the machine's memory); intermediates beyond half of it go to files in ``workdir`` (None:
    the system's temporary folder). ``dtype`` float32 runs the fine-grid pass in single
    precision (see the module docstring). Returns a closure.residuals.CoarseSnapshot.
    """
    from closure.residuals import CoarseSnapshot, _wanted

    g = slabs.grid
    if g.dims != cg.fine.dims or g.shape != cg.fine.shape or g.periodic != cg.fine.periodic:
        raise UserError(f"the snapshot's grid {g.dims} {g.shape} does not match the "
                        f"coarse-graining's fine grid {cg.fine.dims} {cg.fine.shape}: build "
                        "the coarse-graining from this file's grid")
    if isinstance(scalars, str):
        scalars = (scalars,)
    scalars = tuple(dict.fromkeys(scalars))
    for c in (*(VELOCITY_OF[d] for d in _dirs(g.dims)), *scalars):
        if c not in slabs.names:
            raise UserError(f"the snapshot has no field {c!r} (it has "
                            f"{', '.join(slabs.names)}): add it with --scalar or --var")
    if np.dtype(dtype) not in (np.dtype(np.float64), np.dtype(np.float32)):
        raise OptionError(f"the fine-grid pass runs in float64 or float32, not {dtype!r}")
    want = set(_wanted(targets, g.dims, scalars))
    if g.ndim == 1:  # a 1-D snapshot is a single row: nothing to split
        from closure.io import Snapshot
        from closure.residuals import coarse_grain_snapshot

        snap = Snapshot({c: slabs.read(c, 0, g.shape[0]) for c in slabs.names}, g,
                        slabs.index, slabs.time)
        return coarse_grain_snapshot(snap, cg, scalars, targets)
    budget = default_memory_limit() if memory_limit is None else int(memory_limit)
    if budget <= 0:
        raise OptionError(f"the memory limit must be positive, got {memory_limit!r}")
    with tempfile.TemporaryDirectory(prefix="closure-slabs-", dir=workdir) as folder:
        stores = _Stores(budget, folder)
        if cg.kind != "block" and g.periodic:
            fields, out = _spectral(slabs, cg, scalars, want, _Engine(cg, budget, stores, dtype))
        elif cg.kind == "block":
            fields, out = _block(slabs, cg, scalars, want, budget, stores, dtype)
        else:
            fields, out = _bounded(slabs, cg, scalars, want, budget, stores, dtype)
        fields = {k: np.ascontiguousarray(v, dtype=float) for k, v in fields.items()}
        order = [t for t in _wanted(targets, g.dims, scalars)]
        out = {k: np.ascontiguousarray(out[k], dtype=float) for k in order}
    return CoarseSnapshot(fields, out, cg.coarse, cg, slabs.index, slabs.time)


def _dirs(dims) -> tuple[str, ...]:
    return tuple(d for d in ("x", "y", "z") if d in dims)


def _spectral(slabs, cg, scalars, want, eng: _Engine):
    """closure.residuals._spectral_terms, by slabs (same operators, same arithmetic)."""
    terms = SpectralTerms(cg, scalars, want)
    read = slabs.read
    # fine-grid fields first (files when large): filtered velocity, vorticity, its filter
    fine_store = {name: eng.fine(key_terms, read, terms.n_inputs)
                  for name, key_terms in terms.fine_fields().items()}

    def read_all(name, s0, s1):
        if name in fine_store:
            return fine_store[name][s0:s1]
        return read(name, s0, s1)

    res = eng.coarse(terms.requests(), read_all, terms.n_inputs + len(fine_store))
    return terms.assemble(res)


class SpectralTerms:
    """What the periodic spectral pass computes for ``want``: the fine-grid fields it needs
    first (:meth:`fine_fields`), the sampled coarse outputs (:meth:`requests`) and the terms
    assembled from those (:meth:`assemble`); the same lists, in the same order, in process
    and in the queue's slab tasks (closure.slabtasks)."""

    def __init__(self, cg: CoarseGraining, scalars, want):
        fine = cg.fine
        self.dims = fine.dims
        self.dirs = _dirs(self.dims)
        self.scalars = tuple(scalars)
        self.want = set(want)
        self.two_d = self.dims == ("y", "x")
        self.n_inputs = len(self.dirs) + len(self.scalars)
        self.need_force = any(t.startswith("force_") for t in self.want)
        self.need_vf = self.two_d and "vorticity_forcing" in self.want
        self.need_sigma = self.two_d and bool(
            self.want & {"vorticity_forcing", "enstrophy_transfer"})
        self._F = ("f",) * fine.ndim

    def _op(self, code, j):
        return tuple(code if d == j else ("f" if "f" in code else "") for d in self.dims)

    def fine_fields(self) -> dict:
        """{name: key terms} of the fine-grid fields the sampled pass reads (see
        _Engine.fine): the filtered velocity, the vorticity and its filter."""
        out: dict = {}
        if self.need_force or self.need_vf:
            for i in self.dirs:
                out[f"ubar:{i}"] = [(1.0, _field(VELOCITY_OF[i]), self._F)]
        if self.need_sigma:
            ax, ay = ("", "d"), ("d", "")  # d_x, d_y on (y, x)
            out["omega"] = [(1.0, _field("v"), ax), (-1.0, _field("u"), ay)]
            if self.need_vf:
                out["omega_bar"] = [(1.0, _field("v"), ("f", "fd")),
                                    (-1.0, _field("u"), ("fd", "f"))]
        return out

    def requests(self) -> list:
        """The sampled outputs: (key, producer, ops), as _Engine.coarse takes them."""
        from closure.residuals import stress_pairs

        dirs, want, two_d, F = self.dirs, self.want, self.two_d, self._F
        Fd = {j: self._op("fd", j) for j in dirs}
        D = {j: self._op("d", j) for j in dirs}
        V = {d: VELOCITY_OF[d] for d in dirs}
        need_force, need_vf = self.need_force, self.need_vf
        req = []
        for i in dirs:
            js = [j for j in dirs if "pi" in want or (two_d and j != i)]
            req.append((("u", i), _field(V[i]), [F, *(Fd[j] for j in js)]))
        for c in self.scalars:
            req.append((("c", c), _field(c), [F]))
        if self._stress():
            for i, j in stress_pairs(self.dims):
                js = sorted({i, j}) if need_force else []
                req.append((("p", i, j), _product(V[i], V[j]), [F, *(Fd[d] for d in js)]))
                if need_force:
                    req.append((("q", i, j), _product(f"ubar:{i}", f"ubar:{j}"),
                                [D[d] for d in js]))
        for c in self.scalars:
            if want & {f"flux_{c}_{j}" for j in dirs}:
                for j in dirs:
                    req.append((("flux", c, j), _product(V[j], c), [F]))
        if self.need_sigma:
            req.append((("omega",), _field("omega"), [F, *(Fd[j] for j in dirs)]))
            for j in dirs:
                req.append((("s", j), _product(V[j], "omega"),
                            [F, *([Fd[j]] if need_vf else [])]))
                if need_vf:
                    req.append((("t", j), _product(f"ubar:{j}", "omega_bar"), [D[j]]))
        return req

    def _stress(self) -> bool:
        from closure.residuals import stress_names

        return bool(self.want & {*stress_names(self.dims), "pi"} or self.need_force)

    def assemble(self, res: dict):
        """(coarse fields, coarse targets) from the sampled outputs ``{(key, op): array}``."""
        from closure.residuals import energy_transfer, stress_pairs

        dirs, want, two_d, F = self.dirs, self.want, self.two_d, self._F
        Fd = {j: self._op("fd", j) for j in dirs}
        D = {j: self._op("d", j) for j in dirs}
        V = {d: VELOCITY_OF[d] for d in dirs}
        need_force, need_vf = self.need_force, self.need_vf
        ubar, grad = {}, {}
        for i in dirs:
            ubar[i] = res[(("u", i), F)]
            for j in dirs:
                if (("u", i), Fd[j]) in res and ("pi" in want or (two_d and j != i)):
                    grad[(i, j)] = res[(("u", i), Fd[j])]
        fields = {V[d]: ubar[d] for d in dirs}
        cbar = {}
        for c in self.scalars:
            cbar[c] = fields[c] = res[(("c", c), F)]
        if two_d:
            fields["vorticity"] = grad[("y", "x")] - grad[("x", "y")]
        out: dict = {}
        pairs = stress_pairs(self.dims)
        if self._stress():
            for i, j in pairs:
                out[f"tau_{i}{j}"] = res[(("p", i, j), F)] - ubar[i] * ubar[j]
                if need_force:
                    for d in sorted({i, j}):
                        a, b = res[(("p", i, j), Fd[d])], res[(("q", i, j), D[d])]
                        key = f"force_{j if d == i else i}"
                        out[key] = out[key] + (a - b) if key in out else a - b
        if "pi" in want:
            strain = {i + j: 0.5 * (grad[(i, j)] + grad[(j, i)]) for i, j in pairs}
            out["pi"] = energy_transfer(out, strain, self.dims)
        for c in self.scalars:
            for j in dirs:
                if (("flux", c, j), F) in res:
                    out[f"flux_{c}_{j}"] = res[(("flux", c, j), F)] - ubar[j] * cbar[c]
        if self.need_sigma:
            omega_bar = res[(("omega",), F)]
            sigma, vf = {}, 0.0
            for j in dirs:
                sigma[j] = res[(("s", j), F)] - ubar[j] * omega_bar
                if need_vf:
                    vf = vf + (res[(("s", j), Fd[j])] - res[(("t", j), D[j])])
            if "enstrophy_transfer" in want:
                out["enstrophy_transfer"] = -sum(sigma[j] * res[(("omega",), Fd[j])]
                                                 for j in dirs)
            if need_vf:
                out["vorticity_forcing"] = vf
        return fields, out


def _field(name):
    return lambda slab: slab(name)


def _product(a, b):
    return lambda slab: slab(a) * slab(b)


# ---------------------------------------------------------------------------------- real space
def _linear_and_products(slabs, cg, scalars, want):
    """The keys and producers of closure.residuals._grid_terms's linear fields and products."""
    from closure.residuals import _OMEGA, _TAU, stress_names, stress_pairs

    fine = cg.fine
    dirs = _dirs(fine.dims)
    V = {d: VELOCITY_OF[d] for d in dirs}
    two_d = fine.dims == ("y", "x")
    need_sigma = two_d and bool(want & {"vorticity_forcing", "enstrophy_transfer"})
    fluxes = [c for c in scalars if any(t.startswith(f"flux_{c}_") for t in want)]
    linear = {V[d]: _field(V[d]) for d in dirs}
    linear.update({c: _field(c) for c in scalars})
    if need_sigma:
        linear[_OMEGA] = _field(_OMEGA)
    products = {}
    if want & {*stress_names(fine.dims), "pi"} or any(t.startswith("force_") for t in want):
        for i, j in stress_pairs(fine.dims):
            products[(_TAU, i + j)] = _product(V[i], V[j])
    for c in (*fluxes, *([_OMEGA] if need_sigma else [])):
        for j in dirs:
            products[(c, j)] = _product(V[j], c)
    return linear, products, fluxes, need_sigma


def _omega_reader(slabs, grid: Grid, scheme: str, read):
    """``read`` plus the fine vorticity d_x v - d_y u (2-D), from slabs with a halo of two
    rows (at least six rows per window, for the one-sided edge stencils)."""
    from closure.derivatives import derivative
    from closure.residuals import _OMEGA

    def reader(name, s0, s1):
        if name != _OMEGA:
            return read(name, s0, s1)
        a, b = _window(grid.shape[0], s0, s1, 2, 6)
        sub = _subgrid(grid, b - a)
        u, v = read("u", a, b), read("v", a, b)
        w = derivative(v, sub, "x", 1, scheme) - derivative(u, sub, "y", 1, scheme)
        return w[s0 - a:s1 - a]

    return reader


def _window(n: int, s0: int, s1: int, halo: int, least: int) -> tuple[int, int]:
    a, b = max(0, s0 - halo), min(n, s1 + halo)
    while b - a < min(least, n):
        a, b = max(0, a - 1), min(n, b + 1)
    return a, b


def _subgrid(grid: Grid, rows: int) -> Grid:
    return Grid(grid.dims, (rows, *grid.shape[1:]), grid.spacing, grid.origin, grid.periodic,
                grid.units)


def _block(slabs, cg, scalars, want, budget, stores, dtype):
    """Block averaging: block means of slabs ``ratio`` rows thick, then the coarse terms."""
    from closure.residuals import _terms, fine_scheme

    fine, r = cg.fine, cg.ratio
    dirs = _dirs(fine.dims)
    linear, products, fluxes, need_sigma = _linear_and_products(slabs, cg, scalars, want)
    read = slabs.read
    if need_sigma:
        if fine.periodic:  # the spectral derivative along the first direction is global
            eng = _Engine(cg, budget, stores, dtype)
            omega = eng.fine([(1.0, _field("v"), ("", "d")), (-1.0, _field("u"), ("d", ""))],
                             read, 2)
            base = read

            def read(name, s0, s1):  # noqa: F811
                return omega[s0:s1] if name == "<omega>" else base(name, s0, s1)
        else:
            read = _omega_reader(slabs, fine, fine_scheme(fine), read)
    keys = list(linear) + list(products)
    makers = [linear[k] for k in linear] + [products[k] for k in products]
    coarse = cg.coarse
    acc = np.empty((len(keys), *coarse.shape))
    row = 8 * int(np.prod(fine.shape[1:])) * (len(keys) + len(dirs) + len(scalars) + 2)
    per = max(r, int(budget // 4 // row))
    for s0, s1 in _steps(fine.shape[0], per, r):
        cache: dict = {}

        def slab(name, s0=s0, s1=s1, cache=cache):
            if name not in cache:
                cache[name] = np.asarray(read(name, s0, s1), dtype=dtype)
            return cache[name]

        sub = CoarseGraining(cg.kind, r, cg.widths, _subgrid(fine, s1 - s0))
        stack = np.stack([mk(slab) for mk in makers])
        acc[:, s0 // r:s1 // r] = sub.block_mean(stack)
    bar_lin = {k: acc[a] for a, k in enumerate(linear)}
    bar_prod = {k: acc[len(linear) + a] for a, k in enumerate(products)}
    vel_names = [VELOCITY_OF[d] for d in dirs]
    return _terms(bar_lin, bar_prod, coarse, fine_scheme(coarse), dirs, vel_names, scalars,
                  fluxes, fine.dims == ("y", "x"), want)


def _radius(cg: CoarseGraining, a: int) -> int:
    """Half-width in points of the real-space kernel along axis ``a`` (as scipy.ndimage)."""
    cells = cg.widths[a] / cg.fine.spacing[a]
    if cg.kind == "gaussian":
        return int(6.0 * cells / np.sqrt(12.0) + 0.5)  # gaussian_filter1d, truncate=6
    return len(box_weights(cells)) // 2


def _filter_axis(cg, f, axis_in_grid, lead):
    g = cg.fine
    h = g.spacing[axis_in_grid]
    cells = cg.widths[axis_in_grid] / h
    ax = lead + axis_in_grid
    if cg.kind == "gaussian":
        return scipy.ndimage.gaussian_filter1d(f, cells / np.sqrt(12.0), axis=ax,
                                               mode="reflect", truncate=6.0)
    return scipy.ndimage.convolve1d(f, box_weights(cells), axis=ax, mode="reflect")


def _bounded(slabs, cg, scalars, want, budget, stores, dtype):
    """Non-periodic box and Gaussian filters in real space, slab by slab (see the module
    docstring): filtered stack in a store, terms from windows with halos, sampled at once."""
    from closure.residuals import _terms, fine_scheme

    fine, r = cg.fine, cg.ratio
    dirs = _dirs(fine.dims)
    scheme = fine_scheme(fine)
    linear, products, fluxes, need_sigma = _linear_and_products(slabs, cg, scalars, want)
    read = slabs.read
    if need_sigma:
        read = _omega_reader(slabs, fine, scheme, read)
    keys = list(linear) + list(products)
    makers = [linear[k] for k in linear] + [products[k] for k in products]
    k = len(keys)
    N0 = fine.shape[0]
    row = 8 * int(np.prod(fine.shape[1:])) * (2 * k + len(dirs) + len(scalars) + 2)
    per = max(1, int(budget // 4 // row))
    # stage 1: every direction but the first, slab by slab
    part = stores.empty((k, *fine.shape), dtype)
    for s0, s1 in _steps(N0, per):
        cache: dict = {}

        def slab(name, s0=s0, s1=s1, cache=cache):
            if name not in cache:
                cache[name] = np.asarray(read(name, s0, s1), dtype=dtype)
            return cache[name]

        stack = np.stack([mk(slab) for mk in makers])
        for a in range(1, fine.ndim):
            stack = _filter_axis(cg, stack, a, 1)
        part[:, s0:s1] = stack
    # stage 2: the first direction, with a halo of the kernel's radius
    full = stores.empty((k, *fine.shape), dtype)
    R = _radius(cg, 0) + 1
    for s0, s1 in _steps(N0, per):
        a, b = _window(N0, s0, s1, R, 2 * R + 1)
        out = _filter_axis(cg, np.asarray(part[:, a:b]), 0, 1)
        full[:, s0:s1] = out[:, s0 - a:s1 - a]
    del part
    # stage 3: the terms on windows with a halo of two rows, sampled every r-th row
    coarse = cg.coarse
    fields_out: dict = {}
    targets_out: dict = {}
    vel_names = [VELOCITY_OF[d] for d in dirs]
    first = list(range(0, N0, r))
    for s0, s1 in _steps(N0, per):
        keep = [i for i in first if s0 <= i < s1]
        if not keep:
            continue
        a, b = _window(N0, s0, s1, 2, 6)
        win = np.asarray(full[:, a:b], dtype=float)
        bar_lin = {key: win[n] for n, key in enumerate(linear)}
        bar_prod = {key: win[len(linear) + n] for n, key in enumerate(products)}
        sub = _subgrid(fine, b - a)
        f_w, t_w = _terms(bar_lin, bar_prod, sub, scheme, dirs, vel_names, scalars, fluxes,
                          fine.dims == ("y", "x"), want)
        rows = [i - a for i in keep]
        for dest, src in ((fields_out, f_w), (targets_out, t_w)):
            for name, arr in src.items():
                if name not in dest:
                    dest[name] = np.empty(coarse.shape)
                sampled = arr[rows][(slice(None),) + (slice(None, None, r),) * (fine.ndim - 1)]
                dest[name][keep[0] // r:keep[-1] // r + 1] = sampled
    return fields_out, targets_out


__all__ = ["ArraySlabs", "DEFAULT_MEMORY_FRACTION", "SourceSlabs", "coarse_grain_out_of_core",
           "default_memory_limit", "machine_memory", "needs_out_of_core", "parse_memory"]
