"""Reading fields from user files and writing our own files.

This is the only module that knows file formats. Input files are opened read-only and never
written; every file we write goes to a temporary name in the target folder and is renamed into
place, so a reader never sees a half-written file.

Input layout: netCDF (or Zarr) variables with dimensions ``(time, [z,] [y,] x)`` (an input
without a ``time`` dimension holds one snapshot), in one file, several files (a list, a glob or
a folder; ordered by time), a netCDF-4 group or a Zarr store. Velocity components are read as
``u, v, w``, the names given in ``variables``, or by CF standard name; scalars by name.
Dimensions are ours by name, by mapping or by their coordinate's CF ``axis``. Grid spacing
comes from the coordinate variables, which must be uniformly spaced to the precision they are
stored in, or from ``spacing``; without either the spacing is 1 (grid index) with a warning.
A level stack (``levels``) reads each z level as a grid of its own. NaN, fill values and a mask
variable mark land (``Snapshot.mask``). Fields are loaded one snapshot at a time (no dask).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import glob
import hashlib
import os
import tempfile
import threading
import warnings
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import netCDF4
import numpy as np
import xarray as xr

from closure.atomic import ordinary_mode
from closure.errors import InputFileError, UserError
from closure.fields import CoarseSnapshot, Snapshot  # re-exported: the types live there
from closure.filters import CoarseGraining
from closure.grid import DIRECTION_OF, SPATIAL_DIMS, VELOCITY_OF, Grid

TIME = "time"
#: relative tolerance on the spacing of a coordinate for it to count as uniform
UNIFORM_RTOL = 1e-6
#: the value of the global attribute ``closure_file`` in coarse files we write
COARSE_FILE_KIND = "coarse-grained fields and exact subgrid terms"


def sha256_file(path: str | os.PathLike, chunk_size: int = 1 << 20,
                cancel: threading.Event | None = None) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks (constant memory).

    ``cancel``: an event another thread may set to stop early (raises InterruptedError).
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while block := fh.read(chunk_size):
                if cancel is not None and cancel.is_set():
                    raise InterruptedError(f"hashing {path} was cancelled")
                h.update(block)
    except FileNotFoundError:
        raise InputFileError(f"no such file: {path}") from None
    return h.hexdigest()


# ---------------------------------------------------------------------------------------------
# reading


#: HDF5 chunk cache per variable of the files we read (bytes). Each chunk (one snapshot of a
#: field) is read once, so a cache only holds memory: netCDF's default (64 MiB per variable)
#: keeps the last few snapshots of every field resident, and a job's memory grows with the
#: number of snapshots until the caches fill. Chunks larger than this bypass the cache.
CHUNK_CACHE_BYTES = 1 << 20

#: file name endings taken as netCDF when a folder or glob is given
NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf", ".h5", ".hdf5")

#: CF standard names of velocity components (CF standard name table), by our name. Looked up
#: only when the short name (or --var) does not find the variable.
STANDARD_NAMES = {
    "u": ("sea_water_x_velocity", "eastward_sea_water_velocity",
          "baroclinic_eastward_sea_water_velocity", "barotropic_eastward_sea_water_velocity",
          "x_wind", "eastward_wind", "x_velocity"),
    "v": ("sea_water_y_velocity", "northward_sea_water_velocity",
          "baroclinic_northward_sea_water_velocity", "barotropic_northward_sea_water_velocity",
          "y_wind", "northward_wind", "y_velocity"),
    "w": ("upward_sea_water_velocity", "sea_water_z_velocity", "upward_air_velocity",
          "z_wind", "upward_wind", "z_velocity"),
}
#: coordinate ``axis`` attributes and standard names that identify our dimensions
_AXIS_OF = {"X": "x", "Y": "y", "Z": "z", "T": TIME}
_DIM_STANDARD_NAMES = {
    "projection_x_coordinate": "x", "grid_longitude": "x",
    "projection_y_coordinate": "y", "grid_latitude": "y",
    "depth": "z", "height": "z", "altitude": "z", "height_above_reference_ellipsoid": "z",
    "model_level_number": "z", "time": TIME,
}


def _is_zarr(path: Path) -> bool:
    return path.is_dir() and (path.suffix == ".zarr" or any(
        (path / m).exists() for m in (".zgroup", ".zarray", ".zmetadata", "zarr.json")))


def input_files(paths: str | os.PathLike | Sequence[str | os.PathLike],
                base: str | os.PathLike | None = None) -> list[Path]:
    """The inputs a path option names, in order: files, Zarr stores (folders) and the
    netCDF files (``*.nc``, ``*.nc4``, ...) of a plain folder, globs expanded (sorted).

    ``paths`` is one string or a list; relative entries are taken from ``base`` (default: the
    working folder). InputFileError when an entry matches nothing. A service must check that
    every returned path lies under its data roots before opening them.
    """
    items = [paths] if isinstance(paths, str | os.PathLike) else list(paths)
    if not items:
        raise InputFileError("no input given: give a netCDF file, several files, a glob, a "
                             "folder or a Zarr store")
    out: list[Path] = []
    for item in items:
        if not isinstance(item, str | os.PathLike) or not str(item):
            raise InputFileError(f"an input path must be a non-empty string, got {item!r}")
        p = Path(item).expanduser()
        if base is not None and not p.is_absolute():
            p = Path(base) / p
        if glob.has_magic(str(p)):
            found = sorted(Path(m) for m in glob.glob(str(p)))
            found = [m for m in found if m.is_file() or _is_zarr(m)]
            if not found:
                raise InputFileError(f"no file matches {item!r}: check the pattern (quote it "
                                     "so the shell does not expand it)")
            out += found
        elif _is_zarr(p) or p.is_file():
            out.append(p)
        elif p.is_dir():
            found = sorted(m for m in p.iterdir()
                           if m.is_file() and m.suffix.lower() in NETCDF_SUFFIXES)
            if not found:
                raise InputFileError(f"the folder {p} holds no netCDF files "
                                     f"({', '.join('*' + s for s in NETCDF_SUFFIXES)}) and is "
                                     "not a Zarr store: give the files or a glob")
            out += found
        else:
            raise InputFileError(f"no such file: {p}: check the path")
    unique = list(dict.fromkeys(out))
    return unique


def _store_files(path: Path) -> list[Path]:
    """The files of one input (itself, or every file of a Zarr store), sorted."""
    if path.is_dir():
        return sorted(p for p in path.rglob("*") if p.is_file())
    return [path]


def input_sha256(paths: Sequence[str | os.PathLike],
                 cancel: threading.Event | None = None) -> str:
    """SHA-256 of an input. One file: the file's own SHA-256 (``sha256sum``). Several files
    or a Zarr store: the SHA-256 of the sorted lines ``<sha256 of a file>`` (one per file;
    for files inside a Zarr store ``<store name>/<relative path> <sha256>``, since chunk names
    carry positions), joined by newlines. Renaming or reordering plain files keeps it; any
    byte changed in any file changes it."""
    paths = [Path(p) for p in paths]
    if len(paths) == 1 and not paths[0].is_dir():
        return sha256_file(paths[0], cancel=cancel)
    lines = []
    for p in paths:
        if p.is_dir():
            for f in _store_files(p):
                lines.append(f"{p.name}/{f.relative_to(p).as_posix()} "
                             f"{sha256_file(f, cancel=cancel)}")
        else:
            lines.append(sha256_file(p, cancel=cancel))
    return hashlib.sha256("\n".join(sorted(lines)).encode()).hexdigest()


def input_stamps(paths: Sequence[str | os.PathLike]) -> list[dict]:
    """Size and modification time of every file of an input (to detect changes cheaply)."""
    out = []
    for p in paths:
        for f in _store_files(Path(p)):
            st = f.stat()
            out.append({"path": str(f), "size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)})
    return out


def _open_netcdf(path: Path) -> netCDF4.Dataset:
    """The file opened read-only with a small chunk cache on every variable."""
    nc = netCDF4.Dataset(path, "r")
    if nc.data_model.startswith("NETCDF4"):  # classic files have no chunk cache
        for g in _walk_groups(nc):
            for var in g.variables.values():
                with contextlib.suppress(RuntimeError):
                    var.set_var_chunk_cache(size=CHUNK_CACHE_BYTES)
    return nc


def _walk_groups(g):
    yield g
    for child in g.groups.values():
        yield from _walk_groups(child)


def _group_paths(nc) -> list[str]:
    return [g.path for g in _walk_groups(nc) if g.path != "/" and g.variables]


def _parent_coords(nc, group: str, ds: xr.Dataset) -> xr.Dataset:
    """Coordinate variables of the group's dimensions defined in a parent group (netCDF-4
    groups inherit their parents' dimensions; xarray reads only the group itself)."""
    g = nc[group.strip("/")]
    found = {}
    parent = g.parent
    while parent is not None:
        for d in ds.dims:
            d = str(d)
            if d in ds.variables or d in found or d not in parent.variables:
                continue
            var = parent.variables[d]
            if var.dimensions == (d,):
                found[d] = (d, np.asarray(var[:]), {k: var.getncattr(k) for k in var.ncattrs()
                                                    if k != "_FillValue"})
        parent = parent.parent
    return ds.assign_coords(found) if found else ds


