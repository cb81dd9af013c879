"""Times the service answers: ISO 8601 UTC strings in every JSON document, whatever the
catalog holds (its columns keep epoch seconds, so rows of earlier versions stay valid)."""

from __future__ import annotations

import re
import subprocess
import sys
import warnings

import pytest
import sqlalchemy as sa
from service_support import redis_server, turb2d_file  # noqa: F401

from api.app import create_app
from api.deps import Settings
from closure.store import Store, epoch_time, iso_time, jobs_table

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

ISO = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ")
TIME_KEYS = {"created", "updated", "started", "finished", "submitted"}


def test_iso_time_of_a_known_epoch():
    # 2026-12-02T07:30:00Z is 1796196600 s after 1970-01-01T00:00:00Z (datetime, UTC)
    assert iso_time(1796196600.0) == "2026-12-02T07:30:00Z"
    assert iso_time(1796196600.75) == "2026-12-02T07:30:00Z"
    assert iso_time("2026-12-02T07:30:00Z") == "2026-12-02T07:30:00Z"
    assert iso_time(None) is None
    assert epoch_time("2026-12-02T07:30:00Z") == 1796196600.0
    assert epoch_time(12.5) == 12.5


def test_rows_an_earlier_version_wrote_read_back_as_iso(tmp_path):
    store = Store(tmp_path / "store")
    # a row as earlier versions wrote it: epoch floats in the Float columns
    with store.engine.begin() as conn:
        conn.execute(jobs_table.insert().values(
            id="j-old", name=None, spec={}, fingerprint="f" * 64, input_sha256=None,
            dataset_id=None, state="succeeded", model_id=None, error=None, reused=False,
            created=1796196600.0, updated=1796196660.0, started=1796196601.0,
            finished=1796196659.0))
    row = store.get_job("j-old")
    assert (row["created"], row["started"], row["finished"], row["updated"]) == (
        "2026-12-02T07:30:00Z", "2026-12-02T07:30:01Z", "2026-12-02T07:30:59Z",
        "2026-12-02T07:31:00Z")
    assert [r["created"] for r in store.list_jobs()] == ["2026-12-02T07:30:00Z"]
    # new rows too, and the column still holds seconds (sortable, the same type as before)
    store.create_job(job_id="j-new", spec={}, fingerprint="e" * 64, input_sha256=None)
    assert ISO.fullmatch(store.get_job("j-new")["created"])
    with store.engine.connect() as conn:
        raw = conn.execute(sa.select(jobs_table.c.created).where(
            jobs_table.c.id == "j-new")).scalar_one()
    assert isinstance(raw, float)
    assert [r["id"] for r in store.list_jobs()] == ["j-new", "j-old"]


def _walk(doc, where="$"):
    """Every (path, key, value) of a JSON document."""
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield f"{where}.{k}", k, v
            yield from _walk(v, f"{where}.{k}")
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _walk(v, f"{where}[{i}]")


def _check_times(doc, what: str) -> int:
    """Assert every time field is ISO 8601 UTC and no number looks like epoch seconds;
    returns how many time fields were seen."""
    seen = 0
    for path, key, value in _walk(doc):
        if key in TIME_KEYS and value is not None and not isinstance(value, dict | list):
            if key == "started" and isinstance(value, int) and what == "/health":
                continue  # the health document's count of started tasks, not a time
            assert isinstance(value, str) and ISO.fullmatch(value), (what, path, value)
            seen += 1
        elif isinstance(value, float) and 1e9 < value < 4e9:
            pytest.fail(f"{what} {path}: {value} looks like epoch seconds")
    return seen


@pytest.mark.slow
def test_every_json_of_an_end_to_end_flow_answers_iso_times(tmp_path, redis_server,  # noqa: F811
                                                           turb2d_file):  # noqa: F811
    store_root = tmp_path / "store"
    app = create_app(Settings(store=store_root, redis_url=redis_server.url,
                              data_roots=(turb2d_file.parent,)))
    answers = []

    with TestClient(app) as http:
        def get(url, **kw):
            r = http.get(url, **kw)
            assert r.status_code < 300, (url, r.text)
            answers.append((url, r.json()))
            return r.json()

        r = http.post("/datasets?name=turb2d.nc", content=turb2d_file.read_bytes())
        assert r.status_code == 201, r.text
        answers.append(("POST /datasets", r.json()))
        ds = r.json()
        spec = {"input": {"dataset_id": ds["id"]}, "filter": {"kind": "gaussian", "ratio": 4},
                "fit": {"resamples": 4}}
        r = http.post("/jobs?name=iso", json=spec)
        assert r.status_code == 202, r.text
        answers.append(("POST /jobs", r.json()))
        job_id = r.json()["id"]
        get(f"/jobs/{job_id}")
        # run the queued tasks to the end in a worker of its own
        url = redis_server.url
        code = "import sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
        run = subprocess.run([sys.executable, "-c", code, "worker", "--burst",
                              "--redis", url, "--store", str(store_root),
                              "--log-level", "WARNING"],
                             capture_output=True, text=True, timeout=300)
        assert run.returncode == 0, run.stderr[-3000:]
        done = get(f"/jobs/{job_id}")
        assert done["state"] == "succeeded", done
        model_id = done["model_id"]
        get("/jobs")
        get("/datasets")
        get(f"/datasets/{ds['id']}")
        get("/models")
        model = get(f"/models/{model_id}")
        get("/products")
        get("/sweeps")
        get("/health")
        r = http.delete(f"/jobs/{job_id}")  # a finished job: 409 with the error body
        answers.append((f"DELETE /jobs/{job_id}", r.json()))
    seen = sum(_check_times(doc, what) for what, doc in answers)
    # the times we know are there: dataset, job (created, started, finished), model record
    # and the model file's own provenance
    assert ISO.fullmatch(done["created"]) and ISO.fullmatch(done["finished"])
    assert ISO.fullmatch(model["created"])
    assert ISO.fullmatch(model["model"]["provenance"]["created"])
    assert seen >= 10
