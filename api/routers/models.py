"""/models: the catalog of discovered closures, and their exports."""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, Depends, Query
from fastapi.responses import PlainTextResponse, Response

from api.deps import get_store, require_token
from closure.store import Store

router = APIRouter(tags=["models"], dependencies=[Depends(require_token)])

_MEDIA = {"json": "application/json", "python": "text/x-python", "c": "text/x-c",
          "fortran": "text/x-fortran"}
_SUFFIX = {"json": "json", "python": "py", "c": "h", "fortran": "f90"}
_FIELDS = ("id", "dataset_sha256", "target", "filter_kind", "filter_width", "filter_ratio",
           "scheme", "method", "n_terms", "test_r2", "test_corr", "job_id", "name", "created")


@router.get("/models", summary="Query the model catalog")
def list_models(dataset: str | None = Query(None, description="dataset id or input SHA-256"),
                target: str | None = Query(None, description="stress, force, vorticity, flux:C"),
                filter: Literal["box", "gaussian", "spectral", "block"] | None = Query(
                    None, description="filter kind"),
                min_r2: float | None = Query(None, description="least held-out R^2"),
                limit: int = Query(100, ge=1, le=1000),
                store: Store = Depends(get_store)) -> list:
    rows = store.find_models(dataset=dataset, target=target, filter_kind=filter,
                             min_r2=min_r2, limit=limit)
    return [{k: r[k] for k in _FIELDS} for r in rows]


@router.get("/models/{model_id}", summary="A model: catalog record, content and summary")
def get_model(model_id: str, store: Store = Depends(get_store)) -> dict:
    row = store.get_model(model_id)
    model = store.load_model(model_id)
    return {**{k: row[k] for k in _FIELDS}, "summary": model.summary(),
            "model": model.to_dict()}


@router.get("/models/{model_id}/export", summary="A model as JSON, Python, C or Fortran")
def export_model(model_id: str,
                 lang: Literal["json", "python", "c", "fortran"] = Query(
                     "json", description="json | python | c | fortran"),
                 store: Store = Depends(get_store)) -> Response:
    from closure.export import export_model as export

    text = export(store.load_model(model_id), lang)
    cls = Response if lang == "json" else PlainTextResponse
    return cls(text, media_type=_MEDIA[lang], headers={
        "Content-Disposition": f'attachment; filename="{model_id}.{_SUFFIX[lang]}"'})
