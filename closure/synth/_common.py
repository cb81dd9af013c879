"""Pieces shared by the demo solvers: progress reporting, dataset attributes, writing."""

from __future__ import annotations

import datetime as _dt
from collections.abc import Callable

import numpy as np
import xarray as xr

from closure import __version__
from closure.errors import OptionError
from closure.grid import Grid

Progress = Callable[[str, int, int], None]

VARIABLE_ATTRS = {
    "u": {"long_name": "velocity along x", "units": "m s-1"},
    "v": {"long_name": "velocity along y", "units": "m s-1"},
    "w": {"long_name": "velocity along z", "units": "m s-1"},
    "vorticity": {"long_name": "vertical vorticity d_x v - d_y u", "units": "s-1"},
    "c": {"long_name": "passive scalar (deviation from the mean gradient)", "units": "1"},
}
COORD_ATTRS = {
    "x": {"long_name": "x coordinate", "units": "m", "axis": "X"},
    "y": {"long_name": "y coordinate", "units": "m", "axis": "Y"},
    "z": {"long_name": "z coordinate", "units": "m", "axis": "Z"},
    "time": {"long_name": "time", "units": "s", "axis": "T"},
}


def check_positive(name: str, value: float, allow_zero: bool = False) -> None:
    ok = value >= 0 if allow_zero else value > 0
    if not (np.isfinite(value) and ok):
        bound = ">= 0" if allow_zero else "> 0"
        raise OptionError(f"--{name.replace('_', '-')} must be a finite number {bound}, "
                          f"got {value!r}")


def check_count(name: str, value: int, minimum: int = 1) -> None:
    if int(value) != value or value < minimum:
        raise OptionError(f"--{name.replace('_', '-')} must be a whole number >= {minimum}, "
                          f"got {value!r}")


def make_dataset(grid: Grid, times: list[float], fields: dict[str, list[np.ndarray]],
                 attrs: dict) -> xr.Dataset:
    """A CF-style dataset: dims (time, [z,] y, x), coordinates in m and s."""
    dims = ("time",) + grid.dims
    coords = {"time": ("time", np.asarray(times, dtype=float), COORD_ATTRS["time"])}
    for d in grid.dims:
        coords[d] = (d, grid.coords(d), COORD_ATTRS[d])
    data = {name: (dims, np.stack(frames).astype(np.float64), VARIABLE_ATTRS[name])
            for name, frames in fields.items()}
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    base = {
        "Conventions": "CF-1.8",
        "source": f"closure {__version__}",
        "history": f"{now} created by closure.synth.{attrs.get('solver', '?')}",
        "domain_lengths": np.asarray(grid.lengths, dtype=float),
        "periodic": "true",
    }
    base.update({k: _attr(v) for k, v in attrs.items()})
    return xr.Dataset(data, coords=coords, attrs=base)


def _attr(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "none"
    return value


def run_cost(wall_seconds: float, simulated_time: float) -> dict:
    """The global attributes that state a run's cost: its wall-clock time (s, on the machine
    that ran it) and the simulated time it covered (s), so a coarse run of the same flow can
    report its cost against the fine run's (closure.les settings["fine_cost"])."""
    return {"wall_seconds": float(wall_seconds), "simulated_time": float(simulated_time)}


def no_progress(phase: str, done: int, total: int) -> None:
    """A progress callback that does nothing."""
