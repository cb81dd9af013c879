"""rq tasks: thin glue that moves inputs and outputs of closure.pipeline through the store.

Arguments and return values are plain JSON (job ids, snapshot indices, small dicts); arrays go
through the store's files. Every task is safe to run twice: a map task (a group of snapshots,
see worker.queue.split_snapshots) overwrites each snapshot's stats file atomically, a reduce
task that finds its model already stored just reports it.
Errors a user can fix (closure.errors.UserError) fail the job at once with their message;
anything else raises, so rq retries the task.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from closure.errors import UserError
from closure.spec import parse_spec
from closure.store import (
    fingerprint_hash,
    read_json,
    write_json_atomic,
)
from worker import queue as q
from worker.context import (  # noqa: F401 - re-exported: tasks.store(), tasks.configure() ...
    INPUT_CHANGED,
    _conn,
    _discard_if_ended,
    _fail,
    _failure_callback,
    _keep_held_out,
    _lease_lost,
    _leased,
    _missing_message,
    _open_planned,
    check_input_file,
    configure,
    data_roots,
    discard_work,
    plan_indices,
    store,
)

# --------------------------------------------------------------------------- tasks

@_leased
def plan_task(job_id: str) -> dict:
    """Plan the job, then enqueue the map tasks (groups of snapshots; or each snapshot's
    slab tasks, worker.slabs) and the reduce task after them."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    spec = parse_spec(row["spec"])
    st.update_job(job_id, state="running", only_if_active=True)
    q.set_progress(conn, job_id, phase="plan")
    from closure import pipeline
    from closure.library_compressible import every_preset

    presets = every_preset()
    if isinstance(spec.library, str) and spec.library not in presets:
        # the API puts a terms file's content inline: a queued job never names a file
        return _fail(conn, job_id, f"library {spec.library_label[:200]!r}: a queued job takes "
                     f"a preset ({', '.join(presets)}) or term definitions inline, not a file")
    try:
        for path in spec.input.paths if spec.input.path is not None else [""]:
            check_input_file(path)
        plan = pipeline.plan(spec)
    except UserError as exc:
        return _fail(conn, job_id, str(exc))

    sha = plan.get("sha256") or row["input_sha256"]
    if sha != row["input_sha256"]:
        return _fail(conn, job_id, INPUT_CHANGED)
    fingerprint = fingerprint_hash(spec, sha)
    if fingerprint != row["fingerprint"]:
        st.update_job(job_id, fingerprint=fingerprint)
    existing = st.model_by_fingerprint(fingerprint)
    if existing is not None:
        st.update_job(job_id, state="succeeded", model_id=existing["id"], reused=True,
                      only_if_active=True)
        q.set_progress(conn, job_id, phase="done")
        return {"job": job_id, "model_id": existing["id"], "reused": True}

    if _lease_lost():
        return {"job": job_id, "lease_lost": True}
    work = st.job_dir(job_id)
    write_json_atomic(work / "plan.json", plan)
    write_json_atomic(work / "spec.json", spec.model_dump(mode="json"))
    indices = plan_indices(plan)
    from rq import Worker

    queue = q.get_queue(conn)
    workers = Worker.count(queue=queue)
    n_slab_tasks = pipeline.slab_split(spec, plan, workers, q.TASKS_PER_WORKER)
    # a snapshot split into slab tasks (worker.slabs) has no map task
    groups = [] if n_slab_tasks > 1 else q.split_snapshots(indices, workers)
    q.set_progress(conn, job_id, phase="map", snapshots_total=len(indices), tasks=groups)
    parts = []
    if n_slab_tasks > 1:
        from worker import slabs

        parts = slabs.enqueue(conn, queue, job_id, spec, plan, indices, n_slab_tasks)
    for k, group in enumerate(groups):
        parts.append(queue.enqueue_call(
            "worker.tasks.map_task", args=(job_id, group), job_id=q.map_id(job_id, k),
            timeout=q.MAP_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
            failure_ttl=q.PROGRESS_TTL_S,
            description=f"map {job_id} snapshots {group[0]}..{group[-1]}"))
    from rq.job import Dependency

    queue.enqueue_call(
        "worker.tasks.reduce_task", args=(job_id,), job_id=q.reduce_id(job_id),
        depends_on=Dependency(jobs=parts, allow_failure=True),
        timeout=q.REDUCE_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S, description=f"reduce {job_id}",
        on_failure=_failure_callback())
    if q.is_canceled(conn, job_id):  # canceled while we were fanning out
        q.stop_tasks(conn, job_id)
    return {"job": job_id, "snapshots": len(indices)}


def _held_out(work: Path, plan: dict):
    """The held-out snapshots kept by the map tasks (any missing one is recomputed)."""
    from closure.pipeline import HeldOut

    held = HeldOut(work / "held_out", list(plan["components"]))
    held.indices = {int(p.stem) for p in (work / "held_out").glob("*.npz")
                    if p.stem.isdigit()}
    return held


