"""The status of a job of any kind: the catalog row brought in line with the queue, plus its
live progress and what the kind of job stored. One floor above the job kinds (plan/map/reduce
in worker.tasks, a posteriori runs, coarse-graining products, sweeps), which all sit on
worker.queue and import nothing from here."""

from __future__ import annotations

import redis

from worker import aposteriori, products, sweeps
from worker import queue as q


def reconcile(store, conn: redis.Redis, row: dict) -> dict:
    """Bring an active catalog row in line with the queue (a task that failed for good, or
    that the queue lost, fails the job with a reason). Returns the (possibly updated) row."""
    if row["state"] not in ("queued", "running"):
        return row
    if aposteriori.is_aposteriori(row):  # one task of its own, not plan/map/reduce
        return aposteriori.reconcile(store, conn, row)
    return q.reconcile_plan_reduce(store, conn, row)


def status(store, conn: redis.Redis, job_id: str) -> dict:
    """The user-facing status of a job: catalog state plus live progress."""
    row = store.get_job(job_id)
    row = reconcile(store, conn, row)
    progress = q.read_progress(conn, job_id)
    if row["state"] == "succeeded":
        progress["phase"] = "done"
    elif row["state"] in ("failed", "canceled"):
        progress["phase"] = row["state"]
    extra = products.status_fields(store, row) if products.is_coarse_grain(row) else \
        sweeps.status_fields(store, row) if sweeps.is_sweep(row) else {}
    return {**extra,
        "id": row["id"], "name": row["name"], "state": row["state"], "progress": progress,
        "model_id": row["model_id"], "error": q.public_error(store, row),
        "reused": bool(row["reused"]),
        "input_sha256": row["input_sha256"], "dataset_id": row["dataset_id"],
        "created": row["created"], "started": row["started"], "finished": row["finished"],
        "spec": row["spec"],
    }
