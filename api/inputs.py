"""Where a job's input and library are: paths under the data roots, uploaded datasets, presets
or inline term definitions; and the size limits checked from a file's header.

What a remote caller can make the server read: files under the data roots (inputs and terms
files, symlinks and ``..`` resolved first) and its own uploads. Nothing here reads field values:
the header (dimensions, coordinates) only; value checks run in the worker's plan task.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Sequence
from pathlib import Path

from api.errors import ForbiddenPathError
from closure.errors import InputFileError, InputTooLargeError, OptionError, UserError
from closure.spec import JobSpec
from closure.store import Store

#: longest path a request may name, and longest path component (bytes, as Linux allows)
MAX_PATH = 4096
MAX_NAME = 255
#: largest terms file read from a data root (bytes)
MAX_TERMS_FILE = 1 << 20
TERMS_SUFFIXES = (".json", ".yaml", ".yml")


def check_path_text(raw: str, field: str) -> None:
    """Refuse a path no file system takes: NUL bytes, over-long paths or names (422)."""
    if "\x00" in raw:
        raise OptionError(f"{field}: the path contains a NUL byte; give a plain file path")
    encoded = raw.encode("utf-8", "surrogateescape")
    if len(encoded) > MAX_PATH or any(len(part) > MAX_NAME for part in encoded.split(b"/")):
        raise OptionError(f"{field}: the path is longer than {MAX_PATH} bytes or has a name "
                          f"longer than {MAX_NAME} bytes; give a shorter path")


def resolve_under_roots(raw: str, roots: Sequence[Path], field: str = "input.path") -> Path:
    """The real path of ``raw`` if it lies inside one of ``roots`` (symlinks and ``..``
    resolved first); relative paths are taken relative to each root in turn."""
    check_path_text(raw, field)
    if not roots:
        raise ForbiddenPathError(
            "this server reads no files by path (it has no data roots; start it with "
            "--data-root DIR or CLOSURE_DATA_ROOTS); upload the file with POST /datasets")
    real_roots = [Path(r).resolve() for r in roots]
    p = Path(raw)  # no ~ expansion: the server's home means nothing to a remote caller
    candidates = [p] if p.is_absolute() else [root / p for root in real_roots]
    inside = None
    for cand in candidates:
        try:
            real = cand.resolve()
            exists = real.exists()
        except OSError:  # a symlink loop, a name the file system refuses
            continue
        if is_inside(real, real_roots):
            inside = inside or real
            if exists:
                break
    if inside is None:
        listed = ", ".join(str(r) for r in real_roots)
        raise ForbiddenPathError(
            f"{field} {raw!r} is outside the data roots ({listed}); put the file under "
            "one of them or upload it with POST /datasets")
    if not inside.is_file():
        raise InputFileError(f"{field} {raw!r}: no such file under the data roots")
    return inside


def resolve_inputs_under_roots(raw: str | Sequence[str], roots: Sequence[Path],
                               field: str = "input.path") -> list[Path]:
    """The real paths of every input an ``input.path`` names (several paths, globs, a folder
    of netCDF files, Zarr stores: closure.io.input_files), each of them, and every file of a
    Zarr store, inside the data roots (symlinks and ``..`` resolved). Relative entries and
    patterns are taken from each root in turn."""
    from closure.io import _store_files, input_files

    items = [raw] if isinstance(raw, str) else list(raw)
    if not items:
        raise InputFileError(f"{field} is empty: give a file, several files, a glob, a folder "
                             "or a Zarr store under the data roots")
    if not roots:
        resolve_under_roots(items[0], roots, field)  # the answer for a server without roots
    real_roots = [Path(r).resolve() for r in roots]
    out: list[Path] = []
    for item in items:
        check_path_text(item, field)
        found = None
        for root in real_roots:
            try:
                found = input_files(item, base=root)
                break
            except InputFileError:
                continue
        if found is None:
            raise InputFileError(f"{field} {item!r}: no such file, folder or match under the "
                                 "data roots")
        for p in found:
            real = p.resolve()
            files = [real] + [f.resolve() for f in _store_files(real)] if real.is_dir() else [real]
            if not all(is_inside(f, real_roots) for f in files):
                listed = ", ".join(str(r) for r in real_roots)
                raise ForbiddenPathError(
                    f"{field} {item!r} leads outside the data roots ({listed}); put the files "
                    "under one of them or upload them with POST /datasets")
            out.append(real)
    return list(dict.fromkeys(out))


def _declared_sizes_zarr(path: Path) -> dict:
    """closure.io.declared_sizes' answer for a Zarr store, from its metadata only."""
    import xarray as xr

    try:
        ds = xr.open_zarr(path, chunks=None, decode_times=False)
    except Exception:  # noqa: BLE001 - any unreadable store is the same answer
        raise InputFileError(f"{path.name} could not be read as a Zarr store") from None
    try:
        return {"dims": {str(k): int(v) for k, v in ds.sizes.items()}, "unlimited": [],
                "variables": {str(n): {"dims": [str(d) for d in v.dims],
                                       "itemsize": int(v.dtype.itemsize)}
                              for n, v in ds.variables.items()}}
    finally:
        ds.close()


