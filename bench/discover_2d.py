"""Benchmark: closure discovery on 2-D fields against a straightforward baseline, same run.

    python bench/discover_2d.py                     # 1024^2 x 32 snapshots (the full size)
    python bench/discover_2d.py --n 256 --snapshots 16 --memory-snapshots 8 32

Fields: random divergence-free velocity from a streamfunction with random phases and an energy
spectrum E(k) ~ k^3 below the peak wavenumber and k^-3 above it (the 2-D enstrophy range),
band-limited to 2/3 of the Nyquist wavenumber; independent snapshots, written once to a
temporary netCDF file. Both contenders read that file.

Contenders (each in its own subprocess, timed after a warm-up run on a tiny file that does the
imports; peak memory: the kernel's peak resident set, reset after the warm-up through
/proc/self/clear_refs, minus the resident set when the work starts; where that reset is not
available, ``resource.getrusage`` over the whole process):

  discover   closure.pipeline.discover: Gaussian filter (spectral), ratio 4, default width,
             the default stress library (9 terms), thresholded least squares with blocked
             cross-validation, 20 resamples, scores and the pointwise transfer pass on the
             held-out snapshots
  baseline   per snapshot scipy.ndimage.gaussian_filter (same width, periodic wrap), every
             ratio-th point, the same 9 terms from numpy.gradient on the coarse grid, all
             snapshots stacked into one design matrix, scikit-learn LassoCV (5 folds, 100
             penalties), R^2 on the held-out snapshots

Whole process (``--whole-process``, start-up included): wall time from starting the process to
its exit, nothing warmed up, of

  closure discover   the command line, ``closure discover FILE -o model.json -q``
  six-candidate      a short hand-written script, ``python bench/discover_2d.py --worker six``:
             per snapshot scipy.ndimage.gaussian_filter, every ratio-th point, six tensor
             candidates (|S| S, A A^T, S, S S, S R - R S, R R) from numpy.gradient, a stacked
             design matrix, scikit-learn LassoCV, R^2 on the held-out snapshots

Then the peak memory of discover on the first ``--memory-snapshots`` A and B snapshots (it
should not grow with the number of snapshots: statistics are O(p^2) per snapshot).
Prints the time ratio, the peak-memory ratios and where discover spends its time. With
``--repeat N`` the contenders run N times each, alternately, and the fastest run of each is
compared (the machine may be shared). No assertion: a measurement.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from peakmem import peak_mb, start_memory  # (bench/ is the script's folder)

RATIO = 4


# ---------------------------------------------------------------------- data
def write_fields(path: Path, n: int, snapshots: int, seed: int = 0) -> Path:
    """Write ``snapshots`` random band-limited 2-D velocity fields on [0, 2 pi)^2 (netCDF)."""
    import netCDF4

    rng = np.random.default_rng(seed)
    k = np.fft.fftfreq(n, 1.0 / n)
    kr = np.fft.rfftfreq(n, 1.0 / n)
    ky, kx = np.meshgrid(k, kr, indexing="ij")
    kk = np.hypot(kx, ky)
    k0 = 8.0
    energy = (kk / k0) ** 3 / (1 + (kk / k0) ** 6)
    amplitude = np.zeros_like(kk)
    nz = kk > 0
    amplitude[nz] = np.sqrt(energy[nz] / kk[nz] ** 3)
    amplitude[kk > (2.0 / 3.0) * (n // 2)] = 0.0
    x = np.arange(n) * (2 * np.pi / n)
    tmp = path.with_name(f".{path.name}.tmp")
    with netCDF4.Dataset(tmp, "w", format="NETCDF4") as ds:
        ds.createDimension("time", None)
        ds.createDimension("y", n)
        ds.createDimension("x", n)
        for name, vals, units in (("y", x, "m"), ("x", x, "m")):
            v = ds.createVariable(name, "f8", (name,))
            v[:] = vals
            v.units = units
        t = ds.createVariable("time", "f8", ("time",))
        t.units = "s"
        u = ds.createVariable("u", "f8", ("time", "y", "x"), chunksizes=(1, n, n))
        v = ds.createVariable("v", "f8", ("time", "y", "x"), chunksizes=(1, n, n))
        u.units = v.units = "m s-1"
        for i in range(snapshots):
            phase = np.exp(2j * np.pi * rng.random(kk.shape))
            psi = amplitude * phase
            uh, vh = 1j * ky * psi, -1j * kx * psi  # u = d_y psi, v = -d_x psi
            scale = n * n
            t[i] = float(i)
            u[i] = np.fft.irfft2(uh, s=(n, n)) * scale
            v[i] = np.fft.irfft2(vh, s=(n, n)) * scale
    os.replace(tmp, path)
    return path


# ---------------------------------------------------------------------- contenders






#: where discover's time goes: (label, module, attribute path); each is wrapped with a timer
PARTS = (
    ("read snapshots", "closure.io", "FieldSource.snapshot"),
    ("hash the input (a thread, beside the map)", "closure.io", "sha256_file"),
    ("coarse-grain", "closure.residuals", "coarse_grain_snapshot"),
    ("library design", "closure.library", "design"),
    ("statistics", "closure.stats", "SufficientStats.from_design"),
    ("fit and selection", "closure.pipeline", "fit_closure"),
    ("held-out predictions", "closure.library", "predict"),
)


def _wrap_parts() -> tuple[dict, list]:
    import importlib

    spent, undo = {label: 0.0 for label, _, _ in PARTS}, []
    for label, module, attr in PARTS:
        owner = importlib.import_module(module)
        *path, name = attr.split(".")
        for p in path:
            owner = getattr(owner, p)
        raw = owner.__dict__[name] if isinstance(owner, type) else getattr(owner, name)
        func = raw.__func__ if isinstance(raw, classmethod) else raw

        def timed(*a, _func=func, _label=label, **k):
            t = time.perf_counter()
            try:
                return _func(*a, **k)
            finally:
                spent[_label] += time.perf_counter() - t

        setattr(owner, name, classmethod(timed) if isinstance(raw, classmethod) else timed)
        undo.append((owner, name, raw))
    return spent, undo


def run_discover(path: str, snapshots: int | None) -> dict:
    from closure import pipeline
    from closure.spec import parse_spec

    spec = parse_spec({"input": {"path": path,
                                 "snapshots": None if snapshots is None
                                 else list(range(snapshots))},
                       "filter": {"kind": "gaussian", "ratio": RATIO},
                       "fit": {"method": "threshold"}})
    spent, undo = _wrap_parts()  # timers, to show where the time goes
    before = start_memory()
    t0 = time.perf_counter()
    model = pipeline.discover(spec)
    seconds = time.perf_counter() - t0
    peak = peak_mb()
    for owner, name, raw in undo:
        setattr(owner, name, raw)
    return {"seconds": seconds, "peak_rise_mb": peak - before, "peak_mb": peak,
            "test_r2": model.scores["test"]["r2"], "parts": spent,
            "terms": [t.name for t in model.active_terms]}


def _baseline_terms(ub, vb, h, delta):
    """The default stress library's 9 terms from numpy.gradient: list of (xx, xy, yy)."""
    uy, ux = np.gradient(ub, h, h)
    vy, vx = np.gradient(vb, h, h)
    A = np.array([[ux, uy], [vx, vy]])  # A[i, j] = d_j u_i
    S = 0.5 * (A + A.transpose(1, 0, 2, 3))
    R = 0.5 * (A - A.transpose(1, 0, 2, 3))
    smag = np.sqrt(2 * np.einsum("ijab,ijab->ab", S, S))

    def mm(P, Q):
        return np.einsum("ikab,kjab->ijab", P, Q)

    def lap(f):
        fy, fx = np.gradient(f, h, h)
        return np.gradient(fx, h, axis=1) + np.gradient(fy, h, axis=0)

    hess = []
    for f in (ub, vb):
        fy, fx = np.gradient(f, h, h)
        fxy, fxx = np.gradient(fx, h, h)
        fyy = np.gradient(fy, h, axis=0)
        hess.append(np.array([[fxx, fxy], [fxy, fyy]]))
    second = np.array([[np.einsum("abxy,abxy->xy", hess[i], hess[j]) for j in range(2)]
                       for i in range(2)])
    eye = np.eye(2)[:, :, None, None]
    d2, d4 = delta**2, delta**4
    tensors = [d2 * smag * S, d2 / 12 * mm(A, A.transpose(1, 0, 2, 3)), S, d2 * mm(S, S),
               d2 * (mm(S, R) - mm(R, S)), d2 * mm(R, R),
               d2 * np.array([[lap(S[i, j]) for j in range(2)] for i in range(2)]),
               d4 * second, d2 * smag**2 * eye]
    return [(T[0, 0], T[0, 1], T[1, 1]) for T in tensors]


