"""Coarse-graining jobs through the service.

In process (TestClient, a Redis of our own, no worker): POST /jobs with kind coarse-grain,
user errors as 4xx with clear messages, /products routes, range requests, the OpenAPI
document. End to end (slow; a local stack: our own Redis, uvicorn, two rq workers in fresh
processes): the queued product equals ``closure coarse-grain`` bit for bit (periodic and
bounded data, one and several filter settings); a killed map task is retried and the product
is unchanged; a canceled job leaves no product; the download streams with constant memory
in the API; the client and CLI commands.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
import warnings

import netCDF4
import numpy as np
import pytest
import xarray as xr
from service_support import child_pids, redis_server  # noqa: F401
from test_products import assert_same_file

with warnings.catch_warnings():  # starlette warns that its test client is built on httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from closure import products
from closure.cli import main as cli_main
from closure.spec import parse_coarse_grain_spec
from closure.store import Store


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """Small 2-D turbulence files: ``small`` (32 x 32, 6 snapshots) and ``big`` (64 x 64,
    12 snapshots; jobs on it run long enough to be killed or canceled mid-way)."""
    from closure.synth import turb2d, write

    root = tmp_path_factory.mktemp("data")
    small = write(turb2d(n=32, snapshots=6, spinup=0.5, interval=0.1), root / "small.nc")
    big = write(turb2d(n=64, snapshots=12, spinup=0.5, interval=0.1), root / "big.nc")
    return {"small": small, "big": big, "root": root}


def cg_spec(path, filters, periodic=True, **extra) -> dict:
    return {"kind": "coarse-grain", "input": {"path": str(path), "periodic": periodic},
            "filters": filters, **extra}


# --------------------------------------------------------------------------- in process

@pytest.fixture
def api(tmp_path, redis_server, data):  # noqa: F811
    from api.app import create_app
    from api.deps import Settings

    settings = Settings(store=tmp_path / "store", redis_url=redis_server.url,
                        data_roots=(data["root"],))
    with TestClient(create_app(settings)) as c:
        c.store = Store(tmp_path / "store")
        c.settings = settings
        yield c


def test_submit_queues_a_coarse_grain_job_and_resubmission_reuses_it(api, data):
    spec = cg_spec(data["small"], [{"ratio": 4}, {"ratio": 2, "kind": "box"}])
    r = api.post("/jobs", json=spec, params={"name": "cg"})
    assert r.status_code == 202, r.text
    doc = r.json()
    assert doc["state"] == "queued" and doc["product_id"] is None
    assert doc["spec"]["kind"] == "coarse-grain" and doc["spec"]["input"]["path"]
    again = api.post("/jobs", json=spec)
    assert again.status_code == 200 and again.json()["id"] == doc["id"] and again.json()["reused"]
    # a discovery job without a kind is still a discovery job
    r = api.post("/jobs", json={"input": {"path": str(data["small"])}})
    assert r.status_code == 202 and "product_id" not in r.json()


def test_a_stored_product_answers_an_identical_submission(api, data):
    from api.inputs import resolve_input
    from closure.store import fingerprint_hash

    spec = parse_coarse_grain_spec(cg_spec(data["small"], [{"ratio": 4}]))
    run_spec, ds = resolve_input(spec, api.store, api.settings)
    fp = fingerprint_hash(run_spec, ds["sha256"])
    out = products.coarse_grain_product(run_spec, data["root"] / "stored.nc")
    row = api.store.add_product(file=out, fingerprint=fp, dataset_sha256=ds["sha256"],
                                spec=run_spec.model_dump(mode="json"),
                                plan=products.plan(run_spec), job_id=None)
    r = api.post("/jobs", json=cg_spec(data["small"], [{"ratio": 4}]))
    assert r.status_code == 200, r.text
    doc = r.json()
    assert doc["reused"] and doc["state"] == "succeeded" and doc["product_id"] == row["id"]
    assert api.get(f"/jobs/{doc['id']}").json()["product_id"] == row["id"]


@pytest.mark.parametrize("spec, status, message", [
    (cg_spec("small.nc", [{"ratio": 64}]), 400,
     "filters[0]: the grid has 32 points in y, fewer than the ratio 64"),
    (cg_spec("small.nc", [{"ratio": 2}], targets=["flux:c"]), 400,
     "target flux:c needs the scalar 'c' in input.scalars"),
    (cg_spec("small.nc", [{"ratio": 2}], dtype="int8"), 422,
     "dtype: must be one of 'float64' or 'float32'"),
    (cg_spec("small.nc", [{"ratio": 2}, {"ratio": 2}]), 422, "repeats an earlier one"),
    ({"kind": "tune", "input": {"path": "small.nc"}}, 422,
     "kind must be 'discover' (the default), 'coarse-grain' or 'sweep'"),
    (cg_spec("/etc/passwd", [{"ratio": 2}]), 403, "outside the data roots"),
    (cg_spec("nothere.nc", [{"ratio": 2}]), 422, "no such file under the data roots"),
], ids=["ratio", "flux", "dtype", "repeated", "kind", "outside", "missing"])
def test_user_errors_are_4xx_with_clear_messages(api, spec, status, message):
    r = api.post("/jobs", json=spec)
    assert r.status_code == status, r.text
    assert message in r.json()["detail"], r.json()["detail"]
    assert not any((api.store.root / "jobs").iterdir())


def test_unknown_product_is_404_everywhere(api):
    for method, url in (("GET", "/products/pr-nope"), ("GET", "/products/pr-nope/data"),
                        ("DELETE", "/products/pr-nope")):
        r = api.request(method, url)
        assert r.status_code == 404, (url, r.text)
        assert "no product with id 'pr-nope'" in r.json()["detail"]
    assert api.get("/products").json() == []


def test_download_and_range_requests(api, data):
    spec = parse_coarse_grain_spec(cg_spec(data["small"], [{"ratio": 2}]))
    out = products.coarse_grain_product(spec, data["root"] / "ranged.nc")
    plan = products.plan(spec)
    row = api.store.add_product(file=out, fingerprint="f" * 64, dataset_sha256=plan["sha256"],
                                spec=spec.model_dump(mode="json"), plan=plan, job_id=None)
    body = (api.store.product_dir(row["id"]) / "product.nc").read_bytes()
    r = api.get(f"/products/{row['id']}/data")
    assert r.status_code == 200 and r.content == body
    assert r.headers["x-content-sha256"] == row["sha256"]
    assert r.headers["accept-ranges"] == "bytes"
    assert r.headers["content-type"] == "application/x-netcdf"
    # RFC 9110, section 14: a byte range answers 206 with Content-Range
    r = api.get(f"/products/{row['id']}/data", headers={"Range": "bytes=100-1099"})
    assert r.status_code == 206 and r.content == body[100:1100]
    assert r.headers["content-range"] == f"bytes 100-1099/{len(body)}"
    r = api.get(f"/products/{row['id']}/data", headers={"Range": "bytes=-64"})
    assert r.status_code == 206 and r.content == body[-64:]
    r = api.get(f"/products/{row['id']}/data",
                headers={"Range": f"bytes={len(body) + 10}-"})
    assert r.status_code == 416
    listed = api.get("/products").json()
    assert [p["id"] for p in listed] == [row["id"]] and listed[0]["size"] == len(body)
    assert api.get(f"/products/{row['id']}").json()["spec"]["kind"] == "coarse-grain"
    assert api.delete(f"/products/{row['id']}").json() == {"deleted": row["id"]}
    assert api.get(f"/products/{row['id']}").status_code == 404


def test_zarr_product_download_and_range_requests(api, data, tmp_path):
    """A Zarr product is served as one zip (application/zip, ``<id>.zarr.zip``), with range
    requests; the client names the file by its format and refuses a netCDF name."""
    from closure.client import Client

    spec = parse_coarse_grain_spec(cg_spec(data["small"], [{"ratio": 2}, {"ratio": 4}],
                                           format="zarr", targets=["stress"], transfers=[]))
    out = products.coarse_grain_product(spec, data["root"] / "ranged.zarr.zip")
    plan = products.plan(spec)
    row = api.store.add_product(file=out, fingerprint="e" * 64, dataset_sha256=plan["sha256"],
                                spec=spec.model_dump(mode="json"), plan=plan, job_id=None)
    assert row["format"] == "zarr"
    body = (api.store.product_dir(row["id"]) / "product.nc").read_bytes()
    assert body[:4] == b"PK\x03\x04"  # a zip (PKWARE APPNOTE, 4.3.7: local file header)
    r = api.get(f"/products/{row['id']}/data")
    assert r.status_code == 200 and r.content == body
    assert r.headers["content-type"] == "application/zip"
    assert f'filename="{row["id"]}.zarr.zip"' in r.headers["content-disposition"]
    assert r.headers["x-product-format"] == "zarr"
    # RFC 9110, section 14: a byte range answers 206 with Content-Range
    r = api.get(f"/products/{row['id']}/data", headers={"Range": "bytes=10-1033"})
    assert r.status_code == 206 and r.content == body[10:1034]
    assert r.headers["content-range"] == f"bytes 10-1033/{len(body)}"
    r = api.get(f"/products/{row['id']}/data", headers={"Range": f"bytes={len(body)}-"})
    assert r.status_code == 416
    # the client: a folder gets <id>.zarr.zip; a .nc name is refused before writing
    c = Client("http://testserver")
    c._http = api
    down = tmp_path / "down"
    down.mkdir()
    got = c.fetch(row["id"], down)
    assert got == down / f"{row['id']}.zarr.zip" and got.read_bytes() == body
    with products.open_product(got, "setting_1") as ds:
        assert ds.sizes["x"] == 8 and ds.attrs["coarsening_ratio"] == 4
    from closure.errors import UserError

    with pytest.raises(UserError, match=r"is a Zarr product .* name the file out.zarr.zip"):
        c.fetch(row["id"], down / "out.nc")
    assert sorted(p.name for p in down.iterdir()) == [got.name]
    # discovery reads netCDF products only: a clear 4xx
    r = api.post("/jobs", json={"input": {"dataset_id": row["id"]}})
    assert r.status_code == 400 and "is a Zarr product" in r.json()["detail"], r.text


def test_openapi_documents_products_and_the_job_kind(api):
    doc = api.get("/openapi.json").json()
    paths = doc["paths"]
    assert {"get"} == set(paths["/products"])
    assert {"get", "delete"} == set(paths["/products/{product_id}"])
    data_get = paths["/products/{product_id}/data"]["get"]
    assert {"200", "206", "404", "416"} <= set(data_get["responses"])
    assert "404" in paths["/products/{product_id}"]["delete"]["responses"]
    assert "CoarseGrainSpec" in doc["components"]["schemas"]
    fmt = doc["components"]["schemas"]["CoarseGrainSpec"]["properties"]["format"]
    assert fmt["enum"] == ["netcdf", "zarr"] and "ZipStore" in fmt["description"]
    assert {"application/x-netcdf", "application/zip"} <= set(
        data_get["responses"]["200"]["content"])
    body = paths["/jobs"]["post"]["requestBody"]["content"]["application/json"]["schema"]
    refs = str(body)
    assert "CoarseGrainSpec" in refs and "JobSpec" in refs


# --------------------------------------------------------------------------- end to end

@pytest.fixture(scope="module")
def stack(tmp_path_factory, data):
    from closure.localstack import LocalStack, WorkerOptions

    st = LocalStack(tmp_path_factory.mktemp("stack"), port=0, workers=2,
                    data_roots=[data["root"]],
                    worker_options=WorkerOptions(monitoring_interval=1, abandon_grace=3,
                                                 maintenance_interval=2),
                    env={"CLOSURE_SNAPSHOTS_PER_TASK": "1"})
    st.start()
    yield st
    st.stop()


@pytest.fixture
def client(stack):
    from closure.client import Client

    stack.respawn_dead_workers()
    with Client(stack.server_url) as c:
        yield c


def in_process(tmp_path, fine, filters, periodic) -> list:
    """`closure coarse-grain` once per setting: the reference files."""
    out = []
    for k, f in enumerate(filters):
        path = tmp_path / f"ref-{fine.stem}-{periodic}-{k}.nc"
        args = ["coarse-grain", str(fine), "-o", str(path), "--ratio", str(f["ratio"]),
                "--filter", f.get("kind", "gaussian")]
        if "width" in f:
            args += ["--width", str(f["width"])]
        if not periodic:
            args.append("--non-periodic")
        assert cli_main(args) == 0
        out.append(path)
    return out


def assert_product_equals(product_file, references) -> None:
    assert_same_file(references[0], product_file)
    with netCDF4.Dataset(product_file) as nc:
        assert len(nc.groups) == (len(references) if len(references) > 1 else 0)
    if len(references) > 1:
        for k, ref in enumerate(references):
            assert_same_file(ref, product_file, f"setting_{k}")


ONE = [{"ratio": 4, "width": 6}]
SEVERAL = [{"ratio": 4, "width": 6}, {"ratio": 4, "width": 10}, {"ratio": 2, "kind": "box"}]


@pytest.mark.slow
def test_queued_products_equal_coarse_grain(stack, client, data, tmp_path):
    cases = [(periodic, filters) for periodic in (True, False) for filters in (ONE, SEVERAL)]
    jobs = [client.submit_coarse_grain(cg_spec(data["small"], f, p)) for p, f in cases]
    assert all(j["state"] == "queued" for j in jobs)
    for (periodic, filters), job in zip(cases, jobs, strict=True):
        doc = client.wait(job["id"], timeout=180, poll=0.2)
        assert doc["state"] == "succeeded" and doc["product_id"].startswith("pr-")
        assert doc["progress"]["snapshots_done"] == doc["progress"]["snapshots_total"] == 6
        got = client.fetch(doc["product_id"], tmp_path / f"{doc['product_id']}.nc")
        assert_product_equals(got, in_process(tmp_path, data["small"], filters, periodic))
        record = client.product(doc["product_id"])
        assert record["job_id"] == job["id"] and len(record["settings"]) == len(filters)
        with xr.open_dataset(got) as ds:
            assert ds.attrs["closure_product_id"] == doc["product_id"]
            assert ds.attrs["source_sha256"] == doc["input_sha256"] == record["dataset_sha256"]
    # an identical resubmission answers the stored product at once
    again = client.submit_coarse_grain(cg_spec(data["small"], SEVERAL, False))
    assert again["reused"] and again["state"] == "succeeded"
    assert again["product_id"] == client.status(jobs[3]["id"])["product_id"]
    # the work areas are gone
    assert not any((stack.store / "jobs").iterdir())


def test_queued_zarr_product_equals_the_netcdf_product(stack, client, data, tmp_path):
    """The same job with format zarr: the downloaded zip holds the netCDF product's groups,
    variables, attributes and values to the last bit (float64), read with xarray."""
    import zarr

    jobs = {fmt: client.submit_coarse_grain(cg_spec(data["small"], SEVERAL, False,
                                                    format=fmt))
            for fmt in ("netcdf", "zarr")}
    ids = {fmt: client.wait(j["id"], timeout=180, poll=0.2)["product_id"]
           for fmt, j in jobs.items()}
    assert ids["netcdf"] != ids["zarr"]
    assert client.product(ids["zarr"])["format"] == "zarr"
    nc = client.fetch(ids["netcdf"], tmp_path)
    zp = client.fetch(ids["zarr"], tmp_path)
    assert nc.name.endswith(".nc") and zp.name == f"{ids['zarr']}.zarr.zip"
    for group in (None, *(f"setting_{k}" for k in range(len(SEVERAL)))):
        with xr.open_dataset(nc, group=group) as a, \
                xr.open_zarr(zarr.storage.ZipStore(zp, mode="r"), group=group) as b:
            assert set(a.variables) == set(b.variables)
            for name, var in a.variables.items():
                assert var.dtype == b[name].dtype and var.dims == b[name].dims, name
                assert var.values.tobytes() == b[name].values.tobytes(), name
                assert var.attrs == b[name].attrs, name
            for key in set(a.attrs) - {"history", "closure_product_id", "closure_job_id",
                                       "closure_spec"}:
                assert np.array_equal(a.attrs[key], b.attrs[key]), key
            assert b.attrs.get("closure_product_id", ids["zarr"]) == ids["zarr"]


def _map_horse(stack, conn, job_id: str) -> int | None:
    """The pid of a work-horse running one of the job's map tasks, if any."""
    from rq import Worker

    from worker import queue as q

    ours = {p.pid for p in stack.worker_procs}
    for w in Worker.all(connection=conn):
        current = w.get_current_job_id()
        if current and current.startswith(f"{job_id}-map-") and w.pid in ours:
            for child in child_pids(w.pid):
                try:
                    if os.getpgid(child) == child:
                        return child
                except ProcessLookupError:
                    continue
    del q
    return None


