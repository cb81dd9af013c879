"""Benchmark: peak memory and time of one 3-D snapshot, in memory and by slabs, same run.

    python bench/outofcore_3d.py                       # 128^3 and 256^3
    python bench/outofcore_3d.py --n 64 128 --repeat 2
    python bench/outofcore_3d.py --n 512 --budget 0.25 # 512^3 where disk and time allow
    python bench/outofcore_3d.py --n 128 --slab-tasks 4   # also the queue's split pass
    python bench/outofcore_3d.py --sizes 1024 --file-dtype f4 --band-limited \
        --memory-limit 4G --skip-memory-run --folder /tmp   # 1024^3 (12 GiB file)

Data: one snapshot of random 3-D velocity (u, v, w; the values do not matter to the cost),
written once to a temporary netCDF file chunked in z-slabs of 8 points, so a slab read touches
only its own chunks; ``--file-dtype f4`` stores it in float32 (half the file; the pass still
runs in float64), ``--band-limited`` makes it a random sum of Fourier modes up to wavenumber 8
in each direction (written slab by slab, as white noise is) instead of white noise. Each
contender runs in its own subprocess, after a warm-up on a tiny grid (imports, FFT set-up);
peak memory is the kernel's peak resident set (VmHWM), reset after the warm-up through
/proc/self/clear_refs, minus the resident set when the work starts.

  in memory   closure.io FieldSource.snapshot + closure.residuals.coarse_grain_snapshot
  by slabs    closure.outofcore.coarse_grain_out_of_core(SourceSlabs(...)) with a budget of
              ``--budget`` times the snapshot's size, or ``--memory-limit`` (intermediates
              beyond half the budget go to files in the temporary folder)
  slab tasks  (with ``--slab-tasks K``) closure.slabtasks.coarse_grain_by_tasks: the queue's
              split pass, its K tasks per phase run one after the other in one process, with
              the same budget per task, pieces in files

Gaussian filter, ratio 4, targets ``--targets`` (default the stress; ``force`` also builds the
fine filtered velocity in files). Prints each peak rise against the snapshot's own size (the
velocity in float64) and the time ratios slabs / in memory and slab tasks / slabs, the time to
write the file and the spill disk used at most. ``--repeat N`` runs each N times,
alternately, and keeps the fastest (the machine may be shared); peaks are the largest seen.
No assertion: a measurement.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from peakmem import peak_mb, start_memory  # noqa: E402  (bench/ is the script's folder)

RATIO = 4


#: largest wavenumber of the band-limited fields
BAND = 8


def _band_limited(rng, n: int):
    """slab(z0, z1) of a random real sum of Fourier modes |k_i| <= BAND (about unit rms)."""
    k = np.arange(-BAND, BAND + 1)
    m = len(k)
    x = np.arange(n) * (2 * np.pi / n)
    E = np.exp(1j * np.outer(x, k))  # (n, m): e^{i k x}, the same in every direction
    C = (rng.standard_normal((m, m, m)) + 1j * rng.standard_normal((m, m, m))) / np.sqrt(m**3)

    def slab(z0, z1):
        A = np.einsum("zk,kab->zab", E[z0:z1], C)  # (s, m, m)
        return np.real(E @ A @ E.T)  # (s, n, n)

    return slab


def write_snapshot(path: Path, n: int, seed: int = 0, dtype: str = "f8",
                   band_limited: bool = False, snapshots: int = 1) -> Path:
    """A netCDF file of ``snapshots`` random 3-D velocity fields (each its own random draw),
    chunked in z-slabs of 8 points."""
    import netCDF4

    rng = np.random.default_rng(seed)
    x = np.arange(n) * (2 * np.pi / n)
    slab = min(8, n)
    with netCDF4.Dataset(path, "w", format="NETCDF4") as ds:
        ds.createDimension("time", None)
        for d in ("z", "y", "x"):
            ds.createDimension(d, n)
            v = ds.createVariable(d, "f8", (d,))
            v[:] = x
            v.units = "m"
        t = ds.createVariable("time", "f8", ("time",))
        t.units = "s"
        t[:] = np.arange(snapshots, dtype=float)
        for c in ("u", "v", "w"):
            var = ds.createVariable(c, dtype, ("time", "z", "y", "x"),
                                    chunksizes=(1, slab, n, n))
            var.units = "m s-1"
            for i in range(snapshots):
                make = _band_limited(rng, n) if band_limited else \
                    (lambda z0, z1: rng.standard_normal((z1 - z0, n, n)))
                for z0 in range(0, n, slab):
                    var[i, z0:z0 + slab] = make(z0, min(n, z0 + slab)).astype(dtype)
    return path


def discover_run(path: Path, memory_limit: str | None, folder: Path) -> dict:
    """``closure discover`` on ``path`` in a process of its own (ratio 4, default width and
    library, ``--memory-limit``): wall time and the child's peak resident set."""
    import resource

    out = folder / "model.json"
    cmd = [sys.executable, "-c", "import sys; from closure.cli import main; sys.exit(main())",
           "discover", str(path), "--ratio", str(RATIO), "--resamples", "2", "-q",
           "-o", str(out), *(["--memory-limit", memory_limit] if memory_limit else [])]
    env = dict(os.environ, TMPDIR=str(folder))
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"discover failed:\n{proc.stderr}")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0  # KiB -> MiB
    return {"seconds": seconds, "peak_mb": peak, "model": json.loads(out.read_text())}






