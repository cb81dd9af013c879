"""The model store: one artifact folder per model and dataset, plus an SQL catalog.

Layout under the store root::

    catalog.sqlite                 the catalog (default; PostgreSQL when given a URL)
    datasets/<id>/<name>.nc        uploaded inputs (read-only once in place)
    jobs/<job id>/plan.json        work area of a running job: its plan ...
    jobs/<job id>/stats/<i>.npz    ... and one SufficientStats file per snapshot
    models/<model id>/             model.json, spec.json, plan.json, diagnostics.json,
                                   summary.txt, stats/
    models/<model id>/les/         a posteriori runs: <run>/les.json, table.txt, request.json
                                   (one per option set) and latest.json
    models/<model id>/report/      the HTML report, built on demand (index.html + PNGs)

Every file is written to a temporary name and renamed into place; a model folder is built
under a temporary name and renamed as a whole, and only then entered in the catalog, so a
reader never sees a half-written model. The catalog is SQLAlchemy 2 Core: an SQLite file by
default, PostgreSQL with ``postgresql+psycopg://...``; ``schema`` puts the tables in their own
PostgreSQL schema (created if missing).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import math
import os
import re
import shutil
import time
import uuid
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from sqlalchemy.exc import DBAPIError, IntegrityError, OperationalError, ProgrammingError

from closure.atomic import write_text
from closure.errors import UserError

JOB_STATES = ("queued", "running", "succeeded", "failed", "canceled")
ACTIVE_STATES = ("queued", "running")
TERMINAL_STATES = ("succeeded", "failed", "canceled")

#: record fields that hold times: the catalog keeps epoch seconds (a Float column, so rows
#: written by earlier versions stay valid and sort in SQL); records answer ISO 8601 UTC
TIME_FIELDS = ("created", "updated", "started", "finished")


def iso_time(value: float | str | None) -> str | None:
    """An ISO 8601 UTC string (``2026-12-02T07:30:00Z``) for an epoch time; a string (already
    ISO) and None pass through."""
    if value is None or isinstance(value, str):
        return value
    return _dt.datetime.fromtimestamp(float(value), _dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def epoch_time(value: float | str | None) -> float | None:
    """Epoch seconds of an ISO 8601 time (or of a number, returned as it is)."""
    if value is None or isinstance(value, int | float):
        return value
    return _dt.datetime.fromisoformat(value.replace("Z", "+00:00")).timestamp()


def _record(row) -> dict:
    """A catalog row as the store answers it: times in ISO 8601 UTC."""
    d = dict(row)
    for key in TIME_FIELDS:
        if key in d:
            d[key] = iso_time(d[key])
    return d


_metadata = sa.MetaData()

datasets_table = sa.Table(
    "closure_datasets", _metadata,
    sa.Column("id", sa.String(64), primary_key=True),
    sa.Column("sha256", sa.String(64), nullable=False, index=True),
    sa.Column("path", sa.Text, nullable=False),
    sa.Column("name", sa.Text),                       # the uploaded file name (None: by path)
    sa.Column("source", sa.String(16), nullable=False),  # "upload" or "path"
    sa.Column("size", sa.BigInteger, nullable=False),
    sa.Column("mtime_ns", sa.BigInteger),
    sa.Column("grid", sa.JSON),
    sa.Column("n_snapshots", sa.Integer),
    sa.Column("variables", sa.JSON),
    sa.Column("created", sa.Float, nullable=False),
)

jobs_table = sa.Table(
    "closure_jobs", _metadata,
    sa.Column("id", sa.String(64), primary_key=True),
    sa.Column("name", sa.Text),
    sa.Column("spec", sa.JSON, nullable=False),
    sa.Column("fingerprint", sa.String(64), nullable=False, index=True),
    sa.Column("input_sha256", sa.String(64), index=True),
    sa.Column("dataset_id", sa.String(64)),
    sa.Column("state", sa.String(16), nullable=False, index=True),
    sa.Column("model_id", sa.String(64)),
    sa.Column("error", sa.Text),
    sa.Column("reused", sa.Boolean, nullable=False, default=False),
    sa.Column("created", sa.Float, nullable=False),
    sa.Column("started", sa.Float),
    sa.Column("finished", sa.Float),
    sa.Column("updated", sa.Float, nullable=False),
)

models_table = sa.Table(
    "closure_models", _metadata,
    sa.Column("id", sa.String(64), primary_key=True),
    sa.Column("fingerprint", sa.String(64), nullable=False, index=True),
    sa.Column("dataset_sha256", sa.String(64), nullable=False, index=True),
    sa.Column("target", sa.String(64), nullable=False, index=True),
    sa.Column("filter_kind", sa.String(16), nullable=False),
    sa.Column("filter_width", sa.Float),
    sa.Column("filter_ratio", sa.Integer, nullable=False),
    sa.Column("scheme", sa.String(16), nullable=False),
    sa.Column("method", sa.String(16), nullable=False),
    sa.Column("n_terms", sa.Integer),
    sa.Column("test_r2", sa.Float),
    sa.Column("test_corr", sa.Float),
    sa.Column("job_id", sa.String(64)),
    sa.Column("name", sa.Text),
    sa.Column("created", sa.Float, nullable=False),
    sa.Column("path", sa.Text, nullable=False),
)

_SAFE_NAME = re.compile(r"[^A-Za-z0-9._-]+")
_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]{0,63}")
#: how long a temporary file or an unknown folder must be untouched before a sweep removes it
SWEEP_MIN_AGE_S = float(os.environ.get("CLOSURE_SWEEP_AGE", 600))




class NotFoundError(UserError):
    """A dataset, job or model id that the store does not know."""


# --------------------------------------------------------------------------- identities

def fingerprint_hash(spec, input_sha256: str) -> str:
    """Hex SHA-256 of what determines a job's result: the input's SHA-256 and the spec's
    fingerprint (:meth:`closure.spec.JobSpec.fingerprint`, without the file's location)."""
    fp = dict(spec.fingerprint())
    fp["input"] = {k: v for k, v in fp["input"].items() if k != "sha256"}
    text = json.dumps({"input_sha256": input_sha256, "spec": fp}, sort_keys=True,
                      separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def model_id_for(fingerprint: str) -> str:
    """The model id is a function of the fingerprint: the same job always makes the same id."""
    return "m-" + fingerprint[:20]


def new_job_id() -> str:
    return "j-" + uuid.uuid4().hex[:20]


def dataset_id_for(sha256: str) -> str:
    return "d-" + sha256[:20]


# --------------------------------------------------------------------------- atomic files

def write_text_atomic(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` to ``path`` through a temporary file in the same folder and a rename."""
    return write_text(path, text)


def write_json_atomic(path: str | os.PathLike, obj: Any) -> Path:
    return write_text_atomic(path, json.dumps(obj, indent=1, sort_keys=True, default=_json_default))


def read_json(path: str | os.PathLike) -> Any:
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)


def _json_default(obj):
    # numpy scalars and arrays that slip into diagnostics
    if hasattr(obj, "tolist"):
        return obj.tolist()
    raise TypeError(f"{type(obj).__name__} is not JSON serialisable")


# --------------------------------------------------------------------------- the store

class Store:
    """Artifact folders under ``root`` plus the SQL catalog at ``db_url``.

    ``db_url`` defaults to ``sqlite:///<root>/catalog.sqlite``. ``schema`` (PostgreSQL only)
    keeps the tables in a schema of their own, e.g. one per test run.
    """

    def __init__(self, root: str | os.PathLike, db_url: str | None = None,
                 schema: str | None = None):
        self.root = Path(root).expanduser().resolve()
        self.root.mkdir(parents=True, exist_ok=True)
        for sub in ("datasets", "jobs", "models", "uploads"):
            (self.root / sub).mkdir(exist_ok=True)
        self.db_url = db_url or f"sqlite:///{self.root / 'catalog.sqlite'}"
        self.schema = schema
        self._pid = os.getpid()
        self._engine: sa.Engine | None = None  # opened on first use: file-only users skip it
        self._tables_ready = False
        try:
            backend = sa.make_url(self.db_url).get_backend_name()
        except sa.exc.ArgumentError:
            raise UserError(f"the catalog database URL {self.db_url!r} is not a URL such as "
                            "sqlite:///PATH or postgresql+psycopg://USER@HOST/DB") from None
        if schema is not None:
            if backend == "sqlite":
                raise UserError("a catalog schema is only supported with PostgreSQL")
            if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", schema):
                raise UserError(f"catalog schema {schema!r}: use letters, digits and _")

    # -- database plumbing

    def _make_engine(self) -> sa.Engine:
        url = sa.make_url(self.db_url)
        kwargs: dict[str, Any] = {}
        if url.get_backend_name() == "sqlite":
            kwargs["connect_args"] = {"timeout": 30}
        else:
            kwargs["pool_pre_ping"] = True
        try:
            engine = sa.create_engine(url, **kwargs)
        except Exception as exc:  # unknown dialect or driver
            raise UserError(f"cannot use the catalog database {self._safe_url()}: {exc}") from None
        if url.get_backend_name() == "sqlite":
            @sa.event.listens_for(engine, "connect")
            def _pragmas(dbapi_conn, _record):
                cur = dbapi_conn.cursor()
                # WAL lets the API read while workers write; busy_timeout rides out short locks
                cur.execute("PRAGMA journal_mode=WAL")
                cur.execute("PRAGMA busy_timeout=30000")
                cur.close()
        if self.schema:
            engine = engine.execution_options(schema_translate_map={None: self.schema})
        return engine

    def _safe_url(self) -> str:
        try:
            return sa.make_url(self.db_url).render_as_string(hide_password=True)
        except Exception:
            return "<unparsable URL>"

    @property
    def engine(self) -> sa.Engine:
        if self._engine is None:
            self._engine = self._make_engine()
        elif os.getpid() != self._pid:
            # after a fork: never share the parent's pooled connections
            self._engine.dispose(close=False)
            self._pid = os.getpid()
        if not self._tables_ready:
            self._tables_ready = True
            try:
                self._create_tables()
            except BaseException:
                self._tables_ready = False
                raise
        return self._engine

    def open(self) -> Store:
        """Connect to the catalog now (and create its tables): fail early on a bad URL."""
        self.engine  # noqa: B018
        return self

    def _create_tables(self) -> None:
        for attempt in range(5):
            try:
                with self._engine.begin() as conn:
                    if self.schema:
                        conn.execute(sa.text(f'CREATE SCHEMA IF NOT EXISTS "{self.schema}"'))
                    _metadata.create_all(conn, checkfirst=True)
                return
            except (IntegrityError, ProgrammingError, OperationalError) as exc:
                # several processes creating the tables at once: one wins, the others retry
                if attempt == 4:
                    raise UserError(f"cannot open the catalog database {self._safe_url()}: "
                                    f"{exc.orig if hasattr(exc, 'orig') else exc}") from None
                time.sleep(0.2 * (attempt + 1))
            except DBAPIError as exc:
                raise UserError(f"cannot open the catalog database {self._safe_url()}: "
                                f"{exc.orig}") from None

    def ping(self) -> None:
        """Raise if the catalog database does not answer."""
        with self.engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()

    def drop_schema(self) -> None:
        """Drop this store's PostgreSQL schema and everything in it (test clean-up)."""
        if not self.schema:
            raise ValueError("drop_schema needs a store opened with a schema")
        with self.engine.begin() as conn:
            conn.execute(sa.text(f'DROP SCHEMA IF EXISTS "{self.schema}" CASCADE'))

    # -- paths

    def job_dir(self, job_id: str) -> Path:
        return self.root / "jobs" / _check_id(job_id)

    def stats_path(self, job_id: str, index: int) -> Path:
        return self.job_dir(job_id) / "stats" / f"{int(index):06d}.npz"

    def model_dir(self, model_id: str) -> Path:
        return self.root / "models" / _check_id(model_id)

    def aposteriori_dir(self, model_id: str) -> Path:
        """A model's a posteriori runs: ``<run>/`` (les.json, table.txt, request.json) per
        option set, and ``latest.json`` naming the latest."""
        return self.model_dir(model_id) / "les"

    def report_dir(self, model_id: str) -> Path:
        """A model's cached HTML report folder (index.html and its PNGs)."""
        return self.model_dir(model_id) / "report"

    def upload_tempfile(self, suffix: str = ".nc") -> Path:
        """A fresh temporary path in the uploads area (same file system as datasets/)."""
        return self.root / "uploads" / f".upload-{uuid.uuid4().hex}{suffix}"

    # -- datasets

    def add_dataset(self, *, sha256: str, path: str | os.PathLike, source: str, size: int,
                    name: str | None = None, mtime_ns: int | None = None,
                    grid: dict | None = None, n_snapshots: int | None = None,
                    variables: dict | None = None) -> dict:
        """Record a dataset (an upload already in place, or a file under a data root)."""
        row = dict(sha256=sha256, path=str(path), source=source, size=int(size), name=name,
                   mtime_ns=mtime_ns, grid=grid, n_snapshots=n_snapshots, variables=variables,
                   created=time.time())
        if source == "upload":
            row["id"] = dataset_id_for(sha256)
        else:
            # a path dataset is identified by its location and content
            key = hashlib.sha256(f"{path}\0{sha256}".encode()).hexdigest()
            row["id"] = "p-" + key[:20]
        existing = self.get_dataset(row["id"], missing_ok=True)
        if existing is not None:
            if existing["mtime_ns"] != mtime_ns or existing["size"] != size:
                self._update(datasets_table, row["id"], mtime_ns=mtime_ns, size=int(size))
                existing = self.get_dataset(row["id"])
            return existing
        try:
            with self.engine.begin() as conn:
                conn.execute(datasets_table.insert().values(**row))
        except IntegrityError:
            pass  # the same dataset recorded at the same moment by another request
        return self.get_dataset(row["id"])

    def import_upload(self, tmp: Path, *, sha256: str, name: str, size: int, grid: dict | None,
                      n_snapshots: int | None, variables: dict | None) -> tuple[dict, bool]:
        """Move a validated upload into ``datasets/<id>/`` (read-only) and record it.

        Returns ``(dataset, created)``; an identical file uploaded before is reused and the
        new copy deleted.
        """
        ds_id = dataset_id_for(sha256)
        existing = self.get_dataset(ds_id, missing_ok=True)
        if existing is not None and Path(existing["path"]).exists():
            tmp.unlink(missing_ok=True)
            return existing, False
        folder = self.root / "datasets" / ds_id
        folder.mkdir(parents=True, exist_ok=True)
        safe = _SAFE_NAME.sub("_", Path(name).name).strip("._") or "data.nc"
        if not safe.endswith(".nc"):
            safe += ".nc"
        dest = folder / safe
        os.chmod(tmp, 0o444)
        os.replace(tmp, dest)
        if existing is not None:  # a row whose file went missing: point it at the new copy
            self._update(datasets_table, ds_id, path=str(dest))
            return self.get_dataset(ds_id), True
        st = dest.stat()
        row = self.add_dataset(sha256=sha256, path=dest, source="upload", size=size, name=name,
                               mtime_ns=st.st_mtime_ns, grid=grid, n_snapshots=n_snapshots,
                               variables=variables)
        return row, True

    def _row(self, table: sa.Table, what: str, row_id: str, missing_ok: bool,
             hint: str = "") -> dict | None:
        """The catalog row ``row_id`` of ``table`` as a record; a malformed id never reaches
        a query. NotFoundError naming the ``what`` (and ``hint``), or None with ``missing_ok``."""
        if not isinstance(row_id, str) or not _ID.fullmatch(row_id):
            if missing_ok:
                return None
            raise NotFoundError(f"{str(row_id)[:80]!r} is not a valid {what} id")
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(table).where(table.c.id == row_id)).mappings().first()
        if row is None:
            if missing_ok:
                return None
            raise NotFoundError(f"no {what} with id {row_id!r}{hint}")
        return _record(row)

    def get_dataset(self, dataset_id: str, missing_ok: bool = False) -> dict | None:
        return self._row(datasets_table, "dataset", dataset_id, missing_ok,
                         "; upload the file with POST /datasets (`closure submit` does it for "
                         "you)")

    def dataset_by_path(self, path: str | os.PathLike, size: int, mtime_ns: int) -> dict | None:
        """A recorded dataset at ``path`` with this size and modification time (its SHA-256
        can be reused without reading the file again)."""
        with self.engine.connect() as conn:
            row = conn.execute(
                sa.select(datasets_table).where(
                    datasets_table.c.path == str(path), datasets_table.c.size == int(size),
                    datasets_table.c.mtime_ns == int(mtime_ns))
                .order_by(datasets_table.c.created.desc())).mappings().first()
        return _record(row) if row else None

    def list_datasets(self, limit: int = 100) -> list[dict]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(datasets_table).order_by(
                datasets_table.c.created.desc()).limit(limit)).mappings().all()
        return [_record(r) for r in rows]

    # -- jobs

    def create_job(self, *, job_id: str, spec: dict, fingerprint: str,
                   input_sha256: str | None, dataset_id: str | None = None,
                   name: str | None = None, state: str = "queued",
                   model_id: str | None = None, reused: bool = False) -> dict:
        now = time.time()
        row = dict(id=job_id, name=name, spec=spec, fingerprint=fingerprint,
                   input_sha256=input_sha256, dataset_id=dataset_id, state=state,
                   model_id=model_id, error=None, reused=reused, created=now, updated=now,
                   finished=now if state in TERMINAL_STATES else None)
        with self.engine.begin() as conn:
            conn.execute(jobs_table.insert().values(**row))
        return self.get_job(job_id)

    def get_job(self, job_id: str, missing_ok: bool = False) -> dict | None:
        return self._row(jobs_table, "job", job_id, missing_ok, "")

    def update_job(self, job_id: str, *, only_if_active: bool = False, **fields) -> bool:
        """Update a job's columns; with ``only_if_active`` only while it is queued/running
        (so a late task cannot overwrite a cancellation). Returns whether a row changed."""
        if "state" in fields:
            if fields["state"] not in JOB_STATES:
                raise ValueError(f"unknown job state {fields['state']!r}")
            if fields["state"] in TERMINAL_STATES:
                fields.setdefault("finished", time.time())
            if fields["state"] == "running":
                fields.setdefault("started", time.time())
        fields["updated"] = time.time()
        stmt = jobs_table.update().where(jobs_table.c.id == job_id).values(**fields)
        if only_if_active:
            stmt = stmt.where(jobs_table.c.state.in_(ACTIVE_STATES))
        with self.engine.begin() as conn:
            return conn.execute(stmt).rowcount > 0

    def find_active_job(self, fingerprint: str) -> dict | None:
        """The newest queued or running job with this fingerprint, if any."""
        with self.engine.connect() as conn:
            row = conn.execute(
                sa.select(jobs_table).where(jobs_table.c.fingerprint == fingerprint,
                                            jobs_table.c.state.in_(ACTIVE_STATES))
                .order_by(jobs_table.c.created.desc())).mappings().first()
        return _record(row) if row else None

    def list_jobs(self, state: str | None = None, limit: int = 100) -> list[dict]:
        stmt = sa.select(jobs_table).order_by(jobs_table.c.created.desc()).limit(limit)
        if state:
            stmt = stmt.where(jobs_table.c.state == state)
        with self.engine.connect() as conn:
            return [_record(r) for r in conn.execute(stmt).mappings().all()]

    # -- models

    def add_model(self, *, model, fingerprint: str, dataset_sha256: str, spec, plan: dict,
                  job_id: str | None, stats_dir: Path | None = None,
                  diagnostics: dict | None = None, name: str | None = None) -> dict:
        """Store a ClosureModel: build its folder under a temporary name, rename it into
        place, then enter it in the catalog. Idempotent: a model already stored under the
        same fingerprint is kept and returned.

        ``stats_dir`` (the job's per-snapshot statistics) is moved into the model folder.
        """
        model_id = model_id_for(fingerprint)
        final = self.model_dir(model_id)
        if not final.exists():
            tmp = self.root / "models" / f".tmp-{model_id}-{uuid.uuid4().hex[:8]}"
            tmp.mkdir()
            try:
                model.save(tmp / "model.json")
                spec_dict = spec.model_dump(mode="json") if hasattr(spec, "model_dump") else spec
                write_json_atomic(tmp / "spec.json", spec_dict)
                write_json_atomic(tmp / "plan.json", plan)
                diag = {"scores": getattr(model, "scores", None),
                        "warnings": list(getattr(model, "warnings", []) or [])}
                diag.update(diagnostics or {})
                write_json_atomic(tmp / "diagnostics.json", diag)
                with contextlib.suppress(Exception):
                    write_text_atomic(tmp / "summary.txt", model.summary() + "\n")
                if stats_dir is not None and Path(stats_dir).is_dir():
                    shutil.copytree(stats_dir, tmp / "stats")
                try:
                    os.rename(tmp, final)
                except OSError:
                    if not final.exists():  # not a lost race with an identical reduce
                        raise
            finally:
                if tmp.exists():
                    shutil.rmtree(tmp, ignore_errors=True)
        existing = self.get_model(model_id, missing_ok=True)
        if existing is not None:
            return existing
        spec_obj = spec
        scores = getattr(model, "scores", {}) or {}
        row = dict(
            id=model_id, fingerprint=fingerprint, dataset_sha256=dataset_sha256,
            target=spec_obj.target, filter_kind=spec_obj.filter.kind,
            filter_width=_model_filter_width(model, spec_obj), filter_ratio=spec_obj.filter.ratio,
            scheme=spec_obj.scheme, method=spec_obj.fit.method,
            n_terms=_n_active_terms(model), test_r2=score_of(scores, "r2"),
            test_corr=score_of(scores, "correlation"), job_id=job_id, name=name,
            created=time.time(), path=str(final))
        try:
            with self.engine.begin() as conn:
                conn.execute(models_table.insert().values(**row))
        except IntegrityError:
            pass  # an identical reduce entered it first
        return self.get_model(model_id)

    def get_model(self, model_id: str, missing_ok: bool = False) -> dict | None:
        return self._row(models_table, "model", model_id, missing_ok,
                         "; list them with GET /models")

    def model_by_fingerprint(self, fingerprint: str) -> dict | None:
        return self.get_model(model_id_for(fingerprint), missing_ok=True)

    def load_model(self, model_id: str):
        """The stored ClosureModel."""
        from closure.model import ClosureModel

        row = self.get_model(model_id)
        return ClosureModel.load(Path(row["path"]) / "model.json")

    def find_models(self, *, dataset: str | None = None, target: str | None = None,
                    filter_kind: str | None = None, min_r2: float | None = None,
                    limit: int = 100) -> list[dict]:
        """Catalog query. ``dataset`` is a SHA-256 (or a prefix of 8+ characters) or a
        dataset id; newest first."""
        c = models_table.c
        stmt = sa.select(models_table).order_by(c.created.desc()).limit(limit)
        if dataset:
            sha = dataset
            if dataset.startswith(("d-", "p-")):
                sha = self.get_dataset(dataset)["sha256"]
            if len(sha) == 64:
                stmt = stmt.where(c.dataset_sha256 == sha)
            elif len(sha) >= 8:
                stmt = stmt.where(c.dataset_sha256.startswith(sha))
            else:
                raise UserError("dataset: give a dataset id or at least 8 hex digits of SHA-256")
        if target:
            stmt = stmt.where(c.target == target)
        if filter_kind:
            stmt = stmt.where(c.filter_kind == filter_kind)
        if min_r2 is not None:
            stmt = stmt.where(c.test_r2 >= float(min_r2))
        with self.engine.connect() as conn:
            return [_record(r) for r in conn.execute(stmt).mappings().all()]

    # -- coarse-grained products (coarse-graining jobs; closure.products makes the files)

    def product_dir(self, product_id: str) -> Path:
        """A product's folder: ``product.nc`` and ``spec.json``."""
        return self.root / "products" / _check_id(product_id)

    def add_product(self, *, file: str | os.PathLike, fingerprint: str, dataset_sha256: str,
                    spec: dict, plan: dict, job_id: str | None,
                    name: str | None = None) -> dict:
        """Store a finished product file (moved, not copied): its folder is built under a
        temporary name and renamed into place, then entered in the catalog. Idempotent: a
        product already stored under the same fingerprint is kept and returned."""
        from closure.io import sha256_file

        product_id = product_id_for(fingerprint)
        final = self.product_dir(product_id)
        final.parent.mkdir(exist_ok=True)
        if not final.exists():
            tmp = final.parent / f".tmp-{product_id}-{uuid.uuid4().hex[:8]}"
            tmp.mkdir()
            try:
                os.replace(file, tmp / PRODUCT_FILE)
                write_json_atomic(tmp / "spec.json", spec)
                try:
                    os.rename(tmp, final)
                except OSError:
                    if not final.exists():  # not a lost race with an identical reduce
                        raise
            finally:
                if tmp.exists():
                    shutil.rmtree(tmp, ignore_errors=True)
        existing = self.get_product(product_id, missing_ok=True)
        if existing is not None:
            return existing
        path = final / PRODUCT_FILE
        settings = [{k: s.get(k) for k in ("group", "kind", "ratio", "width", "width_units",
                                           "coarse_shape")} for s in plan.get("settings", [])]
        row = dict(id=product_id, fingerprint=fingerprint, dataset_sha256=dataset_sha256,
                   format=spec.get("format", "netcdf"), dtype=spec.get("dtype", "float64"),
                   settings=settings, variables=list(plan.get("targets") or []),
                   n_snapshots=len(plan.get("snapshots") or []), size=path.stat().st_size,
                   sha256=sha256_file(path), job_id=job_id, name=name, spec=spec,
                   created=time.time(), path=str(path))
        try:
            with self.engine.begin() as conn:
                conn.execute(products_table.insert().values(**row))
        except IntegrityError:
            pass  # an identical reduce entered it first
        return self.get_product(product_id)

    def get_product(self, product_id: str, missing_ok: bool = False) -> dict | None:
        return self._row(products_table, "product", product_id, missing_ok,
                         "; list them with GET /products (`closure products`)")

    def product_by_fingerprint(self, fingerprint: str) -> dict | None:
        return self.get_product(product_id_for(fingerprint), missing_ok=True)

    def list_products(self, dataset_sha256: str | None = None, limit: int = 100) -> list[dict]:
        """Products, newest first (``dataset_sha256``: of that input only)."""
        stmt = sa.select(products_table).order_by(products_table.c.created.desc()).limit(limit)
        if dataset_sha256:
            stmt = stmt.where(products_table.c.dataset_sha256 == dataset_sha256)
        with self.engine.connect() as conn:
            return [_record(r) for r in conn.execute(stmt).mappings().all()]

    def delete_product(self, product_id: str) -> dict:
        """Remove a product from the catalog, then its folder; returns the removed record.
        (A download already streaming keeps its open file to the end.)"""
        row = self.get_product(product_id)
        with self.engine.begin() as conn:
            conn.execute(products_table.delete().where(products_table.c.id == product_id))
        folder = self.product_dir(product_id)
        if folder.exists():
            gone = folder.parent / f".deleted-{product_id}-{uuid.uuid4().hex[:8]}"
            os.rename(folder, gone)  # atomically out of sight, then removed
            shutil.rmtree(gone, ignore_errors=True)
        return row

    # -- filter-width sweeps run on the queue (files only: sweeps/<id>/sweep.json)

    def sweep_dir(self, sweep_id: str) -> Path:
        return self.root / "sweeps" / _check_id(sweep_id)

    def add_sweep(self, *, result: dict, fingerprint: str, job_id: str | None) -> dict:
        """Store a sweep result (closure.sweep.SweepResult's dict plus ``model_ids``) in a
        folder built under a temporary name and renamed into place; idempotent."""
        sweep_id = sweep_id_for(fingerprint)
        final = self.sweep_dir(sweep_id)
        final.parent.mkdir(exist_ok=True)
        if not final.exists():
            tmp = final.parent / f".tmp-{sweep_id}-{uuid.uuid4().hex[:8]}"
            tmp.mkdir()
            try:
                write_json_atomic(tmp / "sweep.json", {**result, "id": sweep_id,
                                                       "job_id": job_id,
                                                       "created": iso_time(time.time())})
                try:
                    os.rename(tmp, final)
                except OSError:
                    if not final.exists():
                        raise
            finally:
                if tmp.exists():
                    shutil.rmtree(tmp, ignore_errors=True)
        return self.get_sweep(sweep_id)

    def get_sweep(self, sweep_id: str, missing_ok: bool = False) -> dict | None:
        path = self.sweep_dir(sweep_id) / "sweep.json"
        if not path.is_file():
            if missing_ok:
                return None
            raise NotFoundError(f"no sweep with id {sweep_id!r}; list them with GET /sweeps")
        doc = read_json(path)
        return {**doc, "created": iso_time(doc.get("created"))}

    def sweep_by_fingerprint(self, fingerprint: str) -> dict | None:
        return self.get_sweep(sweep_id_for(fingerprint), missing_ok=True)

    def list_sweeps(self) -> list[dict]:
        """Stored sweeps (id, job, widths, model ids), newest first."""
        folder = self.root / "sweeps"
        out = []
        for path in folder.glob("sw-*/sweep.json") if folder.is_dir() else ():
            d = read_json(path)
            out.append({"id": d["id"], "job_id": d.get("job_id"),
                        "created": iso_time(d.get("created")),
                        "widths": [e.get("width_cells") for e in d.get("entries", [])],
                        "model_ids": d.get("model_ids", [])})
        return sorted(out, key=lambda r: -(epoch_time(r["created"]) or 0))

    # -- leftovers

    def sweep(self, min_age: float = SWEEP_MIN_AGE_S) -> list[str]:
        """Remove what interrupted work left behind, so the folders agree with the catalog:
        half-written uploads, ``.tmp-*`` model folders, temporary files of atomic writes
        (a killed work-horse's statistics), the folders of jobs that ended (or that the
        catalog does not know), and model or dataset folders without a catalog row.
        Temporary files and unknown folders are removed only when untouched for ``min_age``
        seconds, so work in progress elsewhere is left alone; the folder of an ended job at
        once. Returns the removed paths, relative to the store."""
        now = time.time()
        removed: list[str] = []

        def old(p: Path) -> bool:
            """Untouched for min_age: the path and, for a folder, everything in it."""
            try:
                latest = p.lstat().st_mtime
                if p.is_dir() and not p.is_symlink():
                    latest = max([latest, *(q.lstat().st_mtime for q in p.rglob("*"))])
            except OSError:
                return False
            return now - latest >= min_age

        def remove(p: Path) -> None:
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)
            else:
                with contextlib.suppress(FileNotFoundError):
                    p.unlink()
            if not p.exists():
                removed.append(str(p.relative_to(self.root)))

        def temporaries(folder: Path):
            for pattern in (".*.tmp", ".tmp-*", ".upload-*"):
                yield from (p for p in folder.rglob(pattern) if old(p))

        def entries(sub: str) -> list[Path]:
            folder = self.root / sub
            return sorted(folder.iterdir()) if folder.is_dir() else []

        for p in entries("uploads"):
            if old(p):
                remove(p)
        for p in entries("jobs"):
            row = self.get_job(p.name, missing_ok=True) if _ID.fullmatch(p.name) else None
            if row is not None and row["state"] in ("queued", "running"):
                for t in temporaries(p):
                    remove(t)
            elif row is not None or old(p):
                remove(p)
        for sub, lookup in (("models", self.get_model), ("datasets", self.get_dataset)):
            for p in entries(sub):
                if p.name.startswith("."):
                    if old(p):
                        remove(p)
                    continue
                known = _ID.fullmatch(p.name) and lookup(p.name, missing_ok=True) is not None
                if not known and old(p):
                    remove(p)
                elif p.is_dir():
                    for t in temporaries(p):
                        remove(t)
        for sub in ("products", "sweeps"):  # half-built or half-deleted product/sweep folders
            for p in entries(sub):
                if p.name.startswith((".tmp-", ".deleted-")) and old(p):
                    remove(p)
        return removed

    # -- internals

    def _update(self, table: sa.Table, row_id: str, **fields) -> None:
        with self.engine.begin() as conn:
            conn.execute(table.update().where(table.c.id == row_id).values(**fields))


def _check_id(value: str) -> str:
    if not _ID.fullmatch(value or ""):
        raise NotFoundError(f"{value!r} is not a valid id")
    return value


def score_of(scores: dict | None, kind: str) -> float | None:
    """A held-out score (``kind`` "r2" or "corr") out of a model's scores: the pooled
    value of ``scores["test"]`` ({"test": {"r2": .., "correlation": ..}}), or a flat
    {"test_r2": ..} / {"r2": ..}."""
    if not isinstance(scores, dict):
        return None
    names = ("corr", "correlation") if kind in ("corr", "correlation") else (kind,)
    for name in names:
        for key in (f"test_{name}", name):
            v = scores.get(key)
            if isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v):
                return float(v)
    for key in ("test", "held_out"):
        sub = scores.get(key)
        if isinstance(sub, dict):
            v = score_of(sub, kind)
            if v is not None:
                return v
    return None


def _n_active_terms(model) -> int | None:
    active = getattr(model, "active", None)
    if active is None:
        return None
    return int(sum(bool(a) for a in active))


def _model_filter_width(model, spec) -> float | None:
    filt = getattr(model, "filter", None)
    if isinstance(filt, dict):
        for key in ("width", "delta", "width_grid"):
            v = filt.get(key)
            if isinstance(v, int | float):
                return float(v)
    return float(spec.filter.width) if spec.filter.width is not None else None


# --------------------------------------------------------------------------- products (catalog)

PRODUCT_FILE = "product.nc"

products_table = sa.Table(
    "closure_products", _metadata,
    sa.Column("id", sa.String(64), primary_key=True),
    sa.Column("fingerprint", sa.String(64), nullable=False, index=True),
    sa.Column("dataset_sha256", sa.String(64), nullable=False, index=True),
    sa.Column("format", sa.String(16), nullable=False),
    sa.Column("dtype", sa.String(16), nullable=False),
    sa.Column("settings", sa.JSON, nullable=False),   # group, kind, ratio, width ... per setting
    sa.Column("variables", sa.JSON),                  # the target variables computed
    sa.Column("n_snapshots", sa.Integer, nullable=False),
    sa.Column("size", sa.BigInteger, nullable=False),
    sa.Column("sha256", sa.String(64), nullable=False),  # of the product file
    sa.Column("job_id", sa.String(64)),
    sa.Column("name", sa.Text),
    sa.Column("spec", sa.JSON, nullable=False),
    sa.Column("created", sa.Float, nullable=False),
    sa.Column("path", sa.Text, nullable=False),
)


def product_id_for(fingerprint: str) -> str:
    """The product id is a function of the fingerprint, like a model's."""
    return "pr-" + fingerprint[:20]


def sweep_id_for(fingerprint: str) -> str:
    return "sw-" + fingerprint[:20]
