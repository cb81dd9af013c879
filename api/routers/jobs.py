"""/jobs: submit a job (discovery, coarse-graining, sweep), follow it, cancel it."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query, Response
from fastapi.responses import JSONResponse

from api.deps import Settings, get_redis, get_settings, get_store, require_token
from api.errors import ConflictError
from api.inputs import resolve_input
from api.routers.products import product_as_dataset, submit_coarse_grain
from api.routers.sweeps import submit_sweep
from api.submission import reuse_or_queue
from closure.spec import AnyJobSpec
from closure.store import Store, fingerprint_hash
from worker import queue as q
from worker import status as jobs_status

router = APIRouter(tags=["jobs"], dependencies=[Depends(require_token)])


@router.post("/jobs", status_code=202, summary="Submit a discovery, coarse-graining or sweep job")
def submit_job(spec: AnyJobSpec, response: Response,
               name: str | None = Query(None, max_length=200, description="a label for the job"),
               settings: Settings = Depends(get_settings), store: Store = Depends(get_store),
               conn=Depends(get_redis)) -> dict:
    """Validate the spec and its input file, then queue the job (202).

    The input is ``input.path`` (a file under the server's data roots) or
    ``input.dataset_id`` (from POST /datasets). An identical job (same input SHA-256 and spec
    fingerprint) is not run twice: the answer is the existing job (200, ``reused: true``),
    finished or still running. ``kind: "coarse-grain"`` queues a coarse-graining job (see
    /products), ``kind: "sweep"`` a filter-width sweep (see /sweeps); a discovery job whose
    ``input.dataset_id`` is a product id (``pr-...``) reads that product.
    """
    if spec.kind == "coarse-grain":
        return submit_coarse_grain(spec, response, name, settings, store, conn)
    if spec.kind == "sweep":
        return submit_sweep(spec, response, name, settings, store, conn)
    spec = product_as_dataset(spec, store)  # input.dataset_id "pr-...": a stored product
    # header-only checks (sizes, ratio, width, library): 4xx now, no field values read
    run_spec, dataset = resolve_input(spec, store, settings)
    fingerprint = fingerprint_hash(run_spec, dataset["sha256"])
    model = store.model_by_fingerprint(fingerprint)
    return reuse_or_queue(store, conn, response, run_spec, dataset, fingerprint, name, model,
                          q.enqueue_plan, **({"model_id": model["id"]} if model else {}))


@router.get("/jobs", summary="Recent jobs")
def list_jobs(state: str | None = Query(
                  None, pattern="^(queued|running|succeeded|failed|canceled)$"),
              limit: int = Query(50, ge=1, le=1000), store: Store = Depends(get_store)) -> list:
    rows = store.list_jobs(state=state, limit=limit)
    return [{k: r[k] for k in ("id", "name", "state", "model_id", "error", "created",
                               "finished", "input_sha256")} for r in rows]


@router.get("/jobs/{job_id}", summary="Job state and progress")
def get_job(job_id: str, store: Store = Depends(get_store),
            conn=Depends(get_redis)) -> JSONResponse:
    """State (queued, running, succeeded, failed, canceled), progress (phase, snapshots
    done/total), the model id once it succeeded, and the error when it failed."""
    # plain JSON types already: answer directly (this is the route clients poll)
    return JSONResponse(jobs_status.status(store, conn, job_id))


@router.delete("/jobs/{job_id}", summary="Cancel a job")
def cancel_job(job_id: str, store: Store = Depends(get_store), conn=Depends(get_redis)) -> dict:
    """Stop a queued or running job: pending tasks never run, running ones are stopped."""
    if not q.cancel(store, conn, job_id):
        row = store.get_job(job_id)
        raise ConflictError(f"job {job_id} already ended ({row['state']}); nothing to cancel")
    return jobs_status.status(store, conn, job_id)
