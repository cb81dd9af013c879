"""HTTP client for a closure service, for scripts and notebooks.

Example::

    from closure.service.client import Client

    with Client("http://127.0.0.1:8000", token=None) as c:
        job = c.submit("run.nc", filter="gaussian", ratio=4, target="stress")
        final = c.wait(job["id"], progress=lambda s: print(s["progress"]))
        model = c.model(final["model_id"])          # catalog record + model dict + summary
        print(model["summary"])
        print(c.export(final["model_id"], "fortran"))

``submit`` takes a full spec (a :class:`closure.spec.JobSpec` or its dict) or a file path
plus the same options as ``closure discover``. A local path is first offered to the server
by path (it must lie under one of the server's data roots); when the server refuses the path,
the file is uploaded (POST /datasets) and the job submitted by dataset id. ``upload=True``
always uploads, ``upload=False`` never does.

Every 4xx/5xx answer raises :class:`ServiceError` carrying the server's message; a job that
ends failed or canceled makes :meth:`Client.wait` raise :class:`JobFailedError`.
A priori scores do not guarantee a stable or accurate coarse simulation: validate a model a
posteriori before relying on it.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx

from closure.errors import UserError
from closure.spec import JobSpec, parse_spec

DEFAULT_SERVER = "http://127.0.0.1:8000"
TERMINAL = ("succeeded", "failed", "canceled")


class ServiceError(UserError):
    """The service answered with an error (``status``, ``detail``), or could not be reached
    (``status`` None)."""

    def __init__(self, message: str, status: int | None = None, detail: Any = None,
                 kind: str | None = None):
        super().__init__(message)
        self.status = status
        self.detail = detail
        self.kind = kind


class JobFailedError(ServiceError):
    """A job ended failed or canceled; ``status_doc`` is its last status."""

    def __init__(self, message: str, status_doc: dict):
        super().__init__(message)
        self.status_doc = status_doc


def inline_local_library(spec_dict: dict) -> dict:
    """The spec with a local terms file's content put inline (``library`` as JSON), so a
    remote server needs no access to it; presets, inline definitions and paths that are not
    local files are left as they are (the server resolves those under its data roots)."""
    from closure.library import PRESETS

    lib = spec_dict.get("library")
    if not isinstance(lib, str) or lib in PRESETS or not Path(lib).is_file():
        return spec_dict
    path = Path(lib)
    text = path.read_text(encoding="utf-8", errors="replace")
    try:
        if path.suffix.lower() == ".json":
            import json

            data = json.loads(text)
        else:
            import yaml

            data = yaml.safe_load(text)
    except Exception as exc:  # noqa: BLE001 - the parser's own reason, for the user's file
        raise UserError(f"terms file {path} could not be read: {exc}") from None
    return {**spec_dict, "library": data}


def spec_from_options(path: str | os.PathLike | list | None = None, *,
                      dataset_id: str | None = None,
                      filter: str | None = None, width: float | None = None,
                      width_units: str | None = None, ratio: int | None = None,
                      target: str | None = None, library: str | None = None,
                      method: str | None = None, scheme: str | None = None,
                      test_fraction: float | None = None, resamples: int | None = None,
                      seed: int | None = None, transfer_weight: float | None = None,
                      variables: dict[str, str] | None = None, scalars=None,
                      snapshots=None, periodic: bool | None = None,
                      base: dict | None = None) -> dict:
    """A job-spec dict from discover-style options (None leaves the spec default), on top
    of ``base`` (e.g. a spec file's content). Validation is :func:`closure.spec.parse_spec`'s."""
    spec: dict = {k: (dict(v) if isinstance(v, dict) else v) for k, v in (base or {}).items()}
    inp = spec.setdefault("input", {})
    if path is not None:
        inp["path"] = ([os.fspath(p) for p in path] if isinstance(path, list | tuple)
                       else os.fspath(path))
        inp.pop("dataset_id", None)
    if dataset_id is not None:
        inp["dataset_id"] = dataset_id
        inp.pop("path", None)
    for key, value in (("variables", variables), ("scalars", list(scalars) if scalars else None),
                       ("snapshots", list(snapshots) if snapshots is not None else None),
                       ("periodic", periodic)):
        if value is not None:
            inp[key] = value
    for section, key, value in (("filter", "kind", filter), ("filter", "width", width),
                                ("filter", "width_units", width_units),
                                ("filter", "ratio", ratio), ("fit", "method", method),
                                ("fit", "test_fraction", test_fraction),
                                ("fit", "resamples", resamples), ("fit", "seed", seed),
                                ("fit", "transfer_weight", transfer_weight)):
        if value is not None:
            spec.setdefault(section, {})[key] = value
    for key, value in (("target", target), ("library", library), ("scheme", scheme)):
        if value is not None:
            spec[key] = value
    return spec


class Client:
    """A closure service at ``server`` (``token``: bearer token, default $CLOSURE_TOKEN)."""

    def __init__(self, server: str = DEFAULT_SERVER, token: str | None = None,
                 timeout: float = 60.0, http: httpx.Client | None = None):
        self.server = server.rstrip("/")
        token = token if token is not None else os.environ.get("CLOSURE_TOKEN") or None
        headers = {"Authorization": f"Bearer {token}"} if token else {}
        if http is None:  # ``http``: an httpx.Client of your own (e.g. a test client)
            http = httpx.Client(base_url=self.server, timeout=timeout)
        http.headers.update(headers)
        self._http = http

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- plumbing

    def _request(self, method: str, url: str, **kwargs) -> httpx.Response:
        try:
            r = self._http.request(method, url, **kwargs)
        except httpx.TimeoutException as exc:
            raise ServiceError(f"the closure service at {self.server} did not answer in time "
                               f"({type(exc).__name__})") from None
        except httpx.TransportError as exc:
            raise ServiceError(f"cannot reach the closure service at {self.server} ({exc}); "
                               "start one with `closure up` or pass --server URL") from None
        if r.status_code >= 400:
            try:
                body = r.json()
            except ValueError:
                body = {"detail": r.text.strip() or r.reason_phrase}
            detail = body.get("detail") if isinstance(body, dict) else body
            kind = body.get("error") if isinstance(body, dict) else None
            msg = detail if isinstance(detail, str) else str(detail)
            raise ServiceError(f"{msg} (HTTP {r.status_code})", status=r.status_code,
                               detail=detail, kind=kind)
        return r

    def _json(self, method: str, url: str, **kwargs) -> Any:
        return self._request(method, url, **kwargs).json()

    # -- the service

    def health(self) -> dict:
        """Redis, catalog and worker count (raises ServiceError on 503)."""
        return self._json("GET", "/health")

    def upload(self, path: str | os.PathLike, variables: dict[str, str] | None = None,
               scalars=(), periodic: bool = True) -> dict:
        """Upload a netCDF file; returns its dataset record (``id``, ``sha256``, grid ...)."""
        path = Path(path)
        if not path.is_file():
            raise UserError(f"{path}: no such file")
        params: dict[str, Any] = {"name": path.name, "periodic": str(bool(periodic)).lower()}
        if variables:
            import json

            params["variables"] = json.dumps(variables)
        if scalars:
            params["scalars"] = ",".join(scalars)

        def chunks() -> Iterator[bytes]:
            with open(path, "rb") as fh:
                while block := fh.read(1 << 20):
                    yield block

        return self._json("POST", "/datasets", params=params, content=chunks(), headers={
            "Content-Type": "application/octet-stream",
            "Content-Length": str(path.stat().st_size)})

    def submit(self, spec: JobSpec | dict | str | os.PathLike | list, *, name: str | None = None,
               upload: bool | None = None, **options) -> dict:
        """Submit a job; returns its status (``id``, ``state``, ``reused`` ...).

        ``spec`` is a JobSpec, a spec dict, or the path of an input file (then ``options``
        are discover options, see :func:`spec_from_options`).
        """
        if isinstance(spec, JobSpec):
            spec_dict = spec.model_dump(mode="json", exclude_none=True)
        elif isinstance(spec, dict):
            spec_dict = spec_from_options(base=spec, **options) if options else spec
        else:
            spec_dict = spec_from_options(spec, **options)
        params = {"name": name} if name else None
        local = spec_dict.get("input", {}).get("path")
        if isinstance(local, list):  # several local files: by path, else one upload each
            return self._submit_several(spec_dict, local, params, upload)
        if local is not None and upload is not False and (upload or Path(local).is_file()):
            if not upload:
                try:
                    by_path = dict(spec_dict, input={**spec_dict["input"],
                                                     "path": str(Path(local).resolve())})
                    parse_spec(by_path)
                    return self._json("POST", "/jobs", json=by_path, params=params)
                except ServiceError as exc:
                    if exc.status != 403:
                        raise
            inp = spec_dict["input"]
            ds = self.upload(local, variables=inp.get("variables"),
                             scalars=inp.get("scalars") or (), periodic=inp.get("periodic", True))
            spec_dict = dict(spec_dict, input={**{k: v for k, v in inp.items() if k != "path"},
                                               "dataset_id": ds["id"]})
        spec_dict = inline_local_library(spec_dict)
        parse_spec(spec_dict)  # the same message locally as the server would give
        return self._json("POST", "/jobs", json=spec_dict, params=params)

    def _submit_several(self, spec_dict: dict, local: list, params, upload) -> dict:
        """A job over several local files: by path when they lie under the server's data
        roots, else each uploaded and the job reads the datasets as one input."""
        files = [Path(p) for p in local]
        if upload is False or not all(f.is_file() for f in files):
            spec_dict = inline_local_library(spec_dict)
            parse_spec(spec_dict)
            return self._json("POST", "/jobs", json=spec_dict, params=params)
        if not upload:
            by_path = dict(spec_dict, input={**spec_dict["input"],
                                             "path": [str(f.resolve()) for f in files]})
            by_path = inline_local_library(by_path)
            parse_spec(by_path)
            try:
                return self._json("POST", "/jobs", json=by_path, params=params)
            except ServiceError as exc:
                if exc.status != 403:
                    raise
        inp = spec_dict["input"]
        ids = [self.upload(f, variables=inp.get("variables"), scalars=inp.get("scalars") or (),
                           periodic=inp.get("periodic", True))["id"] for f in files]
        spec_dict = dict(spec_dict, input={**{k: v for k, v in inp.items() if k != "path"},
                                           "dataset_id": ids})
        spec_dict = inline_local_library(spec_dict)
        parse_spec(spec_dict)
        return self._json("POST", "/jobs", json=spec_dict, params=params)

    def status(self, job_id: str) -> dict:
        """State, progress (phase, snapshots_done/total), model_id, error."""
        return self._json("GET", f"/jobs/{job_id}")

    def jobs(self, state: str | None = None, limit: int = 50) -> list[dict]:
        params = {"limit": limit, **({"state": state} if state else {})}
        return self._json("GET", "/jobs", params=params)

    def cancel(self, job_id: str) -> dict:
        return self._json("DELETE", f"/jobs/{job_id}")

    def wait(self, job_id: str, progress: Callable[[dict], None] | None = None,
             timeout: float | None = None, poll: float = 0.5,
             outage_tolerance: float = 60.0) -> dict:
        """Poll until the job ends; return its final status if it succeeded, raise
        JobFailedError (with the server's error) if it failed or was canceled and
        ServiceError after ``timeout`` seconds. ``progress(status)`` is called at each poll.
        The service being unavailable (503, no answer) for up to ``outage_tolerance`` seconds
        is waited out."""
        deadline = None if timeout is None else time.monotonic() + timeout
        outage_since = None
        while True:
            try:
                doc = self.status(job_id)
                outage_since = None
            except ServiceError as exc:
                # ride out a short outage (Redis restarting: 503; API restarting: no answer)
                if exc.status not in (None, 502, 503, 504):
                    raise
                outage_since = outage_since or time.monotonic()
                if time.monotonic() - outage_since > outage_tolerance:
                    raise
                if deadline is not None and time.monotonic() > deadline:
                    raise
                time.sleep(poll)
                continue
            if progress is not None:
                progress(doc)
            if doc["state"] in TERMINAL:
                if doc["state"] != "succeeded":
                    raise JobFailedError(
                        f"job {job_id} {doc['state']}: {doc.get('error') or 'no reason given'}",
                        doc)
                return doc
            if deadline is not None and time.monotonic() > deadline:
                raise ServiceError(f"job {job_id} still {doc['state']} after {timeout:g} s")
            time.sleep(poll)

    def models(self, dataset: str | None = None, target: str | None = None,
               filter: str | None = None, min_r2: float | None = None,
               limit: int = 100) -> list[dict]:
        """Catalog query: models by dataset (id or SHA-256), target, filter kind, least R^2."""
        params = {k: v for k, v in (("dataset", dataset), ("target", target),
                                    ("filter", filter), ("min_r2", min_r2),
                                    ("limit", limit)) if v is not None}
        return self._json("GET", "/models", params=params)

    def model(self, model_id: str) -> dict:
        """A model's catalog record with ``model`` (its dict) and ``summary`` (text)."""
        return self._json("GET", f"/models/{model_id}")

    def closure_model(self, model_id: str):
        """The model as a :class:`closure.model.ClosureModel`."""
        from closure.model import ClosureModel

        return ClosureModel.from_dict(self.model(model_id)["model"])

    def export(self, model_id: str, lang: str = "json") -> str:
        """The model as source text: json, python, c or fortran."""
        return self._request("GET", f"/models/{model_id}/export", params={"lang": lang}).text

    def dataset(self, dataset_id: str) -> dict:
        return self._json("GET", f"/datasets/{dataset_id}")

    # -- a posteriori runs and reports

    def run_aposteriori(self, model_id: str, spec: dict | None = None, **options) -> dict:
        """Queue an a posteriori run of a stored model against the baselines (the coarse
        solver, from its input file by default); returns the job's status (follow it with
        :meth:`wait`). ``spec``/``options``: fields of :class:`closure.spec.AposterioriSpec`
        (``time``, ``viscosity``, ``baselines`` ...)."""
        from closure.spec import parse_aposteriori_spec

        body = {**(spec or {}), **options}
        parse_aposteriori_spec(body)  # the same message locally as the server would give
        return self._json("POST", f"/models/{model_id}/les", json=body)

    def aposteriori(self, model_id: str) -> dict:
        """A model's latest a posteriori result: ``runs`` (status, blow-up time), ``table``
        (text) and ``result`` (the full comparison)."""
        return self._json("GET", f"/models/{model_id}/les")

    def report_files(self, model_id: str) -> list[str]:
        """The files of a model's HTML report (the server builds it when needed)."""
        return self._json("GET", f"/models/{model_id}/report",
                          params={"format": "json"})["files"]

    def report_file(self, model_id: str, name: str) -> bytes:
        """One file of a model's report (``index.html`` or a figure)."""
        return self._request("GET", f"/models/{model_id}/report/{name}").content

    def download_report(self, model_id: str, out_dir: str | os.PathLike) -> Path:
        """Write a model's report folder (index.html and its PNGs) to ``out_dir``, replacing
        an earlier report there (never another folder's contents); returns ``out_dir``."""
        from closure.report.page import _atomic_folder

        out_dir = Path(out_dir)
        names = self.report_files(model_id)
        with _atomic_folder(out_dir) as tmp:
            for name in names:
                (tmp / name).write_bytes(self.report_file(model_id, name))
        return out_dir

    # -- coarse-graining jobs and their products

    def submit_coarse_grain(self, spec, *, name: str | None = None, upload: bool | None = None,
                             **options) -> dict:
        """Submit a coarse-graining job; returns its status (``id``, ``state``, ``reused``, and
        ``product_id`` once done; follow it with :meth:`wait`).

        ``spec`` is a CoarseGrainSpec, a spec dict, or the path of an input file (then
        ``options`` are those of :func:`coarse_spec_from_options`: ``widths``, ``ratios``,
        ``filter``, ``targets``, ``transfers``, ``dtype`` ...). A local file goes by path when it
        lies under the server's data roots, else it is uploaded (``upload`` forces either way).
        """
        from closure.spec import CoarseGrainSpec, parse_coarse_grain_spec

        if isinstance(spec, CoarseGrainSpec):
            body = spec.model_dump(mode="json", exclude_none=True)
        elif isinstance(spec, dict):
            body = coarse_spec_from_options(base=spec, **options)
        else:
            body = coarse_spec_from_options(spec, **options)
        params = {"name": name} if name else None
        local = body.get("input", {}).get("path")
        if local is not None and upload is not False and (upload or Path(local).is_file()):
            if not upload:
                by_path = dict(body, input={**body["input"], "path": str(Path(local).resolve())})
                parse_coarse_grain_spec(by_path)
                try:
                    return self._json("POST", "/jobs", json=by_path, params=params)
                except ServiceError as exc:
                    if exc.status != 403:
                        raise
            inp = body["input"]
            ds = self.upload(local, variables=inp.get("variables"),
                             scalars=inp.get("scalars") or (), periodic=inp.get("periodic", True))
            body = dict(body, input={**{k: v for k, v in inp.items() if k != "path"},
                                     "dataset_id": ds["id"]})
        parse_coarse_grain_spec(body)  # the same message locally as the server would give
        return self._json("POST", "/jobs", json=body, params=params)


    def products(self, dataset: str | None = None, limit: int = 100) -> list[dict]:
        """Stored coarse-grained products, newest first (``dataset``: id or SHA-256 of the
        input)."""
        params = {"limit": limit, **({"dataset": dataset} if dataset else {})}
        return self._json("GET", "/products", params=params)


    def product(self, product_id: str) -> dict:
        """A product's record: settings, variables, snapshots, size, sha256, spec."""
        return self._json("GET", f"/products/{product_id}")


    def delete_product(self, product_id: str) -> dict:
        return self._json("DELETE", f"/products/{product_id}")


    def fetch(self, product_id: str, path: str | os.PathLike | None = None, *,
              chunk_size: int = 1 << 20, verify: bool = True) -> Path:
        """Download a product's file, streamed in chunks (constant memory), through a
        temporary file renamed into place; its SHA-256 is checked against the server's record.
        ``path``: the file to write, or a folder (None: the current one) to write it in under
        the server's name, ``<id>.nc`` for a netCDF product, ``<id>.zarr.zip`` for a Zarr one
        (a zipped Zarr store: open it with :func:`closure.products.open_product`). A file name
        whose ending contradicts the product's format (``.nc`` for Zarr, ``.zip`` for netCDF)
        is refused before anything is written. Returns the path written."""
        import hashlib
        import tempfile

        from closure.products import SUFFIX

        given = Path(path) if path is not None else Path.cwd()
        digest = hashlib.sha256()
        tmp = None
        try:
            try:
                with self._http.stream("GET", f"/products/{product_id}/data") as r:
                    if r.status_code >= 400:
                        r.read()
                        self._raise_for(r)
                    expected = r.headers.get("x-content-sha256")
                    fmt = r.headers.get("x-product-format") or (
                        "zarr" if r.headers.get("content-type", "").startswith(
                            "application/zip") else "netcdf")
                    target = given / f"{product_id}{SUFFIX.get(fmt, '.nc')}" \
                        if given.is_dir() else given
                    _check_suffix(target, fmt, product_id)
                    target.parent.mkdir(parents=True, exist_ok=True)
                    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part",
                                               dir=target.parent)
                    with os.fdopen(fd, "wb") as out:
                        for block in r.iter_bytes(chunk_size):
                            out.write(block)
                            digest.update(block)
            except httpx.TransportError as exc:
                raise ServiceError(f"the download of product {product_id} from {self.server} "
                                   f"broke off ({exc}); run it again") from None
            if verify and expected and digest.hexdigest() != expected:
                raise ServiceError(f"product {product_id}: the downloaded file's SHA-256 "
                                   f"{digest.hexdigest()} is not the server's {expected}; "
                                   "download it again")
            from closure.atomic import ordinary_mode

            ordinary_mode(tmp)
            os.replace(tmp, target)
        finally:
            if tmp is not None and os.path.exists(tmp):
                os.unlink(tmp)
        return target

    def _raise_for(self, r: httpx.Response) -> None:
        """Raise the ServiceError of an error answer (``_request``'s message)."""
        try:
            body = r.json()
        except ValueError:
            body = {"detail": r.text.strip() or r.reason_phrase}
        detail = body.get("detail") if isinstance(body, dict) else body
        kind = body.get("error") if isinstance(body, dict) else None
        msg = detail if isinstance(detail, str) else str(detail)
        raise ServiceError(f"{msg} (HTTP {r.status_code})", status=r.status_code, detail=detail,
                           kind=kind)

    # -- filter-width sweeps

    def submit_sweep(self, spec, widths, *, ratios=None, filters=None, name: str | None = None,
                     upload: bool | None = None, **options) -> dict:
        """Submit a filter-width sweep: the discovery job ``spec`` (a JobSpec, its dict, or
        an input file path with discover ``options``) at each of ``widths``, for each filter
        kind of ``filters`` (default: the spec's kind); returns the job's status
        (``sweep_id`` once done). One task per kind and width, spread over the workers."""
        from closure.spec import parse_sweep_spec

        if isinstance(spec, JobSpec):
            base = spec.model_dump(mode="json", exclude_none=True)
        elif isinstance(spec, dict):
            base = spec_from_options(base=spec, **options) if options else dict(spec)
        else:
            base = spec_from_options(spec, **options)
        params = {"name": name} if name else None

        def post(discovery: dict) -> dict:
            body = {"kind": "sweep", "discovery": discovery, "widths": list(widths),
                    **({"ratios": list(ratios)} if ratios else {}),
                    **({"filters": list(filters)} if filters else {})}
            parse_sweep_spec(body)  # the same message locally as the server would give
            return self._json("POST", "/jobs", json=body, params=params)

        local = base.get("input", {}).get("path")
        if local is None or upload is False or not (upload or Path(local).is_file()):
            return post(base)
        if not upload:  # by path when the server may read it, else upload
            try:
                return post(dict(base, input={**base["input"],
                                              "path": str(Path(local).resolve())}))
            except ServiceError as exc:
                if exc.status != 403:
                    raise
        inp = base["input"]
        ds = self.upload(local, variables=inp.get("variables"), scalars=inp.get("scalars") or (),
                         periodic=inp.get("periodic", True))
        return post(dict(base, input={**{k: v for k, v in inp.items() if k != "path"},
                                      "dataset_id": ds["id"]}))

    def sweep(self, sweep_id: str) -> dict:
        """A stored sweep result (entries per width, ``model_ids``)."""
        return self._json("GET", f"/sweeps/{sweep_id}")

    def sweeps(self) -> list[dict]:
        return self._json("GET", "/sweeps")

    def sweep_report_files(self, sweep_id: str) -> list[str]:
        """The files of a sweep's HTML report (the server builds it when needed)."""
        return self._json("GET", f"/sweeps/{sweep_id}/report",
                          params={"format": "json"})["files"]

    def sweep_report_file(self, sweep_id: str, name: str) -> bytes:
        """One file of a sweep's report (``index.html`` or a figure)."""
        return self._request("GET", f"/sweeps/{sweep_id}/report/{name}").content

    def download_sweep_report(self, sweep_id: str, out_dir: str | os.PathLike) -> Path:
        """Write a sweep's report folder (index.html and its PNGs, among them the scaled
        coefficients against the filter width) to ``out_dir``, replacing an earlier report
        there; returns ``out_dir``."""
        from closure.report.page import _atomic_folder

        out_dir = Path(out_dir)
        names = self.sweep_report_files(sweep_id)
        with _atomic_folder(out_dir) as tmp:
            for name in names:
                (tmp / name).write_bytes(self.sweep_report_file(sweep_id, name))
        return out_dir


def _check_suffix(path: Path, fmt: str, product_id: str) -> None:
    """UserError when a download's file name says the other format."""
    name = path.name.lower()
    if fmt == "zarr" and name.endswith((".nc", ".nc4", ".netcdf")):
        raise UserError(f"product {product_id} is a Zarr product (a zipped Zarr store), not "
                        f"netCDF: name the file {path.with_suffix('.zarr.zip').name}, or give a "
                        "folder to write it in")
    if fmt == "netcdf" and name.endswith(".zip"):
        raise UserError(f"product {product_id} is a netCDF product: name the file "
                        f"{product_id}.nc, or give a folder to write it in")


# --------------------------------------------------------------------------- coarse-graining

def coarse_spec_from_options(path: str | os.PathLike | None = None, *,
                             dataset_id: str | None = None, filter: str | None = None,
                             widths=None, ratios=None, width_units: str | None = None,
                             targets=None, transfers=None, dtype: str | None = None,
                             variables: dict[str, str] | None = None, scalars=None,
                             snapshots=None, periodic: bool | None = None,
                             base: dict | None = None, format: str | None = None) -> dict:
    """A coarse-graining spec dict (:class:`closure.spec.CoarseGrainSpec`) from options, on
    top of ``base`` (``format``: netcdf or zarr). ``widths`` x ``ratios`` (each a number or
    a list) give one filter setting per pair; validation is
    :func:`closure.spec.parse_coarse_grain_spec`'s."""
    spec = spec_from_options(path, dataset_id=dataset_id, variables=variables, scalars=scalars,
                             snapshots=snapshots, periodic=periodic,
                             base={k: v for k, v in (base or {}).items()})
    spec["kind"] = "coarse-grain"

    def listed(value):
        return None if value is None else list(value) if isinstance(value, list | tuple) \
            else [value]

    widths, ratios = listed(widths), listed(ratios)
    if widths is not None or ratios is not None or filter is not None or width_units:
        settings = []
        for r in ratios or [None]:
            for w in widths or [None]:
                s = {k: v for k, v in (("kind", filter), ("width", w), ("ratio", r),
                                       ("width_units", width_units)) if v is not None}
                settings.append(s)
        spec["filters"] = settings
    for key, value in (("targets", listed(targets)), ("transfers", listed(transfers)),
                       ("dtype", dtype), ("format", format)):
        if value is not None:
            spec[key] = value
    return spec
