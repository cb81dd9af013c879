"""api/: validation, auth, uploads, data roots and error mapping, in process (TestClient) with
a Redis of our own. Jobs are only queued here (no worker); tests/test_service_e2e.py runs them.
"""

from __future__ import annotations

import json
import os
import warnings
import zlib

import pytest

with warnings.catch_warnings():  # starlette warns that its test client is built on httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient
from service_support import redis_server, turb2d_file  # noqa: F401

from api.app import create_app
from api.deps import Settings, is_loopback
from closure.errors import UserError
from closure.io import sha256_file

TOKEN = "s3cret-token"


def make_app(tmp_path, redis_url, roots=(), token=None, max_upload_mb=2048.0, host="127.0.0.1"):
    settings = Settings(store=tmp_path / "store", redis_url=redis_url,
                        data_roots=tuple(roots), token=token, max_upload_mb=max_upload_mb,
                        host=host)
    return create_app(settings)


@pytest.fixture
def client(tmp_path, redis_server, turb2d_file):  # noqa: F811
    app = make_app(tmp_path, redis_server.url, roots=[turb2d_file.parent])
    with TestClient(app) as c:
        c.redis = app.state.redis or __import__("redis").Redis.from_url(redis_server.url)
        c.store_root = tmp_path / "store"
        yield c


def nothing_kept(store_root) -> bool:
    """No dataset, model, job folder or leftover upload in the store."""
    return all(not any((store_root / sub).iterdir()) for sub in
               ("datasets", "models", "jobs", "uploads"))


def spec_for(path, **extra) -> dict:
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4}, **extra}


# --------------------------------------------------------------------------- settings, auth

def test_loopback_detection():
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost")
    assert is_loopback("127.0.0.2")
    assert not is_loopback("0.0.0.0") and not is_loopback("10.1.2.3")
    assert not is_loopback("example.org")


def test_refuses_to_serve_beyond_loopback_without_a_token(tmp_path):
    with pytest.raises(UserError, match="without a token"):
        make_app(tmp_path, "redis://127.0.0.1:1/0", host="0.0.0.0")
    make_app(tmp_path, "redis://127.0.0.1:1/0", host="0.0.0.0", token=TOKEN)  # fine


def test_refuses_to_start_without_a_redis_url(tmp_path):
    with pytest.raises(UserError, match="CLOSURE_REDIS_URL"):
        make_app(tmp_path, None)


def test_settings_from_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("CLOSURE_STORE", str(tmp_path / "s"))
    monkeypatch.setenv("CLOSURE_REDIS_URL", "unix:///tmp/x.sock")
    monkeypatch.setenv("CLOSURE_DATA_ROOTS", os.pathsep.join([str(tmp_path), "/srv/data"]))
    monkeypatch.setenv("CLOSURE_TOKEN", "t")
    monkeypatch.setenv("CLOSURE_MAX_UPLOAD_MB", "12.5")
    s = Settings.from_env(token="override")
    assert s.store == tmp_path / "s" and s.redis_url == "unix:///tmp/x.sock"
    assert s.data_roots == (tmp_path, __import__("pathlib").Path("/srv/data"))
    assert s.token == "override" and s.max_upload_mb == 12.5
    monkeypatch.setenv("CLOSURE_MAX_UPLOAD_MB", "lots")
    with pytest.raises(UserError, match="CLOSURE_MAX_UPLOAD_MB"):
        Settings.from_env()


def test_token_required_when_configured(tmp_path, redis_server):  # noqa: F811
    app = make_app(tmp_path, redis_server.url, token=TOKEN)
    with TestClient(app) as c:
        r = c.get("/jobs")
        assert r.status_code == 401 and "needs a token" in r.json()["detail"]
        assert r.headers["www-authenticate"] == "Bearer"
        r = c.get("/jobs", headers={"Authorization": "Bearer wrong"})
        assert r.status_code == 401 and "wrong token" in r.json()["detail"]
        r = c.post("/datasets?name=a.nc", content=b"CDF\x01xxxx",
                   headers={"Authorization": "Basic abc"})
        assert r.status_code == 401
        assert c.get("/jobs", headers={"Authorization": f"Bearer {TOKEN}"}).status_code == 200
        assert c.get("/health").status_code == 200  # health and docs stay open
        assert c.get("/openapi.json").status_code == 200