def run(kind: str, path: str, budget_bytes: int, targets: list[str], tmp: str) -> dict:
    from closure.filters import make_coarse_graining
    from closure.io import open_fields
    from closure.outofcore import SourceSlabs, coarse_grain_out_of_core
    from closure.residuals import coarse_grain_snapshot
    from closure.slabtasks import coarse_grain_by_tasks

    spill = _SpillWatch(tmp)
    with open_fields(path) as src:
        cg = make_coarse_graining("gaussian", src.grid, RATIO)
        before = start_memory()
        t0 = time.perf_counter()
        if kind == "memory":
            cs = coarse_grain_snapshot(src.snapshot(0), cg, targets=targets)
        elif kind == "slabs":
            spill.start()
            cs = coarse_grain_out_of_core(SourceSlabs(src, 0), cg, targets=targets,
                                          memory_limit=budget_bytes, workdir=tmp)
        else:
            spill.start()
            cs = coarse_grain_by_tasks(SourceSlabs(src, 0), cg, int(kind.split(":")[1]),
                                       targets=targets, memory_limit=budget_bytes, folder=tmp)
        seconds = time.perf_counter() - t0
        peak = peak_mb()
    check = float(sum(np.abs(a).sum() for a in cs.targets.values()))
    return {"seconds": seconds, "rise_mb": peak - before, "peak_mb": peak, "check": check,
            "spill_gb": spill.stop() / 2**30}


class _SpillWatch:
    """The most bytes under a folder while the work runs (sampled every 2 s by a thread)."""

    def __init__(self, folder: str):
        self.folder, self.most, self._stop = folder, 0, None

    def _size(self) -> int:
        total = 0
        for root, _, files in os.walk(self.folder):
            for f in files:
                try:
                    total += os.stat(os.path.join(root, f)).st_blocks * 512
                except OSError:
                    pass
        return total

    def start(self) -> None:
        import threading

        self._stop = threading.Event()

        def watch():
            while not self._stop.wait(2.0):
                self.most = max(self.most, self._size())

        threading.Thread(target=watch, daemon=True).start()

    def stop(self) -> int:
        if self._stop is not None:
            self._stop.set()
        return self.most


def _worker(args) -> None:
    # warm-up on a tiny file: imports and FFT set-up are not the work
    with tempfile.TemporaryDirectory() as tmp:
        small = write_snapshot(Path(tmp) / "warm.nc", 16)
        run(args.worker, str(small), 1 << 20, args.targets, tmp)
        print(json.dumps(run(args.worker, args.file, args.budget_bytes, args.targets, tmp)))


