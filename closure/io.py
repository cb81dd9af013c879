"""Reading fields from user files and writing our own files.

This is the only module that knows file formats. Input files are opened read-only and never
written; every file we write goes to a temporary name in the target folder and is renamed into
place, so a reader never sees a half-written file.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

import xarray as xr


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
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return path
