"""/models/{id}/les: queue an a posteriori run of a stored model (the coarse solver against
the baselines) and read its result."""

from __future__ import annotations

import os
from pathlib import Path

from fastapi import APIRouter, Body, Depends, Response

from api.deps import Settings, get_redis, get_settings, get_store, require_token
from api.inputs import check_declared_sizes, resolve_under_roots
from closure.errors import InputFileError, OptionError
from closure.spec import AposterioriSpec, FileSpec
from closure.store import NotFoundError, Store, new_job_id, read_json
from worker import aposteriori as ap
from worker import status as jobs_status

router = APIRouter(tags=["a posteriori"], dependencies=[Depends(require_token)])


@router.post("/models/{model_id}/les", status_code=202,
             summary="Queue an a posteriori run of a model against the baselines")
def submit_aposteriori(model_id: str, response: Response,
                       spec: AposterioriSpec | None = Body(
                           None, description="options (every one has a default; the body "
                           "may be empty)"),
                       settings: Settings = Depends(get_settings),
                       store: Store = Depends(get_store), conn=Depends(get_redis)) -> dict:
    """Run the model from filtered-DNS initial fields in the 2-D or 3-D coarse solver (with
    ``long_duration``: also long, its statistics compared after ``spinup``), with the same
    options for each baseline, and compare every run with the filtered DNS (202, a job to
    follow with GET /jobs/{id}; the result is at GET /models/{id}/les). The input defaults to
    the model's own input file. The same request again is answered from the store or from
    the run in progress (200, ``reused: true``). A priori skill does not guarantee a stable
    coarse simulation: this run is that check, on this flow only."""
    spec = spec or AposterioriSpec()
    if spec.model_id not in (None, model_id):
        raise OptionError(f"model_id {spec.model_id!r} in the body differs from the URL's "
                          f"{model_id!r}: leave it out")
    row = store.get_model(model_id)
    dims = (read_json(Path(row["path"]) / "model.json").get("dims") or [])
    if list(dims) not in (["y", "x"], ["z", "y", "x"]):
        raise OptionError(f"model {model_id} is a {len(dims)}-D ({', '.join(dims)}) model: the "
                          "a posteriori coarse solvers run 2-D (y, x) and 3-D (z, y, x) "
                          "periodic flows only")
    initial, initial_ds = _resolve(spec.input, "input", store, settings)
    if initial is None:
        initial = ap.model_input_path(store, model_id)
    reference, _ = _resolve(spec.reference, "reference", store, settings)
    update = {"model_id": model_id, "input": FileSpec(path=os.fspath(initial)),
              "reference": None if reference is None else FileSpec(path=os.fspath(reference))}
    modes = None
    if spec.modes_path is not None:  # a forcing table is read by the worker: same roots
        modes = resolve_under_roots(spec.modes_path, settings.data_roots, "forcing modes path")
        if not modes.is_file():
            raise InputFileError(f"forcing modes:{spec.modes_path}: no such file under the "
                                 "data roots; give the path of a table of Fourier modes")
        update["forcing"] = f"modes:{os.fspath(modes)}"
    run_spec = spec.model_copy(update=update)
    sha_in = _sha256(store, initial)
    fp = ap.fingerprint(model_id, run_spec, sha_in,
                        None if reference is None else _sha256(store, reference),
                        None if modes is None else _sha256(store, modes))
    row_fields = dict(spec=run_spec.model_dump(mode="json"), fingerprint=fp,
                      input_sha256=sha_in, dataset_id=initial_ds, model_id=model_id)
    done = ap.read_result(store, model_id, fp)
    existing = None
    if done is not None:  # answered from the store by a finished job of its own
        existing = store.create_job(job_id=new_job_id(), state="succeeded", reused=True,
                                    name="a posteriori", **row_fields)
    existing = existing or store.find_active_job(fp)
    if existing is not None:
        response.status_code = 200
        return {**jobs_status.status(store, conn, existing["id"]), "reused": True}
    job_id = new_job_id()
    store.create_job(job_id=job_id, name="a posteriori", **row_fields)
    try:
        ap.enqueue(conn, job_id)
    except Exception:
        store.update_job(job_id, state="failed", error="the queue was unreachable at submission")
        raise
    return jobs_status.status(store, conn, job_id)


@router.get("/models/{model_id}/les", summary="A model's latest a posteriori result")
def get_aposteriori(model_id: str, store: Store = Depends(get_store),
                    conn=Depends(get_redis)) -> dict:
    """The latest a posteriori comparison of the model: ``runs`` (each run's status,
    blow-up time and message), ``table`` (errors against the filtered DNS, as text) and
    ``result`` (the full comparison: series, spectra, PDFs, metrics, settings). 404 with the
    reason before a run finished (queued, running or failed: the job id says which)."""
    store.get_model(model_id)
    job = ap.latest_job(store, model_id)
    if job is not None:
        job = ap.reconcile(store, conn, job)
    found = ap.read_result(store, model_id)
    if found is None:
        if job is not None and job["state"] in ("queued", "running"):
            raise NotFoundError(f"model {model_id} has no a posteriori result yet: run "
                                f"{job['id']} is {job['state']}; follow it with GET /jobs/"
                                f"{job['id']}")
        if job is not None and job["state"] == "failed":
            raise NotFoundError(f"model {model_id} has no a posteriori result: run "
                                f"{job['id']} failed ({job['error']}); start another with "
                                f"POST /models/{model_id}/les")
        raise NotFoundError(f"model {model_id} has no a posteriori result yet: start a run "
                            f"with POST /models/{model_id}/les")
    request = found["request"]
    out = {"model_id": model_id, "run": found["run"], "job_id": request.get("job_id"),
           "fingerprint": request.get("fingerprint"), "spec": request.get("spec"),
           "runs": request.get("runs"), "table": found["table"], "result": found["result"]}
    if job is not None and job["state"] in ("queued", "running", "failed") \
            and job["fingerprint"] != request.get("fingerprint"):
        out["newer_job"] = {"id": job["id"], "state": job["state"], "error": job["error"]}
    return out


def _resolve(ref: FileSpec | None, what: str, store: Store, settings: Settings
             ) -> tuple[Path | None, str | None]:
    """(real path, dataset id or None) of a file given by path (under the data roots) or by
    uploaded dataset id; (None, None) when not given."""
    if ref is None:
        return None, None
    if ref.dataset_id is not None:
        if "\x00" in ref.dataset_id or len(ref.dataset_id) > 64:
            raise OptionError(f"{what}.dataset_id: give a dataset id from POST /datasets")
        ds = store.get_dataset(ref.dataset_id)
        path = Path(ds["path"])
        if not path.is_file():
            raise InputFileError(f"{what}.dataset_id {ref.dataset_id}: its file is gone from "
                                 "the store; upload it again")
        return path, ds["id"]
    path = resolve_under_roots(ref.path, settings.data_roots, f"{what}.path")
    check_declared_sizes(path, f"{what}.path {ref.path!r}", settings)
    return path, None


def _sha256(store: Store, path: Path) -> str:
    """The file's SHA-256, from the catalog when it recorded this file unchanged."""
    st = path.stat()
    ds = store.dataset_by_path(path, st.st_size, st.st_mtime_ns)
    if ds is not None:
        return ds["sha256"]
    from closure.io import sha256_file

    return sha256_file(path)