def _spawn(kind: str, path: Path, budget_bytes: int, targets: list[str]) -> dict:
    cmd = ["nice", "-n", "10", sys.executable, __file__, "--worker", kind, "--file", str(path),
           "--budget-bytes", str(budget_bytes), "--targets", *targets]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", "--sizes", type=int, nargs="+", default=[128, 256],
                    help="grid sizes")
    ap.add_argument("--budget", type=float, default=0.25,
                    help="memory budget of the slab run, as a fraction of the snapshot's size")
    ap.add_argument("--memory-limit", default=None,
                    help="memory budget of the slab run as a size (e.g. 4G), instead of --budget")
    ap.add_argument("--slab-tasks", type=int, default=0,
                    help="also run the queue's split pass with this many tasks per phase")
    ap.add_argument("--file-dtype", choices=("f8", "f4"), default="f8",
                    help="how the data file stores the velocity")
    ap.add_argument("--band-limited", action="store_true",
                    help="random Fourier modes up to wavenumber 8, not white noise")
    ap.add_argument("--targets", nargs="+", default=["tau_xx", "tau_xy", "tau_yy", "tau_xz",
                                                     "tau_yz", "tau_zz"])
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--skip-memory-run", action="store_true",
                    help="only the slab run (when the in-memory one does not fit)")
    ap.add_argument("--folder", type=Path, default=None, help="where the data file goes")
    ap.add_argument("--discover", type=int, default=0, metavar="S",
                    help="instead: a file of S snapshots (at least 2) and the whole "
                         "`closure discover` on it, with --memory-limit (peak and time)")
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--file", help=argparse.SUPPRESS)
    ap.add_argument("--budget-bytes", type=int, default=0, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        _worker(args)
        return 0
    folder = Path(tempfile.mkdtemp(prefix="closure-ooc-", dir=args.folder))
    from closure.outofcore import parse_memory

    limit = parse_memory(args.memory_limit)
    item = 4 if args.file_dtype == "f4" else 8
    print(f"one 3-D snapshot, Gaussian filter, ratio {RATIO}, targets {' '.join(args.targets)}; "
          "slab budget " + (f"{limit / 2**30:.2f} GiB" if limit else
                            f"{args.budget:g} x the snapshot")
          + f"; {os.cpu_count()} cores; data in {folder} ({args.file_dtype}"
          + (", band-limited)" if args.band_limited else ", white noise)"), flush=True)
    try:
        if args.discover:
            for n in args.n:
                t0 = time.perf_counter()
                path = write_snapshot(folder / f"snaps_{n}.nc", n, dtype=args.file_dtype,
                                      band_limited=args.band_limited, snapshots=args.discover)
                print(f"  {n}^3 x {args.discover}: file of {path.stat().st_size / 2**30:.2f} "
                      f"GiB written in {time.perf_counter() - t0:.0f} s", flush=True)
                r = discover_run(path, args.memory_limit, folder)
                snap_mb = 3 * 8 * n**3 / 2**20
                terms = [t["name"] for t in r["model"]["terms"] if t.get("active")]
                print(f"  {n}^3 x {args.discover}: closure discover {r['seconds']:.0f} s, peak "
                      f"resident {r['peak_mb']:.0f} MiB = {r['peak_mb'] / snap_mb:.2f}x one "
                      f"snapshot in float64 ({snap_mb:.0f} MiB); active terms: "
                      f"{', '.join(terms) or 'none'}", flush=True)
                path.unlink()
            return 0
        for n in args.n:
            size_mb = 3 * 8 * n**3 / 2**20
            need = 3 * n**3 * (item + 8)  # the file, and spill files (~5 N^3 at ratio 4)
            free = shutil.disk_usage(folder).free
            if need > free:
                print(f"  {n}^3: skipped, needs ~{need / 2**30:.1f} GiB of disk, "
                      f"{free / 2**30:.1f} free")
                continue
            t0 = time.perf_counter()
            path = write_snapshot(folder / f"snap_{n}.nc", n, dtype=args.file_dtype,
                                  band_limited=args.band_limited)
            print(f"  {n}^3: file of {path.stat().st_size / 2**30:.2f} GiB written in "
                  f"{time.perf_counter() - t0:.0f} s", flush=True)
            budget = limit or int(args.budget * 3 * 8 * n**3)
            mem, slabs, split = [], [], []
            for _ in range(args.repeat):
                if not args.skip_memory_run:
                    mem.append(_spawn("memory", path, budget, args.targets))
                slabs.append(_spawn("slabs", path, budget, args.targets))
                if args.slab_tasks:
                    split.append(_spawn(f"tasks:{args.slab_tasks}", path, budget,
                                        args.targets))
            s = min(slabs, key=lambda r: r["seconds"])
            s_rise = max(r["rise_mb"] for r in slabs)
            line = (f"  {n}^3 (velocity {size_mb:.0f} MiB): by slabs {s['seconds']:.2f} s, "
                    f"peak +{s_rise:.0f} MiB = {s_rise / size_mb:.2f}x the snapshot "
                    f"(process peak {s['peak_mb']:.0f} MiB, spill {s['spill_gb']:.2f} GiB)")
            if split:
                t = min(split, key=lambda r: r["seconds"])
                t_rise = max(r["rise_mb"] for r in split)
                agree = abs(t["check"] - s["check"]) <= 1e-9 * abs(s["check"])
                line += (f"; {args.slab_tasks} slab tasks {t['seconds']:.2f} s, peak "
                         f"+{t_rise:.0f} MiB, spill {t['spill_gb']:.2f} GiB, time tasks / "
                         f"slabs {t['seconds'] / s['seconds']:.2f}x, agree: {agree}")
            if mem:
                m = min(mem, key=lambda r: r["seconds"])
                m_rise = max(r["rise_mb"] for r in mem)
                agree = abs(m["check"] - s["check"]) <= 1e-9 * abs(m["check"])
                line += (f"; in memory {m['seconds']:.2f} s, peak +{m_rise:.0f} MiB = "
                         f"{m_rise / size_mb:.2f}x; time slabs / memory "
                         f"{s['seconds'] / m['seconds']:.2f}x, peak slabs / memory "
                         f"{s_rise / m_rise:.2f}x; results agree: {agree}")
            print(line, flush=True)
            path.unlink()
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
