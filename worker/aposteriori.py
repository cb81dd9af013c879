"""A posteriori runs on the queue: one rq task runs a stored model and the baselines in the 2-D
or 3-D coarse solver (closure.les.simulate), optionally long with statistics compared after a
spin-up, and stores the comparison beside the model.

One user-visible job id (``j-...``, a catalog row like a discovery job's, its spec an
:class:`closure.spec.AposterioriSpec`, its ``model_id`` set at submission) has one task::

    <job>-les    load the model, run it and the baselines, write the results

Results live in the model's folder (``Store.aposteriori_dir``), one folder per option set::

    les/<run>/les.json       Comparison.to_dict() (NaN and Inf written as null)
    les/<run>/table.txt      Comparison.table()
    les/<run>/request.json   the spec, fingerprint, job id, input SHA-256 and run statuses
    les/latest.json          which <run> is the latest (written last, atomically)

``<run>`` is the start of the run's fingerprint (model, spec, input SHA-256), so the same
request is answered from the store and a run with other options never overwrites it. A model
that blows up is a result (its run's status and blow-up time), not a failure: the task ends
normally and the worker takes the next task.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import time
import uuid
from pathlib import Path

from rq import Callback, get_current_job

from closure.errors import UserError
from closure.spec import AposterioriSpec, parse_aposteriori_spec
from closure.store import Store, epoch_time, read_json, write_json_atomic, write_text_atomic
from worker import queue as q

TASK_SUFFIX = "-les"
KIND = "aposteriori"
#: wall-clock limit of one a posteriori task, seconds
LES_TIMEOUT_S = int(os.environ.get("CLOSURE_LES_TIMEOUT", 3600))
#: the label of the stored model among the runs (the baselines keep their names)
MODEL_LABEL = "model"


def task_id(job_id: str) -> str:
    return job_id + TASK_SUFFIX


def is_aposteriori(row: dict) -> bool:
    """Whether a catalog job row is an a posteriori run (not a discovery job)."""
    spec = row.get("spec")
    return isinstance(spec, dict) and spec.get("kind") == KIND


def fingerprint(model_id: str, spec: AposterioriSpec, input_sha256: str,
                reference_sha256: str | None, modes_sha256: str | None = None) -> str:
    """Hex SHA-256 of what determines an a posteriori result: the model, the spec's
    options (not the files' locations) and the contents of the input and reference files
    (and of the forcing's modes table, when there is one)."""
    data = {"model_id": model_id, "spec": {**spec.fingerprint(), "model_id": None},
            "input_sha256": input_sha256, "reference_sha256": reference_sha256}
    if modes_sha256 is not None:  # left out otherwise: earlier runs keep their fingerprints
        data["modes_sha256"] = modes_sha256
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def run_name(fp: str) -> str:
    return fp[:16]


# --------------------------------------------------------------------------- submit

def enqueue(conn, job_id: str) -> None:
    """Put an a posteriori job's task on the queue."""
    q.set_progress(conn, job_id, phase="queued", submitted=time.time())
    q.get_queue(conn).enqueue_call(
        "worker.aposteriori.les_task", args=(job_id,), job_id=task_id(job_id),
        timeout=LES_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S, description=f"a posteriori {job_id}",
        on_failure=Callback("worker.tasks.on_task_failure"))


# --------------------------------------------------------------------------- the task

def les_task(job_id: str) -> dict:
    """Run the job's model and baselines in the coarse solver and store the comparison."""
    from worker import tasks

    job = get_current_job()
    if job is None:
        raise RuntimeError("closure tasks run inside an rq worker")
    conn = job.connection
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = tasks.store()
    row = st.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    st.update_job(job_id, state="running", only_if_active=True)
    q.set_progress(conn, job_id, phase="les")
    spec = parse_aposteriori_spec(row["spec"])
    n_runs = 1 + len(spec.baselines)  # the model, then each baseline
    seen: list[str] = []

    def progress(name: str, done: int, total: int) -> None:
        # a run counts as done once the next one starts (one that blows up never reaches
        # its last output time) or when all of them have returned, below
        if name not in seen:
            seen.append(name)
        q.set_progress(conn, job_id, phase=f"les {name}", phase_done=len(seen) - 1,
                       phase_total=max(n_runs, len(seen)))

    try:
        _check_files(st, spec, row)
        comparison = run(st, spec, progress=progress)
    except UserError as exc:
        st.update_job(job_id, state="failed", error=str(exc), only_if_active=True)
        q.set_progress(conn, job_id, phase="failed")
        return {"job": job_id, "failed": str(exc)}
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    request = {"job_id": job_id, "model_id": spec.model_id, "fingerprint": row["fingerprint"],
               "input_sha256": row["input_sha256"], "spec": spec.model_dump(mode="json")}
    folder = save_result(st, spec.model_id, comparison, request)
    st.update_job(job_id, state="succeeded", only_if_active=True)
    total = max(n_runs, len(seen))
    q.set_progress(conn, job_id, phase="done", phase_done=total, phase_total=total)
    return {"job": job_id, "model_id": spec.model_id, "run": folder.name,
            "status": {k: v.status for k, v in comparison.runs.items()}}


def _check_files(store: Store, spec: AposterioriSpec, row: dict) -> None:
    """Containment at open time (worker.tasks.check_input_file) of the run's files, and the
    initial file's SHA-256 against the one recorded at submission."""
    from closure.io import sha256_file
    from worker import tasks

    initial = spec.input.path if spec.input is not None else model_input_path(store,
                                                                              spec.model_id)
    tasks.check_input_file(initial)
    if spec.reference is not None:
        tasks.check_input_file(spec.reference.path)
    if spec.modes_path is not None:
        tasks.check_input_file(spec.modes_path)
    if row.get("input_sha256") and sha256_file(initial) != row["input_sha256"]:
        raise UserError("the input file changed since the run was submitted (its SHA-256 "
                        "differs from the one recorded then); it is not read: resubmit")


def run(store: Store, spec: AposterioriSpec, progress=None):
    """closure.les.simulate of the spec's stored model (``spec.input.path`` resolved already;
    ``None``: the model's own input file). Returns the Comparison."""
    from closure.les import simulate

    model = store.load_model(spec.model_id)
    initial = spec.input.path if spec.input is not None else model_input_path(store,
                                                                              spec.model_id)
    reference = spec.reference.path if spec.reference is not None else None
    return simulate(
        model, initial, reference, model_label=MODEL_LABEL, initial_index=spec.initial_index,
        viscosity=spec.viscosity, drag=spec.drag,
        hyperviscosity_order=spec.hyperviscosity_order, forcing=spec.forcing,
        duration=spec.time, interval=spec.interval, baselines=list(spec.baselines),
        smagorinsky_constant=spec.smagorinsky_constant, dealias=spec.dealias, cfl=spec.cfl,
        energy_bound=spec.energy_bound, progress=progress,
        long_duration=spec.long_duration, spinup=spec.spinup,
        sample_interval=spec.sample_interval, hypoviscosity=spec.hypoviscosity,
        hypoviscosity_order=spec.hypoviscosity_order)


def model_input_path(store: Store, model_id: str) -> Path:
    """The fine-grid file a stored model was fitted on (UserError when it is gone)."""
    folder = store.model_dir(model_id)
    path = None
    try:
        path = read_json(folder / "spec.json")["input"].get("path")
    except (OSError, ValueError, KeyError, TypeError):
        pass
    if not path:
        prov = store.load_model(model_id).provenance or {}
        inp = prov.get("input")
        path = inp.get("path") if isinstance(inp, dict) else inp
    if not path or not Path(path).is_file():
        raise UserError(f"model {model_id}'s input file {path or '(not recorded)'} is not "
                        "available: give input.path (under a data root) or input.dataset_id")
    return Path(path)


# --------------------------------------------------------------------------- results

def save_result(store: Store, model_id: str, comparison, request: dict) -> Path:
    """Write a comparison into ``les/<run>/`` (built under a temporary name, renamed into
    place) and point ``les/latest.json`` at it. Returns the run folder."""
    base = store.aposteriori_dir(model_id)
    base.mkdir(parents=True, exist_ok=True)
    name = run_name(request["fingerprint"])
    statuses = {label: {"status": t.status, "blowup_time": t.blowup_time,
                        "message": t.message} for label, t in comparison.runs.items()}
    request = {**request, "run": name, "finished": time.time(), "runs": statuses}
    tmp = base / f".tmp-{name}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        text = comparison.to_json()
        write_text_atomic(tmp / "les.json", text)
        write_text_atomic(tmp / "table.txt", comparison.table() + "\n")
        write_json_atomic(tmp / "request.json", request)
        final = base / name
        if final.exists():  # a re-run of the same request: replace it whole
            old = base / f".old-{name}-{uuid.uuid4().hex[:8]}"
            os.replace(final, old)
            os.replace(tmp, final)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, final)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    write_json_atomic(base / "latest.json", {"run": name, "fingerprint": request["fingerprint"],
                                             "job_id": request.get("job_id")})
    return final


def result_dir(store: Store, model_id: str, fp: str | None = None) -> Path | None:
    """The folder of the run with fingerprint ``fp`` (default: the latest), or None."""
    base = store.aposteriori_dir(model_id)
    if fp is None:
        try:
            name = read_json(base / "latest.json")["run"]
        except (OSError, ValueError, KeyError, TypeError):
            return None
    else:
        name = run_name(fp)
    folder = base / str(name)
    return folder if (folder / "les.json").is_file() else None


def read_result(store: Store, model_id: str, fp: str | None = None) -> dict | None:
    """``{"request": ..., "table": text, "result": les.json}`` of a run, or None."""
    folder = result_dir(store, model_id, fp)
    if folder is None:
        return None
    return {"run": folder.name, "request": read_json(folder / "request.json"),
            "table": (folder / "table.txt").read_text(encoding="utf-8").rstrip("\n"),
            "result": read_json(folder / "les.json")}


# --------------------------------------------------------------------------- jobs

def latest_job(store: Store, model_id: str) -> dict | None:
    """The newest a posteriori job row of a model, or None."""
    import sqlalchemy as sa

    from closure.store import jobs_table

    stmt = (sa.select(jobs_table).where(jobs_table.c.model_id == model_id)
            .order_by(jobs_table.c.created.desc()).limit(200))
    with store.engine.connect() as conn:
        rows = [dict(r) for r in conn.execute(stmt).mappings().all()]
    return next((r for r in rows if is_aposteriori(r)), None)


def reconcile(store: Store, conn, row: dict) -> dict:
    """Fail an active a posteriori job whose task failed for good without its failure callback
    (a work-horse killed on its last attempt) or that the queue lost. Returns the row."""
    if row["state"] not in ("queued", "running") or not is_aposteriori(row):
        return row
    job = q.fetch(conn, task_id(row["id"]))
    message = None
    if job is None:
        if time.time() - epoch_time(row["created"]) > 30 \
                and not conn.exists(q.progress_key(row["id"])):
            message = ("the queue no longer knows this run (Redis lost its data); "
                       "submit it again")
    elif job.get_status(refresh=False) in ("failed", "stopped"):
        message = (f"the a posteriori run failed after {q.TASK_RETRIES + 1} attempts: "
                   f"{q.last_error(job)}")
    if message:
        store.update_job(row["id"], state="failed", error=message, only_if_active=True)
        return store.get_job(row["id"])
    return row
