"""One snapshot's out-of-core pass split into tasks over slabs, sharing one folder.

The periodic spectral pass of :mod:`closure.outofcore` couples every direction, so it runs in
phases; within a phase the ``n_tasks`` tasks are independent (any order, any machine that sees
the folder), and a phase starts when the one before it has ended:

``fine-rows``     (only when the target needs fine-grid fields: the force, the 2-D vorticity
                  terms) task k reads rows k of the first direction and transforms them along
                  the other directions;
``fine-columns``  task k finishes the first direction over columns k of those spectra: the
                  fine filtered velocity (vorticity) as column pieces;
``rows``          task k reads rows k again (and rebuilds the fine fields' rows from the
                  column pieces), forms every product and folds it onto the coarse wavenumbers
                  along the other directions;
``columns``       task k transforms columns k of those along the first direction and folds
                  them: coarse spectra, a few bytes per coarse point;
then :func:`finish` inverts the coarse spectra and assembles the terms: the coarse snapshot of
:func:`closure.residuals.coarse_grain_snapshot` (to round-off: the same engine steps, in the
same order, as :func:`closure.outofcore.coarse_grain_out_of_core`).

Each task writes its pieces under ``folder/<phase>-<k>/`` through a temporary folder renamed
when complete, so a task killed half-way leaves nothing a later phase reads, and a re-run
writes the same bytes (a piece already there is kept). A missing piece raises
:class:`MissingPieces`, naming the tasks whose output is absent. Every task stays within its
memory budget (its rows and columns in chunks the budget allows); its pieces are the files.
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from closure.errors import OptionError, UserError
from closure.filters import CoarseGraining
from closure.grid import VELOCITY_OF
from closure.outofcore import SpectralTerms, _dirs, _Engine, _steps, default_memory_limit

FINE_PHASES = ("fine-rows", "fine-columns")
PHASES = ("rows", "columns")


class MissingPieces(RuntimeError):
    """Pieces a phase needs are absent: the tasks that write them did not complete."""

    def __init__(self, phase: str, tasks: Sequence[int]):
        self.phase, self.tasks = phase, [int(k) for k in tasks]
        super().__init__(f"the {phase} slab task(s) {', '.join(map(str, self.tasks))} left "
                         "no result")


# ---------------------------------------------------------------------------------- plan
def refusal(cg: CoarseGraining) -> str | None:
    """Why slab tasks cannot split a snapshot of this coarse-graining (None: they can)."""
    if not cg.fine.periodic or cg.kind == "block":
        return ("slab tasks split the periodic spectral pass (a box, gaussian or spectral "
                f"filter on a periodic grid), not a {cg.kind} filter on a "
                f"{'periodic' if cg.fine.periodic else 'non-periodic'} grid")
    if cg.fine.ndim < 2:
        return "a 1-D snapshot is a single row"
    return None


def phases(cg: CoarseGraining, scalars: Sequence[str] = (),
           targets: Sequence[str] | None = None) -> list[str]:
    """The phases of the split pass, in order (each of ``n_tasks`` tasks)."""
    from closure.residuals import _wanted

    terms = SpectralTerms(cg, tuple(scalars), _wanted(targets, cg.fine.dims, tuple(scalars)))
    return [*(FINE_PHASES if terms.fine_fields() else ()), *PHASES]


def most_tasks(cg: CoarseGraining) -> int:
    """The largest useful number of tasks per phase: one row of the first direction each."""
    return int(cg.fine.shape[0])


def part(n: int, n_tasks: int, k: int) -> tuple[int, int]:
    """Task ``k``'s share ``(start, stop)`` of ``n`` rows or columns (contiguous, even)."""
    return n * k // n_tasks, n * (k + 1) // n_tasks


# ---------------------------------------------------------------------------------- files
def _piece_dir(folder: Path, phase: str, k: int) -> Path:
    return Path(folder) / f"{phase}-{int(k)}"


