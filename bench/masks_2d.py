"""Benchmark: coarse-graining a 2-D snapshot with land against the same snapshot without, same run.

    python bench/masks_2d.py                 # 1024^2, Gaussian, ratio 4, default width
    python bench/masks_2d.py --n 512 --repeat 5

Fields: a smooth random divergence-free velocity (modes |k| <= 8) on a periodic square; land is
a disc of a fifth of the domain. Contenders, each the fastest of ``--repeat`` runs:

  spectral    closure.residuals.coarse_grain_snapshot without a mask (one spectral step)
  zero        the same snapshot with the disc as land, land as zero velocity (real-space
              kernels with wrap-around, fd4 fine-grid derivatives, the valid-point rule)
  fluid       the same, fluid-only normalised filtering (each stack filtered twice: w f and w)

Targets: the stress (what a stress fit asks for). Prints the times and their ratios to the
spectral run. No assertion: a measurement; run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import time

import numpy as np


def smooth_flow(grid, kmax, seed=0):
    rng = np.random.default_rng(seed)
    y, x = grid.mesh()
    dx, dy = np.zeros(grid.shape), np.zeros(grid.shape)
    for kx in range(-kmax, kmax + 1):
        for ky in range(0, kmax + 1):
            if (kx, ky) != (0, 0) and kx * kx + ky * ky <= kmax * kmax:
                a, ph = rng.normal(), rng.uniform(0, 2 * np.pi)
                s = np.sin(kx * x + ky * y + ph)
                dx -= a * kx * s
                dy -= a * ky * s
    return {"u": dy, "v": -dx}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1024)
    ap.add_argument("--ratio", type=int, default=4)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)

    from closure.filters import make_coarse_graining
    from closure.grid import Grid
    from closure.io import Snapshot
    from closure.residuals import coarse_grain_snapshot

    g = Grid.regular((args.n, args.n), 2 * np.pi)
    fields = smooth_flow(g, 8)
    j, i = np.meshgrid(np.arange(args.n), np.arange(args.n), indexing="ij")
    fluid = (j - args.n / 2) ** 2 + (i - args.n / 2) ** 2 > (args.n / 10) ** 2
    cg = make_coarse_graining("gaussian", g, args.ratio)
    targets = ["tau_xx", "tau_xy", "tau_yy"]

    runs = {
        "spectral": lambda: coarse_grain_snapshot(Snapshot(fields, g, 0, None), cg,
                                                  targets=targets),
        "zero": lambda: coarse_grain_snapshot(Snapshot(fields, g, 0, None, fluid), cg,
                                              targets=targets, scheme="fd4",
                                              derivative_passes=2),
        "fluid": lambda: coarse_grain_snapshot(Snapshot(fields, g, 0, None, fluid), cg,
                                               targets=targets, land="fluid", scheme="fd4",
                                               derivative_passes=2),
    }
    best = {}
    for _ in range(args.repeat):
        for name, run in runs.items():
            t0 = time.perf_counter()
            cs = run()
            best[name] = min(best.get(name, np.inf), time.perf_counter() - t0)
            if cs.valid is not None:
                excluded = int(cs.valid.size - cs.valid.sum())
    print(f"{args.n}^2, Gaussian, ratio {args.ratio}: {excluded} of {cs.valid.size} coarse "
          "points excluded by the land disc")
    for name, t in best.items():
        print(f"  {name:<9} {t * 1e3:8.1f} ms   x{t / best['spectral']:.2f}")


if __name__ == "__main__":
    main()
