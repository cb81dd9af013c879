"""rq tasks: thin glue that moves inputs and outputs of closure.pipeline through the store.

Arguments and return values are plain JSON (job ids, snapshot indices, small dicts); arrays go
through the store's files. Every task is safe to run twice: a map task (a group of snapshots,
see worker.queue.split_snapshots) overwrites each snapshot's stats file atomically, a reduce
task that finds its model already stored just reports it.
Errors a user can fix (closure.errors.UserError) fail the job at once with their message;
anything else raises, so rq retries the task.
"""

from __future__ import annotations

import functools
import os
import shutil
import uuid
from pathlib import Path

from rq import get_current_job

from closure.errors import UserError
from closure.spec import parse_spec
from closure.store import (
    Store,
    fingerprint_hash,
    read_json,
    write_json_atomic,
)
from worker import queue as q

_config: dict = {}
_store: Store | None = None


def configure(store_root: str, db_url: str | None = None, db_schema: str | None = None,
              data_roots=None) -> None:
    """Set where tasks find the store and which folders their inputs may lie in (the worker's
    main process calls this before forking); ``data_roots`` None: $CLOSURE_DATA_ROOTS."""
    global _store
    _config.update(store_root=str(store_root), db_url=db_url, db_schema=db_schema,
                   data_roots=None if data_roots is None else [str(r) for r in data_roots])
    _store = None


def data_roots() -> list[Path]:
    """The folders inputs given by path may lie in (none configured: no root check, only the
    unchanged-location and checksum checks of :func:`check_input_file`)."""
    roots = _config.get("data_roots")
    if roots is None:
        roots = [r for r in os.environ.get("CLOSURE_DATA_ROOTS", "").split(os.pathsep) if r]
    return [Path(r).expanduser() for r in roots]


def check_input_file(path: str | os.PathLike) -> Path:
    """Containment at open time: the input must still be where the submission resolved it
    (no symlink put in its way since: its real path is the recorded one) and, when the worker
    has data roots, lie under one of them or be an upload of the store. UserError otherwise."""
    recorded = Path(path)
    try:
        real = recorded.resolve(strict=True)
    except (OSError, RuntimeError):
        raise UserError(f"the input file {recorded} is gone since the job was submitted: "
                        "resubmit the job") from None
    if real != recorded:
        raise UserError(f"the input file {recorded} now leads elsewhere (a link was put in its "
                        "place since the job was submitted); the job does not read it: put the "
                        "file back and resubmit")
    roots = data_roots()
    if roots:
        allowed = [Path(r).resolve() for r in roots] + [
            (store().root / sub).resolve() for sub in ("datasets", "products")]
        # a Zarr store: every file in it too (a link inside may lead anywhere)
        inside = [real, *(f.resolve() for f in real.rglob("*"))] if real.is_dir() else [real]
        if not all(any(f == r or r in f.parents for r in allowed) for f in inside):
            raise UserError(f"the input file {recorded} is not under the worker's data roots; "
                            "the job does not read it")
    return real


def store() -> Store:
    global _store
    if _store is None:
        root = _config.get("store_root") or os.environ.get("CLOSURE_STORE")
        if not root:
            raise RuntimeError("worker not configured: set CLOSURE_STORE or call configure()")
        _store = Store(root, _config.get("db_url") or os.environ.get("CLOSURE_DB_URL"),
                       _config.get("db_schema") or os.environ.get("CLOSURE_DB_SCHEMA"))
    return _store


def _conn():
    job = get_current_job()
    if job is None:
        raise RuntimeError("closure tasks run inside an rq worker")
    return job.connection


def plan_indices(plan: dict) -> list[int]:
    """Snapshot indices a plan asks to map (every snapshot used for fitting or scoring)."""
    for key in ("snapshots", "indices", "snapshot_indices"):
        if key in plan:
            return [int(i) for i in plan[key]]
    raise KeyError("plan has no list of snapshots")


