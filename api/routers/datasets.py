"""/datasets: upload a netCDF file (streamed to disk, size-limited, validated on arrival)."""

from __future__ import annotations

import hashlib
import json

from fastapi import APIRouter, Depends, Query, Request, Response
from starlette.concurrency import run_in_threadpool

from api.deps import Settings, get_settings, get_store, require_token
from api.errors import TooLargeError, UnsupportedMediaError
from api.inputs import check_declared_sizes, describe_fields
from closure.errors import InputFileError, InputTooLargeError, OptionError
from closure.store import Store

router = APIRouter(tags=["datasets"], dependencies=[Depends(require_token)])

_NETCDF_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n")


def _public(ds: dict) -> dict:
    return {k: ds[k] for k in ("id", "sha256", "name", "source", "size", "grid", "n_snapshots",
                               "variables", "created")}


@router.post("/datasets", status_code=201, summary="Upload a netCDF file", openapi_extra={
    "requestBody": {"required": True, "content": {"application/octet-stream": {
        "schema": {"type": "string", "format": "binary"}}}}})
async def upload_dataset(
        request: Request, response: Response,
        name: str = Query("upload.nc", max_length=255, description="the file's name"),
        variables: str | None = Query(None, description='JSON map of our names to the file\'s, '
                                      'e.g. {"u": "U", "v": "V"}'),
        scalars: str | None = Query(None, description="comma-separated scalar names"),
        periodic: bool = True,
        settings: Settings = Depends(get_settings), store: Store = Depends(get_store)) -> dict:
    """Send the file as the raw request body (``Content-Type: application/octet-stream``),
    e.g. ``curl --data-binary @f.nc -H 'Content-Type: application/octet-stream'
    'http://HOST/datasets?name=f.nc'``. The body is streamed to disk and refused past the
    size limit (413); the file is opened as fields (422 with the reason when it cannot be)
    and kept only then. The same file uploaded twice is stored once (200)."""
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype.startswith("multipart/"):
        raise UnsupportedMediaError(
            "send the file as the raw request body (Content-Type: application/octet-stream, "
            "curl --data-binary @FILE), not as a multipart form")
    mapping = _parse_variables(variables)
    scalar_names = [s.strip() for s in (scalars or "").split(",") if s.strip()]
    limit = int(settings.max_upload_mb * 2**20)
    length = request.headers.get("content-length")
    if length and length.isdigit() and int(length) > limit:
        raise TooLargeError(_too_large(settings))
    tmp = store.upload_tempfile(".nc")
    digest = hashlib.sha256()
    size = 0
    try:
        with open(tmp, "wb") as fh:
            async for chunk in request.stream():
                size += len(chunk)
                if size > limit:
                    raise TooLargeError(_too_large(settings))
                digest.update(chunk)
                fh.write(chunk)
        if size == 0:
            raise InputFileError("the upload is empty; send the netCDF file as the request body")
        with open(tmp, "rb") as fh:
            head = fh.read(8)
        if not head.startswith(_NETCDF_MAGIC):
            raise InputFileError(f"{name}: not a netCDF file (netCDF-3 or netCDF-4/HDF5 "
                                 "expected)")
        try:
            time_dim = (mapping or {}).get("time", "time")
            try:
                await run_in_threadpool(check_declared_sizes, tmp, name, settings, time_dim)
            except InputTooLargeError as exc:
                raise TooLargeError(str(exc)) from None
            info = await run_in_threadpool(describe_fields, tmp, mapping, scalar_names, periodic)
        except InputFileError as exc:  # name the user's file, not our temporary copy
            raise InputFileError(str(exc).replace(str(tmp), name)) from None
        ds, created = await run_in_threadpool(
            store.import_upload, tmp, sha256=digest.hexdigest(), name=name, size=size,
            grid=info["grid"], n_snapshots=info["n_snapshots"], variables=mapping)
    finally:
        tmp.unlink(missing_ok=True)
    if not created:
        response.status_code = 200
    return _public(ds)


@router.get("/datasets", summary="Uploaded and referenced datasets")
def list_datasets(limit: int = Query(100, ge=1, le=1000),
                  store: Store = Depends(get_store)) -> list:
    return [_public(d) for d in store.list_datasets(limit)]


@router.get("/datasets/{dataset_id}", summary="A dataset's record")
def get_dataset(dataset_id: str, store: Store = Depends(get_store)) -> dict:
    return _public(store.get_dataset(dataset_id))


def _parse_variables(text: str | None) -> dict | None:
    if not text:
        return None
    try:
        mapping = json.loads(text)
    except json.JSONDecodeError:
        mapping = None
    if not isinstance(mapping, dict) or not all(
            isinstance(k, str) and isinstance(v, str) for k, v in mapping.items()):
        raise OptionError('variables: give a JSON object of names, e.g. {"u": "U", "v": "V"}')
    return mapping


def _too_large(settings: Settings) -> str:
    return (f"the upload is over the limit of {settings.max_upload_mb:g} MiB "
            "(CLOSURE_MAX_UPLOAD_MB on the server); put large files under a data root and "
            "submit them by path")
