"""Where a job's input file is: a path under the data roots or an uploaded dataset."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

from api.errors import ForbiddenPathError
from closure.errors import InputFileError
from closure.spec import JobSpec
from closure.store import Store


def resolve_under_roots(raw: str, roots: Sequence[Path]) -> Path:
    """The real path of ``raw`` if it lies inside one of ``roots`` (symlinks and ``..``
    resolved first); relative paths are taken relative to each root in turn."""
    if not roots:
        raise ForbiddenPathError(
            "this server reads no files by path (it has no data roots; start it with "
            "--data-root DIR or CLOSURE_DATA_ROOTS); upload the file with POST /datasets")
    real_roots = [Path(r).resolve() for r in roots]
    p = Path(raw).expanduser()
    candidates = [p] if p.is_absolute() else [root / p for root in real_roots]
    inside = None
    for cand in candidates:
        real = cand.resolve()
        if any(real == root or root in real.parents for root in real_roots):
            inside = inside or real
            if real.exists():
                break
    if inside is None:
        listed = ", ".join(str(r) for r in real_roots)
        raise ForbiddenPathError(
            f"input.path {raw!r} is outside the data roots ({listed}); put the file under "
            "one of them or upload it with POST /datasets")
    if not inside.is_file():
        raise InputFileError(f"input.path {raw!r}: no such file under the data roots")
    return inside


def describe_fields(path: Path, variables: dict | None = None, scalars: Sequence[str] = (),
                    periodic: bool = True, **options) -> dict:
    """Open ``path`` with closure.io.open_fields (raising InputFileError with what is wrong)
    and describe it: grid, number of snapshots, velocity components and scalars.
    ``options``: open_fields' group, mask, levels and spacing."""
    from closure.io import open_fields

    with open_fields(path, variables=variables or None, scalars=tuple(scalars),
                     periodic=periodic, **options) as src:
        return {"grid": src.grid.to_dict(), "n_snapshots": int(src.n_snapshots),
                "velocity": list(src.velocity), "scalars": list(src.scalars)}


def resolve_input(spec: JobSpec, store: Store, roots: Sequence[Path]) -> tuple[JobSpec, dict]:
    """The spec the workers run (``input.path`` absolute, no dataset id) and the dataset
    record of its input. The file is checked with the spec's variable mapping here, so a
    missing variable is answered at submission."""
    inp = spec.input
    options = {"group": inp.group, "mask": inp.mask, "levels": inp.levels,
               "spacing": inp.spacing}
    if inp.path is not None and not isinstance(inp.path, str):
        # several inputs need every path checked against the roots (closure.io.input_files
        # expands them); until then one file per job
        raise InputFileError("input.path: this server takes one file per job; give one path "
                             "(or upload the data as one file)")
    if inp.dataset_id is not None:
        ds = store.get_dataset(inp.dataset_id)
        path = Path(ds["path"])
        if not path.is_file():
            raise InputFileError(f"dataset {inp.dataset_id}: its file is gone from the store; "
                                 "upload it again")
        info = describe_fields(path, inp.variables, inp.scalars, inp.periodic, **options)
    else:
        path = resolve_under_roots(inp.path, roots)
        info = describe_fields(path, inp.variables, inp.scalars, inp.periodic, **options)
        st = path.stat()
        ds = store.dataset_by_path(path, st.st_size, st.st_mtime_ns)
        if ds is None:
            from closure.io import sha256_file

            ds = store.add_dataset(sha256=sha256_file(path), path=path, source="path",
                                   size=st.st_size, mtime_ns=st.st_mtime_ns, grid=info["grid"],
                                   n_snapshots=info["n_snapshots"], variables=inp.variables)
    if inp.snapshots:
        bad = [i for i in inp.snapshots if i >= info["n_snapshots"]]
        if bad:
            raise InputFileError(f"input.snapshots: {bad} out of range; the file has "
                                 f"{info['n_snapshots']} snapshots (0..{info['n_snapshots'] - 1})")
    run_input = inp.model_copy(update={"path": os.fspath(path), "dataset_id": None,
                                       "sha256": None})
    return spec.model_copy(update={"input": run_input}), ds