def run_baseline(path: str, snapshots: int | None) -> dict:
    import netCDF4
    import scipy.ndimage
    from sklearn.linear_model import LassoCV

    before = start_memory()
    t0 = time.perf_counter()
    with netCDF4.Dataset(path) as ds:
        n_all = ds.dimensions["time"].size
        n_snap = n_all if snapshots is None else snapshots
        n = ds.dimensions["x"].size
        h_fine = 2 * np.pi / n
        width = 2 * RATIO  # fine spacings, the pipeline's default
        sigma = width / np.sqrt(12.0)  # Gaussian of second moment D^2/12
        delta = width * h_fine
        n_test = max(1, round(0.25 * n_snap))
        rows = {"train": ([], []), "test": ([], [])}
        for i in range(n_snap):
            u = np.asarray(ds["u"][i], dtype=float)
            v = np.asarray(ds["v"][i], dtype=float)

            def bar(f):
                return scipy.ndimage.gaussian_filter(f, sigma, mode="wrap")[::RATIO, ::RATIO]

            ub, vb = bar(u), bar(v)
            tau = (bar(u * u) - ub * ub, bar(u * v) - ub * vb, bar(v * v) - vb * vb)
            terms = _baseline_terms(ub, vb, h_fine * RATIO, delta)
            X = np.stack([np.stack([t[c].ravel() for t in terms], axis=1) for c in range(3)])
            w = np.sqrt(np.array([1.0, 2.0, 1.0]))[:, None]
            part = "test" if i >= n_snap - n_test else "train"
            rows[part][0].append((X * w[:, :, None]).reshape(-1, X.shape[2]))
            rows[part][1].append((np.stack([t.ravel() for t in tau]) * w).ravel())
    Xtr, ytr = np.concatenate(rows["train"][0]), np.concatenate(rows["train"][1])
    Xte, yte = np.concatenate(rows["test"][0]), np.concatenate(rows["test"][1])
    scale = np.sqrt((Xtr**2).mean(axis=0))
    fit = LassoCV(cv=5, fit_intercept=False).fit(Xtr / scale, ytr)
    pred = (Xte / scale) @ fit.coef_
    r2 = 1 - np.sum((yte - pred) ** 2) / np.sum((yte - yte.mean()) ** 2)
    seconds = time.perf_counter() - t0
    peak = peak_mb()
    return {"seconds": seconds, "peak_rise_mb": peak - before, "peak_mb": peak,
            "test_r2": float(r2), "terms": int(np.count_nonzero(fit.coef_))}


