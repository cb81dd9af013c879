"""rq tasks of a snapshot split into slab tasks (closure.slabtasks), in place of its map task.

For snapshot ``i`` the plan task enqueues, per phase of the pass, ``n_tasks`` tasks
``<job>-slab-<i>-<phase>-<k>`` (each phase depends on every task of the one before it, with
``allow_failure`` so a task that failed for good is reported, not waited on forever), then
``<job>-finish-<i>``, which assembles the coarse snapshot, writes the snapshot's
SufficientStats like a map task and removes the pieces. The reduce waits for the finishing
tasks. Pieces live in the job's work folder in the store (``jobs/<job>/slabs/<i>/``), so every
worker that sees the store can take any task; only ids and indices travel through Redis.

Every task runs under its lease and is retried by rq like a map task (a killed work-horse
re-runs; pieces are written through a temporary folder and renamed, so a half-written piece is
never read). A task that finds a piece missing (its task failed every attempt) or meets a
UserError records the snapshot's error, as a map task does, and the later tasks of that
snapshot stand down; the reduce then fails the job naming it.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from closure.errors import UserError
from closure.spec import parse_spec
from closure.store import read_json
from worker import queue as q
from worker.context import (
    _conn,
    _discard_if_ended,
    _keep_held_out,
    _lease_lost,
    _leased,
    _open_planned,
    store,
)


def enqueue(conn, queue, job_id: str, spec, plan: dict, indices: list[int],
            n_tasks: int) -> list:
    """Enqueue the slab tasks and finishing task of each snapshot in ``indices``; returns the
    finishing tasks (the reduce depends on them)."""
    from rq.job import Dependency

    from closure import pipeline

    phases = pipeline.slab_phases(spec, plan)
    q.set_progress(conn, job_id, slabs={"snapshots": [int(i) for i in indices],
                                        "tasks": int(n_tasks), "phases": phases})
    common = {"timeout": q.MAP_TIMEOUT_S, "retry": q.retry_policy(),
              "result_ttl": q.PROGRESS_TTL_S, "failure_ttl": q.PROGRESS_TTL_S}
    finals = []
    for i in indices:
        before = None
        for phase in phases:
            after = Dependency(jobs=before, allow_failure=True) if before else None
            before = [queue.enqueue_call(
                "worker.slabs.slab_task", args=(job_id, int(i), phase, k, int(n_tasks)),
                job_id=q.slab_id(job_id, i, phase, k), depends_on=after,
                description=f"slab {job_id} snapshot {i} {phase} {k + 1}/{n_tasks}", **common)
                for k in range(n_tasks)]
        finals.append(queue.enqueue_call(
            "worker.slabs.finish_task", args=(job_id, int(i), int(n_tasks)),
            job_id=q.finish_id(job_id, i), depends_on=Dependency(jobs=before, allow_failure=True),
            description=f"finish {job_id} snapshot {i}", **common))
    return finals


def folder(work: Path, index: int) -> Path:
    """Where snapshot ``index``'s slab pieces live in the job's work folder."""
    return Path(work) / "slabs" / str(int(index))


def _record(conn, job_id: str, index: int, message: str) -> None:
    """The snapshot's error, kept as a map task keeps one (the first one recorded wins)."""
    with conn.pipeline() as p:
        p.hsetnx(q.errors_key(job_id), str(int(index)), message)
        p.expire(q.errors_key(job_id), q.PROGRESS_TTL_S)
        p.execute()


def _failed(conn, job_id: str, index: int) -> bool:
    return bool(conn.hexists(q.errors_key(job_id), str(int(index))))


def _missing(conn, job_id: str, index: int, exc) -> str:
    """Why pieces are missing: the last error of each task that left none."""
    parts = []
    for k in exc.tasks[:3]:
        job = q.fetch(conn, q.slab_id(job_id, index, exc.phase, k))
        why = q.last_error(job) if job is not None else "its task was lost"
        parts.append(f"slab task {exc.phase} {k} failed after {q.TASK_RETRIES + 1} attempts: "
                     f"{why}")
    more = f" (and {len(exc.tasks) - 3} more)" if len(exc.tasks) > 3 else ""
    return "; ".join(parts) + more


def _job_files(job_id: str):
    """(store, work folder, spec, plan), or None when the job's work is gone (it ended)."""
    st = store()
    work = st.job_dir(job_id)
    try:
        return st, work, parse_spec(read_json(work / "spec.json")), read_json(work / "plan.json")
    except FileNotFoundError:
        return None


@_leased
def slab_task(job_id: str, index: int, phase: str, task: int, n_tasks: int) -> dict:
    """Task ``task`` of ``n_tasks`` of ``phase`` over snapshot ``index``: its pieces under
    the job's work folder (closure.pipeline.run_slab_task)."""
    from closure import pipeline
    from closure.slabtasks import MissingPieces

    conn = _conn()
    out = {"job": job_id, "index": int(index), "phase": phase, "task": int(task)}
    files = None if q.is_canceled(conn, job_id) else _job_files(job_id)
    if files is None or _failed(conn, job_id, index):
        return {**out, "skipped": True}
    _, work, spec, plan = files
    try:
        with _open_planned(plan) as source:
            pipeline.run_slab_task(spec, plan, int(index), phase, int(task), int(n_tasks),
                                   folder(work, index), source=source)
    except UserError as exc:
        _record(conn, job_id, index, str(exc))
    except MissingPieces as exc:
        _record(conn, job_id, index, _missing(conn, job_id, index, exc))
    _discard_if_ended(job_id)
    return out


@_leased
def finish_task(job_id: str, index: int, n_tasks: int) -> dict:
    """Snapshot ``index``'s coarse fields and SufficientStats from its slab tasks' pieces,
    saved as a map task saves them; the pieces are removed."""
    from closure import pipeline
    from closure.slabtasks import MissingPieces

    conn = _conn()
    out = {"job": job_id, "index": int(index)}
    files = None if q.is_canceled(conn, job_id) else _job_files(job_id)
    if files is None or _failed(conn, job_id, index):
        return {**out, "skipped": True}
    st, work, spec, plan = files
    try:
        stats, coarse = pipeline.finish_slab_tasks(spec, plan, int(index), int(n_tasks),
                                                   folder(work, index))
    except UserError as exc:
        _record(conn, job_id, index, str(exc))
        return out
    except MissingPieces as exc:
        _record(conn, job_id, index, _missing(conn, job_id, index, exc))
        return out
    if _lease_lost():
        return {**out, "lease_lost": True}
    if int(index) in {int(i) for i in plan.get("test") or ()} or spec.reference_net.enabled:
        _keep_held_out(work, plan, coarse)
    stats.save(st.stats_path(job_id, index))  # atomic: temp file + rename
    with conn.pipeline() as p:
        p.sadd(q.done_key(job_id), int(index))
        p.expire(q.done_key(job_id), q.PROGRESS_TTL_S)
        p.execute()
    shutil.rmtree(folder(work, index), ignore_errors=True)
    _discard_if_ended(job_id)
    return out