@_leased
def map_task(job_id: str, indices: list[int]) -> dict:
    """SufficientStats of each snapshot in ``indices``, one file each, saved atomically
    (temp file + rename): a re-run overwrites them with identical statistics."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "indices": indices, "canceled": True}
    st = store()
    work = st.job_dir(job_id)
    spec = parse_spec(read_json(work / "spec.json"))
    plan = read_json(work / "plan.json")
    from closure import pipeline

    source = None
    errors = {}
    try:
        source = _open_planned(plan)  # once for the whole group
    except UserError as exc:
        errors = {int(i): str(exc) for i in indices}
    test = {int(i) for i in plan.get("test") or ()}
    for i in indices if not errors else ():
        if q.is_canceled(conn, job_id):
            break
        try:
            if (int(i) in test or spec.reference_net.enabled) and hasattr(pipeline, "_map"):
                # keep the held-out snapshot's coarse fields for the scoring pass (and, for
                # the reference network, the training snapshots' for its training), as an
                # in-process run does (saves coarse-graining them again in the reduce)
                stats, coarse = pipeline._map(spec, plan, int(i), source=source)
                _keep_held_out(work, plan, coarse)
            else:
                stats = pipeline.map_snapshot(spec, plan, int(i), source=source)
        except UserError as exc:
            errors[int(i)] = str(exc)
            continue
        if _lease_lost():
            break
        stats.save(st.stats_path(job_id, i))  # atomic: temp file + rename
        with conn.pipeline() as p:
            p.sadd(q.done_key(job_id), int(i))
            p.expire(q.done_key(job_id), q.PROGRESS_TTL_S)
            p.execute()
    if source is not None:
        source.close()
    if errors:
        with conn.pipeline() as p:
            p.hset(q.errors_key(job_id), mapping={str(k): v for k, v in errors.items()})
            p.expire(q.errors_key(job_id), q.PROGRESS_TTL_S)
            p.execute()
    _discard_if_ended(job_id)
    return {"job": job_id, "indices": indices, "errors": len(errors)}


@_leased
def reduce_task(job_id: str) -> dict:
    """Load every snapshot's statistics, fit and score the model, store it, end the job."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    existing = st.model_by_fingerprint(row["fingerprint"])
    if existing is not None:  # a re-run after the model was stored
        st.update_job(job_id, state="succeeded", model_id=existing["id"], only_if_active=True)
        q.set_progress(conn, job_id, phase="done")
        return {"job": job_id, "model_id": existing["id"]}
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}

    work = st.job_dir(job_id)
    spec = parse_spec(read_json(work / "spec.json"))
    plan = read_json(work / "plan.json")
    indices = plan_indices(plan)
    missing = [i for i in indices if not st.stats_path(job_id, i).exists()]
    if missing:
        return _fail(conn, job_id, _missing_message(conn, job_id, missing))

    from closure import pipeline
    from closure.stats import SufficientStats

    stats = {i: SufficientStats.load(st.stats_path(job_id, i)) for i in indices}

    def progress(phase: str, done: int, total: int) -> None:
        q.set_progress(conn, job_id, phase=phase, phase_done=int(done), phase_total=int(total))

    q.set_progress(conn, job_id, phase="reduce")
    try:
        held = _held_out(work, plan) if hasattr(pipeline, "HeldOut") else None
        with _open_planned(plan) as source:  # for held-out snapshots not kept by the maps
            model = pipeline.reduce(spec, plan, stats, progress=progress, source=source,
                                    held_out=held)
    except UserError as exc:
        return _fail(conn, job_id, str(exc))
    if _lease_lost():
        return {"job": job_id, "lease_lost": True}
    from worker import selection

    if selection.wanted(spec):  # coarse runs choose the stored model (worker.selection)
        return selection.start(conn, job_id, spec, plan, stats, model)
    model_row = st.add_model(
        model=model, fingerprint=row["fingerprint"], dataset_sha256=row["input_sha256"],
        spec=spec, plan=plan, job_id=job_id, stats_dir=work / "stats", name=row["name"])
    st.update_job(job_id, state="succeeded", model_id=model_row["id"], only_if_active=True)
    q.set_progress(conn, job_id, phase="done")
    shutil.rmtree(work, ignore_errors=True)
    return {"job": job_id, "model_id": model_row["id"]}


# --------------------------------------------------------------------------- callbacks

def on_task_failure(job, connection, exc_type=None, exc_value=None, tb=None) -> None:
    """rq failure callback of plan and reduce tasks: when no retry is left, fail the job with
    the error (the status endpoint also reconciles failures rq records without a callback,
    such as a killed work-horse on its last attempt)."""
    if job.retries_left:
        return
    job_id = job.id.rsplit("-", 1)[0]
    message = f"{exc_type.__name__ if exc_type else 'error'}: {exc_value}"
    if isinstance(exc_value, UserError):
        message = str(exc_value)
    try:
        store().update_job(job_id, state="failed", error=message, only_if_active=True)
        discard_work(job_id)
    finally:
        q.set_progress(connection, job_id, phase="failed")
