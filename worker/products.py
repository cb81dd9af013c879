"""rq tasks of coarse-graining jobs: plan -> map (pieces per snapshot) -> reduce (product).

The same task ids as discovery jobs (``<job>-plan``, ``<job>-map-<k>``, ``<job>-reduce``), so
worker.queue's status, reconciliation and cancellation serve both kinds. Map tasks write one
piece per snapshot and setting (closure.products.write_pieces, each renamed into place); the
reduce waits for every map (allow_failure), assembles the pieces into one file and stores it
as a product (closure.store.Store.add_product). Every task is safe to run twice.
"""

from __future__ import annotations

import shutil

from closure.errors import UserError
from closure.spec import parse_coarse_grain_spec
from closure.store import read_json, write_json_atomic
from worker import queue as q
from worker.context import (
    INPUT_CHANGED,
    _conn,
    _fail,
    _failure_callback,
    _missing_message,
    store,
)

KIND = "coarse-grain"


def is_coarse_grain(row: dict) -> bool:
    """Whether a catalog job row is a coarse-graining job."""
    spec = row.get("spec")
    return isinstance(spec, dict) and spec.get("kind") == KIND


def status_fields(st, row: dict) -> dict:
    """What GET /jobs/{id} adds for a coarse-graining job: the product id once it exists."""
    if row["state"] != "succeeded":
        return {"product_id": None}
    product = st.product_by_fingerprint(row["fingerprint"])
    return {"product_id": product["id"] if product else None}


def enqueue(conn, job_id: str) -> None:
    """Put a coarse-graining job's plan task on the queue."""
    q.enqueue_plan(conn, job_id, "worker.products.plan_task", "coarse-grain")


def _pieces(job_id: str):
    return store().job_dir(job_id) / "pieces"


def _drop_work(job_id: str) -> None:
    shutil.rmtree(store().job_dir(job_id), ignore_errors=True)


def _done(conn, job_id: str, product_id: str, reused: bool = False) -> dict:
    store().update_job(job_id, state="succeeded", reused=reused, only_if_active=True)
    q.set_progress(conn, job_id, phase="done")
    return {"job": job_id, "product_id": product_id, **({"reused": True} if reused else {})}