def is_inside(real: Path, real_roots: Sequence[Path]) -> bool:
    """Whether the resolved path ``real`` is one of ``real_roots`` or lies below one."""
    return any(real == root or root in real.parents for root in real_roots)


# --------------------------------------------------------------------------- size limits

def check_declared_sizes(path: Path, label: str, settings, time_dim: str = "time") -> dict:
    """Refuse a file whose header declares more than the server's limits (413 naming the
    limit and its variable): points per snapshot of any variable, snapshots, and bytes of all
    variables together. Reads the header only, so a tiny file that declares a huge grid costs
    nothing. Returns the declared sizes (closure.io.declared_sizes)."""
    from closure.io import declared_sizes

    try:
        sizes = _declared_sizes_zarr(path) if path.is_dir() else declared_sizes(path)
    except InputFileError:
        raise InputFileError(f"{label} could not be read as netCDF: give a netCDF-3 or "
                             "netCDF-4 file") from None
    dims = sizes["dims"]
    times = {time_dim} | set(sizes["unlimited"])
    total = 0
    for name, var in sizes["variables"].items():
        shape = [dims.get(d, 0) for d in var["dims"]]
        spatial = [n for d, n in zip(var["dims"], shape, strict=True) if d not in times]
        points = math.prod(spatial)
        if points > settings.max_points:
            raise InputTooLargeError(
                f"{label}: variable {name!r} has {' x '.join(map(str, spatial))} = {points} "
                f"points per snapshot, over this server's limit of {settings.max_points} "
                "(CLOSURE_MAX_POINTS on the server; ask its operator to raise it, or split or "
                "coarsen the file)")
        total += math.prod(shape) * var["itemsize"]
    n_time = max([dims.get(d, 0) for d in times if d in dims] or [1])
    if n_time > settings.max_snapshots:
        raise InputTooLargeError(
            f"{label}: {n_time} snapshots, over this server's limit of "
            f"{settings.max_snapshots} (CLOSURE_MAX_SNAPSHOTS on the server; ask its operator "
            "to raise it, or split the file)")
    if total > settings.max_input_gb * 2**30:
        raise InputTooLargeError(
            f"{label}: its variables declare {total / 2**30:.1f} GiB, over this server's limit "
            f"of {settings.max_input_gb:g} GiB (CLOSURE_MAX_INPUT_GB on the server; ask its "
            "operator to raise it, or split the file)")
    return sizes


# --------------------------------------------------------------------------- fields

def describe_fields(path: Path, variables: dict | None = None, scalars: Sequence[str] = (),
                    periodic: bool = True, **options) -> dict:
    """Open ``path`` with closure.io.open_fields (raising InputFileError with what is wrong)
    and describe it: grid, number of snapshots, velocity components and scalars. Reads the
    header and coordinates only. ``options``: open_fields' group, mask, levels and spacing."""
    from closure.io import open_fields
    from closure.products import open_coarse_input

    coarse = open_coarse_input(path) if isinstance(path, Path) and path.is_file() else None
    if coarse is not None:  # a coarse product read for discovery: its fine grid decides
        with coarse:
            return {"grid": coarse.coarse_graining.fine.to_dict(),
                    "n_snapshots": int(coarse.n_snapshots), "velocity": list(coarse.velocity),
                    "scalars": list(coarse.scalars)}
    with open_fields(path, variables=variables or None, scalars=tuple(scalars),
                     periodic=periodic, **options) as src:
        return {"grid": src.grid.to_dict(), "n_snapshots": int(src.n_snapshots),
                "velocity": list(src.velocity), "scalars": list(src.scalars)}