def run_six(path: str) -> dict:
    """The six-candidate hand-written script (its imports inside, so a cold process pays them)."""
    import netCDF4
    import scipy.ndimage
    from sklearn.linear_model import LassoCV

    with netCDF4.Dataset(path) as ds:
        n_snap = ds.dimensions["time"].size
        n = ds.dimensions["x"].size
        h = 2 * np.pi / n * RATIO
        sigma = 2 * RATIO / np.sqrt(12.0)
        delta = 2 * RATIO * 2 * np.pi / n
        n_test = max(1, round(0.25 * n_snap))
        X, y = {"train": [], "test": []}, {"train": [], "test": []}
        for i in range(n_snap):
            u, v = (np.asarray(ds[c][i], dtype=float) for c in ("u", "v"))

            def bar(f):
                return scipy.ndimage.gaussian_filter(f, sigma, mode="wrap")[::RATIO, ::RATIO]

            ub, vb = bar(u), bar(v)
            tau = np.stack([bar(u * u) - ub * ub, bar(u * v) - ub * vb, bar(v * v) - vb * vb])
            uy, ux = np.gradient(ub, h, h)
            vy, vx = np.gradient(vb, h, h)
            A = np.array([[ux, uy], [vx, vy]])
            S = 0.5 * (A + A.transpose(1, 0, 2, 3))
            R = 0.5 * (A - A.transpose(1, 0, 2, 3))
            smag = np.sqrt(2 * np.einsum("ijab,ijab->ab", S, S))

            def mm(P, Q):
                return np.einsum("ikab,kjab->ijab", P, Q)

            cands = [delta**2 * smag * S, delta**2 * mm(A, A.transpose(1, 0, 2, 3)), S,
                     delta**2 * mm(S, S), delta**2 * (mm(S, R) - mm(R, S)), delta**2 * mm(R, R)]
            cols = np.stack([np.stack([T[0, 0], T[0, 1], T[1, 1]]).ravel() for T in cands], 1)
            part = "test" if i >= n_snap - n_test else "train"
            X[part].append(cols)
            y[part].append(tau.ravel())
    Xtr, ytr = np.concatenate(X["train"]), np.concatenate(y["train"])
    Xte, yte = np.concatenate(X["test"]), np.concatenate(y["test"])
    scale = np.sqrt((Xtr**2).mean(axis=0))
    fit = LassoCV(cv=5, fit_intercept=False).fit(Xtr / scale, ytr)
    pred = (Xte / scale) @ fit.coef_
    r2 = 1 - np.sum((yte - pred) ** 2) / np.sum((yte - yte.mean()) ** 2)
    return {"test_r2": float(r2), "terms": int(np.count_nonzero(fit.coef_))}