@pytest.mark.slow
def test_killed_map_task_is_retried_and_product_is_identical(stack, client, data, tmp_path):
    from worker import queue as q

    filters = [{"ratio": 4, "width": 5}, {"ratio": 2, "width": 3}]
    job = client.submit_coarse_grain(cg_spec(data["big"], filters))
    conn = q.connect(stack.redis_url)
    killed = None
    deadline = time.monotonic() + 60
    while killed is None and time.monotonic() < deadline:
        pid = _map_horse(stack, conn, job["id"])
        if pid is not None:
            try:
                os.kill(pid, signal.SIGKILL)
                killed = pid
            except ProcessLookupError:
                pass
        time.sleep(0.003)
    assert killed, "no map task was seen running"
    doc = client.wait(job["id"], timeout=180, poll=0.2)
    retried = [k for k in range(len(q.map_tasks(conn, job["id"])))
               if (t := q.fetch(conn, q.map_id(job["id"], k))) is not None
               and t.retries_left is not None and t.retries_left < q.TASK_RETRIES]
    assert retried, "no map task was retried"
    got = client.fetch(doc["product_id"], tmp_path / "killed.nc")
    assert_product_equals(got, in_process(tmp_path, data["big"], filters, True))


@pytest.mark.slow
def test_canceled_job_leaves_no_product(stack, client, data):
    from closure.client import JobFailedError

    filters = [{"ratio": 2, "width": w} for w in (3, 4, 5, 6)]
    job = client.submit_coarse_grain(cg_spec(data["big"], filters, dtype="float32"))
    deadline = time.monotonic() + 60
    while client.status(job["id"])["progress"]["phase"] in ("queued", "plan"):
        assert time.monotonic() < deadline
        time.sleep(0.01)
    assert client.cancel(job["id"])["state"] == "canceled"
    with pytest.raises(JobFailedError, match="canceled"):
        client.wait(job["id"], timeout=30)
    time.sleep(3.0)  # running tasks stop or see the flag; none may store a product
    doc = client.status(job["id"])
    assert doc["state"] == "canceled" and doc["product_id"] is None
    assert job["id"] not in {p["job_id"] for p in client.products()}
    leftovers = [p.name for p in (stack.store / "products").iterdir()
                 if p.name.startswith(".")]
    assert leftovers == []
    assert not (stack.store / "jobs" / job["id"] / "product.nc").exists()


