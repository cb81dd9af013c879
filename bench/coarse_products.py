"""Coarse-graining products on the queue, against baselines in the same run.

Measures, on generated 2-D turbulence (closure.synth turb2d):

1. the wall time of a queued coarse-graining job (submit to succeeded, then the download)
   with 2 workers against `closure coarse-grain` run in process once per setting (the
   baseline), for the same settings; ratio printed;
2. the API's resident-memory growth while it streams the product, against the product's size
   (ratio printed; streaming keeps it near 0).

Each worker runs one BLAS thread; numbers move with machine load, so compare ratios.

    python bench/coarse_products.py                  # defaults: 256 x 256, 16 snapshots
    python bench/coarse_products.py --n 128 --snapshots 8
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closure.cli import main as cli_main  # noqa: E402
from closure.client import Client  # noqa: E402
from closure.localstack import LocalStack  # noqa: E402

SETTINGS = [{"ratio": 4, "width": 6}, {"ratio": 4, "width": 10}, {"ratio": 2, "width": 4}]


def rss_kib(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def task_times(stack, job_id: str) -> dict:
    """Seconds spent in the plan, map (summed over tasks) and reduce tasks (rq's times)."""
    from worker import queue as q

    conn = q.connect(stack.redis_url)
    out = {}
    maps = [q.map_id(job_id, k) for k in range(len(q.map_tasks(conn, job_id)))]
    for label, ids in (("plan", [q.plan_id(job_id)]), ("map", maps),
                       ("reduce", [q.reduce_id(job_id)])):
        jobs = [q.fetch(conn, i) for i in ids]
        out[label] = sum((j.ended_at - j.started_at).total_seconds() for j in jobs if j)
    out["map tasks"] = len(maps)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=256)
    ap.add_argument("--snapshots", type=int, default=16)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="bench-products-") as tmp:
        tmp = Path(tmp)
        from closure.synth import turb2d, write

        data = write(turb2d(n=args.n, snapshots=args.snapshots, spinup=0.5, interval=0.02),
                     tmp / "turb2d.nc")
        t = time.perf_counter()
        for k, s in enumerate(SETTINGS):
            cli_main(["coarse-grain", str(data), "-o", str(tmp / f"ref{k}.nc"), "--ratio",
                      str(s["ratio"]), "--width", str(s["width"])])
        baseline = time.perf_counter() - t
        with LocalStack(tmp / "stack", port=0, workers=2, data_roots=[tmp]) as stack, \
                Client(stack.server_url) as c:
            t = time.perf_counter()
            job = c.submit_coarse_grain({"kind": "coarse-grain", "input": {"path": str(data)},
                                         "filters": SETTINGS})
            doc = c.wait(job["id"], poll=0.05)
            queued = time.perf_counter() - t
            phases = task_times(stack, job["id"])
            before = rss_kib(stack.api.pid)
            peak = [before]
            done = threading.Event()

            def sample():
                while not done.is_set():
                    peak[0] = max(peak[0], rss_kib(stack.api.pid))
                    time.sleep(0.005)

            th = threading.Thread(target=sample)
            th.start()
            t = time.perf_counter()
            out = c.fetch(doc["product_id"], tmp / "product.nc")
            download = time.perf_counter() - t
            done.set()
            th.join()
        size_mib = out.stat().st_size / 2**20
        growth_mib = (peak[0] - before) / 1024
        print(f"data {args.n} x {args.n}, {args.snapshots} snapshots, {len(SETTINGS)} settings")
        print(f"in process (closure coarse-grain per setting): {baseline:.2f} s")
        print(f"queued, 2 workers (submit to succeeded):       {queued:.2f} s "
              f"(ratio {queued / baseline:.2f})")
        print("queued tasks: " + ", ".join(f"{k} {v:.2f} s" for k, v in phases.items()))
        print(f"download {size_mib:.1f} MiB in {download:.2f} s; API memory growth "
              f"{growth_mib:.1f} MiB (ratio to size {growth_mib / size_mib:.3f})")


if __name__ == "__main__":
    main()