def _open_dataset(path: Path, group: str | None = None) -> xr.Dataset:
    if not path.exists():
        raise InputFileError(f"no such file: {path}: check the path")
    if _is_zarr(path):
        return _open_zarr(path, group)
    if path.is_dir():
        raise InputFileError(f"{path} is a folder: give a netCDF file")
    nc = None
    try:
        # our own handle (closed with the dataset), so xarray never reopens the file with the
        # default caches; cache=False keeps only the requested slice in memory
        nc = _open_netcdf(path)
        if group is not None:
            key = group.strip("/")
            try:
                nc[key] if key else nc
            except (IndexError, KeyError, OSError):
                known = ", ".join(_group_paths(nc)) or "none"
                nc.close()
                raise InputFileError(f"{path} has no group {group!r}; its groups with variables "
                                     f"are: {known}. Fix --group") from None
            ds = xr.open_dataset(xr.backends.NetCDF4DataStore(nc, group=key or None),
                                 decode_times=False, decode_timedelta=False, cache=False)
            return _parent_coords(nc, key, ds) if key else ds
        return xr.open_dataset(xr.backends.NetCDF4DataStore(nc), decode_times=False,
                               decode_timedelta=False, cache=False)
    except InputFileError:
        raise
    except Exception as exc:  # the netCDF library's OSError, or xarray's decoding errors
        if nc is not None and nc.isopen():
            nc.close()
        raise InputFileError(f"{path} could not be read as netCDF ({exc}): give a netCDF-3 or "
                             "netCDF-4 file or a Zarr store (convert other formats, e.g. with "
                             "xarray)") from None


def _open_zarr(path: Path, group: str | None) -> xr.Dataset:
    try:
        import zarr  # noqa: F401
    except ImportError:
        raise InputFileError(f"{path} is a Zarr store, which needs the zarr package: "
                             "pip install zarr") from None
    try:
        # chunks=None: lazy backend arrays without dask; a read loads just the slice asked.
        # Stores without consolidated metadata are common and open fine without it.
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*consolidated metadata",
                                    category=RuntimeWarning)
            return xr.open_zarr(path, group=group, chunks=None, decode_times=False,
                                decode_timedelta=False)
    except Exception as exc:
        where = f" group {group!r}" if group else ""
        raise InputFileError(f"{path}{where} could not be read as a Zarr store ({exc}): check "
                             "the path (and --group)") from None


def _rename_dims(ds: xr.Dataset, path: Path, variables: Mapping[str, str]) -> xr.Dataset:
    """Apply ``--var x=lon``-style mappings of dimension names."""
    rename = {}
    for ours in (TIME, *SPATIAL_DIMS):
        theirs = variables.get(ours)
        if theirs is None or theirs == ours:
            continue
        if theirs not in ds.dims:
            raise InputFileError(
                f"dimension {theirs!r} (given for {ours}) is not in {path}; its dimensions are "
                f"{', '.join(map(str, ds.dims)) or 'none'}")
        if ours in ds.dims or ours in ds.variables:
            raise InputFileError(f"{path} already has a {ours!r}; cannot rename {theirs!r} to it")
        rename[theirs] = ours
    return ds.rename(rename) if rename else ds


def _auto_dims(ds: xr.Dataset, variables: Mapping[str, str]) -> tuple[xr.Dataset, list[str]]:
    """Rename dimensions whose coordinate variable says what it is (CF ``axis`` X/Y/Z/T, or a
    standard name such as projection_x_coordinate or depth); explicit mappings come first."""
    rename, notes = {}, []
    taken = {str(d) for d in ds.dims} | {str(v) for v in ds.variables}
    for d in map(str, ds.dims):
        if d in (TIME, *SPATIAL_DIMS) or d in variables.values() or d not in ds.variables:
            continue
        attrs = ds[d].attrs
        ours = _AXIS_OF.get(str(attrs.get("axis", "")).upper()) or \
            _DIM_STANDARD_NAMES.get(str(attrs.get("standard_name", "")))
        if ours is None or ours in variables or ours in taken or ours in rename.values():
            continue
        rename[d] = ours
        how = (f"axis {attrs['axis']}" if "axis" in attrs
               else f"standard_name {attrs['standard_name']}")
        notes.append(f"dimension {d!r} read as {ours} ({how}); --var {ours}=NAME overrides")
    return (ds.rename(rename) if rename else ds), notes


def _file_name(ds: xr.Dataset, ours: str, variables: Mapping[str, str]) -> str | None:
    """The file's variable for our name: explicit mapping, same name, or a variable that a
    coarse file marked with ``closure_name``."""
    if ours in variables:
        return variables[ours] if variables[ours] in ds.data_vars else None
    if ours in ds.data_vars:
        return ours
    marked = [n for n, v in ds.data_vars.items() if v.attrs.get("closure_name") == ours]
    return str(marked[0]) if len(marked) == 1 else None


def _by_standard_name(ds: xr.Dataset, path: Path, ours: str) -> tuple[str, str] | None:
    """(file's name, standard name) of the velocity component ``ours`` found by its CF
    standard name; InputFileError when several variables match."""
    for std in STANDARD_NAMES.get(ours, ()):
        hits = [str(n) for n, v in ds.data_vars.items() if v.attrs.get("standard_name") == std]
        if len(hits) > 1:
            raise InputFileError(f"{path} has several variables with standard_name {std!r} "
                                 f"({', '.join(hits)}): choose one with --var {ours}=NAME")
        if hits:
            return hits[0], std
    return None


def _missing(path: Path, ds: xr.Dataset, ours: str, what: str,
             variables: Mapping[str, str], groups: Sequence[str] = ()) -> InputFileError:
    names = ", ".join(map(str, ds.data_vars)) or "none"
    hint = ""
    if not ds.data_vars and groups:
        hint = (f" (the file keeps its variables in groups: {', '.join(groups)}; choose one "
                "with --group PATH)")
    if ours in variables:
        return InputFileError(f"variable {variables[ours]!r} (given for {ours}, {what}) not "
                              f"found in {path}; the file's variables are: {names}{hint}. Fix "
                              f"--var {ours}=NAME")
    std = STANDARD_NAMES.get(ours)
    by_std = f" (nor a variable with standard_name {' / '.join(std[:2])}, ...)" if std else ""
    return InputFileError(f"variable {ours!r} ({what}) not found in {path}{by_std}; the file's "
                          f"variables are: {names}{hint}. Map it with --var {ours}=NAME")


def _uniform_tolerance(x: np.ndarray, h: float, dtype: np.dtype) -> float:
    """Allowed deviation of one coordinate step from the mean step.

    A step is the difference of two stored values, each rounded to the coordinate's own
    precision (half an ulp, ``eps/2 * |x|``), so round-off alone moves a step by up to
    ``eps * max|x|``; the mean step from the end points errs by ``eps * max|x| / (n - 1)``.
    Twice that budget covers the rounding of float32 coordinates written from float64 ones;
    below it, UNIFORM_RTOL of the step is kept for float64 coordinates.
    """
    eps = float(np.finfo(dtype).eps) if np.dtype(dtype).kind == "f" else 0.0
    n = x.size
    return max(UNIFORM_RTOL * abs(h), 2.0 * eps * float(np.max(np.abs(x))) * (1 + 1 / (n - 1)))


def _spacing(ds: xr.Dataset, path: Path, dim: str, n: int) -> tuple[float, float, str | None]:
    """(spacing, origin, units) of a spatial dimension from its coordinate variable."""
    if dim not in ds.variables:
        return 1.0, 0.0, None
    coord = ds[dim]
    if coord.dims != (dim,):
        raise InputFileError(f"coordinate {dim!r} in {path} has dims {coord.dims}; "
                             f"it must be 1-D along {dim}")
    if coord.dtype.kind not in "fiu":
        raise InputFileError(f"coordinate {dim!r} in {path} is not numeric ({coord.dtype})")
    x = np.asarray(coord.values, dtype=float)
    if not np.all(np.isfinite(x)):
        raise InputFileError(f"coordinate {dim!r} in {path} has NaN or Inf values: fix the "
                             "coordinate")
    if n < 2:
        raise InputFileError(f"dimension {dim!r} in {path} has {n} point; a grid direction needs "
                             "at least 2 points (drop the dimension from the file)")
    h = (x[-1] - x[0]) / (n - 1)
    steps = np.diff(x)
    if h <= 0 or np.any(steps <= 0):
        raise InputFileError(f"coordinate {dim!r} in {path} is not increasing: reverse that "
                             f"dimension (e.g. ds.isel({dim}=slice(None, None, -1))) first")
    tol = _uniform_tolerance(x, h, coord.dtype)
    bad = np.abs(steps - h) > tol
    if np.any(bad):
        i = int(np.argmax(bad))
        raise InputFileError(
            f"coordinate {dim!r} in {path} is not uniformly spaced (step {steps[i]:g} at index "
            f"{i}, mean step {h:g}, steps from {steps.min():g} to {steps.max():g}, tolerance "
            f"{tol:.3g} for {coord.dtype} values): closure needs a uniform rectilinear grid; "
            "interpolate the data to uniform spacing first, or give --spacing DX[,DY[,DZ]] "
            "to use the grid as uniform with that spacing")
    units = coord.attrs.get("units")
    return float(h), float(x[0]), (str(units) if units is not None else None)


def _is_degrees(units: str | None) -> bool:
    return units is not None and units.strip().lower().startswith("degree")


def _curvilinear(ds: xr.Dataset, dims: Sequence[str]) -> list[str]:
    """Names of multi-dimensional coordinate variables over the fields' spatial dims (the
    latitude/longitude arrays of a curvilinear grid)."""
    spatial = set(dims) - {TIME}
    out = []
    for name, var in ds.variables.items():
        if var.ndim < 2 or not set(map(str, var.dims)) <= spatial:
            continue
        std = str(var.attrs.get("standard_name", ""))
        units = str(var.attrs.get("units", ""))
        if std in ("latitude", "longitude") or _is_degrees(units) or \
                str(name).lower() in ("lat", "lon", "latitude", "longitude", "nav_lat",
                                      "nav_lon", "xlat", "xlong"):
            out.append(f"{name}({', '.join(map(str, var.dims))})")
    return out


