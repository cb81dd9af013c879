"""Statistics of a coarse snapshot within a memory budget: the library's design by slabs.

:func:`statistics_by_slabs` returns the :class:`closure.stats.SufficientStats` of
``SufficientStats.from_design(design(library, fields, grid, scheme, delta), y, ...)`` (to
round-off) without ever holding the whole design, its term arrays or its derivative fields.
The Gram statistics are sums over points, so they add up over slabs of the coarse grid along
its first direction (z in 3-D, y in 2-D).

A slab holds complete rows of the other directions, so every derivative along them is that of
the whole grid. Derivatives along the first direction need its whole column: for each field and
order the library takes along it, the derivative is computed once over column chunks of the
grid and kept (in memory while it fits half the budget, else in a file of a temporary folder,
as closure.outofcore keeps its intermediates); a slab then takes the other directions'
derivatives of its rows with :func:`closure.library.derivative_fields`. Derivatives along
different directions commute, so this holds for every scheme (spectral, fd2, fd4) on periodic
and non-periodic grids; only the order of the operators (the first direction first rather than
last) differs from the in-memory path, at round-off.
"""

from __future__ import annotations

import dataclasses
import tempfile
from collections.abc import Mapping, Sequence

import numpy as np

from closure.derivatives import check_scheme, derivatives
from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.library import evaluation
from closure.library.kinematics import AXES, field_symbol, symbol_info
from closure.library.terms import Library
from closure.outofcore import _steps, _Stores, _subgrid, default_memory_limit
from closure.scores import TransferContext, transfers_pointwise
from closure.stats import SufficientStats

#: arrays of the grid's (or a slab's) size held besides the derivative fields, term arrays,
#: design and target: the library's shared subexpressions, a margin
_EXTRA_ARRAYS = 4


def design_bytes(library: Library, grid: Grid) -> int:
    """Estimated peak bytes of the in-memory statistics of ``library`` on ``grid``
    (closure.library.design and the stacked target, float64): its derivative fields, the
    (components, points, terms) design, the target and a margin (the design evaluates its
    terms by chunks of points, so their arrays are never whole). The default 3-D stress
    library: 112 arrays of the grid (measured 108.5 at 128^3, bench/coarse_stats.py)."""
    n = int(np.prod(grid.shape))
    p, c = len(library.terms), len(library.keys)
    return 8 * n * (len(library.symbols) + p * c + c + _EXTRA_ARRAYS)


def design_fits(library: Library, grid: Grid, memory_limit: int | None) -> bool:
    """Whether the in-memory design of ``library`` on ``grid`` fits ``memory_limit`` bytes
    (None: closure.outofcore.default_memory_limit)."""
    return design_bytes(library, grid) <= _budget(memory_limit)


def _lead_symbols(library: Library, grid: Grid):
    """The first direction's name, and {symbol name: (field, order along the first direction,
    the symbol of the other directions' derivatives)}."""
    lead = grid.dims[0]
    a = AXES.index(lead)
    out = {}
    for s in library._compiled()[0]:
        info = symbol_info(s)
        if info is None:
            raise ValueError(f"{s.name} is not a derivative symbol")
        f, counts = info
        rest = tuple(0 if i == a else n for i, n in enumerate(counts))
        out[s.name] = (f, int(counts[a]), field_symbol(f, rest))
    return lead, out


