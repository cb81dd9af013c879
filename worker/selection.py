"""rq tasks of selection by coarse runs (a discovery job with ``fit.select`` aposteriori).

After the discovery reduce has fitted the a priori model, :func:`start` (called by
worker.tasks.reduce_task instead of storing it) plans the candidates along the sparse paths
(closure.selection.plan_from_stats on the job's statistics) and their eddy-viscosity
companions (closure.selection.companions_for), writes them to the job's ``selection/`` folder
and fans out::

    <job>-run-<k>     one candidate's long coarse run (closure.selection.run_candidate);
                      its record (plain JSON) written atomically to selection/run-<k>.json
    <job>-choose      after every run (allow_failure): closure.selection.conclude picks the
                      model, which is stored as the reduce would have stored it

Progress shows the phase "coarse runs" with runs done / total. Candidates travel as JSON.
"""

from __future__ import annotations

import shutil
import time

from closure.errors import UserError
from closure.store import read_json, write_json_atomic
from worker import queue as q
from worker.context import (
    _conn,
    _discard_if_ended,
    _fail,
    _failure_callback,
    _lease_lost,
    _leased,
    check_input_file,
    store,
)

#: the phase shown in the job's progress while candidates run
PHASE = "coarse runs"


def wanted(spec) -> bool:
    """Whether a discovery job chooses its model by coarse runs."""
    return getattr(spec.fit, "select", "apriori") == "aposteriori"


def run_id(job_id: str, k: int) -> str:
    return f"{job_id}-run-{int(k)}"


def choose_id(job_id: str) -> str:
    return f"{job_id}-choose"


def runs_key(job_id: str) -> str:
    return q.KEY_PREFIX + job_id + ":runs"


def _folder(job_id: str):
    return store().job_dir(job_id) / "selection"


def start(conn, job_id: str, spec, plan: dict, stats: dict, model) -> dict:
    """Plan the candidates of a reduced job and queue one run task each and the choose task
    after them; the a priori ``model`` is kept in the job folder as the candidates' base."""
    from closure.selection import (
        candidate_to_dict,
        companions_for,
        initial_path,
        input_options,
        plan_from_stats,
    )

    folder = _folder(job_id)
    try:
        initial = initial_path(spec, plan)
        check_input_file(initial)
        options = input_options(spec)
        candidates = plan_from_stats(spec, plan, stats,
                                     transfer_weights=spec.fit.transfer_weights,
                                     max_per_path=spec.fit.max_candidates)
        if not candidates:
            raise UserError("no candidate models to run: the sparse path is empty")
        candidates += companions_for(spec, plan, stats, model, candidates, initial, options)
    except UserError as exc:
        return _fail(conn, job_id, str(exc))
    if _lease_lost():
        return {"job": job_id, "lease_lost": True}
    folder.mkdir(parents=True, exist_ok=True)
    model.save(folder / "base.json")
    write_json_atomic(folder / "candidates.json", {
        "candidates": [candidate_to_dict(c) for c in candidates], "initial": str(initial),
        "input_options": options, "long_duration": spec.fit.duration,
        "spinup": spec.fit.spinup, "tolerance": spec.fit.tolerance})
    from rq.job import Dependency

    queue = q.get_queue(conn)
    conn.delete(runs_key(job_id))
    q.set_progress(conn, job_id, phase=PHASE, phase_done=0, phase_total=len(candidates))
    parts = [queue.enqueue_call(
        "worker.selection.run_task", args=(job_id, k), job_id=run_id(job_id, k),
        timeout=q.MAP_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S, description=f"coarse run {job_id} {c.label}")
        for k, c in enumerate(candidates)]
    queue.enqueue_call(
        "worker.selection.choose_task", args=(job_id,), job_id=choose_id(job_id),
        depends_on=Dependency(jobs=parts, allow_failure=True), timeout=q.REDUCE_TIMEOUT_S,
        retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S, failure_ttl=q.PROGRESS_TTL_S,
        description=f"choose {job_id}", on_failure=_failure_callback())
    if q.is_canceled(conn, job_id):
        stop_tasks(conn, job_id, len(candidates))
    return {"job": job_id, "candidates": len(candidates)}


class _Canceled(Exception):
    """The job was canceled while a coarse run was going."""


def _cancel_check(conn, job_id: str):
    """A progress callback that stops the run (at most every 2 s a Redis look-up) once the
    job is canceled."""
    last = [0.0]

    def progress(phase: str, done: int, total: int) -> None:
        now = time.monotonic()
        if now - last[0] >= 2.0:
            last[0] = now
            if q.is_canceled(conn, job_id):
                raise _Canceled

    return progress


