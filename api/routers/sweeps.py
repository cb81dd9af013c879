"""/sweeps: filter-width sweeps run on the queue (POST /jobs with ``kind: "sweep"``), their
results (closure.sweep.SweepResult, with each width's stored model id)."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Response

from api.deps import Settings, get_store, require_token
from api.inputs import resolve_input
from closure.errors import UserError
from closure.spec import SweepSpec
from closure.store import Store, fingerprint_hash, new_job_id

router = APIRouter(tags=["sweeps"], dependencies=[Depends(require_token)])

_NOT_FOUND = {404: {"description": "no sweep with this id", "content": {"application/json": {
    "example": {"detail": "no sweep with id 'sw-...'", "error": "NotFoundError"}}}}}


def submit_sweep(spec: SweepSpec, response: Response, name: str | None, settings: Settings,
                 store: Store, conn) -> dict:
    """POST /jobs for ``kind: "sweep"``: check every width against the input, answer an
    identical earlier sweep (200, ``reused``), else queue it (202)."""
    from closure.sweep import sweep_specs
    from worker import status as jobs_status
    from worker import sweeps as tasks

    discovery, dataset = resolve_input(spec.discovery, store, settings)
    run_spec = spec.model_copy(update={"discovery": discovery})
    for k, s in enumerate(sweep_specs(discovery, spec.widths, spec.ratios)):
        try:
            resolve_input(s, store, settings)  # a width the data cannot take: 4xx now (header)
        except UserError as exc:
            raise type(exc)(f"widths[{k}] ({spec.widths[k]:g}): {exc}") from None
    fingerprint = fingerprint_hash(run_spec, dataset["sha256"])
    existing = None
    if store.sweep_by_fingerprint(fingerprint) is not None:
        existing = store.create_job(
            job_id=new_job_id(), spec=run_spec.model_dump(mode="json"), fingerprint=fingerprint,
            input_sha256=dataset["sha256"], dataset_id=dataset["id"], name=name,
            state="succeeded", reused=True)
    existing = existing or store.find_active_job(fingerprint)
    if existing is not None:
        response.status_code = 200
        return {**jobs_status.status(store, conn, existing["id"]), "reused": True}
    job_id = new_job_id()
    store.create_job(job_id=job_id, spec=run_spec.model_dump(mode="json"),
                     fingerprint=fingerprint, input_sha256=dataset["sha256"],
                     dataset_id=dataset["id"], name=name)
    try:
        tasks.enqueue(conn, job_id)
    except Exception:
        store.update_job(job_id, state="failed", error="the queue was unreachable at submission")
        raise
    return jobs_status.status(store, conn, job_id)


@router.get("/sweeps", summary="Stored filter-width sweeps, newest first")
def list_sweeps(store: Store = Depends(get_store)) -> list:
    return store.list_sweeps()


@router.get("/sweeps/{sweep_id}", summary="A sweep result", responses=_NOT_FOUND)
def get_sweep(sweep_id: str, store: Store = Depends(get_store)) -> dict:
    """Per width: filter, ratio, D, scaled coefficients, held-out scores and the stored
    model's id (``model_ids``, in width order; each has its report at
    /models/{id}/report). A priori skill does not guarantee a stable or accurate coarse
    simulation."""
    return store.get_sweep(sweep_id)