def _lead_derivatives(fields: Mapping[str, np.ndarray], grid: Grid, scheme: str, lead: str,
                      wanted: Mapping[str, set[int]], stores: _Stores, budget: int) -> dict:
    """{(field, order): store of grid.shape} of each field's derivatives along the first
    direction, computed over column chunks (every other point of the grid is a column)."""
    n0 = grid.shape[0]
    line = Grid((lead,), (n0,), (grid.spacing[0],), (grid.origin[0],), grid.periodic,
                grid.units)
    cols = int(np.prod(grid.shape[1:]))
    out = {}
    for f, orders in wanted.items():
        orders = sorted(n for n in orders if n > 0)
        if not orders:
            continue
        for n in orders:
            out[(f, n)] = stores.empty(grid.shape, np.float64)
        flat = np.asarray(fields[f], dtype=float).reshape(n0, cols)
        # a column chunk, its spectrum and one output per order, each (n0, per)
        per = max(1, budget // 4 // (8 * n0 * (4 + len(orders))))
        for c0, c1 in _steps(cols, per):
            block = np.ascontiguousarray(flat[:, c0:c1].T)  # (columns, n0): n0 last
            for n, d in zip(orders, derivatives(block, line, lead, orders, scheme),
                            strict=True):
                out[(f, n)].set_cols(c0, c1, d.T)
    return out


def _slab_terms(library: Library, fields: Mapping[str, np.ndarray], grid: Grid, scheme: str,
                delta: float, budget: int, per_row_arrays: float, rows: int | None,
                workdir: str | None):
    """Yields (first row, last row + 1, the slab's shape, the library's compiled values over
    the slab: a flat list [term][component]) for slabs of the first direction."""
    evaluation._check_library_grid(library, grid, delta)
    check_scheme(scheme, grid)
    if budget <= 0:
        raise OptionError(f"the memory limit must be positive, got {budget!r}")
    syms, fn = library._compiled()
    lead, info = _lead_symbols(library, grid)
    if any(f not in fields or np.shape(fields[f]) != grid.shape for f, _, _ in info.values()):
        evaluation.derivative_fields(syms, fields, grid, scheme)  # raises its UserError
    wanted: dict[str, set[int]] = {}
    by_order: dict[int, list[str]] = {}
    for name, (f, n, _) in info.items():
        wanted.setdefault(f, set()).add(n)
        by_order.setdefault(n, []).append(name)
    # per row: the derivative fields and what the caller holds (term arrays, design, ...)
    per_row = 8 * int(np.prod(grid.shape[1:])) * (len(syms) + per_row_arrays)
    per = int(rows) if rows is not None else max(1, budget // 2 // per_row)
    with tempfile.TemporaryDirectory(prefix="closure-coarse-", dir=workdir) as folder:
        firsts = _lead_derivatives(fields, grid, scheme, lead, wanted, _Stores(budget, folder),
                                   budget)
        for s0, s1 in _steps(grid.shape[0], per):
            sub = _subgrid(grid, s1 - s0)
            values: dict[str, np.ndarray] = {}
            for n, members in sorted(by_order.items()):
                base = {f: (np.asarray(fields[f][s0:s1], dtype=float) if n == 0
                            else firsts[(f, n)][s0:s1])
                        for f in {info[m][0] for m in members}}
                got = evaluation.derivative_fields([info[m][2] for m in members], base, sub,
                                                   scheme)
                for m in members:
                    values[m] = got[info[m][2].name]
                del base, got
            with np.errstate(all="ignore"):
                flat = fn(float(delta), *(values[s.name] for s in syms))
            del values
            yield s0, s1, sub.shape, flat
            del flat


def _budget(memory_limit: int | None) -> int:
    return default_memory_limit() if memory_limit is None else int(memory_limit)


def statistics_by_slabs(library: Library, fields: Mapping[str, np.ndarray], grid: Grid,
                        scheme: str, delta: float, targets: Mapping[str, np.ndarray],
                        weights: Sequence[float] | None = None, *,
                        snapshot: int | None = None, point_weights: np.ndarray | None = None,
                        transfers: Sequence[str] = (), target: str | None = None,
                        transfer_points: np.ndarray | None = None,
                        memory_limit: int | None = None, rows: int | None = None,
                        workdir: str | None = None, backend=None) -> SufficientStats:
    """``SufficientStats.from_design(design(library, fields, grid, scheme, delta), y, weights,
    library.names, list(targets), snapshot=snapshot, point_weights=point_weights)`` with ``y``
    the ``targets`` (component name -> array of ``grid.shape``, in the library's component
    order), computed by slabs of the first direction within ``memory_limit`` bytes (None: half
    the machine's memory) of derivatives and design.

    ``transfers`` (names of closure.scores.transfer_names for ``target``, each pointwise:
    closure.scores.transfers_pointwise) add the extra blocks closure.pipeline gathers for
    transfer-weighted fits: the transfers of every term's design column against those of the
    targets, over ``transfer_points`` (boolean of ``grid.shape``; None: every point). Their
    context (e.g. the resolved strain, 9 coarse fields in 3-D) is held whole.

    ``rows``: rows per slab (default: as many as the budget allows). Derivatives along the
    first direction that do not fit half the budget go to files in ``workdir`` (None: the
    system's temporary folder), deleted afterwards.
    """
    comps = list(targets)
    if len(comps) != len(library.keys):
        raise ValueError(f"{len(comps)} targets for a library of {len(library.keys)} components")
    for c in comps:
        if np.shape(targets[c]) != grid.shape:
            raise ValueError(f"target {c!r} has shape {np.shape(targets[c])}, the grid "
                             f"{grid.shape}")
    transfers = tuple(transfers)
    ctx = None
    if transfers:
        if target is None or not transfers_pointwise(target, transfers):
            raise ValueError(f"transfers {transfers} of target {target!r} are not pointwise: "
                             "gather them from the whole design")
        ctx = TransferContext(target, fields, grid, scheme)
    names, C, p = library.names, len(comps), len(library.terms)
    pw = None if point_weights is None else np.asarray(point_weights, dtype=float).reshape(
        grid.shape)
    tv = None if transfer_points is None else np.asarray(transfer_points).reshape(grid.shape)
    total = SufficientStats.zeros(names, comps)
    extra = {name: SufficientStats.zeros(names, (name,)) for name in transfers}
    # per row besides the derivative fields: the term arrays, the design, the target, the
    # transfers' columns and products (with transfers), a margin
    held = 2 * p * C + C + _EXTRA_ARRAYS + ((p * C + 3 * p) if transfers else 0)
    for s0, s1, shape, flat in _slab_terms(library, fields, grid, scheme, delta,
                                           _budget(memory_limit), held, rows, workdir):
        X = np.empty((C, int(np.prod(shape)), p))
        for c in range(C if p else 0):  # arranged as closure.library.design arranges them
            np.stack([np.broadcast_to(np.asarray(flat[t * C + c], dtype=float), shape)
                      .reshape(-1) for t in range(p)], axis=1, out=X[c])
        del flat
        y = np.stack([np.asarray(targets[c][s0:s1], dtype=float).reshape(-1) for c in comps])
        if ctx is not None:  # as closure.pipeline gathers them from the whole design
            rows_ctx = ctx.rows(s0, s1)
            columns = rows_ctx.transfers({c: X[k].T.reshape(p, *shape)
                                          for k, c in enumerate(comps)}, transfers)
            exact = rows_ctx.transfers({c: y[k].reshape(shape) for k, c in enumerate(comps)},
                                       transfers)
            for name in transfers:
                extra[name] = extra[name] + SufficientStats.from_design(
                    columns[name].reshape(p, -1).T[None], exact[name].reshape(1, -1), None,
                    names, (name,), point_weights=None if tv is None else tv[s0:s1].reshape(-1),
                    backend=backend)
            del rows_ctx, columns, exact
        total = total + SufficientStats.from_design(
            X, y, weights, names, comps,
            point_weights=None if pw is None else pw[s0:s1].reshape(-1), backend=backend)
        del X, y
    return dataclasses.replace(total, extra=extra,
                               snapshots=() if snapshot is None else (int(snapshot),))


def predict_by_slabs(library: Library, coefficients: Sequence[float],
                     fields: Mapping[str, np.ndarray], grid: Grid, scheme: str = "spectral",
                     delta: float = 1.0, *, memory_limit: int | None = None,
                     rows: int | None = None, workdir: str | None = None
                     ) -> dict[str, np.ndarray]:
    """closure.library.predict by slabs of the first direction: only the prediction (one
    array of ``grid.shape`` per target component) is held whole; the derivative fields and
    term arrays live a slab at a time within ``memory_limit`` bytes (as
    :func:`statistics_by_slabs`)."""
    coefficients = np.asarray(coefficients, dtype=float).reshape(-1)
    if coefficients.size != len(library.terms):
        raise ValueError(f"{coefficients.size} coefficients for {len(library.terms)} terms")
    if not np.all(np.isfinite(coefficients)):
        raise UserError("the model has NaN or infinite coefficients: refit it")
    active = [t.name for t, c in zip(library.terms, coefficients, strict=True) if c != 0]
    names = library.components
    out = {n: np.zeros(grid.shape) for n in names}
    if not active:
        evaluation._check_library_grid(library, grid, delta)
        return out
    sub = library.subset(active)
    coef = [c for c in coefficients if c != 0]
    C = len(names)
    for s0, s1, shape, flat in _slab_terms(sub, fields, grid, scheme, delta,
                                           _budget(memory_limit),
                                           len(active) * C + _EXTRA_ARRAYS, rows, workdir):
        for t, c_k in enumerate(coef):  # in predict's order of additions
            for c, n in enumerate(names):
                out[n][s0:s1] += c_k * np.broadcast_to(np.asarray(flat[t * C + c], dtype=float),
                                                       shape)
        del flat
    return out


def prediction_bytes(library: Library, coefficients: Sequence[float], grid: Grid) -> int:
    """Estimated peak bytes of closure.library.predict: the derivative fields and term arrays
    of the terms with a nonzero coefficient, and the prediction."""
    active = [t.name for t, c in zip(library.terms, coefficients, strict=True) if c != 0]
    n, C = int(np.prod(grid.shape)), len(library.keys)
    if not active:
        return 8 * n * C
    sub = library.subset(active)
    return 8 * n * (len(sub.symbols) + len(active) * C + C)


def predict_within(library: Library, coefficients: Sequence[float],
                   fields: Mapping[str, np.ndarray], grid: Grid, scheme: str = "spectral",
                   delta: float = 1.0, memory_limit: int | None = None
                   ) -> dict[str, np.ndarray]:
    """closure.library.predict when it fits ``memory_limit`` (None: the default budget), else
    :func:`predict_by_slabs`."""
    if prediction_bytes(library, coefficients, grid) <= _budget(memory_limit):
        return evaluation.predict(library, coefficients, fields, grid, scheme, delta)
    return predict_by_slabs(library, coefficients, fields, grid, scheme, delta,
                            memory_limit=memory_limit)
