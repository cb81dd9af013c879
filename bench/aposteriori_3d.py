"""Benchmark: long a posteriori runs of a discovered 3-D closure against the classic baselines.

    python bench/aposteriori_3d.py            # 128^3 -> 32^3 (hours on two cores)
    python bench/aposteriori_3d.py --quick    # 64^3 -> 16^3, 10 turnovers (minutes)

Steps, all in this process:

1. the fine run: forced 3-D turbulence in closure's own 3-D solver with no closure
   (``closure.les3d.LESEquation3D`` on the fine grid: the turb3d operators plus
   constant-power forcing of the shells 1..2), from the turb3d initial spectrum,
   ``--snapshots`` snapshots every ``--interval`` s after ``--dns-spinup`` s, written with
   its physics in the attributes;
2. discovery (``closure discover``): Gaussian filter, width 8 fine spacings, ratio 4, the
   default 3-D stress library;
3. the large-eddy turnover time ``l / u'`` of the filtered snapshots (``l = int E/k dk /
   int E dk``, ``u' = sqrt(2 E / 3)``);
4. long coarse runs (``closure.les.simulate``) of the model and every baseline:
   ``--spinup-turnovers`` of spin-up then ``--turnovers`` of statistics, compared with every
   filtered snapshot.

Prints the table of the long-run figures and the coarse-to-fine cost ratio. No assertion: a
measurement. A priori skill does not guarantee a stable or accurate coarse simulation, and
long-run statistics on one flow are evidence, not a guarantee.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closure.cli import main as cli  # noqa: E402
from closure.grid import Grid  # noqa: E402
from closure.les import coarse_data, simulate  # noqa: E402
from closure.les3d import Forcing3D, LESEquation3D  # noqa: E402
from closure.model import ClosureModel  # noqa: E402
from closure.spectral import energy_spectrum, fourier  # noqa: E402
from closure.synth import write  # noqa: E402
from closure.synth._common import make_dataset  # noqa: E402
from closure.synth.turb3d import initial_velocity_hat  # noqa: E402

RATIO, WIDTH = 4, 8.0
BASELINES = ["none", "smagorinsky", "dynamic", "gradient", "gradient-clipped"]


def forced_dns(path: Path, n: int, snapshots: int, interval: float, spinup: float,
               viscosity: float, power: float, seed: int = 0) -> float:
    """Write the forced fine run; returns its wall time (s)."""
    grid = Grid.regular((n, n, n), 2 * np.pi, dims=("z", "y", "x"), units="m")
    uh = initial_velocity_hat(grid, np.random.default_rng(seed), 3.0, 0.5)
    w, v, u = fourier(grid).backward(uh)
    forcing = Forcing3D("power", 2.0, power)
    eq = LESEquation3D(grid, viscosity=viscosity, forcing=forcing)
    uh = eq.initial_state({"u": u, "v": v, "w": w})
    times = [spinup + j * interval for j in range(snapshots)]
    frames = {"u": [], "v": [], "w": []}
    now, chunk = 0.0, 0.25  # the CFL step is set at the start of each chunk
    t = time.perf_counter()
    for target in times:
        while now < target - 1e-9:
            step = min(chunk, target - now)
            uh, _ = eq.advance(uh, step, 0.5)
            now += step
        if not np.all(np.isfinite(uh)):
            raise SystemExit(f"the fine run blew up before t = {target:g} s")
        for k, f in eq.velocity(uh).items():
            frames[k].append(f)
    wall = time.perf_counter() - t
    attrs = {"title": "forced 3-D turbulence (closure bench data)", "solver": "les3d-dns",
             "viscosity": viscosity, "drag": 0.0, "hyperviscosity_order": 1,
             "hypoviscosity": 0.0, **forcing.to_attrs(), "dealias": True}
    write(make_dataset(grid, times, frames, attrs), path)
    return wall


def turnover_time(path: Path) -> float:
    data = coarse_data(path, "gaussian", RATIO, WIDTH)
    out = []
    for f in data.fields:
        k, E = energy_spectrum((f["u"], f["v"], f["w"]), data.grid)
        k, E = k[1:], E[1:]
        dk = k[1] - k[0]
        energy = float(np.sum(E)) * dk
        out.append(float(np.sum(E / k)) * dk / energy / np.sqrt(2 * energy / 3))
    return float(np.mean(out))


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="64^3 -> 16^3, 10 turnovers")
    p.add_argument("--n", type=int, default=None)
    p.add_argument("--snapshots", type=int, default=10)
    p.add_argument("--interval", type=float, default=1.0)
    p.add_argument("--dns-spinup", type=float, default=10.0)
    p.add_argument("--viscosity", type=float, default=None)
    p.add_argument("--power", type=float, default=0.1, help="injected power (m2 s-3)")
    p.add_argument("--turnovers", type=float, default=None)
    p.add_argument("--spinup-turnovers", type=float, default=2.0)
    p.add_argument("--keep", type=Path, default=None)
    p.add_argument("--reuse", action="store_true",
                   help="reuse the fine run and model already in --keep (cost not measured)")
    a = p.parse_args(argv)
    n = a.n or (64 if a.quick else 128)
    nu = a.viscosity or (0.008 if n <= 64 else 0.003)
    turnovers = a.turnovers or (10.0 if a.quick else 100.0)
    folder = a.keep or Path(tempfile.mkdtemp(prefix="aposteriori3d-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    dns = folder / "dns3.nc"
    model_path = folder / "model3.json"
    fine_span = a.dns_spinup + (a.snapshots - 1) * a.interval
    fine_wall = None
    if a.reuse and dns.is_file() and model_path.is_file():
        print(f"reusing {dns} and {model_path}")
    else:
        fine_wall = forced_dns(dns, n, a.snapshots, a.interval, a.dns_spinup, nu, a.power)
        print(f"fine run {n}^3 (nu {nu:g}, power {a.power:g}): {fine_span:g} s simulated in "
              f"{fine_wall:.1f} s wall ({fine_wall / fine_span:.3g} s per simulated s)")
        if cli(["discover", str(dns), "-o", str(model_path), "--filter", "gaussian", "--width",
                str(WIDTH), "--ratio", str(RATIO), "-q"]) != 0:
            print("discover failed")
            return 1
    model = ClosureModel.load(model_path)
    print(f"model: {', '.join(t.name for t in model.active_terms)}")
    T = turnover_time(dns)
    spinup = a.spinup_turnovers * T
    duration = spinup + turnovers * T
    print(f"large-eddy turnover time {T:.3g} s; long runs of {duration:.4g} s")
    t = time.perf_counter()
    c = simulate(model, dns, baselines=BASELINES, long_duration=duration, spinup=spinup)
    coarse_rate = (time.perf_counter() - t) / len(c.long_runs) / duration
    print()
    print(c.long_run_table())
    print()
    if fine_wall is None:
        print(f"cost: {coarse_rate:.3g} s wall per simulated s per coarse run (fine run not "
              "measured: reused)")
    else:
        print(f"cost: {coarse_rate:.3g} s wall per simulated s per coarse run against "
              f"{fine_wall / fine_span:.3g} for the fine run (ratio "
              f"{(fine_wall / fine_span) / coarse_rate:.3g})")
    print("A priori skill does not guarantee a stable or accurate coarse simulation; these "
          "long-run statistics are evidence on this flow, not a guarantee.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