def plan_task(job_id: str) -> dict:
    """Plan the job (hash the input, check every setting), then enqueue the map tasks and
    the reduce after them."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        return {"job": job_id, "canceled": True}
    st = store()
    row = st.get_job(job_id)
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    spec = parse_coarse_grain_spec(row["spec"])
    st.update_job(job_id, state="running", only_if_active=True)
    q.set_progress(conn, job_id, phase="plan")
    from closure import products
    from closure.store import fingerprint_hash
    from worker.context import check_input_file

    try:
        for path in spec.input.paths if spec.input.path is not None else [""]:
            check_input_file(path)  # containment at open time, as for discovery
        plan = products.plan(spec)
    except UserError as exc:
        return _fail(conn, job_id, str(exc))
    if plan["sha256"] != row["input_sha256"]:
        return _fail(conn, job_id, INPUT_CHANGED)
    fingerprint = fingerprint_hash(spec, plan["sha256"])
    if fingerprint != row["fingerprint"]:
        st.update_job(job_id, fingerprint=fingerprint)
    existing = st.product_by_fingerprint(fingerprint)
    if existing is not None:
        return _done(conn, job_id, existing["id"], reused=True)

    work = st.job_dir(job_id)
    write_json_atomic(work / "plan.json", plan)
    write_json_atomic(work / "spec.json", spec.model_dump(mode="json"))
    from rq import Worker
    from rq.job import Dependency

    queue = q.get_queue(conn)
    indices = [int(i) for i in plan["snapshots"]]
    groups = q.split_snapshots(indices, Worker.count(queue=queue))
    q.set_progress(conn, job_id, phase="map", snapshots_total=len(indices), tasks=groups)
    parts = [queue.enqueue_call(
        "worker.products.map_task", args=(job_id, group), job_id=q.map_id(job_id, k),
        timeout=q.MAP_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S,
        description=f"coarse-grain {job_id} snapshots {group[0]}..{group[-1]}")
        for k, group in enumerate(groups)]
    queue.enqueue_call(
        "worker.products.reduce_task", args=(job_id,), job_id=q.reduce_id(job_id),
        depends_on=Dependency(jobs=parts, allow_failure=True),
        timeout=q.REDUCE_TIMEOUT_S, retry=q.retry_policy(), result_ttl=q.PROGRESS_TTL_S,
        failure_ttl=q.PROGRESS_TTL_S, description=f"assemble {job_id}",
        on_failure=_failure_callback())
    if q.is_canceled(conn, job_id):  # canceled while we were fanning out
        q.stop_tasks(conn, job_id)
    return {"job": job_id, "snapshots": len(indices)}


def map_task(job_id: str, indices: list[int]) -> dict:
    """Coarse-grain each snapshot in ``indices`` for every setting; one piece file each,
    renamed into place (a re-run overwrites them with identical bits)."""
    conn = _conn()
    if q.is_canceled(conn, job_id):
        _drop_work(job_id)
        return {"job": job_id, "indices": indices, "canceled": True}
    st = store()
    plan = read_json(st.job_dir(job_id) / "plan.json")
    from closure import products

    errors: dict[int, str] = {}
    source = None
    from worker.context import check_input_file

    try:
        check_input_file(plan["input"]["path"])
        source = products.open_planned(plan)  # once for the whole group
        cgs = products._coarse_grainings(plan, source.grid)
    except UserError as exc:
        errors = {int(i): str(exc) for i in indices}
    for i in indices if not errors else ():
        if q.is_canceled(conn, job_id):
            break
        try:
            products.write_pieces(plan, int(i), _pieces(job_id), source=source,
                                  coarse_grainings=cgs)
        except UserError as exc:
            errors[int(i)] = str(exc)
            continue
        with conn.pipeline() as p:
            p.sadd(q.done_key(job_id), int(i))
            p.expire(q.done_key(job_id), q.PROGRESS_TTL_S)
            p.execute()
    if source is not None:
        source.close()
    if q.is_canceled(conn, job_id):  # no pieces of a canceled job are kept
        _drop_work(job_id)
        return {"job": job_id, "indices": indices, "canceled": True}
    if errors:
        with conn.pipeline() as p:
            p.hset(q.errors_key(job_id), mapping={str(k): v for k, v in errors.items()})
            p.expire(q.errors_key(job_id), q.PROGRESS_TTL_S)
            p.execute()
    return {"job": job_id, "indices": indices, "errors": len(errors)}


def reduce_task(job_id: str) -> dict:
    """Assemble the pieces into the product file, store it, end the job."""
    conn = _conn()
    st = store()
    if q.is_canceled(conn, job_id):
        _drop_work(job_id)
        return {"job": job_id, "canceled": True}
    row = st.get_job(job_id)
    existing = st.product_by_fingerprint(row["fingerprint"])
    if existing is not None:  # a re-run after the product was stored
        _drop_work(job_id)
        return _done(conn, job_id, existing["id"])
    if row["state"] not in ("queued", "running"):
        return {"job": job_id, "state": row["state"]}
    work = st.job_dir(job_id)
    plan = read_json(work / "plan.json")
    spec = read_json(work / "spec.json")
    from closure import products
    from closure.store import product_id_for

    missing = products.missing_pieces(plan, _pieces(job_id))
    if missing:
        return _fail(conn, job_id, _missing_message(conn, job_id, missing))

    def progress(phase: str, done: int, total: int) -> None:
        q.set_progress(conn, job_id, phase=phase, phase_done=int(done), phase_total=int(total))

    q.set_progress(conn, job_id, phase="assemble")
    product_id = product_id_for(row["fingerprint"])
    import json

    from closure import __version__

    attrs = {"closure_product_id": product_id, "closure_job_id": job_id,
             "closure_spec": json.dumps(spec, sort_keys=True),
             "history": f"{_now()} closure {__version__} coarse-grain (queued job {job_id}, "
                        f"product {product_id})"}
    out = work / "product.nc"  # the store's file name; a Zarr product is a zip under it
    products.assemble(plan, _pieces(job_id), out, attrs, progress=progress)
    if q.is_canceled(conn, job_id):  # canceled during the assembly: nothing is stored
        _drop_work(job_id)
        return {"job": job_id, "canceled": True}
    stored = st.add_product(file=out, fingerprint=row["fingerprint"],
                            dataset_sha256=row["input_sha256"], spec=spec, plan=plan,
                            job_id=job_id, name=row["name"])
    _drop_work(job_id)
    return _done(conn, job_id, stored["id"])


def _now() -> str:
    import datetime as dt

    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
