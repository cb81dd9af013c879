"""rq tasks of filter-width sweeps: plan -> one discovery per width -> collect.

Task ids follow discovery jobs (``<job>-plan``, ``<job>-map-<k>`` for width k,
``<job>-reduce``), so worker.queue's status, reconciliation and cancellation serve sweeps too.
Each width task runs closure.pipeline.discover in its work-horse and stores the model like a
discovery job would (same fingerprint, so an identical discovery job finds it); the collect
task builds the closure.sweep.SweepResult from the stored models and stores it.
"""

from __future__ import annotations

from closure.errors import UserError
from closure.spec import parse_sweep_spec
from closure.store import fingerprint_hash, read_json, write_json_atomic
from worker import queue as q
from worker.context import INPUT_CHANGED, _conn, _fail, _failure_callback, store

KIND = "sweep"


def is_sweep(row: dict) -> bool:
    spec = row.get("spec")
    return isinstance(spec, dict) and spec.get("kind") == KIND


def status_fields(st, row: dict) -> dict:
    """What GET /jobs/{id} adds for a sweep: the sweep id once it is stored."""
    if row["state"] != "succeeded":
        return {"sweep_id": None}
    found = st.sweep_by_fingerprint(row["fingerprint"])
    return {"sweep_id": found["id"] if found else None}


def enqueue(conn, job_id: str) -> None:
    """Put a sweep's plan task on the queue."""
    q.enqueue_plan(conn, job_id, "worker.sweeps.plan_task", "sweep")


def _specs(spec):
    """One discovery spec per (filter kind, width), kind by kind (SweepSpec.kinds)."""
    from closure.sweep import sweep_specs

    out = []
    for kind in spec.kinds:
        base = spec.discovery.model_copy(
            update={"filter": spec.discovery.filter.model_copy(update={"kind": kind})})
        try:
            out += sweep_specs(base, spec.widths, spec.ratios)
        except UserError as exc:
            if len(spec.kinds) == 1:
                raise
            raise type(exc)(f"filter {kind}: {exc}") from None
    return out


def _specs_base(spec, kind: str) -> dict:
    d = spec.discovery.model_dump(mode="json")
    d["filter"]["kind"] = kind
    return d