def _curvilinear_error(path: Path, found: list[str]) -> InputFileError:
    return InputFileError(
        f"{path} has 2-D coordinates {', '.join(found)}: a curvilinear grid. closure supports "
        "rectilinear grids with uniform spacing only (latitude/longitude metrics are not "
        "supported yet): regrid the data to a uniform Cartesian grid first, or, where the grid "
        "spacing is close to uniform in metres, map the index dimensions with --var x=NAME "
        "--var y=NAME and give --spacing DX,DY (metres)")


@dataclass
class _Layout:
    dims: tuple[str, ...]  # the variables' dims in file order after renaming (may include time)
    grid: Grid
    n_snapshots: int
    times: np.ndarray | None
    warnings: tuple[str, ...] = ()
    spacing_from: str = "coordinates"
    n_levels: int = 0
    level_values: np.ndarray | None = None


def _spacing_for(dims: Sequence[str], spacing: Sequence[float]) -> dict[str, float]:
    """--spacing DX[,DY[,DZ]] (x, y, z order) for the grid's dims; one value serves all."""
    order = [d for d in ("x", "y", "z") if d in dims]
    values = [float(h) for h in spacing]
    if len(values) == 1:
        values = values * len(order)
    if len(values) != len(order):
        raise InputFileError(
            f"--spacing gives {len(spacing)} value(s) but the grid has {len(order)} direction(s) "
            f"({', '.join(order)}): give one value for all, or one per direction in the order "
            f"{', '.join('d' + d for d in order)}")
    if any(not np.isfinite(h) or h <= 0 for h in values):
        raise InputFileError(f"--spacing values must be positive numbers, got {list(spacing)}")
    return dict(zip(order, values, strict=True))


def _layout(ds: xr.Dataset, path: Path, names: Mapping[str, str], periodic: bool,
            need_spacing: bool = True, spacing: Sequence[float] | None = None,
            levels: bool = False) -> _Layout:
    """Check that the variables ``names`` (ours -> file's) share dims and build the grid.

    ``spacing`` (x, y, z order) replaces the coordinates; ``levels``: the z dimension is a
    stack of levels, each a grid of the other spatial dims."""
    first_ours, first = next(iter(names.items()))
    dims = tuple(map(str, ds[first].dims))
    known = (TIME, *SPATIAL_DIMS)
    unknown = [d for d in dims if d not in known]
    if unknown:
        curvy = _curvilinear(ds, dims)
        if curvy:
            raise _curvilinear_error(path, curvy)
        raise InputFileError(
            f"variable {first!r} in {path} has dims ({', '.join(dims)}); closure reads dims "
            f"named time, z, y, x: the dimension(s) {', '.join(map(repr, unknown))} are not "
            "understood: rename them in the file or map them with --var x=NAME (y=, z=, time= "
            "likewise)")
    spatial_all = tuple(d for d in SPATIAL_DIMS if d in dims)
    if levels and "z" not in spatial_all:
        raise InputFileError(f"--levels needs a z dimension, but {first!r} in {path} has dims "
                             f"({', '.join(dims)}): drop --levels (or map the level dimension "
                             "with --var z=NAME)")
    spatial = tuple(d for d in spatial_all if not (levels and d == "z"))
    if "x" not in spatial:
        raise InputFileError(f"variable {first!r} in {path} has no x dimension (dims: "
                             f"{', '.join(dims) or 'none'}): closure needs dims "
                             "(time, [z,] [y,] x); map another dimension with --var x=NAME")
    for ours, theirs in names.items():
        other = tuple(map(str, ds[theirs].dims))
        if set(other) != set(dims):
            raise InputFileError(
                f"variable {theirs!r} ({ours}) in {path} has dims ({', '.join(other)}) but "
                f"{first!r} ({first_ours}) has ({', '.join(dims)}): all fields must share the "
                "dims (time, [z,] [y,] x)")
        if ds[theirs].dtype.kind not in "fiu":
            raise InputFileError(f"variable {theirs!r} ({ours}) in {path} is not numeric "
                                 f"({ds[theirs].dtype})")
    shape = tuple(int(ds.sizes[d]) for d in spatial)
    warnings: list[str] = []
    given = _spacing_for(spatial, spacing) if spacing else None
    origin, units, steps = [], [], []
    has_coord = [d in ds.variables for d in spatial]
    spacing_from = "coordinates"
    if not need_spacing:
        steps, origin, units = [1.0] * len(spatial), [0.0] * len(spatial), [None] * len(spatial)
    elif given is not None:
        for d, n in zip(spatial, shape, strict=True):
            if n < 2:
                raise InputFileError(f"dimension {d!r} in {path} has {n} point; a grid "
                                     "direction needs at least 2 points")
            steps.append(given[d])
            origin.append(0.0)
            units.append(None)
        spacing_from = "--spacing"
        replaced = [d for d, c in zip(spatial, has_coord, strict=True) if c]
        if replaced:
            warnings.append(f"--spacing {','.join(f'{given[d]:g}' for d in given)} replaces the "
                            f"coordinates of {', '.join(replaced)} in {path.name}")
    else:
        curvy = _curvilinear(ds, dims)
        if curvy and not all(has_coord):
            raise _curvilinear_error(path, curvy)
        if any(has_coord) and not all(has_coord):
            missing = [d for d, c in zip(spatial, has_coord, strict=True) if not c]
            raise InputFileError(f"{path} has coordinates for some directions but not for "
                                 f"{', '.join(missing)}: give every direction a coordinate "
                                 "variable, or give --spacing DX[,DY[,DZ]]")
        for d, n in zip(spatial, shape, strict=True):
            h, o, u = _spacing(ds, path, d, n)
            if _is_degrees(u):
                raise InputFileError(
                    f"coordinate {d!r} in {path} is in {u}: closure needs lengths on a uniform "
                    "rectilinear grid (latitude/longitude metrics are not supported yet): "
                    "regrid to a Cartesian grid, or give --spacing DX,DY in metres to treat the "
                    "grid as uniform (an approximation for a small domain)")
            steps.append(h)
            origin.append(o)
            units.append(u)
        if not any(has_coord):
            spacing_from = "grid index"
            warnings.append(
                f"{path.name} has no coordinate variables for {', '.join(spatial)}: the grid "
                "spacing is 1 (grid-index units), so Delta, the dimensional coefficients and "
                "every derivative are per grid spacing; give --spacing DX[,DY[,DZ]] for "
                "physical lengths")
    given_units = {u for u in units if u is not None}
    if len(given_units) > 1:
        raise InputFileError(
            f"the coordinates in {path} have different units "
            f"({', '.join(f'{d}: {u}' for d, u in zip(spatial, units, strict=True))}): "
            "convert them to one length unit")
    grid = Grid(spatial, shape, tuple(steps), tuple(origin), periodic,
                given_units.pop() if given_units else None)
    times = None
    if TIME in dims:
        n_snapshots = int(ds.sizes[TIME])
        if TIME in ds.variables and ds[TIME].dtype.kind in "fiu":
            times = np.asarray(ds[TIME].values, dtype=float).reshape(-1)
    else:
        n_snapshots = 1
        if TIME in ds.variables and ds[TIME].ndim == 0 and ds[TIME].dtype.kind in "fiu":
            times = np.asarray([float(ds[TIME].values)])
    if n_snapshots < 1:
        raise InputFileError(f"{path} has no snapshots (the time dimension is empty)")
    n_levels, level_values = 0, None
    if levels:
        n_levels = int(ds.sizes["z"])
        if "z" in ds.variables and ds["z"].dtype.kind in "fiu" and ds["z"].ndim == 1:
            level_values = np.asarray(ds["z"].values, dtype=float)
    return _Layout(dims, grid, n_snapshots, times, tuple(warnings), spacing_from, n_levels,
                   level_values)


