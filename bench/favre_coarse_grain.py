"""Benchmark: Favre (density-weighted) coarse-graining against the incompressible one, same run.

    python bench/favre_coarse_grain.py                  # 3-D 128^3, Gaussian filter, ratio 4
    python bench/favre_coarse_grain.py --n 64 --dims 2 --repeat 5

Fields: smooth random velocity, density, pressure and temperature (independent, band-limited
Gaussian noise; the density log-normal). Contenders, each on the same snapshot, timed with
``time.perf_counter`` (fastest of ``--repeat`` runs, alternating) and with the peak of traced
numpy allocations (``tracemalloc``):

  incompressible  closure.residuals.coarse_grain_snapshot: stress and pi (one spectral step
                  per field, folded onto the coarse grid)
  favre           closure.favre.favre_coarse_grain: stress and pi (fine-grid filter of each
                  density-weighted product, quotients and derivatives on the fine grid)
  favre, all      every Favre target (stress, force, heat flux, pressure-dilatation, pi)

Prints the time and memory ratios against the incompressible contender. No assertion: a
measurement (run it on a quiet machine; the figures move with load).
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from closure.favre import favre_coarse_grain
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot
from closure.residuals import coarse_grain_snapshot, stress_names


def smooth(grid: Grid, rng: np.random.Generator, top: int) -> np.ndarray:
    fh = np.fft.rfftn(rng.standard_normal(grid.shape))
    for a, n in enumerate(grid.shape):
        m = np.abs(np.fft.fftfreq(n, 1.0 / n)) if a < grid.ndim - 1 else np.arange(n // 2 + 1)
        shape = [1] * grid.ndim
        shape[a] = m.size
        fh *= (m <= top).reshape(shape)
    f = np.fft.irfftn(fh, s=grid.shape, axes=tuple(range(grid.ndim)))
    return (f - f.mean()) / f.std()


def measure(run, repeat: int) -> tuple[float, float]:
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - t)
    tracemalloc.start()
    run()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return best, peak / 2**20


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=128)
    parser.add_argument("--dims", type=int, default=3, choices=(2, 3))
    parser.add_argument("--ratio", type=int, default=4)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    dims = ("z", "y", "x")[3 - args.dims:]
    grid = Grid.regular((args.n,) * args.dims, 2 * np.pi, dims=dims)
    rng = np.random.default_rng(0)
    top = args.n // 6
    fields = {c: smooth(grid, rng, top) for c in ("u", "v", "w")[:args.dims]}
    fields["rho"] = np.exp(0.2 * smooth(grid, rng, top))
    fields["T"] = 300 * np.exp(0.05 * smooth(grid, rng, top))
    fields["p"] = fields["rho"] * 287.0 * fields["T"]
    snap = Snapshot(fields, grid, 0, None)
    cg = make_coarse_graining("gaussian", grid, args.ratio)
    stress = [*stress_names(dims), "pi"]
    contenders = {
        "incompressible": lambda: coarse_grain_snapshot(snap, cg, targets=stress),
        "favre": lambda: favre_coarse_grain(snap, cg, targets=stress),
        "favre, all": lambda: favre_coarse_grain(snap, cg),
    }
    results = {name: measure(run, args.repeat) for name, run in contenders.items()}
    t0, m0 = results["incompressible"]
    print(f"{args.dims}-D {args.n}^{args.dims}, Gaussian filter, ratio {args.ratio}, "
          f"fastest of {args.repeat}")
    print(f"{'contender':16s} {'time s':>9s} {'ratio':>7s} {'peak MiB':>9s} {'ratio':>7s}")
    for name, (t, m) in results.items():
        print(f"{name:16s} {t:9.3f} {t / t0:7.2f} {m:9.1f} {m / m0:7.2f}")


if __name__ == "__main__":
    main()
