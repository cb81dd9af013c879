"""Benchmark: discovery from one file against the same data as one file per snapshot and as a
Zarr store, same run.

    python bench/inputs_many_files.py                  # 256^2 x 16 snapshots
    python bench/inputs_many_files.py --n 128 --snapshots 8 --repeat 3

Fields: random divergence-free 2-D velocity (a streamfunction of random low modes), written
once as one netCDF file, as one netCDF file per snapshot (xarray), and as a Zarr store.
Each layout runs closure.pipeline.discover (Gaussian filter, ratio 4, the default library,
20 resamples) in this process after a warm-up on the one-file layout; with ``--repeat N``
the layouts run N times each, alternately, and the fastest run of each is compared (the
machine may be shared). Prints each layout's time and its ratio to the one-file time, and
checks the models agree. No assertion on time: a measurement.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import xarray as xr


def fields(n: int, snapshots: int, seed: int = 0) -> xr.Dataset:
    from closure.derivatives import derivative
    from closure.grid import Grid

    rng = np.random.default_rng(seed)
    g = Grid.regular((n, n), 2 * np.pi)
    y, x = g.mesh()
    us, vs = [], []
    for _ in range(snapshots):
        psi = np.zeros((n, n))
        for kx in range(-6, 7):
            for ky in range(0, 7):
                if (kx, ky) != (0, 0):
                    k2 = kx * kx + ky * ky
                    psi += rng.normal() / k2 * np.cos(kx * x + ky * y + rng.uniform(0, 6.3))
        us.append(derivative(psi, g, "y"))
        vs.append(-derivative(psi, g, "x"))
    c = g.coords("x")
    return xr.Dataset({"u": (("time", "y", "x"), np.array(us)),
                       "v": (("time", "y", "x"), np.array(vs))},
                      coords={"time": np.arange(snapshots, dtype=float), "y": c, "x": c})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=256)
    ap.add_argument("--snapshots", type=int, default=16)
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args()
    from closure import pipeline
    from closure.spec import parse_spec

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        ds = fields(args.n, args.snapshots)
        ds.to_netcdf(tmp / "one.nc")
        (tmp / "run").mkdir()
        for i in range(args.snapshots):
            ds.isel(time=slice(i, i + 1)).to_netcdf(tmp / "run" / f"snap_{i:03d}.nc")
        ds.to_zarr(tmp / "store.zarr", consolidated=False)
        layouts = {"one file": str(tmp / "one.nc"),
                   f"{args.snapshots} files": str(tmp / "run" / "snap_*.nc"),
                   "zarr store": str(tmp / "store.zarr")}

        def spec(path):
            return parse_spec({"input": {"path": path}, "filter": {"ratio": 4}})

        pipeline.discover(spec(layouts["one file"]))  # warm-up: imports, caches
        best = {k: float("inf") for k in layouts}
        models = {}
        for _ in range(args.repeat):
            for name, path in layouts.items():
                t = time.perf_counter()
                models[name] = pipeline.discover(spec(path))
                best[name] = min(best[name], time.perf_counter() - t)
        base = best["one file"]
        print(f"{args.n}^2 x {args.snapshots} snapshots, fastest of {args.repeat}")
        for name, t in best.items():
            diff = np.max(np.abs(models[name].coefficients_scaled
                                 - models["one file"].coefficients_scaled))
            print(f"  {name:<12} {t:7.2f} s   ratio {t / base:5.2f}   max |coefficient "
                  f"difference| {diff:.1e}")


if __name__ == "__main__":
    main()
