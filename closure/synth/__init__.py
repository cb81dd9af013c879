"""Demo-data solvers of our own: 1-D Burgers, forced 2-D turbulence, decaying 3-D turbulence,
compressible 2-D/3-D turbulence of an ideal gas.

Each solver returns an ``xarray.Dataset`` (CF-style, dims ``(time, [z,] y, x)``, coordinates in
m and s); :func:`write` stores one atomically as netCDF.
"""

from __future__ import annotations

import os
from pathlib import Path

import xarray as xr

from closure.synth.burgers import burgers
from closure.synth.compressible import compressible
from closure.synth.turb2d import turb2d
from closure.synth.turb3d import turb3d

SOLVERS = {"burgers": burgers, "turb2d": turb2d, "turb3d": turb3d,
           "compressible": compressible}

__all__ = ["SOLVERS", "burgers", "compressible", "turb2d", "turb3d", "write"]


def write(ds: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write a solver's dataset to netCDF at ``path`` (atomic: temp file + rename)."""
    from closure.io import write_netcdf

    return write_netcdf(ds, path)