def _rss_kib(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    raise AssertionError("no VmRSS")


@pytest.mark.slow
def test_download_streams_with_constant_memory(stack, client, data, tmp_path):
    """A 256 MiB product goes through the API with its resident memory growing by far less
    than the file (a budget of 48 MiB; reading the file into one response grows it by
    about 760 MiB), and a range request over HTTP."""
    size = 256 << 20
    big = tmp_path / "big-product.nc"
    rng = np.random.default_rng(0)
    with open(big, "wb") as fh:
        for _ in range(size >> 22):
            fh.write(rng.bytes(1 << 22))
    import hashlib

    digest = hashlib.sha256(big.read_bytes()).hexdigest()
    st = Store(stack.store)
    spec = parse_coarse_grain_spec(cg_spec(data["small"], [{"ratio": 4}]))
    row = st.add_product(file=big, fingerprint="e" * 64, dataset_sha256="0" * 64,
                         spec=spec.model_dump(mode="json"), plan={"settings": []}, job_id=None)
    api_pid = stack.api.pid
    before = _rss_kib(api_pid)
    peak = [before]
    done = threading.Event()

    def sample():
        while not done.is_set():
            peak[0] = max(peak[0], _rss_kib(api_pid))
            time.sleep(0.005)

    sampler = threading.Thread(target=sample)
    sampler.start()
    import httpx

    try:
        with httpx.stream("GET", f"{stack.server_url}/products/{row['id']}/data",
                          timeout=120) as r:
            assert r.status_code == 200
            for _ in r.iter_raw():
                pass
        out = client.fetch(row["id"], tmp_path / "fetched.nc")
    finally:
        done.set()
        sampler.join()
    growth_mib = (peak[0] - before) / 1024
    assert growth_mib < 48, f"the API grew by {growth_mib:.0f} MiB for a 256 MiB download"
    assert out.stat().st_size == size
    assert hashlib.sha256(out.read_bytes()).hexdigest() == digest == row["sha256"]
    r = httpx.get(f"{stack.server_url}/products/{row['id']}/data",
                  headers={"Range": f"bytes={size - 100}-"})
    assert r.status_code == 206 and len(r.content) == 100
    client.delete_product(row["id"])


@pytest.mark.slow
def test_cli_submit_list_and_fetch(stack, data, tmp_path):
    env = {**os.environ, "CLOSURE_SERVER": stack.server_url}
    cli = [sys.executable, "-c", "import sys; from closure.cli import main; "
           "sys.exit(main(sys.argv[1:]))"]

    def run(*args, check=True):
        r = subprocess.run([*cli, *args], env=env, capture_output=True, text=True, timeout=180)
        if check:
            assert r.returncode == 0, (args, r.stdout, r.stderr)
        return r

    out = run("submit-coarse-grain", str(data["small"]), "--ratio", "2", "--width", "3",
              "--width", "5", "--target", "stress", "--transfer", "pi", "--wait").stdout
    product_id = out.strip().splitlines()[-1]
    assert product_id.startswith("pr-")
    assert product_id in run("products").stdout
    target = tmp_path / "out.nc"
    assert "wrote" in run("fetch", product_id, "-o", str(target)).stdout
    with xr.open_dataset(target, group="setting_1") as ds:
        assert [v for v in ds.data_vars if v.startswith(("tau", "pi"))] == [
            "tau_xx", "tau_xy", "tau_yy", "pi"]
    out = run("submit-sweep", str(data["small"]), "--widths", "4,6", "--ratios", "2",
              "--resamples", "2", "--seed", "31", "--wait").stdout
    sweep_id = out.strip().splitlines()[-1]
    assert sweep_id.startswith("sw-")
    assert "a priori skill does not guarantee" in out
    # the sweep's report, built by the server: the sweep figures against the filter width
    page = run("sweep-report", sweep_id, "-o", str(tmp_path / "sweep")).stdout.strip()
    assert page == str(tmp_path / "sweep" / "index.html")
    assert {"index.html", "sweep_coefficients.png"} <= {
        p.name for p in (tmp_path / "sweep").iterdir()}
    r = run("sweep-report", "sw-nope", "-o", str(tmp_path / "none"), check=False)
    assert r.returncode == 2 and "no sweep with id 'sw-nope'" in r.stderr
    # a Zarr product: fetched into a folder under its own name, opened with xarray
    out = run("submit-coarse-grain", str(data["small"]), "--ratio", "2", "--target", "stress",
              "--transfer", "pi", "--format", "zarr", "--wait").stdout
    zarr_id = out.strip().splitlines()[-1]
    assert zarr_id != product_id
    down = tmp_path / "down"
    down.mkdir()
    assert f"{zarr_id}.zarr.zip" in run("fetch", zarr_id, "-o", str(down)).stdout
    with products.open_product(down / f"{zarr_id}.zarr.zip") as ds:
        assert ds.attrs["closure_product_id"] == zarr_id and "pi" in ds
    r = run("fetch", zarr_id, "-o", str(tmp_path / "z.nc"), check=False)
    assert r.returncode == 2 and "is a Zarr product" in r.stderr
    r = run("submit-coarse-grain", str(data["small"]), "--ratio", "64", check=False)
    assert r.returncode == 2 and "filters[0]" in r.stderr
    r = run("fetch", "pr-nope", "-o", str(tmp_path / "x.nc"), check=False)
    assert r.returncode == 2 and "no product with id 'pr-nope'" in r.stderr
    assert not (tmp_path / "x.nc").exists()


@pytest.mark.slow
def test_discovery_job_from_a_stored_product(stack, client, data):
    """A discovery job whose input.dataset_id is a product id reads the product (no second
    pass over the fine data) and gives the model in-process discovery gives from the fine
    data; the model's provenance names the product."""
    from closure import pipeline
    from closure.spec import parse_spec

    job = client.submit_coarse_grain(cg_spec(data["small"], [{"ratio": 4}, {"ratio": 2}]))
    product_id = client.wait(job["id"], timeout=180, poll=0.2)["product_id"]
    common = {"filter": {"ratio": 4}, "fit": {"resamples": 4, "seed": 11}}
    doc = client.submit({"input": {"dataset_id": product_id}, **common})
    final = client.wait(doc["id"], timeout=180, poll=0.2)
    model = client.closure_model(final["model_id"])
    direct = pipeline.discover(parse_spec({"input": {"path": str(data["small"])}, **common}))
    assert model.names == direct.names
    np.testing.assert_array_equal(model.coefficients, direct.coefficients)
    assert model.provenance["product_id"] == product_id
    # a filter the product was not made with is refused at submission
    from closure.client import ServiceError

    with pytest.raises(ServiceError, match="not the job's gaussian filter, ratio 2") as err:
        client.submit({"input": {"dataset_id": product_id}, "filter": {"ratio": 2}})
    assert err.value.status == 400
    with pytest.raises(ServiceError, match="no product with id 'pr-nope'") as err:
        client.submit({"input": {"dataset_id": "pr-nope"}})
    assert err.value.status == 404


# --------------------------------------------------------------------------- sweeps

def test_sweep_user_errors_are_4xx(api, data):
    base = {"input": {"path": str(data["small"])}, "fit": {"resamples": 2}}
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": [4, 200]})
    assert r.status_code == 400, r.text
    assert r.json()["detail"].startswith("widths[1] (200): ")
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": []})
    assert r.status_code == 422 and "widths: " in r.json()["detail"]
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": [4, 8],
                                "ratios": [1, 2, 3]})
    assert r.status_code == 422 and "3 ratios for 2 widths" in r.json()["detail"]
    assert api.get("/sweeps/sw-nope").status_code == 404
    assert "no sweep with id 'sw-nope'" in api.get("/sweeps/sw-nope").json()["detail"]
    doc = api.get("/openapi.json").json()
    assert "/sweeps/{sweep_id}" in doc["paths"] and "SweepSpec" in doc["components"]["schemas"]
    assert not any((api.store.root / "jobs").iterdir())


