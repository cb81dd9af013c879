"""/sweeps: filter-width sweeps run on the queue (POST /jobs with ``kind: "sweep"``), their
results (closure.sweep.SweepResult, with each width's stored model id) and their HTML
reports (built on demand and cached in the sweep's folder, as /models/{id}/report is)."""

from __future__ import annotations

import fcntl
from pathlib import Path
from typing import Literal

from fastapi import APIRouter, Depends, Query, Request, Response
from fastapi.responses import FileResponse, RedirectResponse

from api.deps import Settings, get_settings, get_store, require_token
from api.inputs import resolve_input
from api.submission import reuse_or_queue
from closure.errors import UserError
from closure.spec import SweepSpec
from closure.store import Store, fingerprint_hash

router = APIRouter(tags=["sweeps"], dependencies=[Depends(require_token)])

_NOT_FOUND = {404: {"description": "no sweep with this id", "content": {"application/json": {
    "example": {"detail": "no sweep with id 'sw-...'", "error": "NotFoundError"}}}}}


def submit_sweep(spec: SweepSpec, response: Response, name: str | None, settings: Settings,
                 store: Store, conn) -> dict:
    """POST /jobs for ``kind: "sweep"``: check every width against the input, answer an
    identical earlier sweep (200, ``reused``), else queue it (202)."""
    from worker import sweeps as tasks

    discovery, dataset = resolve_input(spec.discovery, store, settings)
    run_spec = spec.model_copy(update={"discovery": discovery})
    n = len(spec.widths)
    for k, s in enumerate(tasks._specs(run_spec)):  # one per (filter kind, width)
        try:
            resolve_input(s, store, settings)  # a width the data cannot take: 4xx now (header)
        except UserError as exc:
            kind = f"filter {spec.kinds[k // n]}, " if len(spec.kinds) > 1 else ""
            raise type(exc)(f"{kind}widths[{k % n}] ({spec.widths[k % n]:g}): {exc}") from None
    fingerprint = fingerprint_hash(run_spec, dataset["sha256"])
    return reuse_or_queue(store, conn, response, run_spec, dataset, fingerprint, name,
                          store.sweep_by_fingerprint(fingerprint), tasks.enqueue)


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


# --------------------------------------------------------------------------- the report

#: the report's folder inside the sweep's folder
REPORT = "report"


@router.get("/sweeps/{sweep_id}/report", summary="A sweep's HTML report (or its file list)",
            responses=_NOT_FOUND)
def get_sweep_report(sweep_id: str, request: Request,
                     format: Literal["html", "json"] = Query(
                         "html", description="html: the page; json: the report's file names"),
                     store: Store = Depends(get_store),
                     settings: Settings = Depends(get_settings)):
    """The report of the first width's model with the sweep figures: scaled coefficient of
    each term and held-out scores against the filter width. ``format=html`` redirects to the
    page (``/sweeps/{id}/report/``), whose figures are relative links; ``format=json`` builds
    the report and lists its files. Built on first request and kept in the sweep's folder.
    A priori skill does not guarantee a stable or accurate coarse simulation."""
    if format == "html":
        store.get_sweep(sweep_id)
        return RedirectResponse(str(request.url_for("sweep_report_page", sweep_id=sweep_id)),
                                status_code=307)
    from api.routers.reports import report_files

    folder = ensure_sweep_report(store, sweep_id, settings)
    return {"sweep_id": sweep_id, "files": report_files(folder),
            "url": str(request.url_for("sweep_report_page", sweep_id=sweep_id))}


@router.get("/sweeps/{sweep_id}/report/", name="sweep_report_page",
            summary="The sweep report page", response_class=FileResponse,
            responses={200: {"content": {"text/html": {}}}, **_NOT_FOUND})
def sweep_report_page(sweep_id: str, store: Store = Depends(get_store),
                      settings: Settings = Depends(get_settings)) -> FileResponse:
    from api.routers.reports import _file

    return _file(ensure_sweep_report(store, sweep_id, settings), "index.html")


@router.get("/sweeps/{sweep_id}/report/{filename}",
            summary="A file of the sweep report (its figures)", response_class=FileResponse,
            responses={403: {"description": "not a plain file name of the report"},
                       **_NOT_FOUND})
def sweep_report_file(sweep_id: str, filename: str, store: Store = Depends(get_store),
                      settings: Settings = Depends(get_settings)) -> FileResponse:
    from api.errors import ForbiddenPathError
    from api.routers.reports import _FILE_NAME, _file

    if not _FILE_NAME.match(filename) or ".." in filename:
        raise ForbiddenPathError(f"report file {filename!r}: ask for a plain file name of the "
                                 "report, such as index.html or one of its .png figures")
    return _file(ensure_sweep_report(store, sweep_id, settings), filename)


def ensure_sweep_report(store: Store, sweep_id: str, settings: Settings | None = None) -> Path:
    """The sweep's report folder (``sweeps/<id>/report``), built now when missing: the report
    of the first width's stored model (closure.report.build_report) with the sweep result,
    as ``closure sweep --report`` writes it in process. A stored sweep does not change, so
    the folder is built once; builds are serialised by a file lock in the sweep's folder, so
    concurrent requests (threads or API processes) build it once."""
    from api.routers.reports import _SOURCE, _check_report_input, _current
    from closure.store import write_json_atomic
    from worker import aposteriori as ap

    result = store.get_sweep(sweep_id)  # 404 for an unknown sweep
    ids = result.get("model_ids") or []
    if not ids:
        raise UserError(f"sweep {sweep_id} records no model ids; submit the sweep again")
    key = {"sweep": sweep_id, "model": ids[0]}
    folder = store.sweep_dir(sweep_id) / REPORT
    if _current(folder, key):
        return folder
    with open(store.sweep_dir(sweep_id) / ".report.lock", "a") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            if _current(folder, key):  # another request built it while we waited
                return folder
            store.get_model(ids[0])  # 404 when the first width's model was deleted
            from closure.report import build_report

            try:
                input_path = ap.model_input_path(store, ids[0])
                if settings is not None:  # the same containment and limits as a job's input
                    _check_report_input(input_path, store, settings)
            except UserError:
                input_path = None  # the report says the a priori figures need the input
            build_report(store.model_dir(ids[0]) / "model.json", folder, input_path,
                         sweep=result)
            write_json_atomic(folder / _SOURCE, key)
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)
    return folder
