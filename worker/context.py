"""What every task kind shares (worker.tasks, worker.products, worker.sweeps,
worker.selection, worker.aposteriori, worker.slabs): where the store is, the task's Redis
connection, its lease, containment of inputs at open time (opening the planned input), keeping
a held-out snapshot's coarse fields, failing a job and removing its work. One floor below the
task modules, so they import it and not each other.
"""

from __future__ import annotations

import functools
import os
import shutil
import uuid
from pathlib import Path

from rq import get_current_job

from closure.errors import UserError
from closure.store import Store
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


#: why a job whose input's SHA-256 differs from the one recorded at submission fails
INPUT_CHANGED = ("the input file changed since the job was submitted (its SHA-256 differs from "
                 "the one recorded then); the job does not read it: resubmit the job")


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


def _missing_message(conn, job_id: str, missing: list[int]) -> str:
    errors = {k.decode(): v.decode() for k, v in conn.hgetall(q.errors_key(job_id)).items()}
    parts = []
    task_of = {i: k for k, group in enumerate(q.map_tasks(conn, job_id)) for i in group}
    for i in missing[:5]:
        if str(i) in errors:
            parts.append(f"snapshot {i}: {errors[str(i)]}")
        else:
            # a snapshot split into slab tasks (worker.slabs) ends with its finishing task
            rq_id = q.map_id(job_id, task_of[i]) if i in task_of else q.finish_id(job_id, i)
            job = q.fetch(conn, rq_id)
            why = q.last_error(job) if job is not None else "its task was lost"
            parts.append(f"snapshot {i}: failed after {q.TASK_RETRIES + 1} attempts: {why}")
    more = f" (and {len(missing) - 5} more)" if len(missing) > 5 else ""
    return "; ".join(parts) + more


def _failure_callback():
    from rq import Callback

    return Callback("worker.tasks.on_task_failure")