class _Reader:
    """An open netCDF file whose variables ``names`` (ours -> file's) share one layout."""

    def __init__(self, path: str | os.PathLike, ds: xr.Dataset, names: dict[str, str],
                 layout: _Layout):
        self.path = Path(path)
        self._ds = ds
        self.names = names
        self._layout = layout
        self.grid = layout.grid
        self.n_snapshots = layout.n_snapshots
        self.times = layout.times
        self.attrs = dict(ds.attrs)
        self.units: dict[str, str] = _units(ds, names, (TIME, *self.grid.dims))
        self.time_attrs = _time_attrs(ds)
        self._sha256: str | None = None

    def __len__(self) -> int:
        return self.n_snapshots

    def _check_index(self, i) -> int:
        if isinstance(i, bool) or not isinstance(i, int | np.integer):
            raise UserError(f"snapshot index must be a whole number, got {i!r}")
        if not 0 <= i < self.n_snapshots:
            raise UserError(f"snapshot index {i} is out of range: {self.path} has "
                            f"{self.n_snapshots} snapshot(s), indices 0..{self.n_snapshots - 1}")
        return int(i)

    def read(self, name: str, i: int, missing_ok: bool = False) -> np.ndarray:
        """Our variable ``name`` at snapshot ``i`` as float64 of ``grid.shape``, checked finite
        (``missing_ok``: NaN is allowed, Inf is not)."""
        i = self._check_index(i)
        theirs = self.names[name]
        var = self._ds[theirs]
        if TIME in var.dims:
            var = var.isel({TIME: i})
        var = var.transpose(*self.grid.dims)
        with np.errstate(all="ignore"):
            a = np.asarray(var.values, dtype=np.float64)
        bad = np.isinf(a) if missing_ok else ~np.isfinite(a)
        if bad.any():
            where = np.unravel_index(int(np.argmax(bad)), a.shape)
            at = ", ".join(f"{d}={j}" for d, j in zip(self.grid.dims, where, strict=True))
            label = theirs if theirs == name else f"{theirs} ({name})"
            raise InputFileError(
                f"variable {label!r} has {int(bad.sum())} NaN or Inf value(s) at snapshot {i} of "
                f"{self.path} (first at {at}; fill values count as missing): fill or remove "
                "them, or select other snapshots")
        return np.ascontiguousarray(a)

    def read_slab(self, name: str, i: int, start: int, stop: int) -> np.ndarray:
        """Points ``start:stop`` along the first spatial dimension of our variable ``name`` at
        snapshot ``i``, float64 (checked finite): only those chunks of the file are read."""
        i = self._check_index(i)
        first = self.grid.dims[0]
        var = self._ds[self.names[name]]
        var = var.isel({TIME: i}) if TIME in var.dims else var
        var = var.isel({first: slice(int(start), int(stop))}).transpose(*self.grid.dims)
        with np.errstate(all="ignore"):
            a = np.asarray(var.values, dtype=np.float64)
        bad = ~np.isfinite(a)
        if bad.any():  # the message of read(), the point counted from the whole grid
            where = list(np.unravel_index(int(np.argmax(bad)), a.shape))
            where[0] += int(start)
            at = ", ".join(f"{d}={j}" for d, j in zip(self.grid.dims, where, strict=True))
            theirs = self.names[name]
            label = theirs if theirs == name else f"{theirs} ({name})"
            raise InputFileError(
                f"variable {label!r} has NaN or Inf value(s) at snapshot {i} of {self.path} "
                f"(first at {at}; fill values count as missing): fill or remove them, or "
                "select other snapshots")
        return np.ascontiguousarray(a)

    def time_of(self, i: int) -> float | None:
        return None if self.times is None else float(self.times[i])

    @property
    def sha256(self) -> str:
        """SHA-256 of the file (computed once)."""
        if self._sha256 is None:
            self._sha256 = sha256_file(self.path)
        return self._sha256

    def close(self) -> None:
        self._ds.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _units(ds: xr.Dataset, names: Mapping[str, str], dims: Sequence[str]) -> dict[str, str]:
    out = {}
    for ours, theirs in names.items():
        if "units" in ds[theirs].attrs:
            out[ours] = str(ds[theirs].attrs["units"])
    for d in dims:
        if d in ds.variables and "units" in ds[d].attrs:
            out[d] = str(ds[d].attrs["units"])
    return out


def _time_attrs(ds: xr.Dataset) -> dict[str, str]:
    if TIME not in ds.variables:
        return {}
    return {k: str(ds[TIME].attrs[k]) for k in ("units", "calendar") if k in ds[TIME].attrs}


def decode_time(value: float, time_attrs: Mapping[str, str]) -> str | None:
    """A numeric CF time (``units`` like ``days since 2000-01-01``, optional ``calendar``) as
    ISO text; None when the units are not CF ``<unit> since <date>``."""
    units = time_attrs.get("units", "")
    if " since " not in units:
        return None
    try:
        import cftime

        d = cftime.num2date(value, units, time_attrs.get("calendar", "standard"))
        return d.isoformat()
    except Exception:  # cftime's own errors for malformed units: the numbers still serve
        return None


class _Part:
    """One opened input (a netCDF file, a group of one, or a Zarr store) of a FieldSource."""

    def __init__(self, path: Path, ds: xr.Dataset, names: dict[str, str], layout: _Layout,
                 mask: str | None, reopen):
        self.path = path
        self._ds: xr.Dataset | None = ds
        self._reopen = reopen
        self.names = names
        self.layout = layout
        self.mask = mask
        self.units = _units(ds, names, (TIME, *layout.dims))
        self.time_attrs = _time_attrs(ds)
        self.attrs = dict(ds.attrs)

    @property
    def ds(self) -> xr.Dataset:
        """The open dataset (reopened after :meth:`release`)."""
        if self._ds is None:
            self._ds = self._reopen()
        return self._ds

    def release(self) -> None:
        """Close the file; the next read reopens it (many inputs, few open handles)."""
        if self._ds is not None:
            self._ds.close()
            self._ds = None

    def read(self, theirs: str, j: int, level: int | None, dims: Sequence[str]) -> np.ndarray:
        """The file's variable at local snapshot ``j`` (and level) as float64 of ``dims``."""
        var = self.ds[theirs]
        sel = {}
        if TIME in var.dims:
            sel[TIME] = j
        if level is not None and "z" in var.dims:
            sel["z"] = level
        if sel:
            var = var.isel(sel)
        present = [d for d in dims if d in var.dims]
        var = var.transpose(*present)
        with np.errstate(all="ignore"):
            a = np.asarray(var.values, dtype=np.float64)
        for k, d in enumerate(dims):  # a mask without some spatial dims applies along them
            if d not in present:
                a = np.expand_dims(a, k)
        return a


