"""Compressible discovery on the queue: a real Redis of our own and burst workers in fresh
processes (as tests/test_worker.py), and `closure submit --library compressible_classic`
against a local stack (as tests/test_service_e2e.py). The queued model equals in-process
pipeline.discover."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from service_support import redis_server  # noqa: F401

from closure import pipeline
from closure.io import sha256_file
from closure.spec import parse_spec
from closure.store import Store, fingerprint_hash, new_job_id
from worker import queue as q
from worker import status as jobs_status
from worker import tasks

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from closure.synth import compressible, write

    root = tmp_path_factory.mktemp("compressible_data")
    path = write(compressible(n=32, dims=2, snapshots=5, mach=0.4, seed=2), root / "c2.nc")
    # the same data with pressure only and no gas-constant attribute: the spec gives R
    with xr.open_dataset(path) as ds:
        part = ds.drop_vars("T").load()
    del part.attrs["gas_constant"]
    part.to_netcdf(root / "c2_no_t.nc")
    return path, root / "c2_no_t.nc"


@pytest.fixture
def env(tmp_path, redis_server):  # noqa: F811
    conn = q.connect(redis_server.url)
    store = Store(tmp_path / "store")
    tasks.configure(str(store.root))
    yield conn, store
    tasks.configure("")
    conn.close()


def spec_dict(path, **extra) -> dict:
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 2},
            "library": "compressible_classic", "fit": {"resamples": 4}, **extra}


def submit(conn, store, spec: dict) -> str:
    """What POST /jobs does once the input is resolved: a catalog row and the plan task."""
    parsed = parse_spec(spec)
    sha = sha256_file(parsed.input.path)
    job_id = new_job_id()
    store.create_job(job_id=job_id, spec=parsed.model_dump(mode="json"),
                     fingerprint=fingerprint_hash(parsed, sha), input_sha256=sha)
    q.enqueue_plan(conn, job_id)
    return job_id


def run_burst(conn, store) -> None:
    """A worker in burst mode in a fresh process (not a fork of the test process)."""
    url = conn.connection_pool.connection_kwargs.get("path")
    code = "import sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
    r = subprocess.run([sys.executable, "-c", code, "worker", "--burst", "--redis",
                        f"unix://{url}", "--store", str(store.root), "--log-level", "WARNING"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-3000:]


def assert_same_model(stored, direct) -> None:
    assert stored.names == direct.names
    a, b = np.asarray(stored.coefficients), np.asarray(direct.coefficients)
    assert np.all(np.abs(a - b) <= 1e-10 * np.maximum(1.0, np.abs(b)))
    assert list(stored.active) == list(direct.active)


def test_queued_compressible_jobs_equal_in_process_discover(env, data):
    conn, store = env
    full, no_t = data
    specs = [spec_dict(full, target="heat_flux"),
             spec_dict(full, target="stress", gas={"gamma": 1.3}),
             # one of p and T: the map tasks derive T from p = rho R T with the spec's R
             spec_dict(no_t, target="heat_flux", gas={"gas_constant": 287.05})]
    jobs = [submit(conn, store, s) for s in specs]
    run_burst(conn, store)
    for job_id, spec in zip(jobs, specs, strict=True):
        doc = jobs_status.status(store, conn, job_id)
        assert doc["state"] == "succeeded", doc
        stored = store.load_model(doc["model_id"])
        direct = pipeline.discover(parse_spec(spec))
        assert_same_model(stored, direct)
        assert stored.provenance["gas"] == direct.provenance["gas"]
        assert stored.settings.get("equivalent_terms") == direct.settings.get("equivalent_terms")
    gas = store.load_model(jobs_status.status(store, conn, jobs[1])["model_id"]).provenance["gas"]
    assert gas["gamma"] == 1.3 and gas["gas_constant"] == 287.05


def test_cli_submit_with_a_compressible_library(tmp_path_factory, data, tmp_path):
    from closure.localstack import LocalStack
    from closure.model import ClosureModel

    full, _ = data
    stack = LocalStack(tmp_path_factory.mktemp("stack"), port=0, workers=1,
                       data_roots=[full.parent])
    stack.start()
    try:
        env = {**os.environ, "CLOSURE_SERVER": stack.server_url}
        cli = [sys.executable, "-c", "import sys; from closure.cli import main; "
               "sys.exit(main(sys.argv[1:]))"]

        def run(*args):
            r = subprocess.run([*cli, *args], env=env, capture_output=True, text=True,
                               timeout=300)
            assert r.returncode == 0, (args, r.stdout, r.stderr)
            return r.stdout

        job_id = run("submit", str(full), "--library", "compressible_classic", "--ratio", "2",
                     "--resamples", "4", "--target", "heat_flux").strip().splitlines()[-1]
        model_json = tmp_path / "model.json"
        assert "succeeded" in run("wait", job_id, "-o", str(model_json), "-q")
    finally:
        stack.stop()
    model = ClosureModel.load(model_json)
    direct = pipeline.discover(parse_spec(spec_dict(full, target="heat_flux")))
    assert_same_model(model, direct)
    assert model.provenance["gas"]["gas_constant"] == 287.05
