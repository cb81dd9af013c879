"""Reading fields from user files and writing our own files.

This is the only module that knows file formats. Input files are opened read-only and never
written; every file we write goes to a temporary name in the target folder and is renamed into
place, so a reader never sees a half-written file.

Input layout: netCDF variables with dimensions ``(time, [z,] [y,] x)`` (a file without a
``time`` dimension holds one snapshot). Velocity components are read as ``u, v, w`` (or the
names given in ``variables``); scalars by name. Grid spacing comes from the coordinate
variables, which must be uniformly spaced; a dimension without a coordinate variable has
spacing 1 (grid index). Fields are loaded one snapshot at a time (no dask).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import os
import tempfile
import threading
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import netCDF4
import numpy as np
import xarray as xr

from closure.atomic import ordinary_mode
from closure.errors import InputFileError, UserError
from closure.filters import CoarseGraining
from closure.grid import DIRECTION_OF, SPATIAL_DIMS, VELOCITY_OF, Grid
from closure.residuals import CoarseSnapshot

TIME = "time"
#: relative tolerance on the spacing of a coordinate for it to count as uniform
UNIFORM_RTOL = 1e-6
#: the value of the global attribute ``closure_file`` in coarse files we write
COARSE_FILE_KIND = "coarse-grained fields and exact subgrid terms"


@dataclass
class Snapshot:
    """One time step of fine-grid fields.

    ``fields`` maps our names (``u, v, w`` and scalar names) to float64 arrays of
    ``grid.shape``; ``index`` is the snapshot's position in the file; ``time`` its time
    coordinate (file units) or None. ``mask``: a boolean array of ``grid.shape``, True where
    the point is fluid (False on land or missing values), or None when every point is fluid.
    """

    fields: dict[str, np.ndarray]
    grid: Grid
    index: int
    time: float | None
    mask: np.ndarray | None = None


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


def _open_netcdf(path: Path) -> netCDF4.Dataset:
    """The file opened read-only with a small chunk cache on every variable."""
    nc = netCDF4.Dataset(path, "r")
    if nc.data_model.startswith("NETCDF4"):  # classic files have no chunk cache
        for var in nc.variables.values():
            with contextlib.suppress(RuntimeError):
                var.set_var_chunk_cache(size=CHUNK_CACHE_BYTES)
    return nc


def _open_dataset(path: Path) -> xr.Dataset:
    if not path.exists():
        raise InputFileError(f"no such file: {path}: check the path")
    if path.is_dir():
        raise InputFileError(f"{path} is a folder: give a netCDF file")
    nc = None
    try:
        # our own handle (closed with the dataset), so xarray never reopens the file with the
        # default caches; cache=False keeps only the requested slice in memory
        nc = _open_netcdf(path)
        return xr.open_dataset(xr.backends.NetCDF4DataStore(nc), decode_times=False,
                               decode_timedelta=False, cache=False)
    except Exception as exc:  # the netCDF library's OSError, or xarray's decoding errors
        if nc is not None and nc.isopen():
            nc.close()
        raise InputFileError(f"{path} could not be read as netCDF ({exc}): give a netCDF-3 or "
                             "netCDF-4 file (convert other formats, e.g. with xarray)") from None


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


def _file_name(ds: xr.Dataset, ours: str, variables: Mapping[str, str]) -> str | None:
    """The file's variable for our name: explicit mapping, same name, or a variable that a
    coarse file marked with ``closure_name``."""
    if ours in variables:
        return variables[ours] if variables[ours] in ds.data_vars else None
    if ours in ds.data_vars:
        return ours
    marked = [n for n, v in ds.data_vars.items() if v.attrs.get("closure_name") == ours]
    return str(marked[0]) if len(marked) == 1 else None


def _missing(path: Path, ds: xr.Dataset, ours: str, what: str,
             variables: Mapping[str, str]) -> InputFileError:
    names = ", ".join(map(str, ds.data_vars)) or "none"
    if ours in variables:
        return InputFileError(f"variable {variables[ours]!r} (given for {ours}, {what}) not "
                              f"found in {path}; the file's variables are: {names}. Fix "
                              f"--var {ours}=NAME")
    return InputFileError(f"variable {ours!r} ({what}) not found in {path}; the file's variables "
                          f"are: {names}. Map it with --var {ours}=NAME")


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
    bad = np.abs(steps - h) > UNIFORM_RTOL * abs(h)
    if np.any(bad):
        i = int(np.argmax(bad))
        raise InputFileError(
            f"coordinate {dim!r} in {path} is not uniformly spaced (step {steps[i]:g} at index "
            f"{i}, mean step {h:g}, steps from {steps.min():g} to {steps.max():g}): closure needs "
            "a uniform grid; interpolate the data to uniform spacing first")
    units = coord.attrs.get("units")
    return float(h), float(x[0]), (str(units) if units is not None else None)


@dataclass
class _Layout:
    dims: tuple[str, ...]  # the variables' dims in file order after renaming (may include time)
    grid: Grid
    n_snapshots: int
    times: np.ndarray | None


def _layout(ds: xr.Dataset, path: Path, names: Mapping[str, str], periodic: bool,
            need_spacing: bool = True) -> _Layout:
    """Check that the variables ``names`` (ours -> file's) share dims and build the grid."""
    first_ours, first = next(iter(names.items()))
    dims = tuple(map(str, ds[first].dims))
    known = (TIME, *SPATIAL_DIMS)
    unknown = [d for d in dims if d not in known]
    if unknown:
        raise InputFileError(
            f"variable {first!r} in {path} has dims ({', '.join(dims)}); closure reads dims "
            f"named time, z, y, x: rename {', '.join(map(repr, unknown))} in the file or map "
            f"them with --var x=NAME (y=, z=, time= likewise)")
    spatial = tuple(d for d in SPATIAL_DIMS if d in dims)
    if "x" not in spatial:
        raise InputFileError(f"variable {first!r} in {path} has no x dimension (dims: "
                             f"{', '.join(dims) or 'none'}): closure needs dims "
                             "(time, [z,] [y,] x)")
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
    spacing, origin, units = [], [], []
    for d, n in zip(spatial, shape, strict=True):
        if need_spacing:
            h, o, u = _spacing(ds, path, d, n)
        else:
            h, o, u = 1.0, 0.0, None
        spacing.append(h)
        origin.append(o)
        units.append(u)
    has_coord = [d in ds.variables for d in spatial]
    if need_spacing and any(has_coord) and not all(has_coord):
        missing = [d for d, c in zip(spatial, has_coord, strict=True) if not c]
        raise InputFileError(f"{path} has coordinates for some directions but not for "
                             f"{', '.join(missing)}: give every direction a coordinate variable")
    given = {u for u in units if u is not None}
    if len(given) > 1:
        raise InputFileError(
            f"the coordinates in {path} have different units "
            f"({', '.join(f'{d}: {u}' for d, u in zip(spatial, units, strict=True))}): "
            "convert them to one length unit")
    grid = Grid(spatial, shape, tuple(spacing), tuple(origin), periodic,
                given.pop() if given else None)
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
    return _Layout(dims, grid, n_snapshots, times)


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
        self.units: dict[str, str] = {}
        for ours, theirs in names.items():
            if "units" in ds[theirs].attrs:
                self.units[ours] = str(ds[theirs].attrs["units"])
        for d in (TIME, *self.grid.dims):
            if d in ds.variables and "units" in ds[d].attrs:
                self.units[d] = str(ds[d].attrs["units"])
        self.time_attrs = ({k: str(ds[TIME].attrs[k]) for k in ("units", "calendar")
                            if k in ds[TIME].attrs} if TIME in ds.variables else {})
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

    def read(self, name: str, i: int) -> np.ndarray:
        """Our variable ``name`` at snapshot ``i`` as float64 of ``grid.shape`` (checked finite)."""
        i = self._check_index(i)
        theirs = self.names[name]
        var = self._ds[theirs]
        if TIME in var.dims:
            var = var.isel({TIME: i})
        var = var.transpose(*self.grid.dims)
        with np.errstate(all="ignore"):
            a = np.asarray(var.values, dtype=np.float64)
        bad = ~np.isfinite(a)
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


class FieldSource(_Reader):
    """Fine-grid fields in a netCDF file, read one snapshot at a time.

    Attributes: ``path``, ``grid`` (the fine Grid), ``n_snapshots``, ``times`` (time
    coordinate values in file units, or None), ``velocity`` (our names present, e.g.
    ``("u", "v")``), ``scalars``, ``names`` (our name -> the file's), ``units`` (our names and
    coordinate dims -> the file's units attribute, where given), ``attrs`` (global attributes).
    """

    def __init__(self, path, ds, names, layout, velocity, scalars):
        super().__init__(path, ds, names, layout)
        self.velocity: tuple[str, ...] = tuple(velocity)
        self.scalars: tuple[str, ...] = tuple(scalars)

    def snapshot(self, i: int) -> Snapshot:
        """Snapshot ``i`` (0-based), every field loaded and checked finite."""
        i = self._check_index(i)
        fields = {name: self.read(name, i) for name in (*self.velocity, *self.scalars)}
        return Snapshot(fields, self.grid, i, self.time_of(i))

    def __iter__(self) -> Iterator[Snapshot]:
        for i in range(self.n_snapshots):
            yield self.snapshot(i)

    def describe(self) -> dict:
        """Provenance for files we write: path, sha256, names, units (plain types)."""
        return {"file": str(self.path), "sha256": self.sha256, "names": dict(self.names),
                "units": dict(self.units), "time_attrs": dict(self.time_attrs)}


def _check_mapping(variables: Mapping[str, str] | None) -> dict[str, str]:
    out = {}
    for k, v in (variables or {}).items():
        if not isinstance(k, str) or not isinstance(v, str) or not k or not v:
            raise UserError(f"variable mapping entries must be name=NAME strings, got {k!r}={v!r}")
        out[k] = v
    return out


def open_fields(path: str | os.PathLike, variables: Mapping[str, str] | None = None,
                scalars: Sequence[str] = (), periodic: bool = True) -> FieldSource:
    """Open a netCDF file of fine-grid fields lazily and check its layout.

    ``variables`` maps our names to the file's (``{"u": "U"}``; dims too: ``{"x": "lon"}``);
    ``scalars`` are extra fields to carry, by our name. The grid is periodic with period
    ``n * spacing`` unless ``periodic=False``. Raises InputFileError naming the problem.
    Values are checked finite when each snapshot is loaded.
    """
    path = Path(path)
    variables = _check_mapping(variables)
    if isinstance(scalars, str):
        scalars = (scalars,)
    scalars = tuple(dict.fromkeys(scalars))
    for c in scalars:
        if c in VELOCITY_OF.values():
            raise UserError(f"{c!r} is a velocity component, not a scalar: drop --scalar {c}")
    ds = _open_dataset(path)
    try:
        ds = _rename_dims(ds, path, variables)
        u = _file_name(ds, "u", variables)
        if u is None:
            raise _missing(path, ds, "u", "x velocity", variables)
        spatial = [d for d in SPATIAL_DIMS if d in ds[u].dims]
        velocity = [VELOCITY_OF[d] for d in ("x", "y", "z") if d in spatial] or ["u"]
        names = {}
        for ours in velocity:
            theirs = _file_name(ds, ours, variables)
            if theirs is None:
                raise _missing(path, ds, ours, f"{DIRECTION_OF[ours]} velocity", variables)
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
        layout = _layout(ds, path, names, periodic)
        return FieldSource(path, ds, names, layout, velocity, scalars)
    except BaseException:
        ds.close()
        raise


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


def _units_of(name: str, units: Mapping[str, str], length: str | None) -> str | None:
    """Units of an output variable from the input's units; None where not derivable."""
    def u(key):
        return units.get(key)

    vel = [u(c) for c in ("u", "v", "w") if u(c)]
    U = vel[0] if vel and len(set(vel)) == 1 else None
    if name in units and not name.startswith(("tau_", "force_", "flux_")):
        return units[name]
    if name.startswith("tau_"):
        return f"({U})^2" if U else None
    if name.startswith("force_"):
        return f"({U})^2/({length})" if U and length else None
    if name.startswith("flux_"):
        c = u(name[5:-2])
        return f"({U}) ({c})" if U and c else None
    if name == "vorticity":
        return f"({U})/({length})" if U and length else None
    if name == "vorticity_forcing":
        return f"({U})^2/({length})^2" if U and length else None
    if name == "pi":
        return f"({U})^3/({length})" if U and length else None
    if name == "enstrophy_transfer":
        return f"({U})^3/({length})^3" if U and length else None
    return None


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


class CoarseWriter:
    """Stream coarse snapshots into a CF-style netCDF file, renamed into place on close.

    ``source`` is provenance (``FieldSource.describe()``: file, sha256, names, units). Filtered
    fields are stored under the input file's names (``names``), targets under ours; each
    variable has ``long_name``, ``units`` where the input's units determine them, and
    ``closure_name`` / ``closure_role`` attributes so the file reads back with our names.
    """

    def __init__(self, path: str | os.PathLike, source: Mapping | None = None, title: str = ""):
        self.path = Path(path)
        self.source = dict(source or {})
        src = self.source.get("file")
        if src and self.path.exists() and os.path.samefile(src, self.path):
            raise UserError(f"the output {self.path} is the input file: choose another output "
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
                var.long_name = _long_name(ours)
                un = _units_of(ours, units, grid.units)
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
        attrs["source_file"] = str(self.source.get("file", ""))
        attrs["source_sha256"] = str(self.source.get("sha256", ""))
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
            nc[theirs][k, ...] = (cs.fields if role == "field" else cs.targets)[ours]
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
        self.source_index = (np.asarray(ds["snapshot"].values, dtype=int)
                             if "snapshot" in ds.variables else np.arange(self.n_snapshots))
        # the writer stores the source index as the time coordinate when there was no time
        self._has_time = TIME in ds.variables and ds[TIME].attrs.get("long_name") == "time"

    def snapshot(self, i: int) -> CoarseSnapshot:
        i = self._check_index(i)
        fields = {n: self.read(n, i) for n in self.field_names}
        targets = {n: self.read(n, i) for n in self.target_names}
        return CoarseSnapshot(fields, targets, self.grid, self.coarse_graining,
                              int(self.source_index[i]), self._time(i))

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
    "COARSE_FILE_KIND", "CoarseSource", "CoarseWriter", "FieldSource", "Snapshot",
    "open_coarse", "open_fields", "sha256_file", "write_coarse", "write_netcdf",
]
