"""Evaluation: each derivative field once per snapshot, the design matrix of a library, and
the prediction of fitted coefficients.
"""


from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Mapping, Sequence

import numpy as np
import sympy

from closure.derivatives import check_scheme, derivative, derivatives
from closure.errors import UserError
from closure.grid import Grid
from closure.library.kinematics import _INFO, AXES, directions
from closure.library.terms import Library
from closure.threads import side_by_side

# ---------------------------------------------------------------------------------------------
# evaluation


def derivative_fields(symbols: Iterable[sympy.Symbol], fields: Mapping[str, np.ndarray],
                      grid: Grid, scheme: str) -> dict[str, np.ndarray]:
    """Each needed derivative field once: ``{symbol name: array of grid.shape}``.

    Derivatives along x, then y, then z, each with the scheme's own stencil of that order;
    fields sharing a derivative are stacked into one call (one FFT pass).
    """
    check_scheme(scheme, grid)
    wanted = {}
    for s in symbols:
        f, counts = _INFO[s.name]
        if f not in fields:
            raise UserError(f"the terms need the field {f!r}, which is not among the fields "
                            f"given ({', '.join(fields)}): add it (e.g. --scalar {f})")
        wanted[s.name] = (f, counts)
    for d, n in zip(AXES, (max((c[i] for _, c in wanted.values()), default=0)
                           for i in range(3)), strict=True):
        if n and d not in grid.dims:
            raise UserError(f"the terms differentiate along {d}, which the grid "
                            f"{grid.dims} does not have")
    # nodes: (field, partial counts); derivatives applied in x, y, z order
    cache: dict[tuple[str, tuple], np.ndarray] = {}
    for f in {f for f, _ in wanted.values()}:
        a = np.asarray(fields[f], dtype=float)
        if a.shape != grid.shape:
            raise UserError(f"field {f!r} has shape {a.shape}, the grid {grid.shape}")
        cache[(f, (0, 0, 0))] = a
    for axis, d in enumerate(AXES):
        # group the steps of this axis by (parent counts, order) across fields
        steps: dict[tuple, list[str]] = {}
        for f, counts in wanted.values():
            n = counts[axis]
            if n == 0:
                continue
            parent = counts[:axis] + (0,) * (3 - axis)
            steps.setdefault((parent, n), [])
            if f not in steps[(parent, n)]:
                steps[(parent, n)].append(f)
        # one transform of a parent stack for all the orders taken of it
        by_parent: dict[tuple, dict[tuple, list[int]]] = {}
        for (parent, n), fs in steps.items():
            child = parent[:axis] + (n,) + (0,) * (2 - axis)
            todo = tuple(f for f in fs if (f, child) not in cache)
            if todo:
                by_parent.setdefault(parent, {}).setdefault(todo, []).append(n)
        # the groups of an axis are independent: their transforms run side by side
        work = [(parent, todo, orders) for parent, groups in by_parent.items()
                for todo, orders in groups.items()]

        def take(parent, todo, orders, d=d):
            stack = np.stack([cache[(f, parent)] for f in todo])
            return ([derivative(stack, grid, d, orders[0], scheme)] if len(orders) == 1
                    else derivatives(stack, grid, d, orders, scheme))

        results = side_by_side([functools.partial(take, *w) for w in work])
        for (parent, todo, orders), outs in zip(work, results, strict=True):
            for n, out in zip(orders, outs, strict=True):
                child = parent[:axis] + (n,) + (0,) * (2 - axis)
                for f, a in zip(todo, out, strict=True):
                    cache[(f, child)] = a
    return {name: cache[(f, counts)] for name, (f, counts) in wanted.items()}


def _check_library_grid(library: Library, grid: Grid, delta: float) -> None:
    if directions(grid.dims) != library.directions:
        raise UserError(f"the library is for directions {', '.join(library.directions)} but the "
                        f"grid has {', '.join(directions(grid.dims))}")
    if not (isinstance(delta, int | float | np.floating) and math.isfinite(delta) and delta > 0):
        raise UserError(f"the filter width Delta must be a positive number, got {delta!r}")