def _stored_sweep(store: Store, path, widths, ratios) -> dict:
    """A sweep stored as worker.sweeps stores one: each width's model from
    closure.pipeline.discover, then the SweepResult of the stored models with model_ids."""
    from closure import pipeline
    from closure.io import sha256_file
    from closure.spec import parse_sweep_spec
    from closure.store import fingerprint_hash
    from closure.sweep import SweepResult, _entry, sweep_specs

    spec = parse_sweep_spec({"kind": "sweep", "widths": widths, "ratios": ratios,
                             "discovery": {"input": {"path": str(path)},
                                           "fit": {"resamples": 2, "seed": 5}}})
    sha = sha256_file(path)
    specs = sweep_specs(spec.discovery, spec.widths, spec.ratios)
    ids = []
    for s in specs:
        row = store.add_model(model=pipeline.discover(s), fingerprint=fingerprint_hash(s, sha),
                              dataset_sha256=sha, spec=s, plan=pipeline.check(s), job_id=None)
        ids.append(row["id"])
    result = SweepResult(spec.discovery.model_dump(mode="json"),
                         [_entry(store.load_model(m), s.filter.ratio)
                          for m, s in zip(ids, specs, strict=True)]).to_dict()
    result["model_ids"] = ids
    return store.add_sweep(result=result, fingerprint=fingerprint_hash(spec, sha), job_id=None)