class FieldSource:
    """Fine-grid fields in one or more netCDF files (or a Zarr store), read one snapshot at a
    time.

    Attributes: ``path`` (the first input), ``paths`` (every input, in time order),
    ``grid`` (the fine Grid; per level in a level stack), ``n_snapshots`` (time steps over all
    inputs), ``times`` (time coordinate values in the first input's units, or None),
    ``velocity`` (our names present, e.g. ``("u", "v")``), ``scalars``, ``names`` (our name ->
    the file's), ``units`` (our names and coordinate dims -> the file's units attribute, where
    given), ``time_attrs`` (CF time units and calendar), ``attrs`` (global attributes of the
    first input), ``levels`` (level indices of a level stack, else None), ``level_values``,
    ``mask_name``, ``standard_names`` (our name -> the CF standard name that found it),
    ``notes`` (how names and dims were found) and ``warnings`` (to keep with any result).
    """

    def __init__(self, parts: list[_Part], velocity, scalars, *, group: str | None,
                 levels: Sequence[int] | None, standard_names: Mapping[str, str],
                 notes: Sequence[str], periodic: bool):
        self._parts = parts
        first = parts[0]
        self.grid: Grid = first.layout.grid
        self.velocity: tuple[str, ...] = tuple(velocity)
        self.scalars: tuple[str, ...] = tuple(scalars)
        self.names: dict[str, str] = dict(first.names)
        self.group = group
        self.mask_name = first.mask
        self.standard_names = dict(standard_names)
        self.notes: list[str] = list(notes)
        self.warnings: list[str] = list(dict.fromkeys(w for p in parts for w in p.layout.warnings))
        self.spacing_from = first.layout.spacing_from
        self.attrs = dict(first.attrs)
        self.time_attrs = dict(first.time_attrs)
        self.units = dict(first.units)
        self.levels: tuple[int, ...] | None = None if levels is None else tuple(levels)
        lv = first.layout.level_values
        self.level_values = (None if levels is None or lv is None
                             else [float(lv[k]) for k in levels])
        self._order(parts)
        self.path = self._parts[0].path
        self.paths = [p.path for p in self._parts]
        self._sha256: str | None = None

    def _order(self, parts: list[_Part]) -> None:
        """Order the inputs by time; refuse overlapping times (naming the files)."""
        if len(parts) > 1 and all(p.layout.times is not None for p in parts):
            times = [self._common_times(p) for p in parts]
            order = sorted(range(len(parts)), key=lambda k: (times[k].min(), k))
            parts[:] = [parts[k] for k in order]
            times = [times[k] for k in order]
            for a in range(len(parts) - 1):
                if times[a].max() >= times[a + 1].min():
                    raise InputFileError(
                        f"{parts[a].path} and {parts[a + 1].path} overlap in time (times "
                        f"{times[a].min():g}..{times[a].max():g} and {times[a + 1].min():g}.."
                        f"{times[a + 1].max():g}): give each snapshot once (drop one of the "
                        "files)")
            self.times = np.concatenate(times)
            if parts[0].time_attrs != self.time_attrs:  # in the earliest input's units
                import cftime

                ref, new = self.time_attrs, parts[0].time_attrs
                dates = cftime.num2date(self.times, ref["units"], ref.get("calendar", "standard"))
                self.times = np.asarray(cftime.date2num(dates, new["units"],
                                                        new.get("calendar", "standard")),
                                        dtype=float)
                self.time_attrs = dict(new)
                if "units" in new:
                    self.units[TIME] = new["units"]
        elif len(parts) > 1:
            self.times = None
            self.notes.append("the inputs have no time coordinate: snapshots are ordered by "
                              "file name")
        else:
            self.times = parts[0].layout.times
        self._index = [(k, j) for k, p in enumerate(parts) for j in range(p.layout.n_snapshots)]
        self.n_snapshots = len(self._index)
        if self.times is not None and len(parts) == 1:
            self.times = np.asarray(self.times, dtype=float)

    def _common_times(self, part: _Part) -> np.ndarray:
        """The part's times in the first input's time units (CF ``since`` units converted)."""
        t = np.asarray(part.layout.times, dtype=float)
        ref = self.time_attrs
        if part.time_attrs == ref:
            return t
        try:
            import cftime

            dates = cftime.num2date(t, part.time_attrs["units"],
                                    part.time_attrs.get("calendar", "standard"))
            return np.asarray(cftime.date2num(dates, ref["units"],
                                              ref.get("calendar", "standard")), dtype=float)
        except Exception:
            raise InputFileError(
                f"{part.path} has time units {part.time_attrs or 'none'} but {self._parts[0].path}"
                f" has {ref or 'none'}: give files with one time unit (CF 'UNIT since DATE' "
                "units of one calendar are converted)") from None

    def __len__(self) -> int:
        return self.n_snapshots

    def _check_index(self, i) -> int:
        if isinstance(i, bool) or not isinstance(i, int | np.integer):
            raise UserError(f"snapshot index must be a whole number, got {i!r}")
        if not 0 <= i < self.n_snapshots:
            where = self.path if len(self.paths) == 1 else f"the {len(self.paths)} inputs"
            raise UserError(f"snapshot index {i} is out of range: {where} has "
                            f"{self.n_snapshots} snapshot(s), indices 0..{self.n_snapshots - 1}")
        return int(i)

    def _check_level(self, level) -> int | None:
        if self.levels is None:
            if level is not None:
                raise UserError("this input was not opened as a level stack: open it with "
                                "levels (--levels) to read a level")
            return None
        if level is None:
            raise UserError(f"a level stack needs a level: one of {list(self.levels)}")
        n = self._parts[0].layout.n_levels
        if isinstance(level, bool) or not isinstance(level, int | np.integer) or \
                not 0 <= level < n:
            raise UserError(f"level {level!r} is out of range: the inputs have {n} level(s)")
        return int(level)

    def time_of(self, i: int) -> float | None:
        return None if self.times is None else float(self.times[i])

    def _use(self, k: int) -> _Part:
        """Input ``k``, opened; the other inputs are closed (one open file at a time)."""
        if len(self._parts) > 1:
            for q, p in enumerate(self._parts):
                if q != k:
                    p.release()
        return self._parts[k]

    def file_of(self, i: int) -> tuple[Path, int]:
        """(input, index in that input) of snapshot ``i``."""
        k, j = self._index[self._check_index(i)]
        return self._parts[k].path, j

    def read(self, name: str, i: int, level: int | None = None) -> np.ndarray:
        """Our variable ``name`` at snapshot ``i`` as float64 of ``grid.shape``; missing
        values (NaN, fill values) stay NaN; Inf is refused."""
        k, j = self._index[self._check_index(i)]
        part = self._use(k)
        theirs = part.names[name]
        a = part.read(theirs, j, self._check_level(level), self.grid.dims)
        inf = np.isinf(a)
        if inf.any():
            where = np.unravel_index(int(np.argmax(inf)), a.shape)
            at = ", ".join(f"{d}={q}" for d, q in zip(self.grid.dims, where, strict=True))
            label = theirs if theirs == name else f"{theirs} ({name})"
            lv = "" if level is None else f", level {level}"
            raise InputFileError(
                f"variable {label!r} has {int(inf.sum())} Inf value(s) at snapshot {j}{lv} of "
                f"{part.path} (first at {at}): Inf is not a missing value; replace it with NaN "
                "(or the variable's _FillValue) to mark land, or select other snapshots "
                "(--snapshots)")
        return a

    def read_slab(self, name: str, i: int, start: int, stop: int) -> np.ndarray:
        """Points ``start:stop`` along the first spatial dimension of our variable ``name`` at
        snapshot ``i``, float64 (checked finite): only those chunks of the input are read
        (closure.outofcore; land does not go by slabs)."""
        i = self._check_index(i)
        k, j = self._index[i]
        part = self._use(k)
        var = part.ds[part.names[name]]
        var = var.isel({TIME: j}) if TIME in var.dims else var
        var = var.isel({self.grid.dims[0]: slice(int(start), int(stop))})
        var = var.transpose(*self.grid.dims)
        with np.errstate(all="ignore"):
            a = np.asarray(var.values, dtype=np.float64)
        bad = ~np.isfinite(a)
        if bad.any():  # the point counted from the whole grid
            where = list(np.unravel_index(int(np.argmax(bad)), a.shape))
            where[0] += int(start)
            at = ", ".join(f"{d}={w}" for d, w in zip(self.grid.dims, where, strict=True))
            raise InputFileError(
                f"variable {part.names[name]!r} has NaN or Inf value(s) at snapshot {j} of "
                f"{part.path} (first at {at}): a snapshot with land or missing values is "
                "processed in memory, not by slabs: raise --memory-limit or leave out "
                "--float32")
        return np.ascontiguousarray(a)

    def snapshot(self, i: int, level: int | None = None) -> Snapshot:
        """Snapshot ``i`` (0-based over all inputs, in time order), every field loaded.

        Land: NaN or fill values in any field, or zero in the mask variable (``--mask``);
        ``Snapshot.mask`` is True on fluid points (None when every point is fluid) and land
        values are 0.0 in the fields, never NaN."""
        i = self._check_index(i)
        level = self._check_level(level)
        fields = {name: self.read(name, i, level) for name in (*self.velocity, *self.scalars)}
        fluid = np.ones(self.grid.shape, dtype=bool)
        for a in fields.values():
            fluid &= ~np.isnan(a)
        k, j = self._index[i]
        part = self._use(k)
        if part.mask is not None:
            m = part.read(part.mask, j, level, self.grid.dims)
            with np.errstate(invalid="ignore"):
                fluid &= np.broadcast_to(np.isfinite(m) & (m != 0), self.grid.shape)
        mask = None
        if not fluid.all():
            if not fluid.any():
                lv = "" if level is None else f", level {level}"
                raise InputFileError(
                    f"snapshot {j}{lv} of {part.path} has no fluid point (every value is NaN, "
                    "a fill value or masked out): select other snapshots (--snapshots) or "
                    "levels (--levels), or check --mask")
            mask = fluid
            for name, a in fields.items():
                fields[name] = np.where(fluid, a, 0.0)
        fields = {n: np.ascontiguousarray(a) for n, a in fields.items()}
        snap = Snapshot(fields, self.grid, i, self.time_of(i), mask)
        if level is not None:
            snap.level = level
        return snap

    def __iter__(self) -> Iterator[Snapshot]:
        for i in range(self.n_snapshots):
            if self.levels is None:
                yield self.snapshot(i)
            else:
                for level in self.levels:
                    yield self.snapshot(i, level)

    @property
    def sha256(self) -> str:
        """SHA-256 of the input (computed once; see :func:`input_sha256`)."""
        if self._sha256 is None:
            self._sha256 = input_sha256(self.paths)
        return self._sha256

    def describe(self) -> dict:
        """Provenance for files we write: path(s), sha256, names, units (plain types)."""
        out = {"file": str(self.path) if len(self.paths) == 1
               else " ".join(str(p) for p in self.paths),
               "files": [str(p) for p in self.paths], "sha256": self.sha256,
               "names": dict(self.names), "units": dict(self.units),
               "time_attrs": dict(self.time_attrs)}
        if self.group:
            out["group"] = self.group
        return out

    def info(self) -> dict:
        """How the input was read, for a model's provenance (plain types)."""
        out = {
            "files": [str(p) for p in self.paths],
            "group": self.group,
            "names": dict(self.names),
            "standard_names": dict(self.standard_names),
            "units": dict(self.units),
            "velocity_units": {c: self.units[c] for c in self.velocity if c in self.units},
            "length_units": self.grid.units,
            "spacing_from": self.spacing_from,
            "time": dict(self.time_attrs),
            "mask": self.mask_name,
            "levels": None if self.levels is None else list(self.levels),
            "level_values": self.level_values,
            "notes": list(self.notes),
        }
        if self.times is not None and len(self.times):
            first = decode_time(float(self.times[0]), self.time_attrs)
            if first is not None:
                out["time"]["first"] = first
                out["time"]["last"] = decode_time(float(self.times[-1]), self.time_attrs)
        return out

    def close(self) -> None:
        for p in self._parts:
            p.release()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _check_mapping(variables: Mapping[str, str] | None) -> dict[str, str]:
    out = {}
    for k, v in (variables or {}).items():
        if not isinstance(k, str) or not isinstance(v, str) or not k or not v:
            raise UserError(f"variable mapping entries must be name=NAME strings, got {k!r}={v!r}")
        out[k] = v
    return out


def _open_part(path: Path, variables: dict[str, str], scalars: tuple[str, ...], periodic: bool,
               group: str | None, mask: str | None, levels: bool,
               spacing: Sequence[float] | None):
    """(part, velocity, standard names used, notes) of one input."""
    ds = _open_dataset(path, group)
    try:
        groups: list[str] = []
        if not ds.data_vars and group is None and not _is_zarr(path):
            with contextlib.suppress(Exception):
                with netCDF4.Dataset(path, "r") as nc:
                    groups = _group_paths(nc)
        ds = _rename_dims(ds, path, variables)
        ds, notes = _auto_dims(ds, variables)
        std_used: dict[str, str] = {}

        def find(ours: str) -> str | None:
            theirs = _file_name(ds, ours, variables)
            if theirs is None and ours not in variables:
                hit = _by_standard_name(ds, path, ours)
                if hit is not None:
                    theirs, std_used[ours] = hit
            return theirs

        u = find("u")
        if u is None:
            raise _missing(path, ds, "u", "x velocity", variables, groups)
        spatial = [d for d in SPATIAL_DIMS if d in ds[u].dims and not (levels and d == "z")]
        velocity = [VELOCITY_OF[d] for d in ("x", "y", "z") if d in spatial] or ["u"]
        names = {}
        for ours in velocity:
            theirs = u if ours == "u" else find(ours)
            if theirs is None:
                err = _missing(path, ds, ours, f"{DIRECTION_OF[ours]} velocity", variables)
                if ours == "w" and "z" in spatial:
                    err = InputFileError(
                        f"{err} - or, for layered output with horizontal velocity only, analyse "
                        "each level as a 2-D field with --levels all (or --levels 0,5,10)")
                raise err
            names[ours] = theirs
        for c in scalars:
            theirs = _file_name(ds, c, variables)
            if theirs is None:
                raise _missing(path, ds, c, "scalar", variables)
            names[c] = theirs
        # a mapping for a velocity component the grid lacks (w of a 2-D file) is harmless
        unused = [k for k in variables
                  if k not in names and k not in (TIME, *SPATIAL_DIMS, *VELOCITY_OF.values())]
        if unused:
            raise UserError(
                f"--var {unused[0]}={variables[unused[0]]} maps a name that is neither a velocity "
                f"component of this {len(spatial)}-D grid ({', '.join(velocity)}), a dimension, "
                f"nor a scalar: add --scalar {unused[0]} or drop the mapping")
        layout = _layout(ds, path, names, periodic, spacing=spacing, levels=levels)
        if mask is not None:
            if mask not in ds.data_vars:
                names_ = ", ".join(map(str, ds.data_vars)) or "none"
                raise InputFileError(f"mask variable {mask!r} (--mask) not found in {path}; the "
                                     f"file's variables are: {names_}. Fix --mask NAME")
            mdims = tuple(map(str, ds[mask].dims))
            extra = [d for d in mdims if d not in layout.dims]
            if extra:
                raise InputFileError(
                    f"mask variable {mask!r} in {path} has dims ({', '.join(mdims)}); the "
                    f"dimension(s) {', '.join(map(repr, extra))} are not the fields' "
                    f"({', '.join(layout.dims)}): give a mask over (y, x) or the fields' dims")
            if ds[mask].dtype.kind not in "fiub":
                raise InputFileError(f"mask variable {mask!r} in {path} is not numeric "
                                     f"({ds[mask].dtype}): nonzero marks fluid")
        for ours, std in std_used.items():
            notes.append(f"{ours} read from {names[ours]!r} (standard_name {std}); "
                         f"--var {ours}=NAME overrides")
        def reopen():
            again = _rename_dims(_open_dataset(path, group), path, variables)
            return _auto_dims(again, variables)[0]

        return _Part(path, ds, names, layout, mask, reopen), velocity, std_used, notes
    except BaseException:
        ds.close()
        raise