def _label(spec, k: int) -> str:
    """Task k's kind and width, for messages."""
    n = len(spec.widths)
    kind = spec.kinds[k // n]
    return f"width {spec.widths[k % n]:g}" + (f" ({kind})" if len(spec.kinds) > 1 else "")


def plan_task(job_id: str) -> dict:
    """Check every width against the data, hash the input once, queue one task per width
    and the collect task after them."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    spec = parse_sweep_spec(row["spec"])
    st.update_job(job_id, state="running", only_if_active=True)
    q.set_progress(conn, job_id, phase="plan")
    from closure import pipeline
    from closure.io import sha256_file
    from worker.context import check_input_file

    try:
        check_input_file(spec.discovery.input.path or "")  # containment at open time
        specs = _specs(spec)
        for s in specs:
            pipeline.check(s)
        sha = sha256_file(spec.discovery.input.path)
    except UserError as exc:
        return _fail(conn, job_id, str(exc))
    if sha != row["input_sha256"]:
        return _fail(conn, job_id, INPUT_CHANGED)
    fingerprint = fingerprint_hash(spec, sha)
    if fingerprint != row["fingerprint"]:
        st.update_job(job_id, fingerprint=fingerprint)
    if st.sweep_by_fingerprint(fingerprint) is not None:
        st.update_job(job_id, state="succeeded", reused=True, only_if_active=True)
        q.set_progress(conn, job_id, phase="done")
        return {"job": job_id, "reused": True}
    write_json_atomic(st.job_dir(job_id) / "sweep.json", {"sha256": sha})
    from rq.job import Dependency

    queue = q.get_queue(conn)
    groups = [[k] for k in range(len(specs))]  # one width per task: a whole discovery each
    q.set_progress(conn, job_id, phase="map", snapshots_total=len(specs), tasks=groups)
    parts = [queue.enqueue_call(
        "worker.sweeps.width_task", args=(job_id, k), job_id=q.map_id(job_id, k),
        timeout=q.MAP_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S, description=f"sweep {job_id} {_label(spec, k)}")
        for k in range(len(specs))]
    queue.enqueue_call(
        "worker.sweeps.collect_task", args=(job_id,), job_id=q.reduce_id(job_id),
        depends_on=Dependency(jobs=parts, allow_failure=True), timeout=q.REDUCE_TIMEOUT_S,
        retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S, failure_ttl=q.PROGRESS_TTL_S,
        description=f"collect sweep {job_id}", on_failure=_failure_callback())
    if q.is_canceled(conn, job_id):
        q.stop_tasks(conn, job_id)
    return {"job": job_id, "widths": len(specs)}


def width_task(job_id: str, k: int) -> dict:
    """Discovery at the k-th width, in this work-horse; the model is stored (a re-run finds
    it stored and does nothing)."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "width": k, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    spec = parse_sweep_spec(row["spec"])
    s = _specs(spec)[k]
    sha = read_json(st.job_dir(job_id) / "sweep.json")["sha256"]
    fingerprint = fingerprint_hash(s, sha)
    if st.model_by_fingerprint(fingerprint) is None:
        from closure import pipeline

        try:
            model = pipeline.discover(s)
            plan = pipeline.check(s)
        except UserError as exc:
            conn.hset(q.errors_key(job_id), str(k), str(exc))
            conn.expire(q.errors_key(job_id), q.PROGRESS_TTL_S)
            return {"job": job_id, "width": k, "error": str(exc)}
        st.add_model(model=model, fingerprint=fingerprint, dataset_sha256=sha, spec=s,
                     plan=plan, job_id=job_id, name=row["name"])
    with conn.pipeline() as p:
        p.sadd(q.done_key(job_id), int(k))
        p.expire(q.done_key(job_id), q.PROGRESS_TTL_S)
        p.execute()
    return {"job": job_id, "width": k}


def collect_task(job_id: str) -> dict:
    """Build the sweep result from the widths' stored models and store it."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    spec = parse_sweep_spec(row["spec"])
    specs = _specs(spec)
    sha = read_json(st.job_dir(job_id) / "sweep.json")["sha256"]
    from closure.store import model_id_for
    from closure.sweep import SweepResult, _entry

    ids = [model_id_for(fingerprint_hash(s, sha)) for s in specs]
    missing = [k for k, m in enumerate(ids) if st.get_model(m, missing_ok=True) is None]
    if missing:
        errors = {a.decode(): b.decode() for a, b in conn.hgetall(q.errors_key(job_id)).items()}
        why = "; ".join(f"{_label(spec, k)}: "
                        f"{errors.get(str(k), 'its task failed after retries')}"
                        for k in missing)
        return _fail(conn, job_id, why)
    q.set_progress(conn, job_id, phase="reduce")
    entries = [_entry(st.load_model(m), s.filter.ratio) for m, s in zip(ids, specs,
                                                                          strict=True)]
    n = len(spec.widths)
    by_filter = [{"filter_kind": kind, "model_ids": ids[j * n:(j + 1) * n],
                  **SweepResult(_specs_base(spec, kind), entries[j * n:(j + 1) * n]).to_dict()}
                 for j, kind in enumerate(spec.kinds)]
    # the top level is the first kind's sweep (a SweepResult dict, as for one kind)
    result = {k: v for k, v in by_filter[0].items() if k != "filter_kind"}
    if len(spec.kinds) > 1:
        result["filters"] = spec.kinds
        result["by_filter"] = by_filter
    result["note"] = ("a priori skill at every width does not guarantee a stable or accurate "
                      "coarse simulation: validate the models a posteriori")
    stored = st.add_sweep(result=result, fingerprint=row["fingerprint"], job_id=job_id)
    st.update_job(job_id, state="succeeded", only_if_active=True)
    q.set_progress(conn, job_id, phase="done")
    import shutil

    shutil.rmtree(st.job_dir(job_id), ignore_errors=True)
    return {"job": job_id, "sweep_id": stored["id"]}
