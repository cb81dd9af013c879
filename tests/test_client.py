"""closure.client against the real app in process (no worker): error types and messages,
spec building from discover options, upload-or-path submission, waiting."""

from __future__ import annotations

import warnings

import httpx
import pytest
from service_support import redis_server, turb2d_file  # noqa: F401

from api.app import create_app
from api.deps import Settings
from closure.client import Client, JobFailedError, ServiceError, spec_from_options
from closure.errors import OptionError, UserError
from closure.spec import parse_spec

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient


@pytest.fixture
def app(tmp_path, redis_server, turb2d_file):  # noqa: F811
    return create_app(Settings(store=tmp_path / "store", redis_url=redis_server.url,
                               data_roots=(turb2d_file.parent,), token="tok"))


@pytest.fixture
def client(app):
    with TestClient(app) as http:
        yield Client("http://testserver", token="tok", http=http)


def test_spec_from_options_builds_a_valid_spec():
    spec = spec_from_options("/data/run.nc", filter="box", width=3.0, ratio=2, target="force",
                             method="lasso", scheme="fd4", test_fraction=0.3, seed=7,
                             variables={"u": "U"}, scalars=["c"], snapshots=[0, 1, 2],
                             periodic=False)
    parsed = parse_spec(spec)
    assert parsed.filter.kind == "box" and parsed.filter.width == 3.0 and parsed.filter.ratio == 2
    assert parsed.target == "force" and parsed.fit.method == "lasso" and parsed.scheme == "fd4"
    assert parsed.input.variables == {"u": "U"} and parsed.input.snapshots == [0, 1, 2]
    assert parsed.input.periodic is False and parsed.fit.seed == 7
    # options override a base spec; the base is not modified
    base = {"input": {"path": "/x.nc"}, "fit": {"method": "ard", "seed": 1}}
    merged = spec_from_options(dataset_id="d-1", seed=2, base=base)
    assert merged["input"] == {"dataset_id": "d-1"} and merged["fit"] == {"method": "ard",
                                                                           "seed": 2}
    assert base == {"input": {"path": "/x.nc"}, "fit": {"method": "ard", "seed": 1}}


def test_bad_options_fail_locally_with_the_field(client, turb2d_file):  # noqa: F811
    with pytest.raises(OptionError, match="filter.kind"):
        client.submit(str(turb2d_file), filter="tophat")


def test_server_errors_raise_service_error_with_message_and_status(client, app):
    with pytest.raises(ServiceError) as err:
        client.status("j-unknown")
    assert err.value.status == 404 and "no job with id 'j-unknown'" in str(err.value)
    assert isinstance(err.value, UserError)  # the CLI prints it as `error: ...`, exit 2
    with TestClient(app) as http:
        anonymous = Client("http://testserver", token="", http=http)
        with pytest.raises(ServiceError) as err:
            anonymous.models()
        assert err.value.status == 401 and err.value.kind == "unauthorized"


def test_unreachable_server_is_a_clear_error():
    with Client("http://127.0.0.1:9", timeout=2) as c:
        with pytest.raises(ServiceError, match="cannot reach the closure service") as err:
            c.health()
        assert err.value.status is None


def test_submit_by_path_under_a_root(client, turb2d_file):  # noqa: F811
    doc = client.submit(str(turb2d_file), ratio=4)
    assert doc["state"] == "queued" and doc["dataset_id"].startswith("p-")
    assert client.status(doc["id"])["id"] == doc["id"]
    assert client.jobs()[0]["id"] == doc["id"]


def test_submit_outside_the_roots_uploads_instead(client, turb2d_file, tmp_path):  # noqa: F811
    outside = tmp_path / "elsewhere.nc"
    outside.write_bytes(turb2d_file.read_bytes())
    with pytest.raises(ServiceError) as err:
        client.submit(str(outside), upload=False)
    assert err.value.status == 403
    doc = client.submit(str(outside))  # default: refused by path, so uploaded
    assert doc["dataset_id"].startswith("d-")
    ds = client.dataset(doc["dataset_id"])
    assert ds["name"] == "elsewhere.nc" and ds["n_snapshots"] == 6
    forced = client.submit(str(turb2d_file), upload=True, seed=3)
    assert forced["dataset_id"] == doc["dataset_id"]  # same content, same dataset


def test_several_files_outside_the_roots_are_uploaded_and_read_as_one_input(
        client, app, turb2d_file, tmp_path):  # noqa: F811
    # one file per snapshot, outside the roots: each is uploaded, and the job reads the
    # datasets as one input whose checksum is the combined one (closure.io.input_sha256)
    import xarray as xr

    from closure.io import input_sha256

    files = []
    with xr.open_dataset(turb2d_file) as ds:
        for i in range(ds.sizes["time"]):
            files.append(tmp_path / f"snap_{i}.nc")
            ds.isel(time=slice(i, i + 1)).to_netcdf(files[-1])
    doc = client.submit([str(f) for f in files])
    assert doc["state"] == "queued"
    spec = doc["spec"]["input"]
    assert isinstance(spec["path"], list) and len(spec["path"]) == len(files)
    assert client.dataset(doc["dataset_id"])["sha256"] == input_sha256(files)
    # the same files by path under the roots need no upload
    inside = turb2d_file.parent / "split"
    inside.mkdir(exist_ok=True)
    for f in files:
        (inside / f.name).write_bytes(f.read_bytes())
    by_path = client.submit([str(inside / f.name) for f in files], seed=5)
    assert by_path["spec"]["input"]["path"] == [str((inside / f.name).resolve()) for f in files]
    with pytest.raises(ServiceError) as err:
        client.submit({"input": {"dataset_id": [doc["dataset_id"], "d-" + "0" * 20]}})
    assert err.value.status == 404


def test_wait_raises_job_failed_after_cancel(client, turb2d_file):  # noqa: F811
    doc = client.submit(str(turb2d_file))
    client.cancel(doc["id"])
    seen = []
    with pytest.raises(JobFailedError, match="canceled") as err:
        client.wait(doc["id"], progress=seen.append, timeout=10)
    assert err.value.status_doc["state"] == "canceled" and seen
    with pytest.raises(ServiceError) as err:
        client.cancel(doc["id"])
    assert err.value.status == 409


def test_wait_times_out_on_a_queued_job(client, turb2d_file):  # noqa: F811
    doc = client.submit(str(turb2d_file), seed=11)
    with pytest.raises(ServiceError, match="still queued"):
        client.wait(doc["id"], timeout=0.3, poll=0.1)


def test_wait_rides_out_a_short_outage(turb2d_file):  # noqa: F811
    answers = iter([503, 503, 200])

    def handler(request: httpx.Request) -> httpx.Response:
        code = next(answers)
        if code == 503:
            return httpx.Response(503, json={"detail": "the job queue (Redis) is not answering"})
        return httpx.Response(200, json={"id": "j-1", "state": "succeeded", "model_id": "m-1",
                                         "progress": {}})

    http = httpx.Client(base_url="http://x", transport=httpx.MockTransport(handler))
    doc = Client("http://x", http=http).wait("j-1", poll=0.01, outage_tolerance=5)
    assert doc["model_id"] == "m-1"
    answers = iter([503] * 100)
    http = httpx.Client(base_url="http://x", transport=httpx.MockTransport(handler))
    with pytest.raises(ServiceError, match="Redis"):
        Client("http://x", http=http).wait("j-1", poll=0.01, outage_tolerance=0.05)