def _same_grid(a: _Part, b: _Part) -> None:
    ga, gb = a.layout.grid, b.layout.grid
    same = (ga.dims == gb.dims and ga.shape == gb.shape and ga.units == gb.units
            and np.allclose(ga.spacing, gb.spacing, rtol=UNIFORM_RTOL, atol=0)
            and np.allclose(ga.origin, gb.origin, rtol=UNIFORM_RTOL,
                            atol=UNIFORM_RTOL * min(ga.spacing))
            and a.layout.n_levels == b.layout.n_levels)
    if not same:
        def text(p):
            g = p.layout.grid
            lv = f", {p.layout.n_levels} levels" if p.layout.n_levels else ""
            return (f"{' x '.join(map(str, g.shape))} ({', '.join(g.dims)}), spacing "
                    f"{', '.join(f'{h:g}' for h in g.spacing)}, origin "
                    f"{', '.join(f'{o:g}' for o in g.origin)}{lv}")
        raise InputFileError(f"{a.path} and {b.path} are on different grids ({text(a)} vs "
                             f"{text(b)}): give files of one grid")
    if a.names != b.names:
        raise InputFileError(f"{a.path} and {b.path} name the fields differently ({a.names} vs "
                             f"{b.names}): give files with the same variables")


def open_fields(path: str | os.PathLike | Sequence[str | os.PathLike],
                variables: Mapping[str, str] | None = None, scalars: Sequence[str] = (),
                periodic: bool = True, *, group: str | None = None, mask: str | None = None,
                levels: str | Sequence[int] | None = None,
                spacing: Sequence[float] | None = None) -> FieldSource:
    """Open fine-grid fields lazily and check their layout.

    ``path``: a netCDF file, a Zarr store, a folder of netCDF files, a glob, or a list of
    these (see :func:`input_files`); the inputs must share the grid and the variables, and are
    ordered by their time coordinate. ``variables`` maps our names to the file's
    (``{"u": "U"}``; dims too: ``{"x": "lon"}``); velocity components not found by name are
    looked up by CF standard name. ``scalars`` are extra fields to carry, by our name.
    ``group``: a netCDF-4 group path (or Zarr group). ``mask``: a variable, nonzero on fluid
    points (NaN and fill values are land too). ``levels``: ``"all"`` or level indices: each z
    level is a separate grid of the other spatial dims. ``spacing``: DX[,DY[,DZ]] for inputs
    without coordinate variables (it replaces coordinates where they exist). The grid is
    periodic with period ``n * spacing`` unless ``periodic=False``. Raises InputFileError
    naming the problem.
    """
    files = input_files(path)
    variables = _check_mapping(variables)
    if isinstance(scalars, str):
        scalars = (scalars,)
    scalars = tuple(dict.fromkeys(scalars))
    for c in scalars:
        if c in VELOCITY_OF.values():
            raise UserError(f"{c!r} is a velocity component, not a scalar: drop --scalar {c}")
    if group is not None and not str(group).strip("/"):
        group = None
    parts: list[_Part] = []
    try:
        velocity, std_used, notes = None, {}, []
        for f in files:
            part, vel, std, nt = _open_part(f, variables, scalars, periodic, group, mask,
                                            levels is not None, spacing)
            parts.append(part)
            if velocity is None:
                velocity, std_used, notes = vel, std, nt
            else:
                _same_grid(parts[0], part)
            if len(files) > 1:
                part.release()  # thousands of files must not hold thousands of handles
        chosen = None
        if levels is not None:
            n = parts[0].layout.n_levels
            if isinstance(levels, str):
                if levels.strip().lower() != "all":
                    raise UserError(f"levels must be 'all' or a list of level indices, got "
                                    f"{levels!r}")
                chosen = list(range(n))
            else:
                chosen = [int(k) for k in levels]
                bad = [k for k in chosen if not 0 <= k < n]
                if bad:
                    raise UserError(f"--levels {bad} out of range: the input has {n} level(s) "
                                    f"along z, indices 0..{n - 1}")
                if not chosen or len(set(chosen)) != len(chosen):
                    raise UserError("--levels must list each level once: e.g. --levels 0,5,10 "
                                    "or --levels all")
        return FieldSource(parts, velocity, scalars, group=group, levels=chosen,
                           standard_names=std_used, notes=notes, periodic=periodic)
    except BaseException:
        for p in parts:
            p.release()
        raise


def open_input(inp, scalars: Sequence[str] | None = None) -> FieldSource:
    """Open the input of a job spec's ``InputSpec`` (closure.spec) with every option it holds;
    ``scalars`` replaces its scalar list (the pipeline adds a flux target's scalar)."""
    if inp.path is None:
        raise UserError("input.dataset_id names an uploaded dataset, which only the service "
                        "resolves: give input.path")
    return open_fields(inp.path, inp.variables or None,
                       tuple(inp.scalars if scalars is None else scalars), inp.periodic,
                       group=inp.group, mask=inp.mask, levels=inp.levels, spacing=inp.spacing)


# ---------------------------------------------------------------------------------------------
# coarse files: write and read back

_LONG_NAMES = {
    "u": "filtered x velocity", "v": "filtered y velocity", "w": "filtered z velocity",
    "vorticity": "vorticity of the filtered velocity, d_x v - d_y u",
    "pi": "subgrid energy transfer -tau_ij S_ij of the filtered strain rate "
          "(positive: resolved energy drained to subgrid scales)",
    "vorticity_forcing": "subgrid vorticity forcing d_j(bar(u_j omega) - bar(u_j) bar(omega))",
    "enstrophy_transfer": "subgrid enstrophy transfer -sigma_j d_j bar(omega), "
                          "sigma_j = bar(u_j omega) - bar(u_j) bar(omega)",
}


def _long_name(name: str) -> str:
    if name in _LONG_NAMES:
        return _LONG_NAMES[name]
    if name.startswith("tau_"):
        i, j = VELOCITY_OF[name[4]], VELOCITY_OF[name[5]]
        return f"subgrid stress bar({i} {j}) - bar({i}) bar({j})"
    if name.startswith("force_"):
        d = name[6:]
        return f"subgrid force d_j tau_{d}j (divergence of the subgrid stress)"
    if name.startswith("flux_"):
        c, d = name[5:-2], name[-1]
        u = VELOCITY_OF[d]
        return f"subgrid flux of {c} along {d}: bar({u} {c}) - bar({u}) bar({c})"
    return f"filtered {name}"


#: Favre targets (closure.favre) as length^a time^b times powers of rho, p and T
_FAVRE_UNITS = {"tau_": (2, -2, {"rho": 1}), "force_": (1, -2, {"rho": 1}),
                "heat_flux_": (1, -1, {"rho": 1, "T": 1}),
                "pressure_dilatation": (0, -1, {"p": 1}), "pi": (2, -3, {"rho": 1})}


def _units_of(name: str, units: Mapping[str, str], length: str | None,
              compressible: bool = False) -> str | None:
    """Units of an output variable from the input's units, simplified (closure.units); None
    where not derivable. ``compressible``: the Favre targets of closure.favre (stress rho u u,
    heat flux rho u T, pressure-dilatation p / time, transfer rho u^3 / length)."""
    from closure.units import Units, simplify, variable_units

    try:
        for key, (a, b, powers) in _FAVRE_UNITS.items() if compressible else ():
            if name == key or (key.endswith("_") and name.startswith(key)):
                vel = {simplify(units[c]) for c in ("u", "v", "w") if units.get(c)}
                base = Units(simplify(length), vel.pop() if len(vel) == 1 else None, None,
                             {c: str(units[c]) for c in powers if units.get(c)})
                if any(c not in base.scalars for c in powers):
                    return None
                return base.dims(a, b, **powers)
        return variable_units(name, units, length)
    except (ValueError, KeyError):  # units closure.units does not parse: say nothing
        return None


