"""What every job kind does once its spec is checked: answer an identical earlier job or
stored result (200, ``reused``), else record the job and queue its plan task (202)."""

from __future__ import annotations

from collections.abc import Callable

from fastapi import Response

from closure.store import Store, new_job_id


def reuse_or_queue(store: Store, conn, response: Response, run_spec, dataset: dict,
                   fingerprint: str, name: str | None, stored: dict | None,
                   enqueue: Callable, **result) -> dict:
    """The status of the job that answers this submission. ``stored``: the result already
    stored under ``fingerprint`` (a model, product or sweep record with its ``job_id``), if
    any; ``result``: the job columns that point at it (e.g. ``model_id``); ``enqueue(conn,
    job_id)`` queues the kind's plan task."""
    from worker import status as jobs_status

    common = dict(spec=run_spec.model_dump(mode="json"), fingerprint=fingerprint,
                  input_sha256=dataset["sha256"], dataset_id=dataset["id"], name=name)
    existing = None
    if stored is not None:
        job_id = stored.get("job_id")
        existing = store.get_job(job_id, missing_ok=True) if job_id else None
        if existing is None or existing["state"] != "succeeded":
            # e.g. the job that made it was canceled just after storing it: a finished job of
            # its own points at the stored result
            existing = store.create_job(job_id=new_job_id(), state="succeeded", reused=True,
                                        **common, **result)
    existing = existing or store.find_active_job(fingerprint)
    if existing is not None:
        response.status_code = 200
        return {**jobs_status.status(store, conn, existing["id"]), "reused": True}
    job_id = new_job_id()
    store.create_job(job_id=job_id, **common)
    try:
        enqueue(conn, job_id)
    except Exception:
        store.update_job(job_id, state="failed", error="the queue was unreachable at submission")
        raise
    return jobs_status.status(store, conn, job_id)