def _as_dataset(exc: UserError, path: Path, dataset_id: str) -> UserError:
    """The error with the store's path of a dataset replaced by its id."""
    text = str(exc).replace(str(path), f"dataset {dataset_id}")
    return type(exc)(text)


# --------------------------------------------------------------------------- library

def library_refused(raw: str) -> str:
    """The one answer to a library that is neither a preset nor a readable terms file under
    the data roots, whatever the reason (missing, unreadable, outside, not a terms file), so
    the answer tells nothing about files the caller may not read."""
    from closure.library_compressible import every_preset

    presets = every_preset()
    shown = raw if len(raw) <= 200 else raw[:200] + "..."
    return (f"library {shown!r} is not a preset ({', '.join(presets)}) nor a readable terms "
            "file (.json, .yaml) under the server's data roots: give a preset, the term "
            "definitions inline (the terms file's content as JSON), or a terms file under a "
            "data root")


def resolve_library(spec: JobSpec, roots: Sequence[Path], dims: Sequence[str]):
    """The spec's library as the workers may take it: a preset name or inline definitions.
    A terms file named by path must lie under the data roots; it is read here and its
    content put inline, so no worker ever reads a library file. Any failure to read or parse
    it answers :func:`library_refused`, never quoting the file."""
    from closure.library import terms_from_inline
    from closure.library_compressible import every_preset

    lib = spec.library
    if not isinstance(lib, str) or lib in every_preset():
        return lib
    check_path_text(lib, "library")
    try:
        path = resolve_under_roots(lib, roots, "library")
        if path.suffix.lower() not in TERMS_SUFFIXES or path.stat().st_size > MAX_TERMS_FILE:
            raise OptionError("not a terms file")
        text = path.read_text(encoding="utf-8")
        if path.suffix.lower() == ".json":
            data = json.loads(text)
        else:
            import yaml

            data = yaml.safe_load(text)
        data = json.loads(json.dumps(data))  # plain JSON types only
        scalars = list(spec.input.scalars)
        if spec.target.startswith("flux:"):
            scalars.append(spec.target.split(":", 1)[1])
        terms_from_inline(data, spec.target, tuple(dims), tuple(dict.fromkeys(scalars)))
    except Exception:  # noqa: BLE001 - one answer for every reason, on purpose
        raise OptionError(library_refused(lib)) from None
    return data


# --------------------------------------------------------------------------- the job's input

def _one_plain_file(raw, roots: Sequence[Path]) -> bool:
    """Whether ``input.path`` names one plain file (no list, no pattern, no folder)."""
    import glob

    if not isinstance(raw, str) or glob.has_magic(raw) or "\x00" in raw:
        return False
    p = Path(raw)
    try:
        return not any((p if p.is_absolute() else Path(r) / p).is_dir() for r in roots)
    except OSError:
        return True  # resolve_under_roots gives the answer

