"""Benchmark: long a posteriori runs of 3-D closures, the model chosen by coarse runs among them.

    python bench/aposteriori_3d.py            # 128^3 -> 32^3, 20 turnovers (hours on 2 cores:
                                              # the 128^3 fine run alone takes ~3 s of CPU a step)
    python bench/aposteriori_3d.py --quick    # 64^3 -> 16^3, 10 turnovers (minutes)

Steps, all in this process:

1. the fine run: forced 3-D turbulence in closure's own 3-D solver with no closure
   (``closure.les3d.LESEquation3D`` on the fine grid: the turb3d operators plus
   constant-power forcing of the shells 1..2), from the turb3d initial spectrum,
   ``--snapshots`` snapshots every ``--interval`` s after ``--dns-spinup`` s, written with
   its physics and its cost (wall seconds, simulated time) in the attributes;
2. the large-eddy turnover time ``l / u'`` of the filtered snapshots (``l = int E/k dk /
   int E dk``, ``u' = sqrt(2 E / 3)``);
3. discovery (Gaussian filter, width 8 fine spacings, ratio 4, the default 3-D stress
   library): plain, with the energy transfer (weight 1), and selected by coarse runs
   (``closure.selection.discover_and_select``) among the sparsest candidates of the paths at
   ``--weights`` and their dynamic mixed companions;
4. long coarse runs (``closure.les.simulate``) of the models and every baseline:
   ``--spinup-turnovers`` of spin-up then ``--turnovers`` of statistics, compared with every
   filtered snapshot; then the selected model and the baselines from a second snapshot.

Prints and writes (bench/results/aposteriori_3d[-quick].{json,md}) what the 2-D bench does
(bench/aposteriori_2d.py holds the shared steps). No assertion: a measurement. A priori skill
does not guarantee a stable or accurate coarse simulation, and long-run statistics on one
flow are evidence, not a guarantee.
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
sys.path.insert(0, str(ROOT / "bench"))

from aposteriori_2d import add_selection_options, fine_cost, finish  # noqa: E402  (bench/, on the path above)

from closure.grid import Grid  # noqa: E402
from closure.les3d import Forcing3D, LESEquation3D  # noqa: E402
from closure.spectral import fourier  # noqa: E402
from closure.synth import write  # noqa: E402
from closure.synth._common import make_dataset, run_cost  # noqa: E402
from closure.synth.turb3d import initial_velocity_hat  # noqa: E402


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
             "hypoviscosity": 0.0, **forcing.to_attrs(), "dealias": True,
             **run_cost(wall, times[-1])}
    write(make_dataset(grid, times, frames, attrs), path)
    return wall


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
    add_selection_options(p)
    p.add_argument("--keep", type=Path, default=None)
    p.add_argument("--reuse", action="store_true",
                   help="reuse the fine run already in --keep (its cost from its attributes)")
    p.add_argument("--out", type=Path, default=None, help="results file stem (.json, .md)")
    a = p.parse_args(argv)
    n = a.n or (64 if a.quick else 128)
    nu = a.viscosity or (0.008 if n <= 64 else 0.003)
    turnovers = a.turnovers or (10.0 if a.quick else 20.0)
    weights = [float(w) for w in a.weights.split(",")]
    out = a.out or ROOT / "bench" / "results" / ("aposteriori_3d" + ("-quick" if a.quick
                                                                     else ""))
    folder = a.keep or Path(tempfile.mkdtemp(prefix="aposteriori3d-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    dns = folder / "dns3.nc"
    if a.reuse and dns.is_file():
        print(f"reusing {dns}")
    else:
        forced_dns(dns, n, a.snapshots, a.interval, a.dns_spinup, nu, a.power)
    fine = fine_cost(dns)
    print(f"fine run {n}^3 (nu {nu:g}, power {a.power:g}): {fine['simulated_time']:g} s "
          f"simulated in {fine['wall_seconds']:.1f} s wall", flush=True)
    return finish(a, dns, folder, out, fine, dims=3, n=n, snapshots=a.snapshots,
                  turnovers=turnovers, spin_turnovers=a.spinup_turnovers, weights=weights,
                  components=("u", "v", "w"))


if __name__ == "__main__":
    sys.exit(main())