def test_no_token_needed_on_loopback_without_one(client):
    assert client.get("/jobs").status_code == 200


def test_openapi_documents_the_routes_and_the_spec(client):
    doc = client.get("/openapi.json").json()
    for path in ("/jobs", "/jobs/{job_id}", "/datasets", "/datasets/{dataset_id}", "/models",
                 "/models/{model_id}", "/models/{model_id}/export", "/health"):
        assert path in doc["paths"], path
    assert "JobSpec" in doc["components"]["schemas"]
    assert client.get("/docs").status_code == 200


# --------------------------------------------------------------------------- health

def test_health_reports_redis_db_and_workers(client):
    doc = client.get("/health").json()
    assert doc["status"] == "ok" and doc["redis"]["ok"] and doc["db"]["ok"]
    assert doc["workers"] == 0 and doc["queue"]["queued"] == 0


def test_health_is_503_when_redis_is_down(tmp_path):
    app = make_app(tmp_path, f"unix://{tmp_path}/nothing.sock")
    with TestClient(app) as c:
        r = c.get("/health")
        assert r.status_code == 503 and not r.json()["redis"]["ok"] and r.json()["db"]["ok"]


# --------------------------------------------------------------------------- uploads

def test_upload_valid_file_then_dedupe(client, turb2d_file):  # noqa: F811
    before = sha256_file(turb2d_file)
    data = turb2d_file.read_bytes()
    r = client.post("/datasets?name=turb2d.nc", content=data,
                    headers={"Content-Type": "application/octet-stream"})
    assert r.status_code == 201, r.text
    ds = r.json()
    assert ds["sha256"] == before and ds["n_snapshots"] == 6 and ds["size"] == len(data)
    assert ds["grid"]["shape"] == [32, 32]
    r2 = client.post("/datasets?name=copy.nc", content=data)
    assert r2.status_code == 200 and r2.json()["id"] == ds["id"]
    assert client.get(f"/datasets/{ds['id']}").json()["sha256"] == before
    assert not any((client.store_root / "uploads").iterdir())
    assert sha256_file(turb2d_file) == before


def test_upload_not_netcdf_is_refused_and_nothing_kept(client):
    r = client.post("/datasets?name=notes.nc", content=b"just some text\n" * 100)
    assert r.status_code == 422
    assert "not a netCDF file" in r.json()["detail"]
    assert nothing_kept(client.store_root)


def test_upload_truncated_netcdf_is_refused_and_nothing_kept(client, turb2d_file):  # noqa: F811
    r = client.post("/datasets?name=cut.nc", content=turb2d_file.read_bytes()[:3000])
    assert r.status_code == 422, r.text
    assert nothing_kept(client.store_root)


def test_upload_missing_variable_is_refused_with_its_name(client, turb2d_file):  # noqa: F811
    r = client.post("/datasets", params={"name": "t.nc", "variables": json.dumps({"u": "U"})},
                    content=turb2d_file.read_bytes())
    assert r.status_code == 422
    msg = r.json()["detail"]
    assert "'U'" in msg and "u, v, vorticity" in msg and "t.nc" in msg and ".upload-" not in msg
    assert nothing_kept(client.store_root)


def test_upload_bad_variables_parameter(client, turb2d_file):  # noqa: F811
    r = client.post("/datasets", params={"variables": "u=U"}, content=turb2d_file.read_bytes())
    assert r.status_code == 422 and "JSON object" in r.json()["detail"]


