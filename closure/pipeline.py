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

import functools
import os
import platform
import tempfile
import threading
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from functools import lru_cache
from pathlib import Path

import numpy as np

from closure.derivatives import check_scheme
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

PLAN_VERSION = 1
Progress = Callable[[str, int, int], None]

#: The reference closure scored beside every model, per target kind (a preset term name).
BASELINE_TERMS = {"stress": "smagorinsky", "force": "div_smagorinsky",
                  "vorticity": "curl_div_smagorinsky", "flux": "eddy_diffusivity"}


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
        from threadpoolctl import threadpool_limits  # (scikit-learn's dependency)

        # looked up at each call (under a millisecond), so BLAS libraries loaded later count
        with threadpool_limits(limits=1, user_api="blas"):
            return function(*args, **kwargs)

    return run


# ---------------------------------------------------------------------- shared pieces
def _input_path(spec: JobSpec) -> Path:
    if spec.input.path is None:
        raise UserError("input.dataset_id names an uploaded dataset, which only the service "
                        "resolves: give input.path")
    return Path(spec.input.path)


def _scalars(spec: JobSpec) -> tuple[str, ...]:
    """Scalars to read: the spec's, and the flux target's own."""
    names = list(spec.input.scalars)
    if spec.target.startswith("flux:"):
        names.append(spec.target.split(":", 1)[1])
    return tuple(dict.fromkeys(names))


def _open(spec: JobSpec):
    from closure.io import open_fields

    return open_fields(_input_path(spec), spec.input.variables or None, _scalars(spec),
                       spec.input.periodic)


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
    from closure.library import make_library

    return make_library(name, target, dims, scalars)


def _library(spec: JobSpec, dims: tuple[str, ...]):
    name = spec.library
    stamp: tuple = ()
    p = Path(name)
    if p.suffix and p.exists():  # a terms file: re-read it when it changes
        st = p.stat()
        stamp = (str(p.resolve()), st.st_size, st.st_mtime_ns)
    return _library_cached(name, spec.target, tuple(dims), _scalars(spec), stamp)


def _blocks(spec: JobSpec, dims) -> tuple[str, ...]:
    """Transfer statistics to gather: all transfers when the fit is transfer-weighted."""
    return transfer_names(spec.target, tuple(dims)) if spec.fit.transfer_weight > 0 else ()