def _fail(conn, job_id: str, message: str) -> dict:
    store().update_job(job_id, state="failed", error=message, only_if_active=True)
    q.set_progress(conn, job_id, phase="failed")
    discard_work(job_id)
    return {"job": job_id, "failed": message}


def discard_work(job_id: str) -> None:
    """Remove an ended job's working folder (plan, spec, per-snapshot statistics)."""
    shutil.rmtree(store().job_dir(job_id), ignore_errors=True)


def _discard_if_ended(job_id: str) -> None:
    """A task that finds its job ended (failed, canceled) removes what it wrote."""
    row = store().get_job(job_id, missing_ok=True)
    if row is None or row["state"] not in ("queued", "running"):
        discard_work(job_id)


# --------------------------------------------------------------------------- leases

_lease: q.Lease | None = None


def _leased(task):
    """Run the task under its lease (worker.queue.Lease): a copy the queue re-ran while
    another still runs waits for that one's lease, and stands down if it stays held."""

    @functools.wraps(task)
    def run(*args, **kwargs):
        global _lease
        job = get_current_job()
        if job is None:
            raise RuntimeError("closure tasks run inside an rq worker")
        with q.Lease(job.connection, job.id) as lease:
            _lease = lease
            try:
                return task(*args, **kwargs)
            finally:
                _lease = None

    return run


def _lease_lost() -> bool:
    """True when this copy lost its lease (another copy runs): it must store nothing."""
    return _lease is not None and not _lease.held()


# --------------------------------------------------------------------------- tasks

@_leased
def plan_task(job_id: str) -> dict:
    """Plan the job, then enqueue one map task per snapshot and the reduce task after them."""
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
        return _fail(conn, job_id, "the input file changed since the job was submitted (its "
                     "SHA-256 differs from the one recorded then); the job does not read it: "
                     "resubmit the job")
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
    groups = q.split_snapshots(indices, Worker.count(queue=queue))
    q.set_progress(conn, job_id, phase="map", snapshots_total=len(indices), tasks=groups)
    parts = []
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


def _open_planned(plan: dict):
    """The planned input, opened as the plan read it (closure.pipeline.open_planned)."""
    from closure.pipeline import open_planned

    inp = plan["input"]
    for path in inp.get("paths") or [inp["path"]]:
        check_input_file(path)
    return open_planned(plan)


def _keep_held_out(work: Path, plan: dict, coarse) -> None:
    """Save a held-out snapshot's coarse fields and targets (closure.pipeline.HeldOut's
    format) into the job's held_out/ folder, atomically (temp folder + rename)."""
    from closure.pipeline import HeldOut

    folder = work / "held_out"
    tmp = folder / f".tmp-{uuid.uuid4().hex}"
    tmp.mkdir(parents=True)
    try:
        HeldOut(tmp, list(plan["components"])).put(coarse)
        name = f"{int(coarse.index)}.npz"
        if (tmp / name).exists():
            os.replace(tmp / name, folder / name)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


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


def _missing_message(conn, job_id: str, missing: list[int]) -> str:
    errors = {k.decode(): v.decode() for k, v in conn.hgetall(q.errors_key(job_id)).items()}
    parts = []
    task_of = {i: k for k, group in enumerate(q.map_tasks(conn, job_id)) for i in group}
    for i in missing[:5]:
        if str(i) in errors:
            parts.append(f"snapshot {i}: {errors[str(i)]}")
        else:
            job = q.fetch(conn, q.map_id(job_id, task_of.get(i, -1)))
            why = q.last_error(job) if job is not None else "its task was lost"
            parts.append(f"snapshot {i}: failed after {q.TASK_RETRIES + 1} attempts: {why}")
    more = f" (and {len(missing) - 5} more)" if len(missing) > 5 else ""
    return "; ".join(parts) + more


# --------------------------------------------------------------------------- callbacks

def _failure_callback():
    from rq import Callback

    return Callback("worker.tasks.on_task_failure")


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