def test_upload_over_the_limit_is_413_by_header_and_by_stream(tmp_path, redis_server,  # noqa: F811
                                                              turb2d_file):  # noqa: F811
    data = turb2d_file.read_bytes()
    app = make_app(tmp_path, redis_server.url, max_upload_mb=len(data) / 2 / 2**20)
    with TestClient(app) as c:
        r = c.post("/datasets?name=big.nc", content=data)  # Content-Length known
        assert r.status_code == 413 and "over the limit" in r.json()["detail"]

        def chunks():  # no Content-Length: refused while streaming
            for i in range(0, len(data), 4096):
                yield data[i:i + 4096]

        r = c.post("/datasets?name=big.nc", content=chunks())
        assert r.status_code == 413
    assert nothing_kept(tmp_path / "store")


def test_upload_empty_and_multipart_are_refused(client, turb2d_file):  # noqa: F811
    assert client.post("/datasets?name=e.nc", content=b"").status_code == 422
    r = client.post("/datasets", files={"file": ("t.nc", turb2d_file.read_bytes())})
    assert r.status_code == 415 and "--data-binary" in r.json()["detail"]
    assert nothing_kept(client.store_root)


# --------------------------------------------------------------------------- jobs: input checks

def test_bad_spec_values_are_422_with_field_paths_and_choices(client, turb2d_file):  # noqa: F811
    spec = spec_for(turb2d_file)
    spec["filter"] = {"kind": "tophat", "ratio": 0}
    spec["scheme"] = "fd3"
    r = client.post("/jobs", json=spec)
    assert r.status_code == 422
    msg = r.json()["detail"]
    assert "filter.kind" in msg and "'box'" in msg and "'gaussian'" in msg
    assert "filter.ratio" in msg and "scheme" in msg and "'fd4'" in msg
    assert "body" not in msg.split(":")[1]
    fields = {e["field"] for e in r.json()["errors"]}
    assert {"filter.kind", "filter.ratio", "scheme"} <= fields
    assert nothing_kept(client.store_root)


def test_spec_with_unknown_field_or_no_input(client, turb2d_file):  # noqa: F811
    r = client.post("/jobs", json={**spec_for(turb2d_file), "speed": "fast"})
    assert r.status_code == 422 and "speed" in r.json()["detail"]
    r = client.post("/jobs", json={"input": {}})
    assert r.status_code == 422 and "exactly one of input.path or input.dataset_id" in \
        r.json()["detail"]
    r = client.post("/jobs", content=b"{not json", headers={"Content-Type": "application/json"})
    assert r.status_code == 422
    assert r.json()["detail"].startswith("invalid request: request body: the request body is "
                                         "not valid JSON")


def test_a_ratio_the_grid_cannot_take_is_refused_at_submission(client, turb2d_file):  # noqa: F811
    spec = spec_for(turb2d_file)
    spec["filter"] = {"kind": "gaussian", "ratio": 3}  # 128 points do not tile by 3
    r = client.post("/jobs", json=spec)
    assert r.status_code in (400, 422)
    assert "not a multiple of the ratio 3" in r.json()["detail"]
    assert nothing_kept(client.store_root)


def test_target_must_be_known(client, turb2d_file):  # noqa: F811
    r = client.post("/jobs", json=spec_for(turb2d_file, target="heat"))
    assert r.status_code == 422 and "target" in r.json()["detail"]


@pytest.mark.parametrize("how", ["dotdot", "absolute", "symlink"])
def test_paths_outside_the_data_roots_are_refused(client, turb2d_file, tmp_path, how):  # noqa: F811
    outside = tmp_path / "outside.nc"
    outside.write_bytes(turb2d_file.read_bytes())
    root = turb2d_file.parent
    if how == "dotdot":
        path = os.path.relpath(outside, root)  # "../..../outside.nc", relative to the root
        assert path.startswith("..")
    elif how == "absolute":
        path = str(outside)
    else:
        link = root / f"link-{os.getpid()}.nc"
        link.unlink(missing_ok=True)
        link.symlink_to(outside)
        path = str(link)
    try:
        r = client.post("/jobs", json=spec_for(path))
    finally:
        if how == "symlink":
            link.unlink()
    assert r.status_code == 403, r.text
    assert "outside the data roots" in r.json()["detail"]
    assert nothing_kept(client.store_root)


