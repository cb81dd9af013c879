"""Zarr products against netCDF products, in the same run.

On generated 2-D turbulence (closure.synth turb2d), the pieces of every snapshot are written
once; then they are assembled into the netCDF product (the baseline) and into the Zarr product
(netCDF assembly + conversion to a zipped Zarr store). Printed: wall times and their ratio,
file sizes and their ratio, and the conversion's peak traced memory (tracemalloc, numpy
included) against the product size: the conversion reads blocks of snapshots, so the ratio
falls as snapshots grow.

    python bench/zarr_product.py                     # defaults: 256 x 256, 32 snapshots
    python bench/zarr_product.py --n 128 --snapshots 16
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closure import products  # noqa: E402
from closure.spec import parse_coarse_grain_spec  # noqa: E402
from closure.synth import turb2d, write  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=256)
    ap.add_argument("--snapshots", type=int, default=32)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        fine = write(turb2d(n=args.n, snapshots=args.snapshots, spinup=0.2, interval=0.05),
                     tmp / "fine.nc")
        spec = parse_coarse_grain_spec({"input": {"path": str(fine)},
                                        "filters": [{"ratio": 4}, {"ratio": 2}]})
        plan = products.plan(spec)
        for i in plan["snapshots"]:
            products.write_pieces(plan, i, tmp / "pieces")
        t0 = time.perf_counter()
        nc = products.assemble(plan, tmp / "pieces", tmp / "p.nc")
        t_nc = time.perf_counter() - t0
        t0 = time.perf_counter()
        zp = products.assemble({**plan, "format": "zarr"}, tmp / "pieces", tmp / "p.zarr.zip")
        t_zarr = time.perf_counter() - t0
        tracemalloc.start()
        products.netcdf_to_zarr_zip(nc, tmp / "again.zarr.zip",
                                    [None, "setting_0", "setting_1"])
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        s_nc, s_zarr = nc.stat().st_size, zp.stat().st_size
        print(f"grid {args.n}^2, {args.snapshots} snapshots, 2 settings")
        print(f"assemble netCDF: {t_nc:.2f} s; Zarr (assemble + convert): {t_zarr:.2f} s; "
              f"ratio {t_zarr / t_nc:.2f}")
        print(f"size netCDF {s_nc / 1e6:.1f} MB, Zarr zip {s_zarr / 1e6:.1f} MB; "
              f"ratio {s_zarr / s_nc:.2f}")
        print(f"conversion peak traced memory {peak / 1e6:.1f} MB = "
              f"{peak / s_nc:.2f} x the product size")


if __name__ == "__main__":
    main()
