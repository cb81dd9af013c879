"""Coarse-grained data products: plan, write one snapshot's pieces, assemble the product file.

A coarse-graining job (:class:`closure.spec.CoarseGrainSpec`) runs as plan -> map -> reduce:

* :func:`plan` checks the input and every filter setting against the data and resolves what
  the pieces and the assembly need (plain JSON types);
* :func:`write_pieces` coarse-grains one snapshot for every setting and writes one small
  netCDF file per setting with :class:`closure.io.CoarseWriter` (atomic: temp file + rename),
  so a re-run overwrites a piece with identical bits;
* :func:`assemble` concatenates the pieces in snapshot order into one CF-1.8 file.

The product file is what ``closure coarse-grain`` writes, variable for variable and bit for
bit in float64 (only ``history`` and the added ``closure_product*``, ``closure_setting*``,
``closure_snapshots`` and ``closure_dtype`` attributes differ). With
several settings the root group holds the first setting and the groups ``setting_0``,
``setting_1``, ... hold each setting (the first twice), so ``xarray.open_dataset(path)``
opens the first setting and ``xarray.open_dataset(path, group="setting_1")`` any other; the
root attribute ``closure_settings`` lists the groups and their filters. Groups, rather than
a ``filter_width`` dimension, because settings with different ratios have different coarse
grids, and one layout serves every combination.

With ``format: "zarr"`` the product is one file too: a zip of a Zarr (v3) store, the layout
:class:`zarr.storage.ZipStore` reads, with the same groups, variables, attributes and values
(bit for bit) as the netCDF product; it is converted from the assembled netCDF file in blocks
of snapshots, so memory stays bounded. Open either with :func:`open_product`, or a Zarr
product with ``xr.open_zarr(zarr.storage.ZipStore(path, mode="r"), group="setting_1")``.

Pure functions of files: no Redis, no store.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path

import netCDF4
import numpy as np

from closure.errors import UserError
from closure.spec import CoarseGrainSpec

#: group name of setting k in a product with several settings
GROUP = "setting_{}"
PRODUCT_FILE_KIND = "closure coarse-grained product"
#: file name suffix and media type of each product format (downloads)
SUFFIX = {"netcdf": ".nc", "zarr": ".zarr.zip"}
MEDIA_TYPE = {"netcdf": "application/x-netcdf", "zarr": "application/zip"}
#: snapshots per block when converting to Zarr (memory: one block of one group's variables)
ZARR_BLOCK = 16


def _no_progress(phase: str, done: int, total: int) -> None:
    pass


# --------------------------------------------------------------------------- what to compute

def wanted_variables(targets: Sequence[str] | None, transfers: Sequence[str] | None,
                     dims: Sequence[str], scalars: Sequence[str]) -> list[str]:
    """Target variable names (closure.residuals.target_names) for the spec's ``targets``
    (stress, force, vorticity, flux:NAME; None: all) and ``transfers`` (pi,
    enstrophy_transfer; None: all on this grid)."""
    from closure.residuals import directions, stress_names, target_names

    dims = tuple(dims)
    every = target_names(dims, scalars)
    dirs = directions(dims)
    two_d = dims == ("y", "x")
    transfer_names = [t for t in ("pi", "enstrophy_transfer") if t in every]
    if targets is None:
        terms = [t for t in every if t not in transfer_names]
    else:
        terms = []
        for t in targets:
            if t == "stress":
                terms += stress_names(dims)
            elif t == "force":
                terms += [f"force_{i}" for i in dirs]
            elif t == "vorticity":
                if not two_d:
                    raise UserError(f"target vorticity needs 2-D (y, x) data; this grid is "
                                    f"{', '.join(dims)}: drop it from targets")
                terms.append("vorticity_forcing")
            else:  # flux:NAME (the spec checked the pattern)
                c = t.split(":", 1)[1]
                if c not in scalars:
                    raise UserError(f"target {t} needs the scalar {c!r} in input.scalars "
                                    f"(it has {', '.join(scalars) or 'none'})")
                terms += [f"flux_{c}_{j}" for j in dirs]
    if transfers is None:
        moved = transfer_names
    else:
        for t in transfers:
            if t not in transfer_names:
                raise UserError(f"transfer {t} needs 2-D (y, x) data; this grid is "
                                f"{', '.join(dims)}: drop it from transfers")
        moved = list(transfers)
    asked = set(terms) | set(moved)
    if not asked:
        raise UserError("nothing to compute: give at least one target or transfer")
    return [t for t in every if t in asked]


# --------------------------------------------------------------------------- plan

def _open(spec: CoarseGrainSpec):
    from closure.io import open_fields

    inp = spec.input
    if inp.path is None:
        raise UserError("input.path is not set (an uploaded dataset must be resolved to its "
                        "file first)")
    return open_fields(inp.path, inp.variables or None, tuple(inp.scalars), inp.periodic,
                       group=inp.group, mask=inp.mask, levels=inp.levels,
                       spacing=None if inp.spacing is None else list(inp.spacing))


def _coarse_grainings(plan: dict, grid):
    from closure.filters import make_coarse_graining

    return [make_coarse_graining(s["kind"], grid, int(s["ratio"]), s["width"], s["width_units"])
            for s in plan["settings"]]


def _plan(spec: CoarseGrainSpec, src) -> dict:
    from closure.filters import make_coarse_graining

    n = src.n_snapshots
    if src.levels is not None:
        raise UserError("input.levels: a coarse-graining product holds one grid; coarse-grain "
                        "a level stack with `closure coarse-grain --levels` (one file per "
                        "level), or submit one job per level")
    if spec.input.snapshots:
        bad = [i for i in spec.input.snapshots if i >= n]
        if bad:
            raise UserError(f"input.snapshots: {bad} out of range; the file has {n} snapshots "
                            f"(0..{n - 1})")
        indices = sorted(dict.fromkeys(int(i) for i in spec.input.snapshots))
    else:
        indices = list(range(n))
    settings, warnings = [], []
    for k, f in enumerate(spec.filters):
        try:
            cg = make_coarse_graining(f.kind, src.grid, f.ratio, f.width, f.width_units)
        except UserError as exc:
            raise UserError(f"filters[{k}]: {exc}") from None
        warnings += [f"filters[{k}]: {w}" for w in cg.warnings()]
        settings.append({"kind": f.kind, "ratio": int(f.ratio), "width": f.width,
                         "width_units": f.width_units, "coarse_shape": list(cg.coarse.shape),
                         "group": GROUP.format(k), "describe": cg.describe()})
    variables = wanted_variables(spec.targets, spec.transfers, src.grid.dims, src.scalars)
    return {
        "kind": "coarse-grain",
        "input": {"path": str(src.path), "paths": [str(p) for p in src.paths],
                  "variables": dict(spec.input.variables),
                  "scalars": list(src.scalars), "periodic": bool(spec.input.periodic),
                  "options": {"group": spec.input.group, "mask": spec.input.mask,
                              "levels": None if src.levels is None else list(src.levels),
                              "spacing": None if spec.input.spacing is None
                              else list(spec.input.spacing)}},
        "grid": src.grid.to_dict(),
        "snapshots": indices,
        "settings": settings,
        "targets": variables,
        "dtype": spec.dtype,
        "format": spec.format,
        "warnings": warnings,
    }


def check(spec: CoarseGrainSpec) -> dict:
    """Check the spec against its input file (filters, ratios, targets, snapshots) without
    hashing the file; returns the plan without ``source``. UserError on a bad option."""
    with _open(spec) as src:
        return _plan(spec, src)


def plan(spec: CoarseGrainSpec) -> dict:
    """:func:`check`, plus the input's provenance (``source``: path, SHA-256, names, units),
    which every piece records."""
    with _open(spec) as src:
        p = _plan(spec, src)
        p["source"] = src.describe()  # hashes the file (once per job)
    p["sha256"] = p["source"]["sha256"]
    return _plain(p)


def _plain(obj):
    return json.loads(json.dumps(obj, default=lambda o: o.tolist() if hasattr(o, "tolist")
                                 else str(o)))


def open_planned(plan: dict):
    """The planned input file, opened as the plan read it (with the input options)."""
    from closure.io import open_fields

    inp = plan["input"]
    opts = inp.get("options") or {}
    return open_fields(inp.get("paths") or inp["path"], inp.get("variables") or None,
                       tuple(inp.get("scalars") or ()), bool(inp.get("periodic", True)),
                       group=opts.get("group"), mask=opts.get("mask"),
                       levels=opts.get("levels"), spacing=opts.get("spacing"))


# --------------------------------------------------------------------------- map: pieces

def piece_path(folder: str | os.PathLike, setting: int, index: int) -> Path:
    """Where the piece of snapshot ``index`` for setting ``setting`` lives under ``folder``."""
    return Path(folder) / f"{int(setting)}" / f"{int(index):06d}.nc"


def write_pieces(plan: dict, index: int, folder: str | os.PathLike, source=None,
                 coarse_grainings=None) -> list[Path]:
    """Coarse-grain snapshot ``index`` for every planned setting; write each as a one-snapshot
    coarse file (closure.io.CoarseWriter, renamed into place). Returns the piece paths.

    ``source`` is the open input (closure.io.FieldSource) to reuse; ``coarse_grainings`` the
    settings' CoarseGraining objects to reuse (built from the plan when None).
    """
    from closure.io import CoarseWriter
    from closure.residuals import coarse_grain_snapshot

    own = source is None
    src = open_planned(plan) if own else source
    try:
        cgs = coarse_grainings or _coarse_grainings(plan, src.grid)
        snap = src.snapshot(int(index))
        out = []
        for k, cg in enumerate(cgs):
            cs = coarse_grain_snapshot(snap, cg, src.scalars, plan["targets"])
            path = piece_path(folder, k, index)
            path.parent.mkdir(parents=True, exist_ok=True)
            with CoarseWriter(path, plan["source"]) as w:
                w.append(cs)
            out.append(path)
        return out
    finally:
        if own:
            src.close()


def missing_pieces(plan: dict, folder: str | os.PathLike) -> list[int]:
    """Snapshot indices with at least one piece missing."""
    n = len(plan["settings"])
    return [i for i in plan["snapshots"]
            if not all(piece_path(folder, k, i).exists() for k in range(n))]


# --------------------------------------------------------------------------- reduce: assemble

def _copy_structure(src: netCDF4.Dataset, dst, dtype: str) -> list[str]:
    """Dimensions, variables (same compression and chunks; fields and terms as ``dtype``),
    variable attributes and the constant variables; returns the time-dependent names."""
    for name, dim in src.dimensions.items():
        dst.createDimension(name, None if dim.isunlimited() else len(dim))
    timed = []
    for name, var in src.variables.items():
        kind = var.dtype
        if dtype == "float32" and "closure_role" in var.ncattrs():
            kind = np.dtype("f4")
        filters = var.filters() or {}
        chunking = var.chunking()
        new = dst.createVariable(
            name, kind, var.dimensions, zlib=bool(filters.get("zlib")),
            complevel=int(filters.get("complevel") or 4), shuffle=bool(filters.get("shuffle")),
            fletcher32=bool(filters.get("fletcher32")),
            chunksizes=None if chunking == "contiguous" else chunking)
        new.setncatts({a: var.getncattr(a) for a in var.ncattrs()})
        if "time" in var.dimensions:
            timed.append(name)
        else:
            new[...] = var[...]
    return timed


def assemble(plan: dict, folder: str | os.PathLike, output: str | os.PathLike,
             attrs: dict | None = None,
             progress: Callable[[str, int, int], None] = _no_progress) -> Path:
    """Concatenate the pieces under ``folder`` into the product file ``output`` (written to a
    temporary name beside it and renamed into place), in the plan's ``format`` (netcdf, or
    zarr: the netCDF file converted to a zipped Zarr store). ``attrs`` are added to the root's
    global attributes (product id, job id ...). Raises UserError naming missing pieces."""
    if plan.get("format", "netcdf") != "zarr":
        return _assemble_netcdf(plan, folder, output, attrs, progress)
    output = Path(output)
    output.parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{output.name}.", dir=output.parent))
    try:
        nc = _assemble_netcdf(plan, folder, work / "product.nc", attrs, progress)
        groups = [None] + ([s["group"] for s in plan["settings"]]
                           if len(plan["settings"]) > 1 else [])
        return netcdf_to_zarr_zip(nc, output, groups, progress=progress)
    finally:
        shutil.rmtree(work, ignore_errors=True)


def _assemble_netcdf(plan: dict, folder: str | os.PathLike, output: str | os.PathLike,
                     attrs: dict | None = None,
                     progress: Callable[[str, int, int], None] = _no_progress) -> Path:
    missing = missing_pieces(plan, folder)
    if missing:
        raise UserError(f"pieces missing for snapshots {missing[:10]}"
                        + (f" (and {len(missing) - 10} more)" if len(missing) > 10 else ""))
    output = Path(output)
    output.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{output.name}.", suffix=".tmp", dir=output.parent)
    os.close(fd)
    settings = plan["settings"]
    dtype = plan.get("dtype", "float64")
    n_set = len(settings)
    layout = [(None, 0)] + ([(s["group"], k) for k, s in enumerate(settings)]
                            if n_set > 1 else [])
    total = len(layout) * len(plan["snapshots"])
    done = 0
    try:
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as out:
            out.set_auto_mask(False)
            for group, k in layout:
                pieces = [piece_path(folder, k, i) for i in plan["snapshots"]]
                dst = out if group is None else out.createGroup(group)
                with netCDF4.Dataset(pieces[0]) as first:
                    first.set_auto_mask(False)
                    timed = _copy_structure(first, dst, dtype)
                    gattrs = {a: first.getncattr(a) for a in first.ncattrs()}
                dst.set_auto_mask(False)
                for start in range(0, len(pieces), 16):
                    _fill_at(dst, pieces, start, timed, dtype)
                    done += len(pieces[start:start + 16])
                    progress("assemble", done, total)
                gattrs["closure_product"] = PRODUCT_FILE_KIND
                gattrs["closure_setting"] = k
                gattrs["closure_snapshots"] = len(pieces)
                gattrs["closure_dtype"] = dtype
                if group is None:
                    gattrs.update(attrs or {})
                    if n_set > 1:
                        gattrs["closure_settings"] = json.dumps(
                            [{"group": s["group"], "kind": s["kind"], "ratio": s["ratio"],
                              "width": s["width"], "width_units": s["width_units"]}
                             for s in settings])
                dst.setncatts(gattrs)
        from closure.atomic import ordinary_mode

        ordinary_mode(tmp)
        os.replace(tmp, output)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return output


def _fill_at(dst, pieces: Sequence[Path], start: int, timed: Sequence[str], dtype: str) -> None:
    """Fill time rows ``start`` .. from the pieces (one snapshot each)."""
    for offset, path in enumerate(pieces[start:start + 16]):
        with netCDF4.Dataset(path) as p:
            p.set_auto_mask(False)
            if len(p.dimensions["time"]) != 1:
                raise ValueError(f"{path}: a piece holds one snapshot")
            for name in timed:
                values = p[name][...]
                if dst[name].dtype == np.dtype("f4") and values.dtype != np.float32:
                    values = values.astype(np.float32)
                dst[name][start + offset:start + offset + 1, ...] = values


def coarse_grain_product(spec: CoarseGrainSpec, output: str | os.PathLike,
                         attrs: dict | None = None,
                         progress: Callable[[str, int, int], None] = _no_progress) -> Path:
    """The whole job in one process (plan, every snapshot's pieces, assembly): the
    reference the queued product is checked against."""
    p = plan(spec)
    work = Path(tempfile.mkdtemp(prefix=".pieces-", dir=Path(output).parent))
    try:
        with open_planned(p) as src:
            cgs = _coarse_grainings(p, src.grid)
            for n, i in enumerate(p["snapshots"]):
                write_pieces(p, i, work, source=src, coarse_grainings=cgs)
                progress("coarse-grain", n + 1, len(p["snapshots"]))
        return assemble(p, work, output, attrs, progress)
    finally:
        shutil.rmtree(work, ignore_errors=True)


# --------------------------------------------------------------------------- Zarr

def netcdf_to_zarr_zip(source: str | os.PathLike, output: str | os.PathLike,
                       groups: Sequence[str | None] = (None,), block: int = ZARR_BLOCK,
                       progress: Callable[[str, int, int], None] = _no_progress) -> Path:
    """Copy the netCDF groups ``groups`` (None: the root) of ``source`` into a zipped Zarr v3
    store ``output``: same variables, dimensions, attributes (read undecoded, so written as
    they are) and values, and the netCDF chunks; consolidated metadata at the root. Written
    ``block`` snapshots at a time to a store folder beside ``output``, zipped (stored, not
    recompressed: the chunks are compressed already) to a temporary name and renamed."""
    import warnings
    import zipfile

    import xarray as xr
    import zarr

    output = Path(output)
    output.parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{output.name}.", dir=output.parent))
    folder = work / "store"
    try:
        for k, group in enumerate(groups):
            with xr.open_dataset(source, group=group, decode_cf=False) as ds:
                encoding = {}
                for name, var in ds.variables.items():
                    chunks = var.encoding.get("chunksizes")
                    encoding[name] = {"chunks": tuple(int(c) for c in chunks)} if chunks else {}
                n = ds.sizes.get("time", 0)
                for start in range(0, max(n, 1), block):
                    part = ds.isel(time=slice(start, start + block)) if n else ds
                    part = part.load()
                    for var in part.variables.values():
                        var.encoding = {}
                    if start == 0:
                        part.to_zarr(folder, group=group, mode="w" if k == 0 else "a",
                                     zarr_format=3, consolidated=False, encoding=encoding)
                    else:
                        part = part.drop_vars([v for v, var in part.variables.items()
                                               if "time" not in var.dims])
                        part.to_zarr(folder, group=group, append_dim="time",
                                     consolidated=False)
                    progress("zarr", k * max(n, 1) + min(start + block, max(n, 1)),
                             len(groups) * max(n, 1))
        with warnings.catch_warnings():
            # consolidated metadata is a zarr-python extension of Zarr 3; xarray reads it
            warnings.filterwarnings("ignore", message="Consolidated metadata",
                                    category=UserWarning)
            zarr.consolidate_metadata(str(folder))
        tmp = work / "product.zip"
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED, allowZip64=True) as z:
            for root, dirs, files in os.walk(folder):
                dirs.sort()
                for name in sorted(files):
                    path = Path(root) / name
                    z.write(path, path.relative_to(folder).as_posix())
        from closure.atomic import ordinary_mode

        ordinary_mode(tmp)
        os.replace(tmp, output)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return output


def product_format(path: str | os.PathLike) -> str:
    """``"zarr"`` for a zipped Zarr store, ``"netcdf"`` otherwise."""
    import zipfile

    return "zarr" if zipfile.is_zipfile(path) else "netcdf"


def open_product(path: str | os.PathLike, group: str | None = None):
    """A product file (netCDF, or a zipped Zarr store) opened with xarray: the root (the first
    setting) or ``group`` (``setting_0``, ``setting_1`` ...). A Zarr product opens as
    ``xr.open_zarr(zarr.storage.ZipStore(path, mode="r"), group=group)`` does; UserError for a
    missing file or group."""
    import xarray as xr

    path = Path(path)
    if not path.is_file():
        raise UserError(f"no product file {path}")
    if product_format(path) == "zarr":
        from zarr.storage import ZipStore

        store = ZipStore(path, mode="r")
        try:
            return xr.open_zarr(store, group=group, chunks=None)
        except (KeyError, FileNotFoundError) as exc:  # zarr's NodeNotFoundError is one
            store.close()
            raise UserError(f"{path} has no group {group!r} ({exc}); a product's groups are "
                            "listed in its root attribute closure_settings") from None
    try:
        return xr.open_dataset(path, group=group)
    except OSError as exc:
        raise UserError(f"{path}: cannot open group {group!r} ({exc}); a product's groups "
                        "are listed in its root attribute closure_settings") from None


# --------------------------------------------------------------------------- discovery input

def open_coarse_input(path: str | os.PathLike):
    """The coarse file at ``path`` (a product, or what ``closure coarse-grain`` writes)
    opened with :func:`closure.io.open_coarse` (a product's root group: its first setting);
    None when the file is not a coarse file (then it holds fine-grid fields)."""
    from closure.io import COARSE_FILE_KIND, open_coarse

    if Path(path).is_file() and product_format(path) == "zarr":
        raise UserError(f"{path} is a Zarr product (a zipped Zarr store); discovery reads "
                        "netCDF products: make the product with format netcdf, or discover "
                        "from the fine data")
    try:
        with netCDF4.Dataset(path) as nc:
            kind = getattr(nc, "closure_file", None)
    except OSError:
        return None  # not netCDF: the fine-grid reader gives the message
    return open_coarse(path) if kind == COARSE_FILE_KIND else None


def check_coarse_input(src, cg) -> None:
    """UserError unless the coarse file ``src`` was made by the coarse-graining ``cg`` (the
    job's filter), so that discovery from it equals discovery from the fine data."""
    made = src.coarse_graining
    same = made.kind == cg.kind and made.ratio == cg.ratio and \
        np.allclose(made.widths, cg.widths, rtol=1e-9, atol=0) and \
        made.fine.shape == cg.fine.shape
    if not same:
        cells = ", ".join(f"{w / h:g}" for w, h in zip(made.widths, made.fine.spacing,
                                                       strict=True))
        raise UserError(
            f"{src.path} holds data coarse-grained with the {made.kind} filter, ratio "
            f"{made.ratio}, width {cells} grid spacings (a product's first setting), not the "
            f"job's {cg.kind} filter, ratio {cg.ratio}: set filter.kind, filter.ratio and "
            "filter.width to match, or use a product made with the job's filter")


def coarse_input_snapshot(src, index: int, components: Sequence[str]):
    """Snapshot ``index`` (its position in the coarse file) of a coarse input, with the
    targets ``components`` (UserError naming a missing one). Its ``index`` is the position,
    as the plan counts snapshots."""
    import dataclasses

    cs = src.snapshot(int(index))
    missing = [c for c in components if c not in cs.targets]
    if missing:
        raise UserError(f"{src.path} has no {', '.join(missing)} (it has "
                        f"{', '.join(cs.targets) or 'no targets'}): make a product with this "
                        "target, or discover from the fine data")
    return dataclasses.replace(cs, index=int(index))