def _favre_long_name(name: str) -> str:
    """Long names of the fields and targets of a Favre-filtered (compressible) coarse file."""
    if name in ("u", "v", "w"):
        return f"Favre-filtered {DIRECTION_OF[name]} velocity bar(rho {name}) / bar(rho)"
    fixed = {"rho": "filtered density bar(rho)", "p": "filtered pressure bar(p)",
             "T": "Favre-filtered temperature bar(rho T) / bar(rho)",
             "pressure_dilatation": "subgrid pressure-dilatation bar(p d_k u_k) - bar(p) "
                                    "d_k u~_k",
             "pi": "subgrid energy transfer -tau_ij S~_ij of the Favre strain rate (dilatation "
                   "included; positive: resolved energy drained to subgrid scales)"}
    if name in fixed:
        return fixed[name]
    if name.startswith("tau_"):
        i, j = VELOCITY_OF[name[4]], VELOCITY_OF[name[5]]
        return f"Favre subgrid stress bar(rho {i} {j}) - bar(rho) {i}~ {j}~"
    if name.startswith("force_"):
        return f"subgrid force d_j tau_{name[6:]}j (divergence of the Favre subgrid stress)"
    if name.startswith("heat_flux_"):
        u = VELOCITY_OF[name[-1]]
        return f"subgrid heat flux along {name[-1]}: bar(rho {u} T) - bar(rho) {u}~ T~"
    return _long_name(name)


def _filter_attrs(cg: CoarseGraining) -> dict:
    desc = cg.describe()
    g = cg.fine
    attrs = {
        "filter_kind": cg.kind,
        "filter_width": float(desc["width"]),
        "coarsening_ratio": np.int32(cg.ratio),
    }
    for d in g.dims:
        attrs[f"filter_width_{d}"] = float(desc["widths"][d])
        attrs[f"filter_width_cells_{d}"] = float(desc["width_cells"][d])
    if cg.kind == "spectral":
        attrs["filter_second_moment_note"] = desc["second_moment_note"]
    else:
        for d in g.dims:
            attrs[f"filter_second_moment_{d}"] = float(desc["second_moment"][d])
    attrs["filter_transfer_function"] = {
        "box": "G(k) = sin(k D/2) / (k D/2) per direction (Pope 2000, Table 13.2)",
        "gaussian": "G(k) = exp(-k^2 D^2 / 24) per direction (Pope 2000, Table 13.2)",
        "spectral": "G(k) = 1 for |k| < pi/D, else 0, per direction (Pope 2000, Table 13.2)",
        "block": "mean over blocks of ratio^d fine cells, coordinates at block centres",
    }[cg.kind]
    attrs.update({
        "grid_dims": " ".join(g.dims),
        "periodic": np.int32(g.periodic),
        "fine_shape": np.asarray(g.shape, dtype=np.int32),
        "fine_spacing": np.asarray(g.spacing, dtype=float),
        "fine_origin": np.asarray(g.origin, dtype=float),
    })
    if cg.kind == "block":
        attrs["subgrid_derivatives"] = (
            f"{'spectral' if g.periodic else 'fd4'} derivatives of the block-averaged terms on "
            "the coarse grid")
    else:
        attrs["subgrid_derivatives"] = (
            f"{'spectral' if g.periodic else 'fd4'} derivatives on the fine grid, then sampled")
    return attrs


#: global attribute of coarse files of compressible data (closure.favre)
FAVRE_NOTE = ("compressible data, density-weighted (Favre) filtering: rho and p are filtered, "
              "u, v, w and T are Favre averages bar(rho f) / bar(rho); the subgrid terms are "
              "the exact Favre ones (closure.favre)")

#: global attribute of coarse files written from data with land
LAND_NOTE = ("land is NaN: filtered fields where the coarse point is land, subgrid terms "
             "wherever the filter footprint (or a fine-grid derivative stencil) touches land")


def _land_as_nan(cs: CoarseSnapshot, ours: str, role: str) -> np.ndarray:
    """A coarse variable with land as NaN: targets where the point is not valid, fields where
    the coarse point is land (the CoarseSnapshot itself keeps finite values)."""
    a = (cs.fields if role == "field" else cs.targets)[ours]
    keep = cs.fluid if role == "field" else cs.valid
    return a if keep is None else np.where(keep, a, np.nan)


class CoarseWriter:
    """Stream coarse snapshots into a CF-style netCDF file, renamed into place on close.

    ``source`` is provenance (``FieldSource.describe()``: file, sha256, names, units). Filtered
    fields are stored under the input file's names (``names``), targets under ours; each
    variable has ``long_name``, ``units`` where the input's units determine them, and
    ``closure_name`` / ``closure_role`` attributes so the file reads back with our names.
    """

    def __init__(self, path: str | os.PathLike, source: Mapping | None = None, title: str = "",
                 gas: Mapping[str, float] | None = None):
        self.path = Path(path)
        # compressible (Favre) snapshots: Favre names and units, the gas constants recorded
        self.gas = None if gas is None else {str(k): float(v) for k, v in gas.items()}
        self.source = dict(source or {})
        inputs = list(self.source.get("files") or [])
        if not inputs and self.source.get("file"):
            inputs = [self.source["file"]]
        for src in inputs:
            if self.path.exists() and Path(src).exists() and os.path.samefile(src, self.path):
                which = "the input file" if len(inputs) == 1 else "an input file"
                raise UserError(f"the output {self.path} is {which}: choose another output "
                                "path (input files are never written)")
        self.title = title
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, self._tmp = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".tmp",
                                         dir=self.path.parent)
        os.close(fd)
        self._nc: netCDF4.Dataset | None = None
        self._vars: list[tuple[str, str, str]] = []  # (our name, netCDF name, role)
        self._count = 0
        self._first: CoarseSnapshot | None = None
        self._done = False

    def _create(self, cs: CoarseSnapshot) -> None:
        names = dict(self.source.get("names") or {})
        units = dict(self.source.get("units") or {})
        grid = cs.grid
        nc = netCDF4.Dataset(self._tmp, "w", format="NETCDF4")
        self._nc = nc
        nc.createDimension(TIME, None)
        for d, n in zip(grid.dims, grid.shape, strict=True):
            nc.createDimension(d, n)
            var = nc.createVariable(d, "f8", (d,))
            var[:] = grid.coords(d)
            var.long_name = f"{d} coordinate of the coarse grid"
            var.axis = d.upper()
            if grid.units:
                var.units = grid.units
        t = nc.createVariable(TIME, "f8", (TIME,))
        if cs.time is not None:
            t.long_name = "time"
            t.setncatts(dict(self.source.get("time_attrs") or
                             ({"units": units[TIME]} if TIME in units else {})))
        else:
            t.long_name = "snapshot index in the source file (the source has no time coordinate)"
        t.axis = "T"
        s = nc.createVariable("snapshot", "i4", (TIME,))
        s.long_name = "snapshot index in the source file"
        taken = {TIME, "snapshot", *grid.dims}
        chunks = (1, *grid.shape)
        for role, group in (("field", cs.fields), ("target", cs.targets)):
            for ours in group:
                theirs = names.get(ours, ours) if role == "field" else ours
                if theirs in taken:
                    raise UserError(f"the output variable name {theirs!r} is used twice: rename "
                                    f"the input variable (--var) or the scalar {ours!r}")
                taken.add(theirs)
                var = nc.createVariable(theirs, "f8", (TIME, *grid.dims), zlib=True,
                                        complevel=1, chunksizes=chunks)
                var.long_name = _long_name(ours) if self.gas is None else _favre_long_name(ours)
                un = _units_of(ours, units, grid.units, compressible=self.gas is not None)
                if un:
                    var.units = un
                var.closure_name = ours
                var.closure_role = role
                self._vars.append((ours, theirs, role))
        attrs = {
            "Conventions": "CF-1.8",
            "title": self.title or "coarse-grained fields and exact subgrid terms",
            "closure_file": COARSE_FILE_KIND,
            "history": f"{_dt.datetime.now(_dt.UTC).strftime('%Y-%m-%dT%H:%M:%SZ')} "
                       f"closure {_version()} coarse-grain",
            "source": f"closure {_version()}",
        }
        attrs.update(_filter_attrs(cs.coarse_graining))
        if self.gas is not None:
            attrs["closure_compressible"] = np.int32(1)
            attrs["favre_note"] = FAVRE_NOTE
            attrs.update(self.gas)  # gamma, gas_constant, prandtl, ... as the input names them
        if cs.land is not None:
            attrs["land_convention"] = cs.land
            attrs["land_note"] = LAND_NOTE
        attrs["source_file"] = str(self.source.get("file", ""))
        attrs["source_sha256"] = str(self.source.get("sha256", ""))
        if self.source.get("group"):
            attrs["source_group"] = str(self.source["group"])
        if self.source.get("level") is not None:
            attrs["source_level"] = np.int32(self.source["level"])
        if names:
            attrs["source_variables"] = " ".join(f"{k}={v}" for k, v in names.items())
        nc.setncatts(attrs)
        self._first = cs

    def append(self, cs: CoarseSnapshot) -> None:
        """Add one coarse snapshot (same grid and variables as the first)."""
        if self._done:
            raise RuntimeError("CoarseWriter is closed")
        if self._nc is None:
            self._create(cs)
        first = self._first
        if cs.grid.shape != first.grid.shape or set(cs.fields) != set(first.fields) or \
                set(cs.targets) != set(first.targets):
            raise ValueError("all coarse snapshots of one file need the same grid and variables")
        k = self._count
        nc = self._nc
        nc[TIME][k] = cs.index if cs.time is None else cs.time
        nc["snapshot"][k] = cs.index
        for ours, theirs, role in self._vars:
            nc[theirs][k, ...] = _land_as_nan(cs, ours, role)
        self._count += 1

    def close(self) -> Path:
        """Finish the file and rename it into place; returns the path."""
        if self._done:
            return self.path
        if self._nc is None:
            self.abort()
            raise UserError("no snapshots to write")
        self._nc.close()
        ordinary_mode(self._tmp)
        os.replace(self._tmp, self.path)
        self._done = True
        return self.path

    def abort(self) -> None:
        """Drop the partial file (the target path is left as it was)."""
        if self._nc is not None and self._nc.isopen():
            self._nc.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self._tmp)
        self._done = True

    def __enter__(self):
        return self

    def __exit__(self, exc_type, *rest) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()


