"""Benchmark: one 3-D snapshot's fine-grid pass on numpy and on torch (CPU, and GPU if any).

    python bench/gpu_pass.py                          # 256^3 and 512^3, stress targets
    python bench/gpu_pass.py --sizes 128 --repeat 3 --targets stress pi

The snapshot: a random band-limited divergence-free velocity on [0, 2 pi)^3 (energy spectrum
~ k^4 exp(-2 (k/k0)^2), k0 = n/16), built in memory. The pass: Gaussian filter of the default
width (2 ratio spacings), ratio 4, the exact subgrid terms asked for (default: the six stress
components, what a stress fit needs).

Contenders, each closure.residuals.coarse_grain_snapshot (the one periodic pass, what the
pipeline runs) on a backend of closure.backend, timed from numpy input to numpy output
(host-device copies included), the fastest of ``--repeat`` runs after one warm-up run (FFT
plans, CUDA context):

  numpy          numpy + scipy.fft, float64 (the baseline; the default path)
  torch-cpu      the same code on torch tensors on the CPU, float64 and float32
  torch-cuda     the same on the GPU, float64 and float32 (when torch sees one)
  numpy float32  numpy in float32, with --float32-numpy

Prints seconds, the ratio to the baseline, and the largest error relative to each target's
largest value against numpy float64 (float64 should be ~1e-14, float32 ~1e-6). No
assertion: a measurement; run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from functools import partial
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def velocity(n: int, seed: int = 0) -> dict[str, np.ndarray]:
    """Random divergence-free band-limited velocity (u, v, w) on an n^3 periodic grid."""
    rng = np.random.default_rng(seed)
    k = np.fft.fftfreq(n, 1.0 / n)
    kr = np.fft.rfftfreq(n, 1.0 / n)
    kz, ky, kx = np.meshgrid(k, k, kr, indexing="ij", sparse=True)
    kk = np.sqrt(kx**2 + ky**2 + kz**2)
    k0 = n / 16
    amp = np.sqrt(kk**4 * np.exp(-2 * (kk / k0) ** 2)) / np.maximum(kk, 1.0)
    out = {}
    spectra = []
    for _ in range(3):
        a = amp * (rng.normal(size=kk.shape) + 1j * rng.normal(size=kk.shape))
        spectra.append(a)
    # project out the divergent part: a - k (k . a) / |k|^2
    kvec = (kx, ky, kz)
    dot = sum(kd * a for kd, a in zip(kvec, spectra, strict=True))
    k2 = np.where(kk > 0, kk**2, 1.0)
    for name, kd, a in zip("uvw", kvec, spectra, strict=True):
        out[name] = np.fft.irfftn(a - kd * dot / k2, s=(n, n, n), axes=(0, 1, 2))
    scale = np.sqrt(np.mean(out["u"] ** 2))
    return {c: np.ascontiguousarray(v / scale) for c, v in out.items()}


def _time(fn, repeat: int, sync=lambda: None):
    fn()  # warm-up
    sync()
    best, result = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        result = fn()
        sync()
        best = min(best, time.perf_counter() - t)
    return best, result


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[256, 512])
    parser.add_argument("--ratio", type=int, default=4)
    parser.add_argument("--repeat", type=int, default=2)
    parser.add_argument("--targets", nargs="+", default=["stress"],
                        help="stress, force, pi or target names")
    parser.add_argument("--devices", nargs="+", default=["numpy", "cpu", "cuda"])
    parser.add_argument("--float32-numpy", action="store_true",
                        help="also time numpy in float32")
    parser.add_argument("--json", help="also write the results to this file")
    args = parser.parse_args(argv)

    from closure.backend import get_backend
    from closure.errors import UserError
    from closure.filters import make_coarse_graining
    from closure.grid import Grid
    from closure.io import Snapshot
    from closure.residuals import coarse_grain_snapshot, stress_names

    contenders = []
    for device in args.devices:
        precisions = ("float64", "float32") if device != "numpy" else (
            ("float64", "float32") if args.float32_numpy else ("float64",))
        for precision in precisions:
            try:
                contenders.append((f"{'torch-' if device != 'numpy' else ''}{device} "
                                   f"{precision}", get_backend(device, precision)))
            except UserError as exc:
                print(f"skipped {device} {precision}: {exc}")
    contenders.sort(key=lambda c: c[0] != "numpy float64")  # the baseline first
    results = []
    for n in args.sizes:
        grid = Grid.regular((n, n, n), 2 * np.pi, dims=("z", "y", "x"))
        cg = make_coarse_graining("gaussian", grid, args.ratio, None, "grid")
        targets = []
        for t in args.targets:
            targets += {"stress": stress_names(grid.dims),
                        "force": ["force_x", "force_y", "force_z"]}.get(t, [t])
        t0 = time.perf_counter()
        snap = Snapshot(velocity(n), grid, 0, 0.0)
        print(f"\n{n}^3 ({n**3 * 8 / 2**30:.2f} GiB per field), targets {', '.join(targets)} "
              f"(fields built in {time.perf_counter() - t0:.1f} s)")
        reference, base = None, None
        for label, be in contenders:
            try:
                seconds, cs = _time(partial(coarse_grain_snapshot, snap, cg, (), targets,
                                            backend=be), args.repeat, be.synchronize)
            except Exception as exc:  # out of memory on a small device: say so, go on
                print(f"  {label:<24} failed: {type(exc).__name__}: {str(exc)[:120]}")
                continue
            out = cs.targets
            if reference is None and label == "numpy float64":
                reference, base = out, seconds
            if reference is None:
                print(f"  {label:<24} {seconds:9.3f} s   (no numpy float64 baseline)")
                continue
            err = max(float(np.abs(out[k] - reference[k]).max() / np.abs(reference[k]).max())
                      for k in targets)
            print(f"  {label:<24} {seconds:9.3f} s   x{base / seconds:7.2f} vs numpy float64   "
                  f"max rel. error {err:.1e}")
            results.append({"n": n, "contender": label, "seconds": seconds,
                            "speedup": base / seconds, "max_relative_error": err})
            del out, cs
            if be.name == "torch" and be.device == "cuda":
                be.torch.cuda.empty_cache()
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(results, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