def test_sweep_report_is_built_once_and_served(api, data):
    """GET /sweeps/{id}/report: the first width's model report with the sweep figures
    (scaled coefficients and held-out scores against the filter width), cached in the
    sweep's folder; 404 for an unknown sweep, 403 for a path, in the OpenAPI document."""
    sweep = _stored_sweep(api.store, data["small"], [4, 6], [2])
    sid = sweep["id"]
    r = api.get(f"/sweeps/{sid}/report", follow_redirects=False)
    assert r.status_code == 307 and r.headers["location"].endswith(f"/sweeps/{sid}/report/")
    listing = api.get(f"/sweeps/{sid}/report", params={"format": "json"}).json()
    assert {"index.html", "sweep_coefficients.png", "sweep_scores.png"} <= set(
        listing["files"]), listing
    folder = api.store.sweep_dir(sid) / "report"
    built = (folder / "index.html").stat().st_mtime_ns
    page = api.get(f"/sweeps/{sid}/report/")
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    html = page.text
    assert "Filter-width sweep" in html and 'src="sweep_coefficients.png"' in html
    assert "A priori skill does not guarantee a stable or accurate coarse simulation" in html
    png = api.get(f"/sweeps/{sid}/report/sweep_coefficients.png")
    assert png.status_code == 200 and png.content[:8] == b"\x89PNG\r\n\x1a\n"  # PNG spec
    assert (folder / "index.html").stat().st_mtime_ns == built  # cached, not rebuilt
    assert api.get(f"/sweeps/{sid}/report/nothere.png").status_code == 404
    assert api.get(f"/sweeps/{sid}/report/..%2Fsweep.json").status_code in (403, 404)
    assert api.get(f"/sweeps/{sid}/report/.source.json").status_code == 403
    for url in ("/sweeps/sw-nope/report", "/sweeps/sw-nope/report/",
                "/sweeps/sw-nope/report/index.html"):
        r = api.get(url, params={"format": "json"})
        assert r.status_code == 404, (url, r.text)
        assert "no sweep with id 'sw-nope'" in r.json()["detail"]
    paths = api.get("/openapi.json").json()["paths"]
    assert "404" in paths["/sweeps/{sweep_id}/report"]["get"]["responses"]
    assert {"403", "404"} <= set(paths["/sweeps/{sweep_id}/report/{filename}"]["get"][
        "responses"])
    # the client writes the folder
    from closure.client import Client

    c = Client("http://testserver")
    c._http = api
    out = c.download_sweep_report(sid, data["root"] / "sweep-report")
    assert (out / "sweep_coefficients.png").read_bytes() == png.content