class _Piece:
    """The pieces one task writes: a temporary folder, renamed into place by :meth:`commit`."""

    def __init__(self, folder: Path, phase: str, k: int):
        self.final = _piece_dir(folder, phase, k)
        self.tmp = Path(folder) / f".tmp-{phase}-{int(k)}-{uuid.uuid4().hex}"
        self.tmp.mkdir(parents=True)
        self.meta: dict = {}

    def create(self, name: str, shape, dtype) -> None:
        a = np.lib.format.open_memmap(self.tmp / f"{name}.npy", mode="w+", dtype=dtype,
                                      shape=tuple(int(n) for n in shape))
        del a

    def write(self, name: str, index, value) -> None:
        # mapped only while written, so its pages count in the page cache, not this process
        # (written back by the kernel; commit() syncs each file once)
        a = np.load(self.tmp / f"{name}.npy", mmap_mode="r+")
        try:
            a[index] = value
        finally:
            del a

    def commit(self) -> None:
        with open(self.tmp / "meta.json", "w") as fh:
            json.dump(self.meta, fh)
        for path in self.tmp.iterdir():  # on disk before the rename makes them visible
            fd = os.open(path, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        if not self.final.exists():
            try:
                os.replace(self.tmp, self.final)
                return
            except OSError:
                if not self.final.exists():
                    raise
        # a re-run (or a copy that finished first): the pieces already there are the same
        shutil.rmtree(self.tmp, ignore_errors=True)

    def discard(self) -> None:
        shutil.rmtree(self.tmp, ignore_errors=True)


def _pieces(folder: Path, phase: str, n_tasks: int) -> list[Path]:
    dirs = [_piece_dir(folder, phase, k) for k in range(n_tasks)]
    missing = [k for k, d in enumerate(dirs) if not (d / "meta.json").exists()]
    if missing:
        raise MissingPieces(phase, missing)
    return dirs


def _read(path: Path, index) -> np.ndarray:
    a = np.load(path, mmap_mode="r")
    try:
        return np.array(a[index])
    finally:
        del a


def _read_cols(path: Path, c0: int, c1: int) -> np.ndarray:
    a = np.load(path, mmap_mode="r")
    try:
        return np.array(a.reshape(a.shape[0], -1)[:, c0:c1])
    finally:
        del a


# ---------------------------------------------------------------------------------- phases
class _Split:
    """The pass's engine, terms and names for one snapshot's coarse-graining."""

    def __init__(self, cg, scalars, targets, memory_limit, dtype):
        from closure.residuals import _wanted

        if np.dtype(dtype) not in (np.dtype(np.float64), np.dtype(np.float32)):
            raise OptionError(f"the fine-grid pass runs in float64 or float32, not {dtype!r}")
        why = refusal(cg)
        if why:
            raise UserError(f"{why}: run the snapshot in one task")
        budget = default_memory_limit() if memory_limit is None else int(memory_limit)
        if budget <= 0:
            raise OptionError(f"the memory limit must be positive, got {memory_limit!r}")
        self.cg, self.g = cg, cg.fine
        self.scalars = tuple(dict.fromkeys((scalars,) if isinstance(scalars, str) else scalars))
        self.order = list(_wanted(targets, self.g.dims, self.scalars))
        self.terms = SpectralTerms(cg, self.scalars, set(self.order))
        self.engine = _Engine(cg, budget, None, dtype)
        self.fine = self.terms.fine_fields()
        self.fine_names = list(self.fine)
        self.requests = self.terms.requests()

    @staticmethod
    def rest_name(n: int, rest) -> str:
        return f"r{n}-" + ".".join(c or "s" for c in rest)

    def fine_reader(self, folder: Path, n_tasks: int, read):
        """``read`` plus the fine fields' rows, rebuilt from the fine-columns pieces."""
        if not self.fine:
            return read
        dirs = _pieces(folder, "fine-columns", n_tasks)
        half = self.engine.half

        def reader(name, s0, s1):
            if name not in self.fine:
                return read(name, s0, s1)
            n = self.fine_names.index(name)
            rows = np.concatenate([_read(d / f"f{n}.npy", slice(s0, s1)) for d in dirs], axis=1)
            return self.engine.fine_inverse(rows.reshape(s1 - s0, *half[1:]))

        return reader


def run_phase(slabs, cg: CoarseGraining, folder: str | os.PathLike, phase: str, task: int,
              n_tasks: int, scalars: Sequence[str] = (), targets: Sequence[str] | None = None,
              memory_limit: int | None = None, dtype=np.float64) -> None:
    """Run task ``task`` of ``n_tasks`` of ``phase`` over snapshot ``slabs`` (a
    closure.outofcore.SourceSlabs or ArraySlabs), writing its pieces under ``folder``.

    ``memory_limit``: bytes this task may use (None: half the machine's memory). Raises
    :class:`MissingPieces` when the phase before it is incomplete."""
    split = _Split(cg, scalars, targets, memory_limit, dtype)
    if slabs.grid.dims != cg.fine.dims or slabs.grid.shape != cg.fine.shape:
        raise UserError(f"the snapshot's grid {slabs.grid.dims} {slabs.grid.shape} does not "
                        f"match the coarse-graining's fine grid {cg.fine.shape}")
    if not 0 <= int(task) < int(n_tasks):
        raise ValueError(f"task {task} of {n_tasks}")
    if int(n_tasks) > most_tasks(cg):
        raise OptionError(f"{n_tasks} slab tasks for {most_tasks(cg)} rows: at most one task "
                          "per row of the first direction")
    for c in (*(VELOCITY_OF[d] for d in _dirs(cg.fine.dims)), *split.scalars):
        if c not in slabs.names:
            raise UserError(f"the snapshot has no field {c!r} (it has "
                            f"{', '.join(slabs.names)}): add it with --scalar or --var")
    folder = Path(folder)
    run = {"fine-rows": _fine_rows, "fine-columns": _fine_columns, "rows": _rows,
           "columns": _columns}.get(phase)
    if run is None or (phase in FINE_PHASES and not split.fine):
        raise ValueError(f"no phase {phase!r} in this pass")
    piece = _Piece(folder, phase, task)
    try:
        run(split, slabs, folder, piece, int(task), int(n_tasks))
        piece.commit()
    finally:
        piece.discard()


def _fine_rows(split: _Split, slabs, folder, piece: _Piece, k: int, n_tasks: int) -> None:
    eng, N0 = split.engine, split.g.shape[0]
    r0, r1 = part(N0, n_tasks, k)
    for n, key_terms in enumerate(split.fine.values()):
        for m in range(len(key_terms)):
            piece.create(f"f{n}.{m}", (r1 - r0, *eng.half[1:]), eng.complex)
        for s0, s1 in _steps(r1 - r0, eng.fine_per_slab(key_terms, split.terms.n_inputs)):
            rows = eng.fine_rows(key_terms, slabs.read, r0 + s0, r0 + s1)
            for m, X in enumerate(rows):
                piece.write(f"f{n}.{m}", slice(s0, s1), X)


def _fine_columns(split: _Split, slabs, folder, piece: _Piece, k: int, n_tasks: int) -> None:
    eng, N0 = split.engine, split.g.shape[0]
    dirs = _pieces(folder, "fine-rows", n_tasks)
    cols = int(np.prod(eng.half[1:]))
    c0, c1 = part(cols, n_tasks, k)
    for n, key_terms in enumerate(split.fine.values()):
        piece.create(f"f{n}", (N0, c1 - c0), eng.complex)
        for a, b in _steps(c1 - c0, eng.fine_columns_per_chunk(len(key_terms))):
            blocks = [np.concatenate([_read_cols(d / f"f{n}.{m}.npy", c0 + a, c0 + b)
                                      for d in dirs]) for m in range(len(key_terms))]
            piece.write(f"f{n}", (slice(None), slice(a, b)),
                        eng.fine_columns(blocks, key_terms))


def _rows(split: _Split, slabs, folder, piece: _Piece, k: int, n_tasks: int) -> None:
    eng, N0 = split.engine, split.g.shape[0]
    r0, r1 = part(N0, n_tasks, k)
    read = split.fine_reader(folder, n_tasks, slabs.read)
    per = eng.coarse_per_slab(split.requests, split.terms.n_inputs + len(split.fine))
    for s0, s1 in _steps(r1 - r0, per):
        for n, rest, X, spectral in eng.coarse_rows(split.requests, read, r0 + s0, r0 + s1):
            name = split.rest_name(n, rest)
            if name not in piece.meta:
                piece.create(name, (r1 - r0, *X.shape[1:]), X.dtype)
                piece.meta[name] = {"shape": list(X.shape[1:]), "spectral": list(spectral),
                                    "dtype": X.dtype.str}
            piece.write(name, slice(s0, s1), X)


def _columns(split: _Split, slabs, folder, piece: _Piece, k: int, n_tasks: int) -> None:
    eng = split.engine
    dirs = _pieces(folder, "rows", n_tasks)
    meta = json.loads((dirs[0] / "meta.json").read_text())
    n0 = split.g.shape[0] // split.cg.ratio
    for n, (_, _, ops) in enumerate(split.requests):
        for rest in sorted({op[1:] for op in ops}):
            name = split.rest_name(n, rest)
            info = meta[name]
            cols = int(np.prod(info["shape"]))
            c0, c1 = part(cols, n_tasks, k)
            dtype = np.result_type(np.dtype(info["dtype"]), eng.complex)
            codes = sorted({op[0] for op in ops if op[1:] == rest})
            for code in codes:
                piece.create(f"{name}@{code or 's'}", (n0, c1 - c0), dtype)
            for a, b in _steps(c1 - c0, eng.columns_per_chunk()):
                block = np.concatenate([_read_cols(d / f"{name}.npy", c0 + a, c0 + b)
                                        for d in dirs])
                for code in codes:
                    piece.write(f"{name}@{code or 's'}", (slice(None), slice(a, b)),
                                eng.first_columns(block, code))
            piece.meta[name] = info


def finish(cg: CoarseGraining, folder: str | os.PathLike, n_tasks: int, index: int,
           time=None, scalars: Sequence[str] = (), targets: Sequence[str] | None = None,
           memory_limit: int | None = None, dtype=np.float64):
    """The coarse snapshot (closure.residuals.CoarseSnapshot) from the columns phase's
    pieces under ``folder``: coarse inverse transforms, then the terms."""
    from closure.residuals import CoarseSnapshot

    split = _Split(cg, scalars, targets, memory_limit, dtype)
    folder = Path(folder)
    dirs = _pieces(folder, "columns", n_tasks)
    meta = json.loads((dirs[0] / "meta.json").read_text())
    res = {}
    for n, (key, _, ops) in enumerate(split.requests):
        for rest in sorted({op[1:] for op in ops}):
            name = split.rest_name(n, rest)
            info = meta[name]
            for code in sorted({op[0] for op in ops if op[1:] == rest}):
                X = np.concatenate([np.load(d / f"{name}@{code or 's'}.npy") for d in dirs],
                                   axis=1)
                coarse = split.engine.coarse_inverse(X, code, info["shape"],
                                                     tuple(info["spectral"]))
                for op in ops:
                    if op[1:] == rest and op[0] == code:
                        res[(key, op)] = coarse
    fields, out = split.terms.assemble(res)
    fields = {k: np.ascontiguousarray(v, dtype=float) for k, v in fields.items()}
    out = {k: np.ascontiguousarray(out[k], dtype=float) for k in split.order}
    return CoarseSnapshot(fields, out, cg.coarse, cg, index, time)


def coarse_grain_by_tasks(slabs, cg: CoarseGraining, n_tasks: int, scalars: Sequence[str] = (),
                          targets: Sequence[str] | None = None,
                          memory_limit: int | None = None, folder: str | None = None,
                          dtype=np.float64):
    """Every phase's tasks in turn, in this process, then :func:`finish`: what the queue's
    slab tasks compute for one snapshot (``folder``: None, a temporary folder)."""
    import tempfile

    with tempfile.TemporaryDirectory(prefix="closure-slabtasks-", dir=folder) as work:
        for phase in phases(cg, scalars, targets):
            for k in range(n_tasks):
                run_phase(slabs, cg, work, phase, k, n_tasks, scalars, targets, memory_limit,
                          dtype)
        return finish(cg, work, n_tasks, slabs.index, slabs.time, scalars, targets,
                      memory_limit, dtype)


__all__ = ["MissingPieces", "coarse_grain_by_tasks", "finish", "most_tasks", "part", "phases",
           "refusal", "run_phase"]
