"""/models/{id}/report: a model's HTML report (closure.report), built on demand and cached in
the model's folder, with its figures."""

from __future__ import annotations

import contextlib
import fcntl
import json
import re
from pathlib import Path
from typing import Literal

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import FileResponse, RedirectResponse

from api.deps import Settings, get_settings, get_store, require_token
from api.errors import ForbiddenPathError
from closure.errors import UserError
from closure.store import NotFoundError, Store, read_json, write_json_atomic
from worker import aposteriori as ap

router = APIRouter(tags=["reports"], dependencies=[Depends(require_token)])

#: what the report folder may be asked for: plain file names, no folders, no hidden files
_FILE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]*(\.[A-Za-z0-9_-]+)*$")
_MEDIA = {".html": "text/html; charset=utf-8", ".png": "image/png",
          ".json": "application/json", ".txt": "text/plain; charset=utf-8"}
#: the cache key of a built report, inside its folder
_SOURCE = ".source.json"


@router.get("/models/{model_id}/report", summary="A model's HTML report (or its file list)")
def get_report(model_id: str, request: Request,
               format: Literal["html", "json"] = Query(
                   "html", description="html: the page; json: the report's file names"),
               store: Store = Depends(get_store), settings: Settings = Depends(get_settings)):
    """``format=html`` redirects to the page (``/models/{id}/report/``), whose figures are
    relative links that resolve under it; ``format=json`` builds the report and lists its
    files. The report is built on first request (and again after a new a posteriori result)
    and kept in the model's folder."""
    if format == "html":
        store.get_model(model_id)
        return RedirectResponse(str(request.url_for("report_page", model_id=model_id)),
                                status_code=307)
    folder = ensure_report(store, model_id, settings)
    source = read_json(folder / _SOURCE)
    return {"model_id": model_id, "files": report_files(folder),
            "aposteriori_run": source.get("les_run"),
            "url": str(request.url_for("report_page", model_id=model_id))}


@router.get("/models/{model_id}/report/", name="report_page", summary="The report page",
            response_class=FileResponse)
def report_page(model_id: str, store: Store = Depends(get_store),
                settings: Settings = Depends(get_settings)) -> FileResponse:
    return _file(ensure_report(store, model_id, settings), "index.html")


@router.get("/models/{model_id}/report/{filename}", summary="A file of the report (its figures)",
            response_class=FileResponse)
def report_file(model_id: str, filename: str, store: Store = Depends(get_store),
                settings: Settings = Depends(get_settings)) -> FileResponse:
    if not _FILE_NAME.match(filename) or ".." in filename:
        raise ForbiddenPathError(f"report file {filename!r}: ask for a plain file name of the "
                                 "report, such as index.html or one of its .png figures")
    return _file(ensure_report(store, model_id, settings), filename)


def _file(folder: Path, name: str) -> FileResponse:
    path = folder / name
    if name not in report_files(folder) or path.resolve().parent != folder.resolve():
        raise NotFoundError(f"the report has no file {name!r}; its files are "
                            f"{', '.join(report_files(folder))}")
    return FileResponse(path, media_type=_MEDIA.get(path.suffix, "application/octet-stream"))


def report_files(folder: Path) -> list[str]:
    """The report's servable files (plain files with plain names), sorted."""
    return sorted(p.name for p in folder.iterdir()
                  if p.is_file() and not p.is_symlink() and _FILE_NAME.match(p.name))


def ensure_report(store: Store, model_id: str, settings: Settings | None = None) -> Path:
    """The model's report folder, built now when missing or older than the model's latest a
    posteriori result. Builds of one model are serialised by a file lock in its folder, so
    concurrent requests (threads or API processes) build it once."""
    store.get_model(model_id)  # 404 for an unknown model
    folder = store.report_dir(model_id)
    les = ap.result_dir(store, model_id)
    key = {"les_run": None if les is None else les.name,
           "les_finished": None if les is None else
           read_json(les / "request.json").get("finished")}
    if _current(folder, key):
        return folder
    lock_path = store.model_dir(model_id) / ".report.lock"
    with open(lock_path, "a") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            if _current(folder, key):  # another request built it while we waited
                return folder
            from closure.report import build_report

            try:
                input_path = ap.model_input_path(store, model_id)
                if settings is not None:  # the same containment and limits as a job's input
                    _check_report_input(input_path, store, settings)
            except UserError:
                input_path = None  # the report says the a priori figures need the input
            build_report(store.model_dir(model_id) / "model.json", folder, input_path,
                         les=None if les is None else les / "les.json")
            write_json_atomic(folder / _SOURCE, key)
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)
    return folder


def _check_report_input(path: Path, store: Store, settings: Settings) -> None:
    """The a priori figures read the model's input in this process: only a file under the
    data roots or an upload, within the size limits (UserError otherwise)."""
    from api.inputs import check_declared_sizes, is_inside

    real = path.resolve()
    roots = [Path(r).resolve() for r in settings.data_roots]
    if real != path or not is_inside(real, [*roots, (store.root / "datasets").resolve()]):
        raise UserError("the model's input is not under the data roots")
    check_declared_sizes(real, "the model's input", settings)


def _current(folder: Path, key: dict) -> bool:
    with contextlib.suppress(OSError, ValueError):
        return (folder / "index.html").is_file() and \
            json.loads((folder / _SOURCE).read_text()) == key
    return False