def test_sweep_over_several_filter_kinds_spec_and_errors(api, data):
    """``filters``: one task spec per (kind, width), kind by kind; a one-kind sweep keeps its
    fingerprint; repeated kinds and a kind the widths do not suit are clear 4xx."""
    from closure.spec import parse_sweep_spec
    from worker.sweeps import _specs

    base = {"input": {"path": str(data["small"])}, "fit": {"resamples": 2}}
    one = parse_sweep_spec({"kind": "sweep", "discovery": base, "widths": [4, 6]})
    assert one.kinds == ["gaussian"] and "filters" not in one.fingerprint()
    two = parse_sweep_spec({"kind": "sweep", "discovery": base, "widths": [4, 6],
                            "filters": ["gaussian", "box"]})
    specs = _specs(two)
    assert [(s.filter.kind, s.filter.width, s.filter.ratio) for s in specs] == [
        ("gaussian", 4, 2), ("gaussian", 6, 3), ("box", 4, 2), ("box", 6, 3)]
    assert two.fingerprint()["filters"] == ["gaussian", "box"]
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": [4, 6],
                                "filters": ["box", "box"]})
    assert r.status_code == 422 and "filter kinds repeat" in r.json()["detail"], r.text
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": [4, 6],
                                "ratios": [2], "filters": ["gaussian", "block"]})
    assert r.status_code in (400, 422), r.text
    assert r.json()["detail"].startswith("filter block: block averaging has width = ratio")
    r = api.post("/jobs", json={"kind": "sweep", "discovery": base, "widths": [4, 64],
                                "filters": ["gaussian", "box"]})
    assert r.status_code == 400 and r.json()["detail"].startswith(
        "filter gaussian, widths[1] (64): "), r.text
    assert not any((api.store.root / "jobs").iterdir())