@_leased
def run_task(job_id: str, k: int) -> dict:
    """The k-th candidate's long coarse run; its record is written atomically (a re-run
    finds it written and does nothing). A UserError is recorded as the candidate's error."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "run": k, "canceled": True}
    folder = _folder(job_id)
    out = folder / f"run-{int(k)}.json"
    if not out.exists():
        from closure.model import ClosureModel
        from closure.selection import candidate_from_dict, run_candidate

        data = read_json(folder / "candidates.json")
        cand = candidate_from_dict(data["candidates"][int(k)])
        try:
            check_input_file(data["initial"])
            record = run_candidate(
                ClosureModel.load(folder / "base.json"), cand, data["initial"],
                long_duration=data["long_duration"], spinup=data["spinup"],
                input_options=data["input_options"], progress=_cancel_check(conn, job_id))
        except UserError as exc:
            record = {"label": cand.label, "error": str(exc)}
        except _Canceled:
            _discard_if_ended(job_id)
            return {"job": job_id, "run": k, "canceled": True}
        if _lease_lost():
            return {"job": job_id, "run": k, "lease_lost": True}
        write_json_atomic(out, record)
    with conn.pipeline() as p:
        p.sadd(runs_key(job_id), int(k))
        p.expire(runs_key(job_id), q.PROGRESS_TTL_S)
        p.scard(runs_key(job_id))
        done = p.execute()[-1]
    q.set_progress(conn, job_id, phase_done=int(done))
    _discard_if_ended(job_id)
    return {"job": job_id, "run": k}


@_leased
def choose_task(job_id: str) -> dict:
    """Choose among the candidates' records (closure.selection.conclude) and store the chosen
    model (the a priori model, with a loud note, when none was stable); end the job."""
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
    from closure.model import ClosureModel
    from closure.selection import candidate_from_dict, conclude, unselected_model
    from closure.spec import parse_spec

    work = st.job_dir(job_id)
    folder = work / "selection"
    data = read_json(folder / "candidates.json")
    candidates = [candidate_from_dict(c) for c in data["candidates"]]
    records, problems = [], []
    for k, cand in enumerate(candidates):
        path = folder / f"run-{k}.json"
        if not path.exists():
            job = q.fetch(conn, run_id(job_id, k))
            why = q.last_error(job) if job is not None else "its task was lost"
            problems.append(f"candidate {cand.label}: its coarse run failed after "
                            f"{q.TASK_RETRIES + 1} attempts: {why}")
            continue
        record = read_json(path)
        if "error" in record:
            problems.append(f"candidate {cand.label}: {record['error']}")
        records.append(record)
    if problems:
        more = f" (and {len(problems) - 5} more)" if len(problems) > 5 else ""
        return _fail(conn, job_id, "; ".join(problems[:5]) + more)
    q.set_progress(conn, job_id, phase="choose")
    base = ClosureModel.load(folder / "base.json")
    selection, chosen = conclude(base, candidates, records,
                                 long_duration=data["long_duration"], spinup=data["spinup"],
                                 tolerance=data["tolerance"])
    model = chosen if chosen is not None else unselected_model(base, selection)
    if _lease_lost():
        return {"job": job_id, "lease_lost": True}
    spec = parse_spec(read_json(work / "spec.json"))
    plan = read_json(work / "plan.json")
    model_row = st.add_model(
        model=model, fingerprint=row["fingerprint"], dataset_sha256=row["input_sha256"],
        spec=spec, plan=plan, job_id=job_id, stats_dir=work / "stats", name=row["name"])
    st.update_job(job_id, state="succeeded", model_id=model_row["id"], only_if_active=True)
    q.set_progress(conn, job_id, phase="done")
    shutil.rmtree(work, ignore_errors=True)
    return {"job": job_id, "model_id": model_row["id"], "chosen": selection.chosen}


def stop_tasks(conn, job_id: str, n: int) -> None:
    """Cancel the waiting run and choose tasks of a job (the running ones stop themselves
    at their next progress check)."""
    from rq.exceptions import InvalidJobOperation
    from rq.job import JobStatus

    for rq_id in [run_id(job_id, k) for k in range(n)] + [choose_id(job_id)]:
        job = q.fetch(conn, rq_id)
        if job is None:
            continue
        try:
            if job.get_status(refresh=False) in (JobStatus.QUEUED, JobStatus.DEFERRED,
                                                 JobStatus.SCHEDULED):
                job.cancel()
        except InvalidJobOperation:
            pass