def _whole(kind: str, path: Path, out: Path) -> tuple[float, str]:
    """Wall time of one cold process (start-up included) and its last output line."""
    if kind == "discover":
        cmd = [sys.executable, "-c", "import sys; from closure.cli import main; "
               "sys.exit(main())", "discover", str(path), "-o", str(out), "-q"]
    else:
        cmd = [sys.executable, __file__, "--worker", "six", "--file", str(path)]
    t = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True)
    seconds = time.perf_counter() - t
    if proc.returncode != 0:
        raise SystemExit(f"{kind} (whole process) failed:\n{proc.stderr}")
    return seconds, (proc.stdout.strip().splitlines() or [""])[-1]


def whole_process(path: Path, repeat: int) -> None:
    """closure discover vs the six-candidate script, each a cold process, alternately."""
    ours, six = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(repeat):
            ours.append(_whole("discover", path, Path(tmp) / "model.json")[0])
            seconds, line = _whole("six", path, Path(tmp) / "unused")
            six.append(seconds)
    best = f"fastest of {repeat}: " if repeat > 1 else ""
    print(f"  whole process (start-up included): closure discover {min(ours):.2f} s ({best}"
          f"{', '.join(f'{t:.2f}' for t in ours)}), six-candidate script {min(six):.2f} s "
          f"({', '.join(f'{t:.2f}' for t in six)}; {line})")
    print(f"  time ratio six-candidate script / closure discover: {min(six) / min(ours):.2f}x "
          "(target >= 5x)")


def _worker(kind: str, path: str, snapshots: int | None) -> None:
    if kind == "six":  # cold: the whole process is what is timed
        print(json.dumps(run_six(path)))
        return
    # warm up on a tiny file first (imports, compiled library terms), so the measured rise in
    # peak memory is the work itself for both contenders
    run = run_discover if kind == "discover" else run_baseline
    with tempfile.TemporaryDirectory() as tmp:
        run(str(write_fields(Path(tmp) / "warm.nc", 32, 4)), None)
    print(json.dumps(run(path, snapshots)))