def evaluate_terms(library: Library, fields: Mapping[str, np.ndarray], grid: Grid,
                   scheme: str = "spectral", delta: float = 1.0) -> list[list[np.ndarray]]:
    """Every term's components on the grid: ``out[term][component]``, arrays of grid.shape."""
    _check_library_grid(library, grid, delta)
    syms, fn = library._compiled()
    deriv = derivative_fields(syms, fields, grid, scheme)
    with np.errstate(all="ignore"):
        flat = fn(float(delta), *(deriv[s.name] for s in syms))
    nc = len(library.keys)
    out = []
    for t in range(len(library.terms)):
        comps = []
        for c in range(nc):
            a = np.asarray(flat[t * nc + c], dtype=float)
            comps.append(np.broadcast_to(a, grid.shape) if a.shape != grid.shape else a)
        out.append(comps)
    return out


#: Points per chunk of the design's term evaluation: the expressions' temporaries of one
#: chunk stay in the CPU's cache (whole-grid temporaries made the evaluation memory-bound).
DESIGN_CHUNK = 8192


def design(library: Library, fields: Mapping[str, np.ndarray], grid: Grid,
           scheme: str = "spectral", delta: float = 1.0) -> np.ndarray:
    """The design tensor: float64 of shape (n_components, n_points, n_terms).

    ``fields`` maps ``u, v[, w]`` and scalars to coarse-grid arrays of ``grid.shape``;
    points are the grid in C order; column ``k`` is term ``k`` with Delta = ``delta``
    (coordinate units), so its fitted coefficient is the Delta-scaled one. The derivative
    fields are computed whole, the terms by chunks of :data:`DESIGN_CHUNK` points (pointwise
    expressions: the same values as whole arrays). Each column is contiguous (the tensor is a
    transposed view of a C-ordered (n_components, n_terms, n_points) array), so the Gram
    products read whole columns.
    """
    _check_library_grid(library, grid, delta)
    syms, fn = library._compiled()
    deriv = derivative_fields(syms, fields, grid, scheme)
    args = [deriv[s.name].reshape(-1) for s in syms]
    nc, npts, nt = len(library.keys), int(np.prod(grid.shape)), len(library.terms)
    out = np.empty((nc, nt, npts))
    with np.errstate(all="ignore"):
        for a in range(0, npts if nt else 0, DESIGN_CHUNK):
            part = slice(a, min(a + DESIGN_CHUNK, npts))
            flat = fn(float(delta), *(x[part] for x in args))
            for t in range(nt):
                for c in range(nc):
                    out[c, t, part] = flat[t * nc + c]
    return out.transpose(0, 2, 1)


def predict(library: Library, coefficients: Sequence[float], fields: Mapping[str, np.ndarray],
            grid: Grid, scheme: str = "spectral", delta: float = 1.0) -> dict[str, np.ndarray]:
    """Sum of ``coefficients[k] * term k`` (Delta-scaled coefficients, one per term) as the
    target variables: ``{"tau_xx": array of grid.shape, ...}``. Terms with a zero coefficient
    are not evaluated."""
    coefficients = np.asarray(coefficients, dtype=float).reshape(-1)
    if coefficients.size != len(library.terms):
        raise ValueError(f"{coefficients.size} coefficients for {len(library.terms)} terms")
    if not np.all(np.isfinite(coefficients)):
        raise UserError("the model has NaN or infinite coefficients: refit it")
    _check_library_grid(library, grid, delta)
    active = [t.name for t, c in zip(library.terms, coefficients, strict=True) if c != 0]
    names = library.components
    out = {n: np.zeros(grid.shape) for n in names}
    if not active:
        return out
    sub = library.subset(active)
    coef = [c for c in coefficients if c != 0]
    cols = evaluate_terms(sub, fields, grid, scheme, delta)
    for c_k, comps in zip(coef, cols, strict=True):
        for n, a in zip(names, comps, strict=True):
            out[n] += c_k * a
    return out
