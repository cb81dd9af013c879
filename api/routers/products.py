"""/products: coarse-grained data sets made by coarse-graining jobs; listed, described,
downloaded (streamed, with HTTP range requests) and deleted. Jobs are submitted through
POST /jobs with ``kind: "coarse-grain"`` (:func:`submit_coarse_grain`)."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query, Response
from fastapi.responses import FileResponse

from api.deps import Settings, get_store, require_token
from api.inputs import resolve_input
from api.submission import reuse_or_queue
from closure import products
from closure.errors import InputFileError, UserError
from closure.spec import CoarseGrainSpec
from closure.store import Store, fingerprint_hash

router = APIRouter(tags=["products"], dependencies=[Depends(require_token)])

_FIELDS = ("id", "name", "dataset_sha256", "format", "dtype", "settings", "variables",
           "n_snapshots", "size", "sha256", "job_id", "created")


def _error(description: str) -> dict:
    return {"description": description, "content": {"application/json": {"example": {
        "detail": description, "error": "NotFoundError"}}}}


_NOT_FOUND = {404: _error("no product with this id")}


def submit_coarse_grain(spec: CoarseGrainSpec, response: Response, name: str | None,
                        settings: Settings, store: Store, conn) -> dict:
    """POST /jobs for ``kind: "coarse-grain"``: check the spec against its input, answer an
    identical earlier job or product (200, ``reused``), else queue the job (202)."""
    from worker import products as tasks

    run_spec, dataset = resolve_input(spec, store, settings)
    products.check(run_spec)  # a ratio, width or target the data cannot take: 4xx now
    fingerprint = fingerprint_hash(run_spec, dataset["sha256"])
    return reuse_or_queue(store, conn, response, run_spec, dataset, fingerprint, name,
                          store.product_by_fingerprint(fingerprint), tasks.enqueue)


def product_as_dataset(spec, store: Store):
    """A discovery spec whose ``input.dataset_id`` names a stored product (``pr-...``) reads
    that product's file: it is entered as a dataset of its own and the spec points at it
    (the pipeline then reads the coarse fields and exact terms instead of the fine data).
    Any other spec is returned as it is."""
    inp = getattr(spec, "input", None)
    if inp is None or not isinstance(inp.dataset_id, str) or not inp.dataset_id.startswith("pr-"):
        return spec
    row = store.get_product(inp.dataset_id)
    if row["format"] == "zarr":
        raise UserError(f"product {row['id']} is a Zarr product; discovery reads netCDF "
                        "products: submit its coarse-graining job with format netcdf, or "
                        "discover from the fine data")
    path = store.product_dir(row["id"]) / "product.nc"
    if not path.is_file():
        raise InputFileError(f"product {row['id']}: its file is gone from the store; "
                             "submit its coarse-graining job again")
    st = path.stat()
    ds = store.dataset_by_path(path, st.st_size, st.st_mtime_ns) or store.add_dataset(
        sha256=row["sha256"], path=path, source="product", size=st.st_size,
        mtime_ns=st.st_mtime_ns, n_snapshots=row["n_snapshots"])
    return spec.model_copy(update={"input": inp.model_copy(update={"dataset_id": ds["id"]})})


@router.get("/products", summary="Coarse-grained products, newest first")
def list_products(dataset: str | None = Query(
                      None, description="only products of this input (dataset id or SHA-256)"),
                  limit: int = Query(100, ge=1, le=1000),
                  store: Store = Depends(get_store)) -> list:
    sha = dataset
    if dataset and dataset.startswith(("d-", "p-")):
        sha = store.get_dataset(dataset)["sha256"]
    return [{k: r[k] for k in _FIELDS} for r in store.list_products(sha, limit=limit)]


@router.get("/products/{product_id}", summary="A product's record", responses=_NOT_FOUND)
def get_product(product_id: str, store: Store = Depends(get_store)) -> dict:
    """Settings (group, filter kind, width, ratio, coarse shape), variables, snapshots, size,
    SHA-256 of the file, the job that made it, and the full spec."""
    row = store.get_product(product_id)
    return {**{k: row[k] for k in _FIELDS}, "spec": row["spec"]}


_DATA = {"application/x-netcdf": {"schema": {"type": "string", "format": "binary"}},
         "application/zip": {"schema": {"type": "string", "format": "binary"}}}


@router.get(
    "/products/{product_id}/data",
    summary="Download a product (netCDF, or a zipped Zarr store; range requests)",
    response_class=FileResponse,
    responses={200: {"content": _DATA,
                     "description": "the whole file, streamed: application/x-netcdf "
                     "(<id>.nc) for format netcdf, application/zip (<id>.zarr.zip, a zipped "
                     "Zarr v3 store) for format zarr"},
               206: {"content": _DATA,
                     "description": "the requested byte range (Range: bytes=A-B)"},
               416: {"description": "the range lies outside the file"}, **_NOT_FOUND})
def product_data(product_id: str, store: Store = Depends(get_store)) -> FileResponse:
    """The product file, streamed from disk in chunks (constant memory whatever its size).
    ``Range: bytes=A-B`` answers 206 with those bytes, so an interrupted download resumes;
    the ETag and ``X-Content-SHA256`` (the whole file's SHA-256) let a client check it.
    The record's ``format`` sets the type and name: a Zarr product is one zip of its store,
    opened with ``xarray.open_zarr(zarr.storage.ZipStore(path, mode="r"), group=...)``."""
    row = store.get_product(product_id)
    path = store.product_dir(product_id) / "product.nc"  # the store's name for either format
    if not path.is_file():
        raise InputFileError(f"product {product_id}: its file is gone from the store; "
                             "delete the product and submit the job again")
    fmt = row["format"] if row["format"] in products.SUFFIX else "netcdf"
    return FileResponse(path, media_type=products.MEDIA_TYPE[fmt],
                        filename=f"{product_id}{products.SUFFIX[fmt]}",
                        headers={"X-Content-SHA256": row["sha256"], "X-Product-Format": fmt})


@router.delete("/products/{product_id}", summary="Delete a product", responses=_NOT_FOUND)
def delete_product(product_id: str, store: Store = Depends(get_store)) -> dict:
    """Remove the product from the catalog and its file from the store (a download already
    streaming finishes). A later identical job makes it again."""
    store.delete_product(product_id)
    return {"deleted": product_id}