def _run(kind: str, path: Path, snapshots: int | None = None) -> dict:
    cmd = [sys.executable, __file__, "--worker", kind, "--file", str(path)]
    if snapshots is not None:
        cmd += ["--use", str(snapshots)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _max_rise(runs: list[dict]) -> float:
    return max(r["peak_rise_mb"] for r in runs)


def _times(runs: list[dict]) -> str:
    return ", ".join(f"{r['seconds']:.2f}" for r in runs)


def _ratio(a: float, b: float) -> str:
    return f"{a / b:.2f}x" if b > 0 else "n/a (no rise measured)"


def _breakdown(run: dict) -> str:
    """Where discover's time went, as lines. Snapshots mapped side by side (discover's
    default --jobs) each add their own times: the parts may then sum to more than the wall
    time, and "other" is left out."""
    from closure.threads import cores

    total = run["seconds"]
    parts = dict(run["parts"])
    inline = sum(v for k, v in parts.items() if "beside" not in k)
    if inline <= total:
        parts["other (plan, open, held-out files, transfers, model)"] = total - inline
    lines = [f"             {seconds:6.2f} s {100 * seconds / total:4.0f}%  {label}"
             for label, seconds in parts.items()]
    if inline > total:
        lines.append(f"             (map times summed over up to {cores()} snapshots side by "
                     "side: more than the wall time)")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=1024, help="fine grid points per direction")
    ap.add_argument("--snapshots", type=int, default=32, help="snapshots in the timed run")
    ap.add_argument("--memory-snapshots", type=int, nargs=2, default=(16, 64),
                    metavar=("A", "B"), help="snapshot counts of the memory-scaling runs")
    ap.add_argument("--memory-n", type=int, default=None,
                    help="grid of the memory-scaling runs (default --n)")
    ap.add_argument("--skip-baseline", action="store_true")
    ap.add_argument("--skip-memory", action="store_true")
    ap.add_argument("--repeat", type=int, default=1,
                    help="runs of each contender, alternately; the fastest of each is compared")
    ap.add_argument("--keep", type=Path, default=None, help="folder to keep the data files in")
    ap.add_argument("--whole-process", action="store_true",
                    help="also time whole cold processes: closure discover against the "
                         "six-candidate script (start-up included)")
    ap.add_argument("--worker", choices=("discover", "baseline", "six"), help=argparse.SUPPRESS)
    ap.add_argument("--file", help=argparse.SUPPRESS)
    ap.add_argument("--use", type=int, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        _worker(args.worker, args.file, args.use)
        return 0

    folder = args.keep or Path(tempfile.mkdtemp(prefix="closure-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    print(f"2-D discovery benchmark: {args.n}^2 x {args.snapshots} snapshots, ratio {RATIO}, "
          f"{os.cpu_count()} cores; data in {folder}")
    t0 = time.perf_counter()
    main_file = write_fields(folder / f"fields_{args.n}_{args.snapshots}.nc", args.n,
                             args.snapshots)
    print(f"  data written in {time.perf_counter() - t0:.1f} s "
          f"({main_file.stat().st_size / 2**20:.0f} MiB)")

    ours_runs, base_runs = [], []
    for _ in range(args.repeat):  # alternate, so a busy spell of the machine hits both
        ours_runs.append(_run("discover", main_file))
        if not args.skip_baseline:
            base_runs.append(_run("baseline", main_file))
    ours = min(ours_runs, key=lambda r: r["seconds"])
    best = f"fastest of {args.repeat}: " if args.repeat > 1 else ""
    print(f"  discover : {ours['seconds']:8.2f} s ({best}"
          f"{_times(ours_runs)}), "
          f"peak memory +{_max_rise(ours_runs):.0f} MiB (total {ours['peak_mb']:.0f}), "
          f"test R^2 {ours['test_r2']:.4f}, terms {', '.join(ours['terms'])}")
    print(_breakdown(ours))
    if base_runs:
        base = min(base_runs, key=lambda r: r["seconds"])
        print(f"  baseline : {base['seconds']:8.2f} s ({best}"
              f"{_times(base_runs)}), "
              f"peak memory +{_max_rise(base_runs):.0f} MiB (total {base['peak_mb']:.0f}), "
              f"test R^2 {base['test_r2']:.4f}, {base['terms']} terms")
        print(f"  time ratio baseline / discover: {base['seconds'] / ours['seconds']:.2f}x "
              "(target >= 5x)")
        print(f"  peak-memory ratio baseline / discover: "
              f"{_ratio(_max_rise(base_runs), _max_rise(ours_runs))} (rise during the work), "
              f"{_ratio(base['peak_mb'], ours['peak_mb'])} (total resident)")
    if args.whole_process:
        whole_process(main_file, args.repeat)
    if not args.skip_memory:
        a, b = args.memory_snapshots
        n_mem = args.memory_n or args.n
        mem_file = write_fields(folder / f"fields_{n_mem}_{b}.nc", n_mem, b, seed=1)
        ra, rb = _run("discover", mem_file, a), _run("discover", mem_file, b)
        print(f"  memory scaling ({n_mem}^2): {a} snapshots +{ra['peak_rise_mb']:.0f} MiB "
              f"(total {ra['peak_mb']:.0f}) in {ra['seconds']:.1f} s, {b} snapshots "
              f"+{rb['peak_rise_mb']:.0f} MiB (total {rb['peak_mb']:.0f}) in "
              f"{rb['seconds']:.1f} s: ratio {_ratio(rb['peak_rise_mb'], ra['peak_rise_mb'])} "
              "(target within 1.10)")
    if args.keep is None:
        for f in folder.iterdir():
            f.unlink()
        folder.rmdir()
    return 0


if __name__ == "__main__":
    sys.exit(main())