@pytest.mark.slow
def test_sweep_over_two_filter_kinds_equals_run_sweep_per_kind(stack, client, data):
    from closure.sweep import run_sweep

    base = {"input": {"path": str(data["small"])}, "fit": {"resamples": 2, "seed": 9}}
    job = client.submit_sweep(base, [4, 6], ratios=[2], filters=["gaussian", "box"])
    doc = client.wait(job["id"], timeout=300, poll=0.2)
    result = client.sweep(doc["sweep_id"])
    assert result["filters"] == ["gaussian", "box"]
    assert [p["filter_kind"] for p in result["by_filter"]] == ["gaussian", "box"]
    assert result["entries"] == result["by_filter"][0]["entries"]  # the first kind on top
    for part in result["by_filter"]:
        direct = run_sweep({**base, "filter": {"kind": part["filter_kind"]}}, [4, 6],
                           [2]).to_dict()
        assert len(part["model_ids"]) == 2 and part["spec"]["filter"]["kind"] == \
            part["filter_kind"]
        for got, want in zip(part["entries"], direct["entries"], strict=True):
            assert got["filter"]["kind"] == part["filter_kind"]
            for name, t in want["terms"].items():
                a, b = got["terms"][name]["coefficient_scaled"], t["coefficient_scaled"]
                assert abs(a - b) <= 1e-10 * max(1.0, abs(b)), (name, a, b)