def test_server_without_data_roots_reads_no_paths(tmp_path, redis_server, turb2d_file):  # noqa: F811
    with TestClient(make_app(tmp_path, redis_server.url)) as c:
        r = c.post("/jobs", json=spec_for(turb2d_file))
        assert r.status_code == 403 and "POST /datasets" in r.json()["detail"]


def test_missing_file_and_missing_variables_under_a_root(client, turb2d_file):  # noqa: F811
    r = client.post("/jobs", json=spec_for(turb2d_file.parent / "nope.nc"))
    assert r.status_code == 422 and "no such file" in r.json()["detail"]
    spec = spec_for(turb2d_file)
    spec["input"]["variables"] = {"v": "V_missing"}
    r = client.post("/jobs", json=spec)
    assert r.status_code == 422 and "V_missing" in r.json()["detail"]
    spec = spec_for(turb2d_file)
    spec["input"]["snapshots"] = [0, 99]
    r = client.post("/jobs", json=spec)
    assert r.status_code == 422 and "out of range" in r.json()["detail"]
    assert not any((client.store_root / "models").iterdir())


def test_unknown_dataset_and_ids_are_404(client):
    r = client.post("/jobs", json={"input": {"dataset_id": "d-0000"}})
    assert r.status_code == 404 and "POST /datasets" in r.json()["detail"]
    assert client.get("/jobs/j-nope").status_code == 404
    assert client.get("/models/m-nope").status_code == 404
    assert client.get("/models/m-nope/export?lang=c").status_code == 404
    assert client.get("/datasets/d-nope").status_code == 404
    assert client.get("/jobs/..%2F..%2Fetc").status_code == 404


def test_bad_query_values_are_422_with_choices(client):
    r = client.get("/models/m-x/export?lang=rust")
    assert r.status_code == 422
    assert "lang" in r.json()["detail"] and "'fortran'" in r.json()["detail"]
    r = client.get("/models?filter=tophat")
    assert r.status_code == 422 and "filter" in r.json()["detail"]
    r = client.get("/models?min_r2=high")
    assert r.status_code == 422 and "min_r2" in r.json()["detail"]


# --------------------------------------------------------------------------- jobs: queueing

def test_submit_queues_json_tasks_dedupes_and_cancels(client, turb2d_file):  # noqa: F811
    before = sha256_file(turb2d_file)
    r = client.post("/jobs?name=first", json=spec_for(turb2d_file))
    assert r.status_code == 202, r.text
    job = r.json()
    assert job["state"] == "queued" and job["input_sha256"] == before and not job["reused"]
    assert job["name"] == "first" and job["progress"]["phase"] == "queued"
    # the queued task is JSON (zlib-compressed by rq), never a pickle
    raw = client.redis.hget(f"rq:job:{job['id']}-plan", "data")
    assert json.loads(zlib.decompress(raw))[0] == "worker.tasks.plan_task"
    # an identical submission (same content, same fingerprint) returns the same job
    again = client.post("/jobs", json=spec_for(turb2d_file))
    assert again.status_code == 200 and again.json()["id"] == job["id"]
    assert again.json()["reused"] is True
    # a different option is a different job
    other = client.post("/jobs", json={**spec_for(turb2d_file), "scheme": "fd4"})
    assert other.status_code == 202 and other.json()["id"] != job["id"]
    # cancel: the job ends canceled, its queued task is canceled, a second cancel is 409
    r = client.delete(f"/jobs/{job['id']}")
    assert r.status_code == 200 and r.json()["state"] == "canceled"
    from worker.queue import fetch

    assert fetch(client.redis, f"{job['id']}-plan").get_status() == "canceled"
    r = client.delete(f"/jobs/{job['id']}")
    assert r.status_code == 409 and "already ended (canceled)" in r.json()["detail"]
    # after a cancel, resubmitting runs a new job
    third = client.post("/jobs", json=spec_for(turb2d_file))
    assert third.status_code == 202 and third.json()["id"] != job["id"]
    listed = {j["id"]: j["state"] for j in client.get("/jobs").json()}
    assert listed[job["id"]] == "canceled" and listed[third.json()["id"]] == "queued"
    assert sha256_file(turb2d_file) == before


