"""Queue throughput and API latency of the closure service, against baselines in the same run.

Measures, on generated 2-D turbulence (closure.synth turb2d):

1. snapshots/s of the map phase of one job with 1 worker and with 2 workers (ratio printed;
   the target is >= 1.8 on 2 cores), from the rq start/end times of the map tasks;
2. the overhead of the whole queued job (1 worker, submit to succeeded) over in-process
   pipeline.discover on the same data (target <= 15 %);
3. p50/p99 latency of GET /jobs/{id} under an open-loop load of ``--rate`` requests/s on
   loopback, for a bounded number of requests (target p99 < 20 ms at 200 requests/s).

Each worker is pinned to a CPU of its own (one BLAS thread; the FFTs' threads share that
CPU), and the in-process baseline to one CPU too, so the baseline, the 1-worker and the
2-worker runs compare like with like: one core per process.

    python bench/queue_throughput.py                 # defaults: 512 x 512, 64 snapshots
    python bench/queue_throughput.py --n 128 --snapshots 8 --requests 400
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

# one thread per process everywhere (the workers get the same through their environment)
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import httpx  # noqa: E402

from closure import pipeline  # noqa: E402
from closure.client import Client  # noqa: E402
from closure.localstack import LocalStack  # noqa: E402
from closure.spec import parse_spec  # noqa: E402


def make_data(n: int, snapshots: int, out: Path) -> Path:
    path = out / f"turb2d-{n}-{snapshots}.nc"
    if not path.exists():
        from closure.synth import turb2d, write

        t = time.perf_counter()
        # closely spaced snapshots keep the generation short; the cost per snapshot of
        # the job does not depend on the spacing
        write(turb2d(n=n, snapshots=snapshots, spinup=0.5, interval=0.02), path)
        print(f"generated {path.name} in {time.perf_counter() - t:.1f} s")
    return path


def spec_for(path: Path, seed: int) -> dict:
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 4, "seed": seed}}


def in_process(path: Path, seed: int) -> tuple[float, float]:
    """(discover wall time, time of the map calls alone) in this process, on one CPU."""
    spec = parse_spec(spec_for(path, seed))
    cpus = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {min(cpus)})
    try:
        t0 = time.perf_counter()
        pipeline.discover(spec)
        total = time.perf_counter() - t0
        plan = pipeline.plan(spec)
        t0 = time.perf_counter()
        with pipeline_source(plan) as src:
            for i in plan["snapshots"]:
                pipeline.map_snapshot(spec, plan, i, source=src)
        maps = time.perf_counter() - t0
    finally:
        os.sched_setaffinity(0, cpus)
    return total, maps


def pipeline_source(plan: dict):
    from closure.io import open_fields

    inp = plan["input"]
    return open_fields(inp["path"], inp.get("variables") or None, tuple(inp.get("scalars") or ()),
                       bool(inp.get("periodic", True)))


def queued(stack: LocalStack, path: Path, seed: int) -> dict:
    """Run one job through the stack: wall time, and the map phase from rq's timestamps."""
    from worker import queue as q

    with Client(stack.server_url) as c:
        t0 = time.perf_counter()
        job = c.submit(spec_for(path, seed))
        doc = c.wait(job["id"], poll=0.05, timeout=3600)
        wall = time.perf_counter() - t0
    conn = q.connect(stack.redis_url)
    groups = q.map_tasks(conn, job["id"])
    maps = [q.fetch(conn, q.map_id(job["id"], k)) for k in range(len(groups))]
    start = min(m.started_at for m in maps)
    end = max(m.ended_at for m in maps)
    busy = sum((m.ended_at - m.started_at).total_seconds() for m in maps)
    plan, red = q.fetch(conn, q.plan_id(job["id"])), q.fetch(conn, q.reduce_id(job["id"]))
    while red.ended_at is None:  # the job is marked succeeded just before rq closes the task
        time.sleep(0.01)
        red = q.fetch(conn, q.reduce_id(job["id"]))
    breakdown = {"to_plan": (plan.started_at - plan.enqueued_at).total_seconds(),
                 "plan": (plan.ended_at - plan.started_at).total_seconds(),
                 "plan_to_maps": (start - plan.ended_at).total_seconds(),
                 "maps_to_reduce": (red.started_at - end).total_seconds(),
                 "reduce": (red.ended_at - red.started_at).total_seconds()}
    conn.close()
    span = (end - start).total_seconds()
    n = sum(len(g) for g in groups)
    return {"wall": wall, "map_span": span, "snapshots": n, "tasks": len(maps),
            "rate": n / span, "per_snapshot": busy / n, "model": doc["model_id"],
            "breakdown": breakdown}


