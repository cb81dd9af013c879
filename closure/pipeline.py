"""The discovery job as pure functions: plan, map one snapshot, reduce, or all in one process.

    plan(spec)                      -> dict (JSON: input hash, snapshots, train/test split, grids)
    map_snapshot(spec, plan, i)     -> SufficientStats of snapshot i
    reduce(spec, plan, stats)       -> ClosureModel (fit, selection, scores, provenance)
    discover(spec)                  -> ClosureModel (plan + every map + reduce, in process)

Only plain types cross between them (the plan is JSON, statistics save losslessly), so a queue
can run each map on any worker. The reduction sums statistics in sorted snapshot order, so a
queued run gives the same model as an in-process one to the last bit of the fit's input.

Train/test split: snapshots are ordered in time; the last ``fit.test_fraction`` of them (at
least one) are held out for scoring and never seen by the fit or its model selection.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import os
import platform
import tempfile
import threading
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from functools import lru_cache
from pathlib import Path

import numpy as np

from closure.derivatives import check_coarse_points, check_scheme
from closure.errors import InputFileError, OptionError, UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.regression import Problem, fit_closure, least_squares
from closure.scores import (
    TransferContext,
    TransferSums,
    prediction_scores,
    transfer_names,
    transfer_scores,
)
from closure.spec import JobSpec
from closure.stats import SufficientStats
from closure.threads import cores, map_in_threads

PLAN_VERSION = 1
Progress = Callable[[str, int, int], None]

#: A snapshot whose land mask leaves fewer valid coarse points than this many per library term
#: is refused: a fit needs many more points than unknowns, and fewer than ten per coefficient
#: is the usual rule-of-thumb floor (common practice).
MIN_POINTS_PER_TERM = 10

#: The reference closure scored beside every model, per target kind (a preset term name).
BASELINE_TERMS = {"stress": "smagorinsky", "force": "div_smagorinsky",
                  "vorticity": "curl_div_smagorinsky", "flux": "eddy_diffusivity"}
#: The same for the compressible presets (closure.library_compressible).
COMPRESSIBLE_BASELINE_TERMS = {"stress": "favre_smagorinsky",
                               "heat_flux": "favre_eddy_diffusivity",
                               "pressure_dilatation": "dilatation_strain_squared"}


def _no_progress(phase: str, done: int, total: int) -> None:
    pass


def _small_blas(function):
    """Run ``function`` with the BLAS libraries single-threaded.

    A job's BLAS work is small (Gram matrices of a few dozen terms), while idle BLAS threads
    keep spinning after each call and take the cores from the FFT threads that do the
    coarse-graining: on two cores that doubled the time of a 2-D job.
    """

    @functools.wraps(function)
    def run(*args, **kwargs):
        with _blas_controller().limit(limits=1, user_api="blas"):
            return function(*args, **kwargs)

    return run


_controller: list = [None, -1]  # (threadpoolctl controller, len(sys.modules) when made)


def _blas_controller():
    """A threadpoolctl controller of the loaded BLAS libraries (scikit-learn's dependency),
    kept while no module is imported: making one scans every loaded library (1-2 ms), a cost
    each queued snapshot would pay; a new import may load a new BLAS library, so it is made
    again then."""
    import sys

    from threadpoolctl import ThreadpoolController

    if _controller[0] is None or _controller[1] != len(sys.modules):
        _controller[:] = [ThreadpoolController(), len(sys.modules)]
    return _controller[0]


# ---------------------------------------------------------------------- shared pieces
def _input_files(spec: JobSpec) -> list[Path]:
    """Every input the spec names (globs and folders expanded; closure.io.input_files)."""
    from closure.io import input_files

    if spec.input.path is None:
        raise UserError("input.dataset_id names an uploaded dataset, which only the service "
                        "resolves: give input.path")
    return input_files(spec.input.path)


def refuse_land_mask(snap) -> None:
    """Refuse a snapshot with land points (Snapshot.mask) where land cannot be taken: the
    a posteriori coarse solver runs periodic domains without land."""
    if snap.mask is not None:
        where = "" if snap.level is None else f", level {snap.level}"
        raise UserError(
            f"snapshot {snap.index}{where} has {int((~snap.mask).sum())} land or missing "
            "point(s) (NaN, fill values or --mask): the a posteriori coarse solver runs "
            "periodic domains without land; start it from snapshots (--snapshots) or levels "
            "(--levels) without missing values")


def _compressible(spec: JobSpec) -> bool:
    """Compressible mode: a compressible library preset (Favre coarse-graining, closure.favre)."""
    from closure.library_compressible import PRESETS

    return spec.library in PRESETS


def _scalars(spec: JobSpec) -> tuple[str, ...]:
    """Scalars to read: the spec's, the flux target's own, and in compressible mode the
    density, pressure and temperature."""
    names = list(spec.input.scalars)
    if spec.target.startswith("flux:"):
        names.append(spec.target.split(":", 1)[1])
    if _compressible(spec):
        from closure.library_compressible import THERMO

        names += THERMO
    return tuple(dict.fromkeys(names))


def _open(spec: JobSpec):
    from closure.io import open_input
    from closure.products import open_coarse_input

    paths = spec.input.paths if spec.input.path is not None else []
    if len(paths) == 1:
        coarse = open_coarse_input(paths[0])  # a coarse product: no second fine pass
        if coarse is not None:
            return coarse
    if _compressible(spec):
        return _open_compressible(spec)
    return open_input(spec.input, _scalars(spec))


def _open_compressible(spec: JobSpec):
    """The input of a compressible job (closure.favre.open_compressible)."""
    from closure.favre import open_compressible
    from closure.io import open_input

    return open_compressible(lambda scalars: open_input(spec.input, scalars),
                             spec.gas.given() if spec.gas is not None else None,
                             spec.input.scalars, spec.input.variables)


def _gas(spec: JobSpec, src) -> dict:
    """Gas constants of a compressible job: the file's attributes, overridden by spec.gas."""
    from closure.favre import gas_constants

    return gas_constants(src, spec.gas.given() if spec.gas is not None else None)


def _check_gas(spec: JobSpec) -> None:
    if spec.gas is not None and spec.gas.given() and not _compressible(spec):
        from closure.library_compressible import PRESETS

        raise UserError(f"gas constants (spec gas) are for compressible data: choose a "
                        f"compressible library ({', '.join(PRESETS)}), or drop them")


def _read_scalars(spec: JobSpec, src) -> list[str]:
    """The scalars the plan reads: in compressible mode only those of p and T the input has."""
    if not _compressible(spec) or hasattr(src, "coarse_graining"):
        return list(_scalars(spec))
    return [s for s in _scalars(spec) if s in src.scalars]


def open_planned(plan: Mapping):
    """The planned input, opened with the options the plan read it with (for workers)."""
    from closure.io import open_fields
    from closure.products import open_coarse_input

    inp = plan["input"]
    paths = inp.get("paths") or [inp["path"]]
    if len(paths) == 1:
        coarse = open_coarse_input(paths[0])  # a coarse product: no second fine pass
        if coarse is not None:
            return coarse
    opts = inp.get("options") or {}
    return open_fields(inp.get("paths") or inp["path"], inp.get("variables") or None,
                       tuple(inp.get("scalars") or ()), bool(inp.get("periodic", True)),
                       group=opts.get("group"), mask=opts.get("mask"),
                       levels=opts.get("levels"), spacing=opts.get("spacing"))


def _coarse_graining(spec: JobSpec, grid: Grid):
    f = spec.filter
    return _coarse_graining_cached(f.kind, grid, f.ratio, f.width, f.width_units)


@lru_cache(maxsize=4)
def _coarse_graining_cached(kind, grid, ratio, width, width_units):
    # one per job: its fine-grid transfer function is computed once, not once per snapshot
    return make_coarse_graining(kind, grid, ratio, width, width_units)


@lru_cache(maxsize=16)
def _library_cached(name: str, target: str, dims: tuple[str, ...], scalars: tuple[str, ...],
                    stamp: tuple):
    from closure.library import make_library, terms_from_inline

    if stamp == ("inline",):  # name is the definitions as JSON text
        return terms_from_inline(json.loads(name), target, dims, scalars)
    return make_library(name, target, dims, scalars)


def _library(spec: JobSpec, dims: tuple[str, ...]):
    if not isinstance(spec.library, str):  # term definitions inline: no file to read
        return _library_cached(json.dumps(spec.library, sort_keys=True), spec.target,
                               tuple(dims), _scalars(spec), ("inline",))
    name = spec.library
    stamp: tuple = ()
    p = Path(name)
    if p.suffix and p.exists():  # a terms file: re-read it when it changes
        st = p.stat()
        stamp = (str(p.resolve()), st.st_size, st.st_mtime_ns)
    return _library_cached(name, spec.target, tuple(dims), _scalars(spec), stamp)


def _blocks(spec: JobSpec, dims) -> tuple[str, ...]:
    """Transfer statistics to gather: all transfers when the fit is transfer-weighted (or a
    selection by coarse runs fits paths at a positive transfer weight)."""
    weights = [spec.fit.transfer_weight]
    if spec.fit.select == "aposteriori":
        weights += list(spec.fit.transfer_weights)
    return transfer_names(spec.target, tuple(dims)) if max(weights) > 0 else ()


def _stamp(path: Path) -> dict:
    st = path.stat()
    return {"size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)}


def _levels(plan: Mapping) -> list[int | None]:
    """The levels a snapshot's statistics pool (``[None]`` without a level stack)."""
    levels = (plan["input"].get("options") or {}).get("levels")
    return [None] if levels is None else [int(k) for k in levels]


# ---------------------------------------------------------------------- plan
def plan(spec: JobSpec) -> dict:
    """Resolve the input and everything the maps and the reduce need (plain JSON types).

    Checks the file, variables, snapshot selection, filter, ratio, scheme and library against
    the data now, so a bad option fails before any work is queued.
    """
    from closure.io import input_sha256

    with _open(spec) as src:
        p = _plan(spec, src, None)
    p["sha256"] = p["input"]["sha256"] = input_sha256(src.paths)
    return p


def check(spec: JobSpec) -> dict:
    """Check the spec against its input file as :func:`plan` does, without hashing the file
    (cheap enough to answer a submission at once); returns the plan with ``sha256`` None."""
    with _open(spec) as src:
        return _plan(spec, src, None)


def _plan(spec: JobSpec, src, sha: str | None) -> dict:
    """The plan from an open source; ``sha`` is the input's SHA-256 (None: filled in later)."""
    from closure.io import input_stamps, sha256_file

    path = src.path if len(src.paths) == 1 else f"the {len(src.paths)} inputs"
    coarse = getattr(src, "coarse_graining", None)  # a coarse input (closure.products)
    grid = src.grid if coarse is None else coarse.fine
    n = src.n_snapshots
    levels = None if src.levels is None else list(src.levels)
    if spec.input.per_level and levels is not None and len(levels) > 1:
        raise UserError(f"input.per_level with {len(levels)} levels gives one model per level: "
                        "run `closure discover --per-level` (or pipeline.discover_levels), or "
                        "submit one job per level (input.levels: [K])")
    times = None if src.times is None else [float(t) for t in src.times]
    velocity = list(src.velocity)
    chosen = list(range(n)) if spec.input.snapshots is None else list(spec.input.snapshots)
    bad = [i for i in chosen if not 0 <= i < n]
    if bad:
        raise OptionError(f"input.snapshots {bad} are out of range: {path} has {n} snapshot(s), "
                          f"indices 0..{n - 1}")
    if len(set(chosen)) != len(chosen):
        raise OptionError("input.snapshots lists a snapshot more than once: list each once")
    if times is not None:
        chosen.sort(key=lambda i: (times[i], i))
    else:
        chosen.sort()
    if len(chosen) < 2:
        raise UserError(f"{len(chosen)} snapshot(s) selected: a held-out score needs at least "
                        "2 (one to fit, one to test); add snapshots")
    n_test = max(1, int(round(spec.fit.test_fraction * len(chosen))))
    n_test = min(n_test, len(chosen) - 1)
    train, test = chosen[:len(chosen) - n_test], chosen[len(chosen) - n_test:]

    _check_gas(spec)
    cg = _coarse_graining(spec, grid)
    if getattr(spec, "device", "numpy") != "numpy":
        from closure.backend import get_backend

        get_backend(spec.device)  # torch present, a GPU where cuda is asked: say so now
    if coarse is not None:
        from closure.products import check_coarse_input

        check_coarse_input(src, cg)
    check_scheme(spec.scheme, cg.coarse)
    check_coarse_points(spec.scheme, cg.coarse, spec.filter.ratio)
    library = _library(spec, grid.dims)
    if len(library.terms) == 0:
        raise UserError(f"the library {spec.library_label!r} has no terms for target {spec.target} "
                        "on this grid: choose another library")
    missing = [f for f in library.fields if f not in (*velocity, *_scalars(spec))]
    if missing:
        raise UserError(f"the library's terms need fields {missing} that are not read: add "
                        "them with --var / input.scalars")
    from closure.library import component_weights

    library_info = {"name": spec.library_label, "terms": library.names,
                    "dropped": list(library.dropped)}
    lib_path = Path(spec.library_label)
    if isinstance(spec.library, str) and lib_path.suffix and lib_path.exists():
        library_info["sha256"] = sha256_file(lib_path)
    first = src.paths[0]
    return {
        "version": PLAN_VERSION,
        "sha256": sha,
        "input": {"path": str(first), "paths": [str(q) for q in src.paths], "sha256": sha,
                  **(_stamp(first) if first.is_file() else {}),
                  "files": input_stamps(src.paths),
                  "variables": dict(spec.input.variables), "scalars": _read_scalars(spec, src),
                  "periodic": bool(spec.input.periodic), "n_snapshots": int(n),
                  "options": {"group": spec.input.group, "mask": spec.input.mask,
                              "levels": levels,
                              "spacing": None if spec.input.spacing is None
                              else list(spec.input.spacing)},
                  "read": src.info(),
                  **({"product_id": src.attrs.get("closure_product_id")} if coarse else {})},
        "snapshots": [int(i) for i in chosen],
        "train": [int(i) for i in train],
        "test": [int(i) for i in test],
        "times": None if times is None else [times[i] for i in chosen],
        "grid": grid.to_dict(),
        "coarse_grid": cg.coarse.to_dict(),
        "filter": cg.describe(),
        "delta": float(cg.delta),
        "target": spec.target,
        "components": library.components,
        "weights": [float(w) for w in component_weights(spec.target, grid.dims)],
        "terms": library.names,
        "library": library_info,
        "scheme": spec.scheme,
        "transfers": list(_blocks(spec, grid.dims)),
        "warnings": list(src.warnings) + list(cg.warnings()) +
        _compressibility_warning(src, chosen[0], library, levels, spec),
        "notes": list(src.notes),
        **({"gas": _gas(spec, src)} if _compressible(spec) else {}),
        "slabs": _slab_info(spec, src, cg),
    }


def check_options(spec: JobSpec, grid: Grid, velocity, n_snapshots: int) -> None:
    """The checks of :func:`plan` that need only the input's header (its grid, velocity
    components and snapshot count): snapshot count, filter, ratio, scheme, library and the
    fields it needs. Reads no field values, so a service can answer a submission at once;
    the value checks (finite values, divergence) run when the job is planned."""
    chosen = n_snapshots if spec.input.snapshots is None else len(set(spec.input.snapshots))
    if chosen < 2:
        raise UserError(f"{chosen} snapshot(s) selected: a held-out score needs at least 2 "
                        "(one to fit, one to test); add snapshots")
    _check_gas(spec)
    cg = _coarse_graining(spec, grid)
    check_scheme(spec.scheme, cg.coarse)
    check_coarse_points(spec.scheme, cg.coarse, spec.filter.ratio)
    library = _library(spec, grid.dims)
    if len(library.terms) == 0:
        raise UserError(f"the library {spec.library_label!r} has no terms for target "
                        f"{spec.target} on this grid: choose another library")
    missing = [f for f in library.fields if f not in (*velocity, *_scalars(spec))]
    if missing:
        raise UserError(f"the library's terms need fields {missing} that are not read: add "
                        "them with --var / input.scalars")


#: Relative divergence above which the incompressible-only pruning of the library is doubtful.
DIVERGENCE_TOLERANCE = 1e-3


def _compressibility_warning(src, index: int, library, levels=None,
                             spec: JobSpec | None = None) -> list[str]:
    """Warn when the library left out terms that are dependent only on incompressible fields
    and the data's velocity is not divergence-free (rms div u against rms |grad u|). A snapshot
    too large for memory is checked on its coarse-grained velocity (read by slabs)."""
    pruned = [d.split(":")[0] for d in library.dropped if "on incompressible fields" in d]
    if not pruned or len(src.velocity) < 2:
        return []
    from closure.filters import land_as_zero
    from closure.residuals import stencil_dilation

    if spec is not None and _by_slabs(spec, src):
        from closure.outofcore import SourceSlabs, coarse_grain_out_of_core

        # too large for memory: the check runs on the coarse-grained velocity, read by slabs
        snap = coarse_grain_out_of_core(SourceSlabs(src, index), _coarse_graining(spec, src.grid),
                                        targets=(), memory_limit=spec.memory_limit)
    else:
        snap = src.snapshot(index, None if not levels else levels[0])
    fields, keep, scheme = snap.fields, None, None
    mask = getattr(snap, "mask", None)
    if mask is not None and not np.all(mask):
        # land: local differences, only where the stencil stays in the fluid (the velocity
        # jumps to zero at the coast, which is no divergence of the flow)
        scheme = "fd4"
        keep = ~stencil_dilation(~np.asarray(mask, dtype=bool), snap.grid, scheme)
        fields = {c: land_as_zero(fields[c], mask) for c in src.velocity}
        if not keep.any():
            return []
    ratio = divergence_ratio(fields, snap.grid, list(src.velocity), keep=keep, scheme=scheme)
    if ratio <= DIVERGENCE_TOLERANCE:
        return []
    return [f"the velocity is not divergence-free (rms div u / rms |grad u| = {ratio:.2g} in "
            f"snapshot {index}), but the library left out {', '.join(pruned)} as dependent on "
            "incompressible fields: for compressible data list them in a terms file"]


def divergence_ratio(fields: Mapping[str, np.ndarray], grid: Grid, velocity: list[str],
                     keep: np.ndarray | None = None, scheme: str | None = None) -> float:
    """rms div u / rms |grad u| of a fine-grid velocity, the scheme's own error discounted.

    Periodic grids: spectral derivatives (exact for resolved fields). Bounded grids: fourth-
    order differences, less twice their error level (estimated as the rms difference from the
    second-order divergence: one-sided edge stencils and barely resolved scales), so exactly
    solenoidal data do not look divergent. ``keep``: the points to average over (default all);
    ``scheme``: the derivatives (default: spectral when periodic, else fd4)."""
    from closure.derivatives import derivative
    from closure.grid import DIRECTION_OF
    from closure.residuals import fine_scheme

    scheme = scheme or fine_scheme(grid)

    def mean(a: np.ndarray) -> float:
        return float(np.mean(a if keep is None else a[keep]))

    def div(s: str) -> np.ndarray:
        return sum(derivative(fields[c], grid, DIRECTION_OF[c], 1, s) for c in velocity)

    gradient_sq = sum(mean(derivative(fields[c], grid, d, 1, scheme) ** 2)
                      for c in velocity for d in grid.dims)
    tiny = np.finfo(float).tiny
    divergence = div(scheme)
    ratio = float(np.sqrt(mean(divergence ** 2) / max(gradient_sq, tiny)))
    if scheme == "spectral":
        return ratio
    # fd2's error bounds fd4's on resolved fields, so rms(div_fd4 - div_fd2) estimates the
    # error level of the check; twice that is a common-practice safety factor
    error = float(np.sqrt(mean((divergence - div("fd2")) ** 2) / max(gradient_sq, tiny)))
    return max(ratio - 2 * error, 0.0)


# ---------------------------------------------------------------------- map
def _check_input(plan: Mapping) -> None:
    files = plan["input"].get("files")
    if files is None:  # a plan of one file written before inputs could be several
        files = [{"path": plan["input"]["path"], "size": plan["input"]["size"],
                  "mtime_ns": plan["input"]["mtime_ns"]}]
    for f in files:
        path = Path(f["path"])
        try:
            now = _stamp(path)
        except FileNotFoundError:
            raise InputFileError(f"the input file {path} is gone since the job was planned") \
                from None
        if now != {"size": f["size"], "mtime_ns": f["mtime_ns"]}:
            raise InputFileError(f"the input file {path} changed since the job was planned: "
                                 "resubmit the job")


def _coarse(spec: JobSpec, plan: Mapping, index: int, source=None):
    """Snapshot ``index`` coarse-grained, with its coarse-graining and library: a list of
    coarse snapshots, one per planned level (one without a level stack)."""
    from closure.residuals import coarse_grain_snapshot

    if int(index) not in set(plan["snapshots"]):
        raise UserError(f"snapshot {index} is not part of this job's plan")
    _check_input(plan)
    own = source is None
    src = open_planned(plan) if own else source
    out, cg, library = [], None, None
    try:
        if hasattr(src, "coarse_graining"):  # a coarse input: read, not computed
            from closure.products import coarse_input_snapshot

            cs = coarse_input_snapshot(src, index, plan["components"])
            return [cs], _coarse_graining(spec, src.coarse_graining.fine), \
                _library(spec, cs.grid.dims)
        for level in _levels(plan):
            slabs = _by_slabs(spec, src)
            snap = None if slabs else src.snapshot(int(index), level)
            grid = src.grid if slabs else snap.grid
            cg = _coarse_graining(spec, grid)
            if library is None:
                library = _library(spec, grid.dims)
                if library.names != list(plan["terms"]):
                    raise UserError("the library's terms changed since the job was planned: "
                                    "resubmit the job")
            # only the fitted target: the scores' transfers come from the coarse fields
            if _compressible(spec):
                from closure.favre import favre_coarse_grain

                out.append(favre_coarse_grain(
                    snap, cg, targets=plan["components"],
                    gas_constant=(plan.get("gas") or {}).get("gas_constant"),
                    scheme=spec.scheme, derivative_passes=derivative_passes(library)))
            elif _by_slabs(spec, src):
                from closure.outofcore import SourceSlabs, coarse_grain_out_of_core

                out.append(coarse_grain_out_of_core(
                    SourceSlabs(src, int(index)), cg, _scalars(spec),
                    targets=plan["components"], memory_limit=spec.memory_limit,
                    dtype=np.float32 if spec.fine_float32 else np.float64))
            else:
                out.append(coarse_grain_snapshot(
                    snap, cg, _scalars(spec), targets=plan["components"],
                    land=spec.filter.land, scheme=spec.scheme,
                    derivative_passes=derivative_passes(library), backend=_backend(spec)))
            del snap
    finally:
        if own:
            src.close()
    return out, cg, library


class _LevelStack:
    """The coarse snapshots of every level of one time step, stacked along a leading axis
    (what HeldOut keeps for a level stack; ``unstack`` splits them again)."""

    def __init__(self, parts):
        self.index = parts[0].index
        self.fields = {k: np.stack([p.fields[k] for p in parts]) for k in parts[0].fields}
        self.targets = {k: np.stack([p.targets[k] for p in parts]) for k in parts[0].targets}
        self.valid = (None if all(p.valid is None for p in parts) else
                      np.stack([np.ones(p.grid.shape, dtype=bool) if p.valid is None
                                else p.valid for p in parts]))


def _unstack(fields: Mapping, targets: Mapping, valid, n_levels: int) -> list[tuple]:
    """(fields, targets, valid) per level of a _LevelStack's arrays."""
    return [({k: a[j] for k, a in fields.items()}, {k: a[j] for k, a in targets.items()},
             None if valid is None else valid[j]) for j in range(n_levels)]


def derivative_passes(library) -> int:
    """Stencil passes the library's derivatives take along one direction at most (a second
    derivative is one pass of its own stencil, a third a second then a first, ...): how far a
    design row reaches, in coarse stencils."""
    from closure.library import symbol_info

    most = 0
    for sym in library.symbols:
        info = symbol_info(sym)
        if info:
            most = max([most, *((n + 1) // 2 for n in info[1])])
    return most


def transfer_valid(valid, grid: Grid, scheme: str):
    """Points where the transfers (which differentiate the target again) see no excluded
    point; None when every point is valid."""
    if valid is None:
        return None
    from closure.residuals import stencil_dilation
    from closure.scores import TRANSFER_PASSES

    return ~stencil_dilation(~np.asarray(valid, dtype=bool), grid, scheme, TRANSFER_PASSES)


def _check_valid_points(spec: JobSpec, cs, cg, n_terms: int) -> None:
    """A UserError when land leaves too few valid coarse points in a snapshot."""
    n_valid = int(np.count_nonzero(cs.valid))
    need = MIN_POINTS_PER_TERM * n_terms
    if n_valid == 0 or n_valid < need:
        cells = ", ".join(f"{w / h:g}" for w, h in zip(cg.widths, cg.fine.spacing, strict=True))
        raise UserError(
            f"the land mask leaves {n_valid} of {cs.valid.size} coarse points of snapshot "
            f"{cs.index} clear of land (a fit of {n_terms} terms needs at least {need}: "
            f"{MIN_POINTS_PER_TERM} per term): points whose {cg.kind} filter footprint (width "
            f"{cells} grid spacings) or {spec.scheme} derivative stencil touches land are left "
            "out. Use a narrower filter (--width) or a smaller --ratio, a lower-order --scheme, "
            "a smaller --library, or check the mask (--mask, NaN or fill values mark land); "
            "--land does not change which points are left out")


def _backend(spec: JobSpec):
    """The array backend of ``spec.device`` (closure.backend; numpy by default): the
    periodic pass without land and the Gram statistics run on it."""
    from closure.backend import get_backend

    return get_backend(getattr(spec, "device", "numpy"))


def _by_slabs(spec: JobSpec, src) -> bool:
    """Whether a snapshot of ``src`` goes through closure.outofcore: it would exceed the
    spec's memory limit in memory, or the fine-grid pass runs in float32."""
    from closure.library import target_components
    from closure.outofcore import needs_out_of_core

    if (getattr(src, "levels", None) is not None or spec.input.mask is not None
            or _compressible(spec) or hasattr(src, "coarse_graining")):
        return False  # level stacks, land, Favre and coarse inputs go in memory
    n_fields = len(src.velocity) + len(_scalars(spec))
    return bool(getattr(spec, "fine_float32", False)) or needs_out_of_core(
        src.grid, n_fields, getattr(spec, "memory_limit", None),
        target_components(spec.target, src.grid.dims))


# ---------------------------------------------------------------------- slab tasks
def _slab_info(spec: JobSpec, src, cg) -> dict:
    """What the queue needs to split a snapshot into slab tasks (closure.slabtasks):
    whether it can (``refused``: why not), whether a snapshot is past the memory limit, and
    how many rows the first direction has. UserError when spec.slab_tasks asks for a split
    that cannot be made."""
    from closure import slabtasks
    from closure.library import target_components
    from closure.outofcore import needs_out_of_core

    why = None
    if hasattr(src, "coarse_graining"):
        why = "the input is already coarse-grained: nothing to split"
    elif getattr(src, "levels", None) is not None or spec.input.mask is not None \
            or _compressible(spec):
        why = "level stacks, land masks and Favre (compressible) coarse-graining are not split"
    else:
        why = slabtasks.refusal(cg)
    rows = slabtasks.most_tasks(cg)
    asked = getattr(spec, "slab_tasks", None)
    if asked is not None and asked > 1:
        if why:
            raise UserError(f"slab_tasks {asked}: {why}, so each snapshot runs in one task: "
                            "leave slab_tasks out (or set it to 1)")
        if asked > rows:
            raise OptionError(f"slab_tasks {asked} is more than the {rows} rows of the first "
                              f"direction ({cg.fine.dims[0]}): give at most {rows}")
    over = why is None and needs_out_of_core(
        cg.fine, len(src.velocity) + len(_scalars(spec)), getattr(spec, "memory_limit", None),
        target_components(spec.target, cg.fine.dims))
    return {"refused": why, "over_budget": bool(over), "rows": int(rows)}


def slab_split(spec: JobSpec, plan: Mapping, workers: int, tasks_per_worker: int = 2) -> int:
    """Slab tasks per phase for each snapshot of a queued job (1: each snapshot in one map
    task): ``spec.slab_tasks`` when given; otherwise, when a snapshot is past the memory
    limit, enough for about ``tasks_per_worker`` tasks per live worker over the whole job."""
    info = plan.get("slabs") or {}
    if info.get("refused") is not None or not info:
        return 1
    if getattr(spec, "slab_tasks", None) is not None:
        return int(spec.slab_tasks)
    if not info.get("over_budget"):
        return 1
    wanted = max(1, int(workers)) * int(tasks_per_worker)
    per_snapshot = -(-wanted // max(1, len(plan["snapshots"])))
    return max(1, min(per_snapshot, int(info["rows"])))


def _slab_setup(spec: JobSpec, plan: Mapping):
    from closure import slabtasks

    cg = _coarse_graining(spec, Grid.from_dict(plan["grid"]))
    dtype = np.float32 if spec.fine_float32 else np.float64
    kwargs = {"scalars": _scalars(spec), "targets": list(plan["components"]),
              "memory_limit": spec.memory_limit, "dtype": dtype}
    return slabtasks, cg, kwargs


def slab_phases(spec: JobSpec, plan: Mapping) -> list[str]:
    """The phases of a split snapshot's pass, in order (closure.slabtasks.phases)."""
    slabtasks, cg, kw = _slab_setup(spec, plan)
    return slabtasks.phases(cg, kw["scalars"], kw["targets"])


@_small_blas
def run_slab_task(spec: JobSpec, plan: Mapping, index: int, phase: str, task: int,
                  n_tasks: int, folder, source=None) -> None:
    """Task ``task`` of ``n_tasks`` of ``phase`` over snapshot ``index``, its pieces under
    ``folder`` (closure.slabtasks.run_phase); ``source``: the planned input, open."""
    from closure.outofcore import SourceSlabs

    if int(index) not in set(plan["snapshots"]):
        raise UserError(f"snapshot {index} is not part of this job's plan")
    _check_input(plan)
    slabtasks, cg, kw = _slab_setup(spec, plan)
    own = source is None
    src = open_planned(plan) if own else source
    try:
        slabtasks.run_phase(SourceSlabs(src, int(index)), cg, folder, phase, task, n_tasks, **kw)
    finally:
        if own:
            src.close()


@_small_blas
def finish_slab_tasks(spec: JobSpec, plan: Mapping, index: int, n_tasks: int, folder):
    """(statistics, coarse snapshot) of snapshot ``index`` from its slab tasks' pieces under
    ``folder``: what :func:`_map` gives for it in one task."""
    slabtasks, cg, kw = _slab_setup(spec, plan)
    times = plan.get("times")
    time = None if times is None else float(times[list(plan["snapshots"]).index(int(index))])
    cs = slabtasks.finish(cg, folder, n_tasks, int(index), time, **kw)
    library = _library(spec, cg.fine.dims)
    if library.names != list(plan["terms"]):
        raise UserError("the library's terms changed since the job was planned: resubmit the "
                        "job")
    return _level_stats(spec, plan, cs, cg, library, int(index)), cs


@_small_blas
def map_snapshot(spec: JobSpec, plan: Mapping, index: int, source=None) -> SufficientStats:
    """Sufficient statistics of one snapshot: coarse-grain, build the design and target.

    ``source`` may be an open closure.io FieldSource of the planned file (saves reopening it).
    Memory: the fine snapshot (by slabs past ``spec.memory_limit``), its coarse fields and the
    (C, n_coarse, p) design (by slabs of the coarse grid past the limit), then O(p^2).
    """
    return _map(spec, plan, index, source)[0]


def _map(spec: JobSpec, plan: Mapping, index: int, source=None):
    """(statistics, coarse snapshot) of snapshot ``index``. A level stack's statistics are
    the sum over its levels (SufficientStats are additive), its coarse snapshot a
    _LevelStack."""
    parts, cg, library = _coarse(spec, plan, index, source)
    if len(parts) == 1:
        return _level_stats(spec, plan, parts[0], cg, library, int(index)), parts[0]
    total = None
    for cs in parts:
        s = _level_stats(spec, plan, cs, cg, library, None)
        total = s if total is None else total + s
    return dataclasses.replace(total, snapshots=(int(index),)), _LevelStack(parts)


def _nbytes(*groups) -> int:
    """Bytes of the arrays in ``groups`` (mappings of arrays)."""
    return sum(int(getattr(a, "nbytes", 0)) for g in groups for a in g.values())


def remaining_budget(memory_limit: int | None, held: int) -> int:
    """The part of ``memory_limit`` (None: closure.outofcore.default_memory_limit) left to a
    pass's own work beside ``held`` bytes the run holds meanwhile (the coarse snapshot, ...);
    at least a quarter of the limit, so a pass can always make progress."""
    from closure.outofcore import default_memory_limit

    limit = default_memory_limit() if memory_limit is None else int(memory_limit)
    return max(limit - int(held), limit // 4)


def _level_stats(spec: JobSpec, plan: Mapping, cs, cg, library, index: int | None):
    """Statistics of one coarse snapshot (one level). A design past what ``spec.memory_limit``
    leaves beside the coarse snapshot is built by slabs (closure.coarsestats), unless its
    transfer statistics differentiate the target (the 2-D enstrophy transfer of the stress or
    force: from the whole design)."""
    from closure.coarsestats import design_fits, statistics_by_slabs
    from closure.library import design
    from closure.scores import transfers_pointwise

    if cs.valid is not None:
        _check_valid_points(spec, cs, cg, len(library.names))
    comps = list(plan["components"])
    # land: excluded coarse points weigh 0 (and are never read by the statistics)
    points = None if cs.valid is None else cs.valid.reshape(-1)
    blocks = tuple(plan.get("transfers") or ())
    budget = remaining_budget(spec.memory_limit, _nbytes(cs.fields, cs.targets))
    if transfers_pointwise(spec.target, blocks) and not design_fits(library, cs.grid, budget):
        return statistics_by_slabs(
            library, cs.fields, cs.grid, spec.scheme, cg.delta,
            {c: cs.targets[c] for c in comps}, plan["weights"], snapshot=index,
            point_weights=points, transfers=blocks, target=spec.target,
            transfer_points=transfer_valid(cs.valid, cs.grid, spec.scheme) if blocks else None,
            memory_limit=budget, backend=_backend(spec))
    X = design(library, cs.fields, cs.grid, spec.scheme, cg.delta)
    y = np.stack([cs.targets[c].reshape(-1) for c in comps])
    extra = {}
    if blocks:
        ctx = TransferContext(spec.target, cs.fields, cs.grid, spec.scheme)
        p, shape = X.shape[2], cs.grid.shape
        columns = ctx.transfers({c: X[k].T.reshape(p, *shape) for k, c in enumerate(comps)},
                                blocks)
        exact = ctx.transfers({c: y[k].reshape(shape) for k, c in enumerate(comps)}, blocks)
        tv = transfer_valid(cs.valid, cs.grid, spec.scheme)
        for name in blocks:
            T = columns[name].reshape(p, -1).T
            extra[name] = SufficientStats.from_design(
                T[None], exact[name].reshape(1, -1), None, library.names, (name,),
                point_weights=None if tv is None else tv.reshape(-1), backend=_backend(spec))
    return SufficientStats.from_design(X, y, plan["weights"], library.names, comps,
                                       snapshot=index, extra=extra, point_weights=points,
                                       backend=_backend(spec))


class HeldOut:
    """Coarse fields and exact targets of held-out snapshots, kept in a folder between the map
    pass and the scoring pass of an in-process run (so scoring need not coarse-grain them
    again, and memory does not grow with the number of snapshots)."""

    def __init__(self, folder: str | os.PathLike, components: list[str]):
        self.folder = Path(folder)
        self.components = list(components)
        self.indices: set[int] = set()

    def put(self, cs) -> None:
        arrays = {f"field:{k}": v for k, v in cs.fields.items()}
        arrays.update({f"target:{c}": cs.targets[c] for c in self.components})
        if cs.valid is not None:
            arrays["valid"] = np.asarray(cs.valid, dtype=bool)
        with open(self.folder / f"{int(cs.index)}.npz", "wb") as fh:
            np.savez(fh, **arrays)
        self.indices.add(int(cs.index))

    def __contains__(self, index) -> bool:
        return int(index) in self.indices

    def get(self, index: int) -> tuple[dict, dict, np.ndarray | None]:
        """(fields, targets, valid points or None) of a held-out snapshot."""
        with np.load(self.folder / f"{int(index)}.npz", allow_pickle=False) as z:
            fields = {k[6:]: z[k] for k in z.files if k.startswith("field:")}
            targets = {k[7:]: z[k] for k in z.files if k.startswith("target:")}
            valid = z["valid"] if "valid" in z.files else None
        return fields, targets, valid


# ---------------------------------------------------------------------- reduce
def _flat_scores(pred: Mapping[str, Mapping], transfers: Mapping[str, Mapping] | None = None
                 ) -> dict:
    """Flat metric -> number (or None) for the model file: pooled first, then per component."""
    pooled = pred.get("all") or next(iter(pred.values()))
    out = {"r2": pooled["r2"], "correlation": pooled["correlation"],
           "relative_error": pooled["relative_error"]}
    if len(pred) > 1:
        for name, s in pred.items():
            if name == "all":
                continue
            for m in ("r2", "correlation", "relative_error"):
                out[f"{m}_{name}"] = s[m]
    for name, s in (transfers or {}).items():
        for m in ("correlation", "mean_ratio", "backscatter_fraction_model",
                  "backscatter_fraction_exact"):
            if m in s:
                out[f"{name}_{m}"] = s[m]
    out["points"] = pooled["points"]
    return out


def _baseline(library, spec: JobSpec, train_stats: SufficientStats):
    """Least-squares coefficient of the Smagorinsky-form term alone on the training data."""
    kind = spec.target.split(":")[0]
    name = (COMPRESSIBLE_BASELINE_TERMS if _compressible(spec) else BASELINE_TERMS).get(kind)
    if name not in library.names:
        return None
    support = np.array([t == name for t in library.names])
    return name, least_squares(Problem.from_stats(train_stats), support)


@_small_blas
def reduce(spec: JobSpec, plan: Mapping, stats: Mapping[int, SufficientStats],
           progress: Progress | None = None, source=None, held_out: HeldOut | None = None):
    """Fit, select and score the closure from every planned snapshot's statistics.

    ``stats`` maps snapshot index (int or str) to SufficientStats (or its dict form). Scores:
    from the statistics of the test snapshots, and a second pass over them (reading and
    coarse-graining again, unless ``held_out`` has them) for the pointwise transfers.
    Returns a closure.model.ClosureModel.
    """
    progress = progress or _no_progress
    stats = {int(k): (v if isinstance(v, SufficientStats) else SufficientStats.from_dict(v))
             for k, v in stats.items()}
    missing = [i for i in plan["snapshots"] if i not in stats]
    if missing:
        raise ValueError(f"no statistics for planned snapshots {missing}")
    for i, s in stats.items():
        if s.terms != tuple(plan["terms"]) or s.components != tuple(plan["components"]):
            raise UserError(f"the statistics of snapshot {i} are for other terms or components "
                            "than this plan: resubmit the job")
    train, test = list(plan["train"]), list(plan["test"])
    progress("fit", 0, 1)
    grid = Grid.from_dict(plan["grid"])
    library = _library(spec, grid.dims)
    groups = []
    if _compressible(spec):  # terms the data cannot separate: keep one of each group
        from closure.equivalence import equivalent_groups

        groups = equivalent_groups(SufficientStats.merge([stats[i] for i in sorted(train)]),
                                   library)
    fit = _fit_without(stats, train, spec, {t for g in groups for t in g.dropped})
    progress("fit", 1, 1)
    train_stats = SufficientStats.merge([stats[i] for i in sorted(train)])
    test_stats = SufficientStats.merge([stats[i] for i in sorted(test)])
    base = _baseline(library, spec, train_stats)
    net = _reference_net(spec, plan, train, progress, source, held_out)
    net_stats, net_sums = [], {}

    # second pass over the held-out snapshots: pointwise transfers of model and baseline
    # (predictions past spec.memory_limit by slabs)
    from closure.coarsestats import predict_within

    sums: dict[str, TransferSums] = {}
    base_sums: dict[str, TransferSums] = {}
    comps = list(plan["components"])
    coarse = Grid.from_dict(plan["coarse_grid"])
    for done, i in enumerate(sorted(test)):
        progress("score", done, len(test))
        levels = _levels(plan)
        if held_out is not None and i in held_out:
            fields, targets, valid = held_out.get(i)
            # one level is kept as it is; several as a _LevelStack
            parts = [(fields, targets, valid)] if len(levels) == 1 else \
                _unstack(fields, targets, valid, len(levels))
        else:
            coarse_parts, _, _ = _coarse(spec, plan, i, source)
            parts = [(cs.fields, cs.targets, cs.valid) for cs in coarse_parts]
        for fields, targets, valid in parts:
            tv = transfer_valid(valid, coarse, spec.scheme)
            ctx = TransferContext(spec.target, fields, coarse, spec.scheme)
            exact = {c: targets[c] for c in comps}
            te = ctx.transfers(exact)
            # the prediction's own work gets what the limit leaves beside the snapshot, the
            # transfer context and the prediction itself
            prediction = len(comps) * 8 * int(np.prod(coarse.shape))
            budget = remaining_budget(spec.memory_limit, _nbytes(fields, targets, te)
                                      + ctx.nbytes() + prediction)
            for coef, acc in ((fit.coefficients, sums),) + \
                    (((base[1], base_sums),) if base else ()):
                model = predict_within(library, coef, fields, coarse, spec.scheme,
                                       float(plan["delta"]), budget)
                tm = ctx.transfers({c: model[c] for c in comps})
                for k in te:
                    acc[k] = acc.get(k, 0) + TransferSums.from_fields(tm[k], te[k], tv)
            if net is not None:
                net_stats.append(_score_network(net, fields, exact, coarse, plan, i, ctx, te,
                                                net_sums, valid, tv))
    progress("score", len(test), len(test))

    scores = {
        "train": _flat_scores(prediction_scores(train_stats, fit.coefficients)),
        "test": _flat_scores(prediction_scores(test_stats, fit.coefficients),
                             transfer_scores(sums)),
    }
    details = {"test_components": prediction_scores(test_stats, fit.coefficients),
               "test_transfers": transfer_scores(sums),
               "test_transfer_sums": {k: s.to_dict() for k, s in sums.items()}}
    if base is not None:
        scores[f"{base[0]}_only_test"] = _flat_scores(prediction_scores(test_stats, base[1]),
                                                      transfer_scores(base_sums))
        details["baseline"] = {"term": base[0],
                               "coefficient_scaled": float(base[1][library.names.index(base[0])])}
    land = land_record(spec, plan, stats)
    if net is not None:
        from closure.neural import SCORES_KEY

        net_test = SufficientStats.merge(net_stats)
        scores[SCORES_KEY] = _flat_scores(prediction_scores(net_test, np.ones(1)),
                                          transfer_scores(net_sums))
        details["reference_net_components"] = prediction_scores(net_test, np.ones(1))
        details["reference_net_transfers"] = transfer_scores(net_sums)
    warnings = list(plan.get("warnings") or []) + [g.describe() for g in groups] + list(
        fit.warnings)
    if land["excluded_points"]:
        warnings.append(land["note"])
    if _levels(plan) != [None]:
        warnings.append(f"statistics of {len(_levels(plan))} z levels pooled into one model "
                        "(2-D fields per level, no derivatives across levels)")
    warnings.append("coefficient standard errors treat every grid point as independent; "
                    "neighbouring points are correlated, so they are optimistic: the selection "
                    "frequencies over snapshot resamples are the better guide")
    settings = {
        "method": spec.fit.method, "selection": spec.fit.selection, "folds": spec.fit.folds,
        "resamples": spec.fit.resamples, "seed": spec.fit.seed,
        "transfer_weight": spec.fit.transfer_weight, "test_fraction": spec.fit.test_fraction,
        "selection_record": fit.to_dict(), "a_priori_details": details, "land": land,
    }
    if groups:
        settings["equivalent_terms"] = [g.to_dict() for g in groups]
    from closure.model import ClosureModel

    std_errors = [float(e) if s else None
                  for e, s in zip(fit.standard_errors, fit.support, strict=True)]
    return ClosureModel.from_fit(
        library, fit.coefficients, std_errors,
        None if fit.selection_frequency is None else list(fit.selection_frequency),
        target=spec.target, filter=dict(plan["filter"]), grid=plan["coarse_grid"],
        scheme=spec.scheme, delta=float(plan["delta"]), provenance=_provenance(spec, plan),
        method=spec.fit.method, settings=settings, scores=scores, warnings=warnings,
        reference_net=None if net is None else net.to_dict())


def _reference_net(spec: JobSpec, plan: Mapping, train, progress: Progress, source=None,
                   held_out: HeldOut | None = None):
    """The neural reference closure trained on the training snapshots (None when the spec
    does not ask for it); their coarse fields come from ``held_out`` when kept there."""
    if not spec.reference_net.enabled:
        return None
    from closure.neural import train_reference_net

    comps = list(plan["components"])

    def snapshots():
        for i in sorted(train):
            if held_out is not None and i in held_out:
                fields, targets, valid = held_out.get(i)
                parts = [(fields, targets, valid)] if len(_levels(plan)) == 1 else \
                    _unstack(fields, targets, valid, len(_levels(plan)))
            else:
                coarse_parts, _, _ = _coarse(spec, plan, i, source)
                parts = [(cs.fields, cs.targets, cs.valid) for cs in coarse_parts]
            for fields, targets, valid in parts:
                yield fields, {c: targets[c] for c in comps}, valid

    return train_reference_net(snapshots(), Grid.from_dict(plan["coarse_grid"]), spec.target,
                               spec.scheme, comps, plan["weights"], spec.reference_net,
                               progress)


def _score_network(net, fields, exact, coarse: Grid, plan: Mapping, index: int,
                   ctx: TransferContext, exact_transfers, sums: dict,
                   valid: np.ndarray | None = None,
                   transfer_points: np.ndarray | None = None) -> SufficientStats:
    """Statistics of the network's prediction on one held-out snapshot as a one-term design
    (so the scores are those of the sparse model, from the same formulas, on the same valid
    points), and its transfer sums added to ``sums``."""
    comps = list(plan["components"])
    pred = net.predict(fields, coarse)
    tm = ctx.transfers({c: pred[c] for c in comps})
    for k in exact_transfers:
        sums[k] = sums.get(k, 0) + TransferSums.from_fields(tm[k], exact_transfers[k],
                                                            transfer_points)
    X = np.stack([pred[c].reshape(-1) for c in comps])[:, :, None]
    y = np.stack([np.asarray(exact[c]).reshape(-1) for c in comps])
    return SufficientStats.from_design(X, y, plan["weights"], ["reference_net"], comps,
                                       snapshot=int(index),
                                       point_weights=None if valid is None else valid.reshape(-1))


def land_record(spec: JobSpec, plan: Mapping, stats: Mapping[int, SufficientStats]) -> dict:
    """Coarse points land excluded from the fit and scores, counted from the statistics (a
    snapshot's excluded points are its coarse points minus those with weight), with the
    convention and a sentence for the summary."""
    per = int(np.prod(plan["coarse_grid"]["shape"])) * len(_levels(plan))

    def excluded(indices):
        return int(sum(per - int(stats[i].count[0]) for i in indices))

    train, test = excluded(plan["train"]), excluded(plan["test"])
    total = per * len(plan["snapshots"])
    # Favre coarse-graining has one land convention: filters normalised over the fluid
    # (weight rho times the mask, closure.favre)
    convention = "fluid" if _compressible(spec) else spec.filter.land
    note = (f"land: {train + test} of {total} coarse points ({(train + test) / total:.1%}; "
            f"{train} fitted, {test} held out) left out of the fit and scores because their "
            f"filter footprint or {spec.scheme} derivative stencil touches land (convention "
            f"'{convention}')")
    return {"convention": convention, "coarse_points": total,
            "excluded_points": train + test, "excluded_train": train, "excluded_test": test,
            "rule": "footprint (Gaussian to 6 standard deviations, box support, block) or "
                    "derivative stencil touches land", "note": note}


def _fit_without(stats: Mapping[int, SufficientStats], train, spec: JobSpec, left_out: set):
    """fit_closure on the terms not in ``left_out``; the result spans every term again (the
    left-out ones with coefficient 0, not selected, no error bar)."""
    import dataclasses

    def run(s):
        f = spec.fit
        return fit_closure(s, train, f.method, transfer_weight=f.transfer_weight,
                           n_folds=f.folds, resamples=f.resamples, seed=f.seed, rule=f.selection)

    if not left_out:
        return run(stats)
    terms = next(iter(stats.values())).terms
    keep = [t for t in terms if t not in left_out]
    fit = run({i: s.select(keep) for i, s in stats.items()})
    index = [terms.index(t) for t in keep]

    def spread(values, fill):
        if values is None:
            return None
        out = np.full(len(terms), fill, dtype=np.asarray(values).dtype)
        out[index] = values
        return out

    return dataclasses.replace(
        fit, terms=tuple(terms), coefficients=spread(fit.coefficients, 0.0),
        support=spread(fit.support, False), standard_errors=spread(fit.standard_errors, 0.0),
        selection_frequency=spread(fit.selection_frequency, 0.0))


def _provenance(spec: JobSpec, plan: Mapping) -> dict:
    """Where the model came from: input file and hash, snapshots, spec, software versions."""
    from importlib.metadata import version

    # package metadata, not ``import sklearn``: that import alone took 2 s of a 5 s discover
    spec_dict = spec.model_dump(mode="json")
    spec_dict["input"]["sha256"] = plan["sha256"]
    read = dict(plan["input"].get("read") or {})
    return {
        "input": plan["input"]["path"],
        "inputs": list(plan["input"].get("paths") or [plan["input"]["path"]]),
        "sha256": plan["sha256"],
        "sha256_policy": "one file: its SHA-256; several files or a Zarr store: SHA-256 of the "
                         "sorted per-file SHA-256 lines (closure.io.input_sha256)",
        **({"product_id": plan["input"]["product_id"]} if plan["input"].get("product_id")
           else {}),
        "variables": dict(plan["input"].get("variables") or {}),
        "input_options": dict(plan["input"].get("options") or {}),
        "input_read": read,
        "units": dict(read.get("units") or {}),
        "notes": list(plan.get("notes") or []),
        "snapshots": {"train": list(plan["train"]), "test": list(plan["test"])},
        "times": plan.get("times"),
        "fine_grid": plan["grid"],
        "library": plan["library"],
        **({"gas": plan["gas"]} if "gas" in plan else {}),
        "spec": spec_dict,
        "software": {"numpy": np.__version__, "scipy": version("scipy"),
                     "scikit-learn": version("scikit-learn"), "python": platform.python_version()},
    }


# ---------------------------------------------------------------------- in process
@_small_blas
def discover(spec: JobSpec, progress: Progress | None = None):
    """Plan, map every snapshot and reduce, in this process (one file handle throughout).

    Snapshots are mapped side by side, each on one core (:func:`map_jobs`; the statistics do
    not depend on it, bit for bit). The input's SHA-256 (provenance) is computed in a thread
    meanwhile: hashing is I/O and C code outside the GIL.
    """
    from closure.io import input_sha256

    progress = progress or _no_progress
    if spec.reference_net.enabled:  # fail before the long pass, not after it
        from closure.neural import require_torch

        require_torch()
    progress("plan", 0, 1)
    with _open(spec) as src, ThreadPoolExecutor(max_workers=1) as pool, \
            tempfile.TemporaryDirectory(prefix="closure-held-out-") as tmp:
        p = _plan(spec, src, None)
        stop = threading.Event()
        digest = pool.submit(input_sha256, src.paths, cancel=stop)
        try:
            progress("plan", 1, 1)
            stats = {}
            indices = sorted(p["snapshots"])
            test = set(p["test"])
            held_out = HeldOut(tmp, p["components"])
            jobs = map_jobs(spec, src, len(indices))
            reader = src if jobs == 1 else _OneReader(src)
            progress("map", 0, len(indices))
            for done, (i, (st, cs)) in enumerate(map_in_threads(
                    lambda i: _map(spec, p, i, source=reader), indices, jobs), start=1):
                stats[i] = st
                if i in test or spec.reference_net.enabled:  # the network trains on them
                    held_out.put(cs)
                del cs
                progress("map", done, len(indices))
            p["sha256"] = p["input"]["sha256"] = digest.result()
        except BaseException:
            stop.set()  # do not wait for the hash of a file whose job failed
            raise
        _check_input(p)  # the file hashed is the file read
        return reduce(spec, p, stats, progress, source=src, held_out=held_out)


def map_jobs(spec: JobSpec, src, n_snapshots: int) -> int:
    """Snapshots an in-process run maps side by side: ``spec.jobs`` when given, else one per
    core, no more than there are snapshots, and as many as half the machine's memory holds
    (closure.outofcore.in_memory_bytes each); 1 when snapshots go by slabs (each already
    uses its memory limit) or through torch (which threads each operation itself)."""
    from closure.library import target_components
    from closure.outofcore import default_memory_limit, in_memory_bytes

    if spec.jobs is not None:
        return max(1, min(int(spec.jobs), n_snapshots))
    if _by_slabs(spec, src) or getattr(spec, "device", "numpy") != "numpy":
        return 1
    if hasattr(src, "coarse_graining"):  # coarse inputs: reading is the work
        return 1
    grid = src.grid
    each = in_memory_bytes(grid, len(src.velocity) + len(_scalars(spec)),
                           target_components(spec.target, grid.dims))
    each *= len(getattr(src, "levels", None) or [None])
    fits = max(1, default_memory_limit() // max(each, 1))
    return max(1, min(cores(), n_snapshots, fits))


class _OneReader:
    """An open input whose attributes and calls are taken one thread at a time (netCDF and
    HDF5 handles are not safe across threads): what snapshots mapped side by side read."""

    def __init__(self, source):
        self._source = source
        self._lock = threading.RLock()

    def __getattr__(self, name):
        with self._lock:
            value = getattr(self._source, name)
        if not callable(value):
            return value

        @functools.wraps(value)
        def call(*args, **kwargs):
            with self._lock:
                return value(*args, **kwargs)

        return call


def discover_levels(spec: JobSpec, progress: Progress | None = None) -> list[tuple[int, object]]:
    """One model per level of a level stack (``input.per_level``): ``[(level, model), ...]``,
    each fitted and scored on that level alone (its provenance lists the one level)."""
    if spec.input.levels is None:
        raise UserError("one model per level needs levels: give --levels all or --levels 0,5,10")
    if spec.input.levels == "all":
        with _open(spec) as src:
            levels = list(src.levels)
    else:
        levels = list(spec.input.levels)
    out = []
    for k in levels:
        one = spec.model_copy(update={"input": spec.input.model_copy(update={"levels": [k]})})
        out.append((k, discover(one, progress)))
    return out


__all__ = ["HeldOut", "derivative_passes", "discover", "discover_levels", "land_record",
           "map_snapshot", "open_planned", "plan", "reduce", "transfer_valid"]