def test_submit_by_dataset_id(client, turb2d_file):  # noqa: F811
    ds = client.post("/datasets?name=t.nc", content=turb2d_file.read_bytes()).json()
    r = client.post("/jobs", json={"input": {"dataset_id": ds["id"]}})
    assert r.status_code == 202, r.text
    doc = r.json()
    assert doc["dataset_id"] == ds["id"] and doc["input_sha256"] == ds["sha256"]
    assert doc["spec"]["input"]["path"].startswith(str(client.store_root))
    # the same content by path is the same job
    r2 = client.post("/jobs", json=spec_for(turb2d_file))
    assert r2.status_code == 200 and r2.json()["id"] == doc["id"]


def test_submit_when_redis_is_down_is_503_not_500(tmp_path, turb2d_file):  # noqa: F811
    app = make_app(tmp_path, f"unix://{tmp_path}/none.sock", roots=[turb2d_file.parent])
    with TestClient(app, raise_server_exceptions=False) as c:
        r = c.post("/jobs", json=spec_for(turb2d_file))
        assert r.status_code == 503 and "Redis" in r.json()["detail"]


def test_stored_model_of_a_canceled_job_is_still_reused(client, turb2d_file):  # noqa: F811
    """A job canceled after its model was stored: resubmitting returns a finished job."""
    from closure.spec import parse_spec
    from closure.store import Store, fingerprint_hash, model_id_for, models_table

    r = client.post("/jobs", json=spec_for(turb2d_file))
    job = r.json()
    client.delete(f"/jobs/{job['id']}")
    store = Store(client.store_root)
    spec = parse_spec(job["spec"])
    fp = fingerprint_hash(spec, job["input_sha256"])
    # enter a catalog row for that job's model (what a reduce finishing at the moment of the
    # cancel leaves behind)
    with store.engine.begin() as conn:
        conn.execute(models_table.insert().values(
            id=model_id_for(fp), fingerprint=fp, dataset_sha256=job["input_sha256"],
            target="stress", filter_kind="gaussian", filter_ratio=4, scheme="spectral",
            method="threshold", job_id=job["id"], created=0.0, path="/nowhere"))
    again = client.post("/jobs", json=spec_for(turb2d_file))
    assert again.status_code == 200
    doc = again.json()
    assert doc["id"] != job["id"] and doc["state"] == "succeeded" and doc["reused"]
    assert doc["model_id"] == model_id_for(fp)


def test_options_and_wrong_methods_answer_allow(client):
    r = client.options("/jobs")
    assert r.status_code == 204 and set(r.headers["allow"].split(", ")) >= {"GET", "POST",
                                                                            "OPTIONS"}
    r = client.options("/jobs/j-1")
    assert {"GET", "DELETE"} <= set(r.headers["allow"].split(", "))
    r = client.put("/jobs")
    assert r.status_code == 405 and "POST" in r.headers["allow"]
    assert r.json()["error"] == "MethodNotAllowed"
    assert client.options("/no-such-route").status_code == 404


def test_every_error_status_is_documented_with_the_error_body(client):
    doc = client.get("/openapi.json").json()
    body = {"$ref": "#/components/schemas/ErrorBody"}
    submit = doc["paths"]["/jobs"]["post"]["responses"]
    for code in ("200", "202", "400", "401", "403", "404", "413", "422", "503"):
        assert code in submit, code
    assert submit["422"]["content"]["application/json"]["schema"] == body
    assert "HTTPValidationError" not in doc["components"]["schemas"]
    # the 422 answer has the documented shape
    r = client.post("/jobs", json={"input": {"path": "x.nc"}, "fit": {"seed": -1}})
    assert r.status_code == 422
    assert set(r.json()) <= {"detail", "error", "errors"}
    assert r.json()["errors"][0]["field"] == "fit.seed"
    r = client.post("/jobs", content=b"\xff\xfe", headers={"Content-Type": "application/json"})
    assert r.status_code in (400, 422) and "error" in r.json()