def latency(server: str, job_id: str, rate: float, requests: int) -> dict:
    """Open-loop GET /jobs/{id}: request k is sent at k / rate s (by a few client threads);
    latencies in ms."""
    lat: list[float] = []
    late = [0]
    lock = threading.Lock()
    n_threads = 4
    t0 = time.perf_counter() + 0.2

    def run(offset: int):
        with httpx.Client(base_url=server, timeout=10) as http:
            http.get(f"/jobs/{job_id}")  # connect before the clock starts
            for k in range(offset, requests, n_threads):
                due = t0 + k / rate
                wait = due - time.perf_counter()
                if wait > 0:
                    time.sleep(wait)
                else:
                    with lock:
                        late[0] += 1
                s = time.perf_counter()
                r = http.get(f"/jobs/{job_id}")
                dt = (time.perf_counter() - s) * 1e3
                assert r.status_code == 200, r.text
                with lock:
                    lat.append(dt)

    threads = [threading.Thread(target=run, args=(i,)) for i in range(n_threads)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - t0
    lat.sort()
    return {"p50": statistics.median(lat), "p99": lat[int(0.99 * (len(lat) - 1))],
            "max": lat[-1], "achieved_rate": len(lat) / elapsed, "late": late[0]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=512, help="grid points per direction")
    ap.add_argument("--snapshots", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=3, help="runs per measurement (median)")
    ap.add_argument("--rate", type=float, default=200.0, help="GET /jobs/{id} per second")
    ap.add_argument("--requests", type=int, default=2000, help="number of GET requests")
    ap.add_argument("--out", type=Path, default=ROOT / "bench" / "out")
    args = ap.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    path = make_data(args.n, args.snapshots, args.out)
    print(f"data: {args.n} x {args.n}, {args.snapshots} snapshots; cores: {os.cpu_count()}")

    results: dict = {1: [], 2: []}
    base_runs = []
    with tempfile.TemporaryDirectory(prefix="closure-bench-") as tmp:
        stacks = {w: LocalStack(Path(tmp) / f"stack{w}", port=0, workers=w,
                                data_roots=[path.parent], threads_per_worker=1, pin_cpus=True)
                  for w in (1, 2)}
        for st in stacks.values():
            st.start()
        try:
            in_process(path, seed=100)  # warm-up runs: imports, first-touch caches
            for st in stacks.values():
                queued(st, path, seed=1)
            # alternate the three kinds of run, so a busy spell on a shared machine spreads
            # over all of them rather than falling on one
            for k in range(args.repeat):
                base_runs.append(in_process(path, seed=100))
                for w, st in stacks.items():
                    results[w].append(queued(st, path, seed=2 + k))
            with Client(stacks[2].server_url) as c:
                job = c.submit(spec_for(path, seed=99))
                c.wait(job["id"], timeout=3600)
            lat = latency(stacks[2].server_url, job["id"], args.rate, args.requests)
        finally:
            for st in stacks.values():
                st.stop()
    base_total = statistics.median(r[0] for r in base_runs)
    base_maps = statistics.median(r[1] for r in base_runs)
    print(f"in process (one CPU): discover {base_total:.2f} s, maps alone {base_maps:.2f} s "
          f"({args.snapshots / base_maps:.2f} snapshots/s)")
    for w in (1, 2):
        runs = results[w]
        r = dict(runs[0])
        for key in ("wall", "map_span", "rate", "per_snapshot"):
            r[key] = statistics.median(x[key] for x in runs)
        r["breakdown"] = {k: statistics.median(x["breakdown"][k] for x in runs)
                          for k in runs[0]["breakdown"]}
        results[w] = r
        print(f"{w} worker(s): job {r['wall']:.2f} s; map phase {r['map_span']:.2f} s = "
              f"{r['rate']:.2f} snapshots/s ({r['tasks']} map tasks, "
              f"{r['per_snapshot'] * 1e3:.0f} ms per snapshot in a task)")
        print("    " + ", ".join(f"{k} {v:.2f} s" for k, v in r["breakdown"].items()))
    ratio = results[2]["rate"] / results[1]["rate"]
    overhead = results[1]["wall"] / base_total - 1
    print()
    print(f"throughput ratio, 2 workers / 1 worker: {ratio:.2f} (target >= 1.8)")
    print(f"queued job (1 worker) over in-process discover: {overhead:+.1%} (target <= 15 %)")
    print(f"map time per snapshot in a worker over in process: "
          f"{results[1]['per_snapshot'] / (base_maps / args.snapshots) - 1:+.1%}")
    print(f"GET /jobs/{{id}} at {args.rate:g}/s, {args.requests} requests "
          f"(achieved {lat['achieved_rate']:.0f}/s, {lat['late']} sent late): "
          f"p50 {lat['p50']:.2f} ms, p99 {lat['p99']:.2f} ms, max {lat['max']:.1f} ms "
          f"(target p99 < 20 ms)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
