"""closure.store: atomic artifact folders and the SQL catalog, on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
import json
import os

import pytest
from service_support import POSTGRES_URL, postgres_reason, store  # noqa: F401

from closure.errors import UserError
from closure.spec import parse_spec
from closure.store import (
    NotFoundError,
    Store,
    fingerprint_hash,
    model_id_for,
    score_of,
    write_json_atomic,
    write_text_atomic,
)

SPEC = {"input": {"path": "/data/a.nc"}, "filter": {"kind": "box", "ratio": 4}}


def test_write_text_atomic_replaces_whole_file_and_leaves_no_temp(tmp_path):
    target = tmp_path / "sub" / "a.json"
    write_json_atomic(target, {"x": 1})
    write_text_atomic(target, "second")
    assert target.read_text() == "second"
    assert sorted(p.name for p in target.parent.iterdir()) == ["a.json"]


def test_write_text_atomic_keeps_old_file_when_the_write_fails(tmp_path):
    target = tmp_path / "a.txt"
    target.write_text("old")
    with pytest.raises(TypeError):
        write_json_atomic(target, {"x": object()})
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["a.txt"]


def test_fingerprint_ignores_location_but_not_content_or_options():
    a = parse_spec(SPEC)
    moved = parse_spec({**SPEC, "input": {"path": "/elsewhere/b.nc"}})
    by_id = parse_spec({**SPEC, "input": {"dataset_id": "d-1"}})
    other = parse_spec({**SPEC, "filter": {"kind": "box", "ratio": 2}})
    sha = "ab" * 32
    assert fingerprint_hash(a, sha) == fingerprint_hash(moved, sha) == fingerprint_hash(by_id, sha)
    assert fingerprint_hash(a, sha) != fingerprint_hash(a, "cd" * 32)
    assert fingerprint_hash(a, sha) != fingerprint_hash(other, sha)
    # the hash is SHA-256 of canonical JSON: 64 hex digits, stable across processes
    assert len(fingerprint_hash(a, sha)) == 64
    assert model_id_for(fingerprint_hash(a, sha)).startswith("m-")


def test_datasets_are_recorded_once_and_found_by_path(store):  # noqa: F811
    row = store.add_dataset(sha256="1" * 64, path="/d/x.nc", source="path", size=10,
                            mtime_ns=5, grid={"dims": ["y", "x"]}, n_snapshots=3)
    again = store.add_dataset(sha256="1" * 64, path="/d/x.nc", source="path", size=10,
                              mtime_ns=5)
    assert again["id"] == row["id"] and row["grid"] == {"dims": ["y", "x"]}
    assert store.dataset_by_path("/d/x.nc", 10, 5)["id"] == row["id"]
    assert store.dataset_by_path("/d/x.nc", 10, 6) is None  # touched: hash again
    with pytest.raises(NotFoundError, match="no dataset"):
        store.get_dataset("d-missing")


def test_import_upload_moves_file_read_only_and_dedupes(store):  # noqa: F811
    data = b"CDF\x01 not really, but the store does not look"
    sha = hashlib.sha256(data).hexdigest()
    tmp = store.upload_tempfile()
    tmp.write_bytes(data)
    row, created = store.import_upload(tmp, sha256=sha, name="../../evil name.nc",
                                       size=len(data), grid=None, n_snapshots=1, variables=None)
    assert created and not tmp.exists()
    path = os.path.realpath(row["path"])
    assert path.startswith(str(store.root / "datasets" / row["id"]))
    assert os.path.basename(path) == "evil_name.nc"
    assert not os.access(path, os.W_OK) or os.geteuid() == 0
    assert oct(os.stat(path).st_mode & 0o777) == "0o444"
    tmp2 = store.upload_tempfile()
    tmp2.write_bytes(data)
    row2, created2 = store.import_upload(tmp2, sha256=sha, name="again.nc", size=len(data),
                                         grid=None, n_snapshots=1, variables=None)
    assert not created2 and row2["id"] == row["id"] and not tmp2.exists()


def test_job_lifecycle_and_active_lookup(store):  # noqa: F811
    fp = "f" * 64
    store.create_job(job_id="j-1", spec=SPEC, fingerprint=fp, input_sha256="1" * 64)
    assert store.find_active_job(fp)["id"] == "j-1"
    assert store.update_job("j-1", state="running", only_if_active=True)
    assert store.get_job("j-1")["started"] is not None
    assert store.update_job("j-1", state="canceled", only_if_active=True)
    # a late task must not overwrite the cancellation
    assert not store.update_job("j-1", state="succeeded", model_id="m-x", only_if_active=True)
    row = store.get_job("j-1")
    assert row["state"] == "canceled" and row["model_id"] is None and row["finished"]
    assert store.find_active_job(fp) is None
    assert store.get_job("j-1")["spec"] == SPEC  # JSON round trip
    with pytest.raises(ValueError, match="unknown job state"):
        store.update_job("j-1", state="done")
    with pytest.raises(NotFoundError):
        store.get_job("j-404")


def test_ids_that_could_escape_the_store_are_refused(store):  # noqa: F811
    for bad in ("../x", "a/b", "", ".hidden"):
        with pytest.raises(NotFoundError):
            store.model_dir(bad)


def test_score_of_reads_common_layouts():
    assert score_of({"test": {"r2": 0.9, "corr": 0.95}}, "r2") == 0.9
    assert score_of({"test_corr": 0.5}, "corr") == 0.5
    assert score_of({"test": {"r2": 0.2, "correlation": 0.7}}, "correlation") == 0.7
    assert score_of({"r2": 1}, "r2") == 1.0
    assert score_of({"train": {"r2": 0.1}}, "r2") is None
    assert score_of(None, "r2") is None


def test_bad_database_url_is_a_user_error(tmp_path):
    with pytest.raises(UserError, match="catalog database"):
        Store(tmp_path, "nosuchdialect://x").open()
    with pytest.raises(UserError, match="not a URL"):
        Store(tmp_path, "catalog.db")


def test_schema_is_refused_on_sqlite(tmp_path):
    with pytest.raises(UserError, match="PostgreSQL"):
        Store(tmp_path, schema="abc")


@pytest.mark.postgres
def test_postgres_schemas_keep_runs_apart(tmp_path):
    reason = postgres_reason()
    if reason:
        pytest.skip(reason)
    a = Store(tmp_path / "a", POSTGRES_URL, schema="closure_test_a_" + os.urandom(4).hex())
    b = Store(tmp_path / "b", POSTGRES_URL, schema="closure_test_b_" + os.urandom(4).hex())
    try:
        a.create_job(job_id="j-1", spec=SPEC, fingerprint="f" * 64, input_sha256=None)
        assert b.get_job("j-1", missing_ok=True) is None
        assert json.dumps(a.get_job("j-1")["spec"]) == json.dumps(SPEC)
    finally:
        a.drop_schema()
        b.drop_schema()


def test_sweep_removes_planted_leftovers_and_keeps_live_work(store):  # noqa: F811
    """Leftovers of killed processes: a half-written upload, a .tmp- model folder, a killed
    horse's temporary statistics file, the folders of ended and unknown jobs, a model folder
    the catalog does not know. Live work (an active job's files, fresh temporaries) stays."""
    root = store.root
    old = 3600.0

    def plant(path, folder=False):
        if folder:
            path.mkdir(parents=True)
            (path / "x.json").write_text("{}")
        else:
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(b"partial")
        # as a crash long ago leaves them: the entry, its contents and its folders untouched
        for p in [path, *(path.rglob("*") if folder else []), *path.parents]:
            if p == root.parent:
                break
            os.utime(p, (os.path.getmtime(p) - old, os.path.getmtime(p) - old))
        return path

    fp = "f" * 64
    store.create_job(job_id="j-live", spec=SPEC, fingerprint=fp, input_sha256="1" * 64)
    store.create_job(job_id="j-done", spec=SPEC, fingerprint="e" * 64, input_sha256="1" * 64)
    store.update_job("j-done", state="failed", error="x")
    live_stats = plant(store.stats_path("j-live", 0))
    leftovers = [
        plant(root / "uploads" / ".upload-0123.nc"),
        plant(root / "models" / ".tmp-m-abc-1234", folder=True),
        plant(store.job_dir("j-live") / "stats" / ".000001.npz.k2j3.tmp"),
        plant(store.job_dir("j-live") / "held_out" / ".tmp-77", folder=True),
        plant(store.job_dir("j-done") / "stats" / "000000.npz"),
        plant(store.job_dir("j-unknown") / "plan.json"),
        plant(root / "models" / "m-orphan", folder=True),
    ]
    fresh = root / "uploads" / ".upload-in-progress.nc"
    fresh.write_bytes(b"streaming")
    removed = store.sweep()
    for path in leftovers:
        assert not path.exists(), path
    assert store.job_dir("j-done").exists() is False
    assert live_stats.exists() and fresh.exists()
    assert "uploads/.upload-0123.nc" in removed
    # the catalog and the folders agree: every folder left has its row
    assert {p.name for p in (root / "jobs").iterdir()} == {"j-live"}
    assert not any((root / "models").iterdir())


def test_ids_with_nul_or_odd_characters_are_not_queried(store):  # noqa: F811
    for bad in ("d-\x00", "x" * 500, "a b", ""):
        with pytest.raises(NotFoundError):
            store.get_dataset(bad)
        assert store.get_job(bad, missing_ok=True) is None
        assert store.get_model(bad, missing_ok=True) is None