def _stamp(path: Path) -> dict:
    st = path.stat()
    return {"size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)}


# ---------------------------------------------------------------------- plan
def plan(spec: JobSpec) -> dict:
    """Resolve the input and everything the maps and the reduce need (plain JSON types).

    Checks the file, variables, snapshot selection, filter, ratio, scheme and library against
    the data now, so a bad option fails before any work is queued.
    """
    from closure.io import sha256_file

    with _open(spec) as src:
        p = _plan(spec, src, None)
    p["sha256"] = p["input"]["sha256"] = sha256_file(_input_path(spec))
    return p


def check(spec: JobSpec) -> dict:
    """Check the spec against its input file as :func:`plan` does, without hashing the file
    (cheap enough to answer a submission at once); returns the plan with ``sha256`` None."""
    with _open(spec) as src:
        return _plan(spec, src, None)


def _plan(spec: JobSpec, src, sha: str | None) -> dict:
    """The plan from an open source; ``sha`` is the input's SHA-256 (None: filled in later)."""
    from closure.io import sha256_file

    path = _input_path(spec)
    grid = src.grid
    n = src.n_snapshots
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

    cg = _coarse_graining(spec, grid)
    check_scheme(spec.scheme, cg.coarse)
    library = _library(spec, grid.dims)
    if len(library.terms) == 0:
        raise UserError(f"the library {spec.library!r} has no terms for target {spec.target} "
                        "on this grid: choose another library")
    missing = [f for f in library.fields if f not in (*velocity, *_scalars(spec))]
    if missing:
        raise UserError(f"the library's terms need fields {missing} that are not read: add "
                        "them with --var / input.scalars")
    from closure.library import component_weights

    library_info = {"name": spec.library, "terms": library.names,
                    "dropped": list(library.dropped)}
    lib_path = Path(spec.library)
    if lib_path.suffix and lib_path.exists():
        library_info["sha256"] = sha256_file(lib_path)
    return {
        "version": PLAN_VERSION,
        "sha256": sha,
        "input": {"path": str(path), "sha256": sha, **_stamp(path),
                  "variables": dict(spec.input.variables), "scalars": list(_scalars(spec)),
                  "periodic": bool(spec.input.periodic), "n_snapshots": int(n)},
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
        "warnings": list(cg.warnings()) + _compressibility_warning(src, chosen[0], library,
                                                                   spec),
    }


#: Relative divergence above which the incompressible-only pruning of the library is doubtful.
DIVERGENCE_TOLERANCE = 1e-3


def _compressibility_warning(src, index: int, library, spec: JobSpec | None = None
                            ) -> list[str]:
    """Warn when the library left out terms that are dependent only on incompressible fields
    and the data's velocity is not divergence-free (rms div u against rms |grad u|). A snapshot
    too large for memory is checked on its coarse-grained velocity (read by slabs)."""
    pruned = [d.split(":")[0] for d in library.dropped if "on incompressible fields" in d]
    if not pruned or len(src.velocity) < 2:
        return []
    if spec is not None and _by_slabs(spec, src):
        from closure.outofcore import SourceSlabs, coarse_grain_out_of_core

        snap = coarse_grain_out_of_core(SourceSlabs(src, index), _coarse_graining(spec, src.grid),
                                        targets=(), memory_limit=spec.memory_limit)
    else:
        snap = src.snapshot(index)
    ratio = divergence_ratio(snap.fields, snap.grid, list(src.velocity))
    if ratio <= DIVERGENCE_TOLERANCE:
        return []
    return [f"the velocity is not divergence-free (rms div u / rms |grad u| = {ratio:.2g} in "
            f"snapshot {index}), but the library left out {', '.join(pruned)} as dependent on "
            "incompressible fields: for compressible data list them in a terms file"]


def divergence_ratio(fields: Mapping[str, np.ndarray], grid: Grid,
                     velocity: list[str]) -> float:
    """rms div u / rms |grad u| of a fine-grid velocity, the scheme's own error discounted.

    Periodic grids: spectral derivatives (exact for resolved fields). Bounded grids: fourth-
    order differences, less twice their error level (estimated as the rms difference from the
    second-order divergence: one-sided edge stencils and barely resolved scales), so exactly
    solenoidal data do not look divergent."""
    from closure.derivatives import derivative
    from closure.grid import DIRECTION_OF
    from closure.residuals import fine_scheme

    scheme = fine_scheme(grid)

    def div(s: str) -> np.ndarray:
        return sum(derivative(fields[c], grid, DIRECTION_OF[c], 1, s) for c in velocity)

    gradient_sq = sum(np.mean(derivative(fields[c], grid, d, 1, scheme) ** 2)
                      for c in velocity for d in grid.dims)
    tiny = np.finfo(float).tiny
    divergence = div(scheme)
    ratio = float(np.sqrt(np.mean(divergence ** 2) / max(gradient_sq, tiny)))
    if scheme == "spectral":
        return ratio
    # fd2's error bounds fd4's on resolved fields, so rms(div_fd4 - div_fd2) estimates the
    # error level of the check; twice that is a common-practice safety factor
    error = float(np.sqrt(np.mean((divergence - div("fd2")) ** 2) / max(gradient_sq, tiny)))
    return max(ratio - 2 * error, 0.0)


# ---------------------------------------------------------------------- map
def _check_input(plan: Mapping) -> None:
    path = Path(plan["input"]["path"])
    try:
        now = _stamp(path)
    except FileNotFoundError:
        raise InputFileError(f"the input file {path} is gone since the job was planned") from None
    then = {k: plan["input"][k] for k in ("size", "mtime_ns")}
    if now != then:
        raise InputFileError(f"the input file {path} changed since the job was planned: "
                             "resubmit the job")


def _coarse(spec: JobSpec, plan: Mapping, index: int, source=None):
    """Snapshot ``index`` coarse-grained, with its coarse-graining and library."""
    from closure.residuals import coarse_grain_snapshot

    if int(index) not in set(plan["snapshots"]):
        raise UserError(f"snapshot {index} is not part of this job's plan")
    _check_input(plan)
    own = source is None
    src = _open(spec) if own else source
    try:
        cg = _coarse_graining(spec, src.grid)
        # only the fitted target: the scores' transfers come from the coarse fields
        if _by_slabs(spec, src):
            from closure.outofcore import SourceSlabs, coarse_grain_out_of_core

            cs = coarse_grain_out_of_core(
                SourceSlabs(src, int(index)), cg, _scalars(spec), targets=plan["components"],
                memory_limit=spec.memory_limit,
                dtype=np.float32 if spec.fine_float32 else np.float64)
        else:
            snap = src.snapshot(int(index))
            cs = coarse_grain_snapshot(snap, cg, _scalars(spec), targets=plan["components"])
    finally:
        if own:
            src.close()
    library = _library(spec, cg.fine.dims)
    if library.names != list(plan["terms"]):
        raise UserError("the library's terms changed since the job was planned: resubmit the "
                        "job")
    return cs, cg, library


def _by_slabs(spec: JobSpec, src) -> bool:
    """Whether a snapshot of ``src`` goes through closure.outofcore: it would exceed the
    spec's memory limit in memory, or the fine-grid pass runs in float32."""
    from closure.library import target_components
    from closure.outofcore import needs_out_of_core

    n_fields = len(src.velocity) + len(_scalars(spec))
    return bool(getattr(spec, "fine_float32", False)) or needs_out_of_core(
        src.grid, n_fields, getattr(spec, "memory_limit", None),
        target_components(spec.target, src.grid.dims))


@_small_blas
def map_snapshot(spec: JobSpec, plan: Mapping, index: int, source=None) -> SufficientStats:
    """Sufficient statistics of one snapshot: coarse-grain, build the design and target.

    ``source`` may be an open closure.io FieldSource of the planned file (saves reopening it).
    Memory: the fine snapshot, its coarse fields and the (C, n_coarse, p) design, then O(p^2).
    """
    return _map(spec, plan, index, source)[0]


def _map(spec: JobSpec, plan: Mapping, index: int, source=None):
    """(statistics, coarse snapshot) of snapshot ``index``."""
    from closure.library import design

    cs, cg, library = _coarse(spec, plan, index, source)
    X = design(library, cs.fields, cs.grid, spec.scheme, cg.delta)
    comps = list(plan["components"])
    y = np.stack([cs.targets[c].reshape(-1) for c in comps])
    extra = {}
    blocks = tuple(plan.get("transfers") or ())
    if blocks:
        ctx = TransferContext(spec.target, cs.fields, cs.grid, spec.scheme)
        p, shape = X.shape[2], cs.grid.shape
        columns = ctx.transfers({c: X[k].T.reshape(p, *shape) for k, c in enumerate(comps)},
                                blocks)
        exact = ctx.transfers({c: y[k].reshape(shape) for k, c in enumerate(comps)}, blocks)
        for name in blocks:
            T = columns[name].reshape(p, -1).T
            extra[name] = SufficientStats.from_design(T[None], exact[name].reshape(1, -1), None,
                                                      library.names, (name,))
    stats = SufficientStats.from_design(X, y, plan["weights"], library.names, comps,
                                        snapshot=int(index), extra=extra)
    return stats, cs


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
        with open(self.folder / f"{int(cs.index)}.npz", "wb") as fh:
            np.savez(fh, **arrays)
        self.indices.add(int(cs.index))

    def __contains__(self, index) -> bool:
        return int(index) in self.indices

    def get(self, index: int) -> tuple[dict, dict]:
        with np.load(self.folder / f"{int(index)}.npz", allow_pickle=False) as z:
            fields = {k[6:]: z[k] for k in z.files if k.startswith("field:")}
            targets = {k[7:]: z[k] for k in z.files if k.startswith("target:")}
        return fields, targets


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
    name = BASELINE_TERMS[spec.target.split(":")[0]]
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
    fit = fit_closure(stats, train, spec.fit.method, transfer_weight=spec.fit.transfer_weight,
                      n_folds=spec.fit.folds, resamples=spec.fit.resamples, seed=spec.fit.seed,
                      rule=spec.fit.selection)
    progress("fit", 1, 1)
    train_stats = SufficientStats.merge([stats[i] for i in sorted(train)])
    test_stats = SufficientStats.merge([stats[i] for i in sorted(test)])

    grid = Grid.from_dict(plan["grid"])
    library = _library(spec, grid.dims)
    base = _baseline(library, spec, train_stats)

    # second pass over the held-out snapshots: pointwise transfers of model and baseline
    from closure.library import predict

    sums: dict[str, TransferSums] = {}
    base_sums: dict[str, TransferSums] = {}
    comps = list(plan["components"])
    coarse = Grid.from_dict(plan["coarse_grid"])
    for done, i in enumerate(sorted(test)):
        progress("score", done, len(test))
        if held_out is not None and i in held_out:
            fields, targets = held_out.get(i)
        else:
            cs, _, _ = _coarse(spec, plan, i, source)
            fields, targets = cs.fields, cs.targets
        ctx = TransferContext(spec.target, fields, coarse, spec.scheme)
        exact = {c: targets[c] for c in comps}
        te = ctx.transfers(exact)
        for coef, acc in ((fit.coefficients, sums),) + (((base[1], base_sums),) if base else ()):
            model = predict(library, coef, fields, coarse, spec.scheme, float(plan["delta"]))
            tm = ctx.transfers({c: model[c] for c in comps})
            for k in te:
                acc[k] = acc.get(k, 0) + TransferSums.from_fields(tm[k], te[k])
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
    warnings = list(plan.get("warnings") or []) + list(fit.warnings)
    warnings.append("coefficient standard errors treat every grid point as independent; "
                    "neighbouring points are correlated, so they are optimistic: the selection "
                    "frequencies over snapshot resamples are the better guide")
    settings = {
        "method": spec.fit.method, "selection": spec.fit.selection, "folds": spec.fit.folds,
        "resamples": spec.fit.resamples, "seed": spec.fit.seed,
        "transfer_weight": spec.fit.transfer_weight, "test_fraction": spec.fit.test_fraction,
        "selection_record": fit.to_dict(), "a_priori_details": details,
    }
    from closure.model import ClosureModel

    std_errors = [float(e) if s else None
                  for e, s in zip(fit.standard_errors, fit.support, strict=True)]
    return ClosureModel.from_fit(
        library, fit.coefficients, std_errors,
        None if fit.selection_frequency is None else list(fit.selection_frequency),
        target=spec.target, filter=dict(plan["filter"]), grid=plan["coarse_grid"],
        scheme=spec.scheme, delta=float(plan["delta"]), provenance=_provenance(spec, plan),
        method=spec.fit.method, settings=settings, scores=scores, warnings=warnings)


def _provenance(spec: JobSpec, plan: Mapping) -> dict:
    """Where the model came from: input file and hash, snapshots, spec, software versions."""
    from importlib.metadata import version

    # package metadata, not ``import sklearn``: that import alone took 2 s of a 5 s discover
    spec_dict = spec.model_dump(mode="json")
    spec_dict["input"]["sha256"] = plan["sha256"]
    return {
        "input": plan["input"]["path"],
        "sha256": plan["sha256"],
        "variables": dict(plan["input"].get("variables") or {}),
        "snapshots": {"train": list(plan["train"]), "test": list(plan["test"])},
        "times": plan.get("times"),
        "fine_grid": plan["grid"],
        "library": plan["library"],
        "spec": spec_dict,
        "software": {"numpy": np.__version__, "scipy": version("scipy"),
                     "scikit-learn": version("scikit-learn"), "python": platform.python_version()},
    }


# ---------------------------------------------------------------------- in process
@_small_blas
def discover(spec: JobSpec, progress: Progress | None = None):
    """Plan, map every snapshot and reduce, in this process (one file handle throughout).

    The input's SHA-256 (provenance) is computed in a thread while the snapshots are mapped:
    hashing is I/O and C code outside the GIL, on a core the map leaves idle between its FFTs.
    """
    from closure.io import sha256_file

    progress = progress or _no_progress
    progress("plan", 0, 1)
    with _open(spec) as src, ThreadPoolExecutor(max_workers=1) as pool, \
            tempfile.TemporaryDirectory(prefix="closure-held-out-") as tmp:
        p = _plan(spec, src, None)
        stop = threading.Event()
        digest = pool.submit(sha256_file, _input_path(spec), cancel=stop)
        try:
            progress("plan", 1, 1)
            stats = {}
            indices = sorted(p["snapshots"])
            test = set(p["test"])
            held_out = HeldOut(tmp, p["components"])
            for done, i in enumerate(indices):
                progress("map", done, len(indices))
                stats[i], cs = _map(spec, p, i, source=src)
                if i in test:
                    held_out.put(cs)
                del cs
            progress("map", len(indices), len(indices))
            p["sha256"] = p["input"]["sha256"] = digest.result()
        except BaseException:
            stop.set()  # do not wait for the hash of a file whose job failed
            raise
        _check_input(p)  # the file hashed is the file read
        return reduce(spec, p, stats, progress, source=src, held_out=held_out)


__all__ = ["HeldOut", "discover", "map_snapshot", "plan", "reduce"]