#: bad specs and what each message must say; together they raise most pydantic error types
BAD_SPECS = [
    ({"filter": {"kind": "tophat"}}, "filter.kind: must be one of 'box'"),
    ({"filter": {"ratio": 0}}, "filter.ratio: must be at least 1"),
    ({"filter": {"ratio": 4096}}, "filter.ratio: must be at most 1024"),
    ({"filter": {"ratio": "four"}}, "filter.ratio: must be a whole number"),
    ({"filter": {"ratio": 2.5}}, "filter.ratio: must be a whole number"),
    ({"filter": {"width": -1.0}}, "filter.width: must be greater than 0"),
    ({"filter": {"width": "wide"}}, "filter.width: must be a number"),
    ({"filter": "gaussian"}, "filter: must be an object"),
    ({"fit": {"test_fraction": 1.5}}, "fit.test_fraction: must be less than 1"),
    ({"fit": {"resamples": [1]}}, "fit.resamples: must be a whole number"),
    ({"fit": {"folds": 1}}, "fit.folds: must be at least 2"),
    ({"fit": {"colour": "red"}}, "fit.colour: is not a field of this spec"),
    ({"reference_net": {"enabled": "maybe"}}, "reference_net.enabled: must be true or false"),
    ({"reference_net": {"kernel": 4}}, "reference_net.kernel: kernel must be odd"),
    ({"scheme": 4}, "scheme: must be one of 'spectral'"),
    ({"speed": "fast"}, "speed: is not a field of this spec"),
    ({"input": {}}, "exactly one of input.path or input.dataset_id"),
    ({"input": {"path": 7}}, "input.path: must be text or a list (got 7)"),
    ({"input": {"path": "x.nc", "snapshots": "all"}}, "input.snapshots: must be a list"),
    ({"kind": "transmogrify"}, "kind must be 'discover' (the default), 'coarse-grain'"),
]
#: the validation library's own wording, which must not reach a user
LIBRARY_WORDING = ("Value error", "Input should", "Field required", "Extra inputs",
                   "Assertion failed", "valid integer", "valid number", "unable to parse")


@pytest.mark.parametrize("change,expected", BAD_SPECS)
def test_422_messages_are_in_our_own_words(client, turb2d_file, change, expected):  # noqa: F811
    spec = spec_for(turb2d_file)
    for key, value in change.items():
        if isinstance(value, dict) and isinstance(spec.get(key), dict):
            spec[key] = {**spec[key], **value} if key != "input" or value else value
        else:
            spec[key] = value
    r = client.post("/jobs", json=spec)
    assert r.status_code == 422, r.text
    body = r.json()
    texts = [body["detail"], *(e["message"] for e in body.get("errors") or [])]
    for text in texts:
        assert not any(w in text for w in LIBRARY_WORDING), text
    assert expected in body["detail"], body["detail"]
    # the same words where the CLI and the client validate a spec locally
    from closure.spec import parse_spec

    if change.get("kind") is None:
        with pytest.raises(UserError) as err:
            parse_spec(spec)
        assert not any(w in str(err.value) for w in LIBRARY_WORDING), str(err.value)
        assert expected in str(err.value)


def test_422_query_messages_are_in_our_own_words(client):
    for url, expected in (("/models?min_r2=high", "min_r2: must be a number"),
                          ("/models?limit=many", "limit: must be a whole number"),
                          ("/models?limit=0", "limit: must be at least 1"),
                          ("/models/m-x/export?lang=rust", "lang: must be one of")):
        r = client.get(url)
        assert r.status_code == 422, (url, r.text)
        assert expected in r.json()["detail"], r.json()["detail"]
        assert not any(w in r.json()["detail"] for w in LIBRARY_WORDING), r.json()["detail"]