@pytest.mark.slow
def test_sweep_runs_across_two_workers_and_equals_run_sweep(stack, client, data):
    from closure.sweep import run_sweep
    from worker import queue as q

    base = {"input": {"path": str(data["small"])}, "fit": {"resamples": 4, "seed": 21}}
    job = client.submit_sweep(base, [4, 6, 8], ratios=[2])
    doc = client.wait(job["id"], timeout=300, poll=0.2)
    assert doc["state"] == "succeeded" and doc["sweep_id"].startswith("sw-")
    result = client.sweep(doc["sweep_id"])
    direct = run_sweep(base, [4, 6, 8], [2]).to_dict()
    assert [e["delta"] for e in result["entries"]] == [e["delta"] for e in direct["entries"]]
    for got, want in zip(result["entries"], direct["entries"], strict=True):
        assert got["terms"].keys() == want["terms"].keys()
        for name, t in want["terms"].items():
            a, b = got["terms"][name]["coefficient_scaled"], t["coefficient_scaled"]
            assert abs(a - b) <= 1e-10 * max(1.0, abs(b)), (name, a, b)
    # every width's model is stored like a discovery job's
    for model_id in result["model_ids"]:
        assert client.model(model_id)["id"] == model_id
    conn = q.connect(stack.redis_url)
    names = {q.fetch(conn, q.map_id(job["id"], k)).worker_name for k in range(3)}
    assert len(names) == 2, names
    again = client.submit_sweep(base, [4, 6, 8], ratios=[2])
    assert again["reused"] and again["sweep_id"] == doc["sweep_id"]
    assert doc["sweep_id"] in [s["id"] for s in client.sweeps()]
    # its report, built by the API from the stored sweep: the sweep figures
    assert {"index.html", "sweep_coefficients.png", "sweep_scores.png"} <= set(
        client.sweep_report_files(doc["sweep_id"]))
    assert b"Filter-width sweep" in client.sweep_report_file(doc["sweep_id"], "index.html")


@pytest.mark.slow
def test_a_bad_snapshot_fails_the_job_with_its_message(stack, client, data):
    from closure.client import JobFailedError
    from closure.io import write_netcdf

    with xr.open_dataset(data["small"]) as ds:
        ds = ds.load()
    ds["u"][4, 0, 0] = float("inf")  # found when snapshot 4 is read, in a map task (NaN
    # would be land)
    broken = write_netcdf(ds, data["root"] / "broken.nc")
    job = client.submit_coarse_grain(cg_spec(broken, [{"ratio": 2}]))
    with pytest.raises(JobFailedError, match=r"snapshot 4: .*'u' has 1 Inf") as err:
        client.wait(job["id"], timeout=180, poll=0.2)
    assert err.value.status_doc["state"] == "failed"
    assert err.value.status_doc["product_id"] is None
    assert job["id"] not in {p["job_id"] for p in client.products()}