def write_coarse(path: str | os.PathLike, snapshots: Iterable[CoarseSnapshot],
                 source: Mapping | None = None) -> Path:
    """Write coarse snapshots (any iterable, consumed one at a time) to a CF-1.8 netCDF file.

    Global attributes record the filter kind, widths (coordinate units and grid cells), ratio,
    second moments (or why they are undefined), the fine grid, and the source file and its
    SHA-256. ``source`` is ``FieldSource.describe()`` or a dict with the same keys.
    """
    with CoarseWriter(path, source) as w:
        for cs in snapshots:
            w.append(cs)
    return w.path


def _version() -> str:
    from closure import __version__

    return __version__


class CoarseSource(_Reader):
    """A coarse file written by ``closure coarse-grain``, read one snapshot at a time.

    ``grid`` is the coarse Grid, ``coarse_graining`` the CoarseGraining that made it (on the
    fine grid recorded in the file), ``field_names`` / ``target_names`` our names of the
    filtered fields and the exact subgrid terms, ``velocity`` and ``scalars`` as in
    FieldSource. ``snapshot(i)`` returns a CoarseSnapshot.
    """

    def __init__(self, path, ds, names, layout, cg, fields, targets):
        super().__init__(path, ds, names, layout)
        self.coarse_graining: CoarseGraining = cg
        self.field_names: tuple[str, ...] = tuple(fields)
        self.target_names: tuple[str, ...] = tuple(targets)
        self.velocity = tuple(c for c in ("u", "v", "w") if c in fields)
        self.scalars = tuple(c for c in fields if c not in (*self.velocity, "vorticity"))
        # what the pipeline asks of any input (FieldSource's): one file, no level stack
        self.paths = [self.path]
        self.levels = None
        self.notes: list[str] = []
        self.warnings: list[str] = []
        self.source_index = (np.asarray(ds["snapshot"].values, dtype=int)
                             if "snapshot" in ds.variables else np.arange(self.n_snapshots))
        # the writer stores the source index as the time coordinate when there was no time
        self._has_time = TIME in ds.variables and ds[TIME].attrs.get("long_name") == "time"

    def info(self) -> dict:
        """How the input was read (FieldSource.info's counterpart): a coarse file."""
        return {"coarse_file": True, "units": dict(self.units)}

    def snapshot(self, i: int, level: int | None = None) -> CoarseSnapshot:
        """Snapshot ``i`` (``level``: None; coarse files hold no level stacks). In a file with
        land (``land_convention`` attribute) NaN marks land in the fields and excluded points in
        the subgrid terms: they read as 0, and ``valid`` is True where all are finite."""
        i = self._check_index(i)
        land = "land_convention" in self.attrs
        fields = {n: self.read(n, i, missing_ok=land) for n in self.field_names}
        targets = {n: self.read(n, i, missing_ok=land) for n in self.target_names}
        valid = None
        if land:
            valid = np.ones(self.grid.shape, dtype=bool)
            for a in (*fields.values(), *targets.values()):
                valid &= np.isfinite(a)
                np.nan_to_num(a, copy=False, nan=0.0)
            valid = None if valid.all() else valid
        return CoarseSnapshot(fields, targets, self.grid, self.coarse_graining,
                              int(self.source_index[i]), self._time(i), valid=valid)

    def _time(self, i: int) -> float | None:
        if self.times is None or not self._has_time:
            return None
        return float(self.times[i])

    def __iter__(self) -> Iterator[CoarseSnapshot]:
        for i in range(self.n_snapshots):
            yield self.snapshot(i)


def open_coarse(path: str | os.PathLike) -> CoarseSource:
    """Open a file written by ``closure coarse-grain`` (or ``write_coarse``) lazily."""
    path = Path(path)
    ds = _open_dataset(path)
    try:
        a = ds.attrs
        need = ("filter_kind", "coarsening_ratio", "grid_dims", "fine_shape", "fine_spacing")
        if a.get("closure_file") != COARSE_FILE_KIND or any(k not in a for k in need):
            raise InputFileError(f"{path} is not a coarse file written by closure coarse-grain "
                                 "(its global attributes do not describe a filter): run "
                                 "`closure coarse-grain` on the fine data first")
        dims = tuple(str(a["grid_dims"]).split())
        fine = Grid(dims, tuple(int(n) for n in np.atleast_1d(a["fine_shape"])),
                    tuple(float(h) for h in np.atleast_1d(a["fine_spacing"])),
                    tuple(float(o) for o in np.atleast_1d(a.get("fine_origin", [0.0] * len(dims)))),
                    bool(int(a.get("periodic", 1))), None)
        ratio = int(a["coarsening_ratio"])
        widths = tuple(float(a.get(f"filter_width_{d}", ratio * h))
                       for d, h in zip(dims, fine.spacing, strict=True))
        fields, targets, names = [], [], {}
        for theirs, var in ds.data_vars.items():
            role, ours = var.attrs.get("closure_role"), var.attrs.get("closure_name", theirs)
            if role == "field":
                fields.append(ours)
            elif role == "target":
                targets.append(ours)
            else:
                continue
            names[ours] = str(theirs)
        if not fields:
            raise InputFileError(f"{path} has no filtered fields: run `closure coarse-grain` "
                                 "again to rewrite it")
        layout = _layout(ds, path, names, fine.periodic, need_spacing=False)
        fine = Grid(fine.dims, fine.shape, fine.spacing, fine.origin, fine.periodic,
                    _coord_units(ds, dims))
        cg = CoarseGraining(str(a["filter_kind"]), ratio, widths, fine)
        coarse = cg.coarse
        if layout.grid.shape != coarse.shape:
            raise InputFileError(f"{path}: the variables' shape {layout.grid.shape} does not "
                                 f"match the recorded fine grid and ratio ({coarse.shape})")
        for d in dims:
            if d in ds.variables and ds.sizes[d] > 1:
                x = np.asarray(ds[d].values, dtype=float)
                if not np.allclose(x, coarse.coords(d), rtol=UNIFORM_RTOL,
                                   atol=UNIFORM_RTOL * coarse.spacing[coarse.axis(d)]):
                    raise InputFileError(f"{path}: coordinate {d} does not match the recorded "
                                         "fine grid and ratio; the file was changed after "
                                         "writing")
        layout.grid = coarse
        return CoarseSource(path, ds, names, layout, cg, fields, targets)
    except BaseException:
        ds.close()
        raise


def _coord_units(ds: xr.Dataset, dims: Sequence[str]) -> str | None:
    given = {str(ds[d].attrs["units"]) for d in dims
             if d in ds.variables and "units" in ds[d].attrs}
    return given.pop() if len(given) == 1 else None


# ---------------------------------------------------------------------------------------------
# generic atomic writer


def write_netcdf(ds: xr.Dataset, path: str | os.PathLike, compress: bool = True) -> Path:
    """Write ``ds`` to netCDF-4 at ``path`` atomically (temp file + rename).

    Variables with a ``time`` dimension are chunked one snapshot per chunk, so the file opens
    lazily with ``chunks={'time': 1}``.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    encoding = {}
    for name, var in ds.data_vars.items():
        enc = {}
        if compress and var.dtype.kind == "f":
            enc.update(zlib=True, complevel=1)
            if var.dims and var.dims[0] == "time":
                enc["chunksizes"] = (1,) + tuple(var.shape[1:])
        encoding[name] = enc
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
        ordinary_mode(tmp)
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return path


__all__ = [
    "COARSE_FILE_KIND", "STANDARD_NAMES", "CoarseSource", "CoarseWriter", "FieldSource",
    "Snapshot", "decode_time", "input_files", "input_sha256", "input_stamps", "open_coarse",
    "open_fields", "open_input", "sha256_file", "write_coarse", "write_netcdf",
]


# ---------------------------------------------------------------------------------------------
# declared sizes (header only)

def declared_sizes(path: str | os.PathLike) -> dict:
    """The sizes a netCDF file declares in its header, without reading any variable's data:
    ``{"dims": {name: length}, "unlimited": [names], "variables": {name: {"dims": [...],
    "itemsize": bytes}}}`` (root group only). Raises InputFileError when it is not netCDF."""
    try:
        nc = netCDF4.Dataset(path, "r")
    except Exception as exc:  # noqa: BLE001 - the netCDF library's OSError and friends
        raise InputFileError(f"{path} could not be read as netCDF ({type(exc).__name__}): give "
                             "a netCDF-3 or netCDF-4 file") from None
    try:
        dims = {str(n): int(len(d)) for n, d in nc.dimensions.items()}
        unlimited = [str(n) for n, d in nc.dimensions.items() if d.isunlimited()]
        variables = {}
        for name, var in nc.variables.items():
            itemsize = getattr(var.dtype, "itemsize", None) or 8  # strings: count 8 bytes
            variables[str(name)] = {"dims": [str(d) for d in var.dimensions],
                                    "itemsize": int(itemsize)}
        return {"dims": dims, "unlimited": unlimited, "variables": variables}
    finally:
        nc.close()
