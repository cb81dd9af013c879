"""Shared fixtures: small synthetic netCDF files written with xarray."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr


def periodic_coords(n: int, length: float = 2 * np.pi) -> np.ndarray:
    """``n`` points ``i * length / n`` of a periodic direction."""
    return np.arange(n) * (length / n)


@pytest.fixture
def make_netcdf(tmp_path):
    """Factory: ``make_netcdf(fields, dims=("time", "y", "x"), coords=None, name=..., ...)``.

    ``fields`` maps a variable name to an array, or to ``(array, attrs)``. ``coords`` maps a
    dimension to its values or ``(values, attrs)``; by default every spatial dimension gets
    periodic coordinates on ``[0, 2 pi)`` in metres and ``time`` gets ``0, 1, ...`` seconds.
    Pass ``coords={}`` for a file without coordinate variables.
    """

    def make(fields: dict, dims=("time", "y", "x"), coords: dict | None = None,
             name: str = "fields.nc", attrs: dict | None = None, units: str | None = "m s-1",
             var_dims: dict | None = None) -> Path:
        data_vars = {}
        shape = None
        for key, value in fields.items():
            arr, a = value if isinstance(value, tuple) else (value, {})
            a = dict(a)
            if units and "units" not in a:
                a["units"] = units
            d = (var_dims or {}).get(key, dims)
            data_vars[key] = (d, np.asarray(arr), a)
            if d == dims:
                shape = np.shape(arr)
        if coords is None:
            coords = {}
            for d, n in zip(dims, shape, strict=True):
                if d == "time":
                    coords[d] = (np.arange(n, dtype=float), {"units": "s"})
                else:
                    coords[d] = (periodic_coords(n), {"units": "m"})
        cvars = {}
        for d, value in coords.items():
            vals, a = value if isinstance(value, tuple) else (value, {})
            cvars[d] = (d, np.asarray(vals), dict(a))
        path = tmp_path / name
        xr.Dataset(data_vars, coords=cvars, attrs=attrs or {}).to_netcdf(path)
        return path

    return make


@pytest.fixture
def random_3d_file(tmp_path):
    """Factory: ``random_3d_file(snapshots, names, interval)`` writes random fields ``names``
    (standard normal, seed 1), ``snapshots`` of 16^3 on [0, 2 pi)^3 ``interval`` s apart."""

    def make(snapshots: int, names=("u", "v", "w"), interval: float = 1.0) -> Path:
        rng = np.random.default_rng(1)
        n = 16
        c = np.arange(n) * (2 * np.pi / n)
        data = {k: (("time", "z", "y", "x"), rng.standard_normal((snapshots, n, n, n)))
                for k in names}
        path = tmp_path / "three_d.nc"
        xr.Dataset(data, coords={"time": np.arange(snapshots) * interval, "z": c, "y": c,
                                 "x": c}).to_netcdf(path)
        return path

    return make


@pytest.fixture
def three_d_file(random_3d_file):
    """Random 3-D velocity, 3 snapshots of 16^3 on [0, 2 pi)^3 (slab-task tests)."""
    return random_3d_file(3, interval=0.5)


@pytest.fixture
def file_stores(monkeypatch):
    """The paths of the arrays closure.outofcore put in files (its _FileArray), in order: what
    a run spilled past its memory budget."""
    from closure import outofcore

    made = []
    init = outofcore._FileArray.__init__

    def spy(self, *a, **k):
        made.append(a[0])
        init(self, *a, **k)

    monkeypatch.setattr(outofcore._FileArray, "__init__", spy)
    return made