def resolve_input(spec: JobSpec, store: Store, settings) -> tuple[JobSpec, dict]:
    """The spec the workers run (``input.path`` absolute, no dataset id, the library a preset
    or inline) and the dataset record of its input. The file's header is checked against the
    size limits and the spec's options here (no field values read), so a missing variable,
    a ratio the grid cannot take or an oversized file is answered at submission."""
    from closure import pipeline
    from closure.grid import Grid

    roots = settings.data_roots
    inp = spec.input
    options = {"group": inp.group, "mask": inp.mask, "levels": inp.levels,
               "spacing": inp.spacing}
    time_dim = inp.variables.get("time", "time")
    if isinstance(inp.dataset_id, list):  # several uploads read as one input, in time order
        from closure.io import input_sha256

        paths, records = [], []
        for did in inp.dataset_id:
            if "\x00" in did or len(did) > 64:
                raise OptionError("input.dataset_id: give dataset ids from POST /datasets")
            one = store.get_dataset(did)
            p = Path(one["path"])
            if not p.is_file():
                raise InputFileError(f"dataset {did}: its file is gone from the store; upload "
                                     "it again")
            try:
                check_declared_sizes(p, f"dataset {did}", settings, time_dim)
            except UserError as exc:
                raise _as_dataset(exc, p, did) from None
            paths.append(p)
            records.append(one)
        try:
            info = describe_fields(paths, inp.variables, inp.scalars, inp.periodic, **options)
        except UserError as exc:
            text = str(exc)
            for p, one in zip(paths, records, strict=True):
                text = text.replace(str(p), f"dataset {one['id']}")
            raise type(exc)(text) from None
        ds = store.add_dataset(sha256=input_sha256(paths), path=paths[0], source="datasets",
                               size=sum(int(r["size"]) for r in records),
                               mtime_ns=max(int(r["mtime_ns"] or 0) for r in records),
                               grid=info["grid"], n_snapshots=info["n_snapshots"],
                               variables=inp.variables)
        path = [os.fspath(p) for p in paths]
    elif inp.dataset_id is not None:
        if "\x00" in inp.dataset_id or len(inp.dataset_id) > 64:
            raise OptionError("input.dataset_id: give a dataset id from POST /datasets")
        ds = store.get_dataset(inp.dataset_id)
        path = Path(ds["path"])
        if not path.is_file():
            raise InputFileError(f"dataset {inp.dataset_id}: its file is gone from the store; "
                                 "upload it again")
        try:
            check_declared_sizes(path, f"dataset {ds['id']}", settings, time_dim)
            info = describe_fields(path, inp.variables, inp.scalars, inp.periodic, **options)
        except UserError as exc:
            raise _as_dataset(exc, path, ds["id"]) from None
    elif _one_plain_file(inp.path, roots):
        path = resolve_under_roots(inp.path, roots)
        check_declared_sizes(path, f"input.path {inp.path!r}", settings, time_dim)
        info = describe_fields(path, inp.variables, inp.scalars, inp.periodic, **options)
        st = path.stat()
        ds = store.dataset_by_path(path, st.st_size, st.st_mtime_ns)
        if ds is None:
            from closure.io import sha256_file

            ds = store.add_dataset(sha256=sha256_file(path), path=path, source="path",
                                   size=st.st_size, mtime_ns=st.st_mtime_ns, grid=info["grid"],
                                   n_snapshots=info["n_snapshots"], variables=inp.variables)
    else:  # several files, a glob, a folder or a Zarr store: every one under the roots
        from closure.io import _store_files, input_sha256

        paths = resolve_inputs_under_roots(inp.path, roots)
        for p in paths:
            check_declared_sizes(p, f"input.path {p.name!r}", settings, time_dim)
        info = describe_fields(paths, inp.variables, inp.scalars, inp.periodic, **options)
        files = [f for p in paths for f in _store_files(p)]
        stats = [f.stat() for f in files]
        ds = store.add_dataset(sha256=input_sha256(paths), path=paths[0], source="paths",
                               size=sum(st.st_size for st in stats),
                               mtime_ns=max(st.st_mtime_ns for st in stats),
                               grid=info["grid"], n_snapshots=info["n_snapshots"],
                               variables=inp.variables)
        path = [os.fspath(p) for p in paths] if len(paths) > 1 else paths[0]
    if inp.snapshots:
        bad = sorted({i for i in inp.snapshots if i >= info["n_snapshots"]})
        if bad:
            shown = ", ".join(map(str, bad[:10])) + (f" and {len(bad) - 10} more"
                                                    if len(bad) > 10 else "")
            raise InputFileError(f"input.snapshots: {shown} out of range; the file has "
                                 f"{info['n_snapshots']} snapshots (0..{info['n_snapshots'] - 1})")
    grid = Grid.from_dict(info["grid"])
    run_input = inp.model_copy(update={"path": path if isinstance(path, list)
                                       else os.fspath(path), "dataset_id": None,
                                       "sha256": None})
    if getattr(spec, "kind", "discover") != "discover":  # coarse-graining: no library, no fit
        return spec.model_copy(update={"input": run_input}), ds
    library = resolve_library(spec, roots, grid.dims)
    run_spec = spec.model_copy(update={"input": run_input, "library": library})
    try:
        pipeline.check_options(run_spec, grid, info["velocity"], info["n_snapshots"])
        if isinstance(path, Path) and path.is_file():
            from closure.products import check_coarse_input, open_coarse_input

            coarse = open_coarse_input(path)
            if coarse is not None:  # a product: the job's filter must be the one it was made with
                with coarse:
                    check_coarse_input(coarse, pipeline._coarse_graining(run_spec, grid))
    except UserError as exc:
        if isinstance(inp.dataset_id, str):
            raise _as_dataset(exc, path, ds["id"]) from None
        raise
    return run_spec, ds
