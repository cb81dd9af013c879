"""End to end over HTTP: a local stack (our own Redis on a unix socket, uvicorn, two rq
worker processes) runs discovery jobs; the queued model equals in-process
pipeline.discover. Workers are killed (the work-horse alone, and worker with work-horse) and
Redis is stopped and restarted mid-job: every job still completes with the same model.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from service_support import child_pids

from closure import pipeline
from closure.client import Client, JobFailedError, ServiceError
from closure.io import sha256_file
from closure.localstack import LocalStack, WorkerOptions
from closure.spec import parse_spec
from worker import queue as q

pytestmark = pytest.mark.slow

N_SNAPSHOTS = 8


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from closure.synth import turb2d, write

    root = tmp_path_factory.mktemp("data")
    path = write(turb2d(n=64, snapshots=N_SNAPSHOTS, spinup=1.0, interval=0.2),
                 root / "turb2d.nc")
    return path


@pytest.fixture(scope="module")
def stack(tmp_path_factory, data):
    st = LocalStack(tmp_path_factory.mktemp("stack"), port=0, workers=2,
                    data_roots=[data.parent],
                    # fast loss detection: a task is given up 1 + 3 s after its last
                    # heartbeat, and the registries are swept every 2 s
                    worker_options=WorkerOptions(monitoring_interval=1, abandon_grace=3,
                                                 maintenance_interval=2))
    st.start()
    yield st
    st.stop()


@pytest.fixture
def client(stack):
    stack.respawn_dead_workers()  # a test before may have killed one
    with Client(stack.server_url) as c:
        yield c


def spec_dict(path, seed: int) -> dict:
    """A job spec; distinct seeds make distinct jobs (no reuse between tests)."""
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 4, "seed": seed}}


def assert_same_model(stored, spec: dict) -> None:
    direct = pipeline.discover(parse_spec(spec))
    assert stored.names == direct.names
    a, b = np.asarray(stored.coefficients), np.asarray(direct.coefficients)
    assert np.all(np.abs(a - b) <= 1e-10 * np.maximum(1.0, np.abs(b))), (a, b)


def task_ids(conn, job_id: str) -> list[str]:
    maps = [q.map_id(job_id, k) for k in range(len(q.map_tasks(conn, job_id)))]
    assert maps
    return [q.plan_id(job_id), *maps, q.reduce_id(job_id)]


def retried_tasks(conn, job_id: str) -> list[str]:
    """Tasks of a job that needed more than one attempt."""
    out = []
    for rq_id in task_ids(conn, job_id):
        job = q.fetch(conn, rq_id)
        if job is not None and job.retries_left is not None and job.retries_left < q.TASK_RETRIES:
            out.append(rq_id)
    return out


def horses(stack) -> list[tuple[int, int]]:
    """(worker pid, work-horse pid) pairs: a horse is the worker's child that leads its own
    process group (rq's scheduler child stays in the worker's group)."""
    out = []
    for proc in stack.worker_procs:
        for child in child_pids(proc.pid):
            try:
                if os.getpgid(child) == child:
                    out.append((proc.pid, child))
            except ProcessLookupError:
                continue
    return out


def kill_mid_job(stack, client, job_id: str, with_worker: bool) -> str:
    """SIGKILL a work-horse busy with this job (and its worker, when ``with_worker``) as soon
    as one is running; returns the phase it was killed in."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        running = horses(stack)
        if running:
            worker_pid, horse_pid = running[0]
            phase = client.status(job_id)["progress"]["phase"]
            if with_worker:
                os.killpg(worker_pid, signal.SIGKILL)  # the worker and its scheduler child
            try:
                os.kill(horse_pid, signal.SIGKILL)
            except ProcessLookupError:
                if not with_worker:
                    continue  # it had just finished: try the next task
            return phase
        time.sleep(0.005)
    raise AssertionError("no work-horse was seen running")


def wait_ok(client, job_id: str, timeout: float = 120) -> dict:
    doc = client.wait(job_id, timeout=timeout, poll=0.2)
    assert doc["state"] == "succeeded" and doc["model_id"]
    return doc


# --------------------------------------------------------------------------- the job

def test_queued_job_over_http_equals_discover(stack, client, data):
    before = sha256_file(data)
    spec = spec_dict(data, seed=1)
    job = client.submit(spec, name="e2e")
    assert job["state"] == "queued"
    seen = []
    doc = client.wait(job["id"], progress=lambda s: seen.append(s["progress"]), poll=0.1,
                      timeout=120)
    assert doc["state"] == "succeeded"
    assert doc["progress"] == {**doc["progress"], "phase": "done",
                               "snapshots_done": N_SNAPSHOTS, "snapshots_total": N_SNAPSHOTS}
    assert any(p["phase"] == "map" for p in seen)
    model = client.closure_model(doc["model_id"])
    assert_same_model(model, spec)
    # two workers shared the tasks
    conn = q.connect(stack.redis_url)
    names = {q.fetch(conn, t).worker_name for t in task_ids(conn, job["id"])}
    assert len(names) == 2, names
    # an identical submission returns the same job and model
    again = client.submit(spec)
    assert again["id"] == job["id"] and again["reused"] and again["model_id"] == doc["model_id"]
    # catalog queries and exports
    rows = client.models(dataset=before, target="stress", filter="gaussian")
    assert doc["model_id"] in [r["id"] for r in rows]
    assert client.models(filter="box") == []
    assert client.models(min_r2=2.0) == []
    for lang, marker in (("json", '"terms"'), ("python", "def "), ("c", "void "),
                         ("fortran", "subroutine")):
        assert marker in client.export(doc["model_id"], lang).lower()
    shown = client.model(doc["model_id"])
    assert "a priori" in shown["summary"].lower()
    assert sha256_file(data) == before


def test_one_file_per_snapshot_by_glob_over_http_equals_discover(stack, client, data):
    # the usual DNS layout: one file per snapshot, named by a glob under the data root; the
    # queued model equals in-process discovery of the same glob, and the dataset's checksum
    # is the combined one of closure.io.input_sha256
    import xarray as xr

    from closure.io import input_files, input_sha256

    folder = data.parent / "per_snapshot"
    folder.mkdir(exist_ok=True)
    with xr.open_dataset(data) as ds:
        for i in range(ds.sizes["time"]):
            ds.isel(time=slice(i, i + 1)).to_netcdf(folder / f"snap_{i:02d}.nc")
    pattern = str(folder / "snap_*.nc")
    spec = {**spec_dict(pattern, seed=7)}
    job = client.submit(spec)
    doc = client.wait(job["id"], poll=0.1, timeout=120)
    assert doc["state"] == "succeeded", doc
    model = client.closure_model(doc["model_id"])
    assert_same_model(model, spec)
    assert model.provenance["sha256"] == input_sha256(input_files(pattern))
    assert len(model.provenance["inputs"]) == N_SNAPSHOTS


def test_cli_client_commands(stack, data, tmp_path):
    env = {**os.environ, "CLOSURE_SERVER": stack.server_url}
    cli = [sys.executable, "-c", "import sys; from closure.cli import main; "
           "sys.exit(main(sys.argv[1:]))"]

    def run(*args, check=True):
        r = subprocess.run([*cli, *args], env=env, capture_output=True, text=True, timeout=180)
        if check:
            assert r.returncode == 0, (args, r.stdout, r.stderr)
        return r

    out = run("submit", str(data), "--ratio", "4", "--resamples", "4", "--seed", "2",
              "--filter", "box").stdout
    job_id = out.strip().splitlines()[-1]
    assert job_id.startswith("j-")
    model_json = tmp_path / "model.json"
    r = run("wait", job_id, "-o", str(model_json), "-q")
    assert "succeeded" in r.stdout and model_json.exists()
    # the full model file, as `closure discover` writes it (apply, report and les read it)
    from closure.model import ClosureModel

    assert ClosureModel.load(model_json).filter["kind"] == "box"
    assert '"state": "succeeded"' in run("status", job_id, "--json").stdout
    listing = run("models", "--filter", "box").stdout
    model_id = [ln.split()[0] for ln in listing.splitlines() if ln.startswith("m-")][0]
    assert "Closure model" in run("show", model_id).stdout
    assert "subroutine" in run("export", model_id, "--lang", "fortran").stdout.lower()
    # an option the data cannot take is refused at submission: status 2, nothing queued
    r = run("submit", str(data), "--snapshots", "3", "--seed", "3", check=False)
    assert r.returncode == 2 and "at least 2" in r.stderr
    # a job that fails in a worker (an Inf in a later snapshot, found when it is read; NaN
    # would be land): wait exits 1 with the error
    import xarray as xr

    with xr.open_dataset(data) as ds:
        ds = ds.load()
    ds["u"][-1, 0, 0] = float("inf")
    from closure.io import write_netcdf

    broken = write_netcdf(ds, data.parent / "broken.nc")
    out = run("submit", str(broken), "--seed", "3").stdout
    bad = out.strip().splitlines()[-1]
    r = run("wait", bad, "-q", check=False)
    assert r.returncode == 1 and "Inf" in r.stderr
    # a user error in the options: status 2 and the field named
    r = run("submit", str(data), "--filter", "tophat", check=False)
    assert r.returncode == 2 and "filter.kind" in r.stderr


def test_bad_inputs_over_http(stack, client, data, tmp_path):
    junk = tmp_path / "junk.nc"
    junk.write_bytes(b"definitely not netCDF\n" * 50)
    with pytest.raises(ServiceError) as err:
        client.upload(junk)
    assert err.value.status == 422 and "not a netCDF file" in str(err.value)
    outside = tmp_path / "outside.nc"
    outside.write_bytes(data.read_bytes())
    with pytest.raises(ServiceError) as err:
        client.submit(spec_dict(outside, seed=4), upload=False)
    assert err.value.status == 403 and "outside the data roots" in str(err.value)
    # the default for a local file outside the roots: upload it, then submit by dataset id
    job = client.submit(spec_dict(outside, seed=4))
    assert job["dataset_id"].startswith("d-") and job["state"] in ("queued", "running")
    client.cancel(job["id"])
    with pytest.raises(ServiceError) as err:
        client.status("j-doesnotexist")
    assert err.value.status == 404


def test_cancel_running_job(stack, client, data):
    job = client.submit(spec_dict(data, seed=5))
    deadline = time.monotonic() + 30
    while client.status(job["id"])["progress"]["phase"] == "queued":
        assert time.monotonic() < deadline
        time.sleep(0.02)
    doc = client.cancel(job["id"])
    assert doc["state"] == "canceled"
    with pytest.raises(JobFailedError, match="canceled"):
        client.wait(job["id"], timeout=30)
    time.sleep(1.0)  # tasks already running finish or stop; none may revive the job
    doc = client.status(job["id"])
    assert doc["state"] == "canceled" and doc["model_id"] is None


# --------------------------------------------------------------------------- failures

def test_killed_work_horse_is_retried_and_job_completes(stack, client, data):
    spec = spec_dict(data, seed=6)
    job = client.submit(spec)
    phase = kill_mid_job(stack, client, job["id"], with_worker=False)
    doc = wait_ok(client, job["id"])
    assert_same_model(client.closure_model(doc["model_id"]), spec)
    conn = q.connect(stack.redis_url)
    assert retried_tasks(conn, job["id"]), f"no task was retried (killed in {phase})"


def test_killed_worker_and_horse_task_is_recovered(stack, client, data):
    spec = spec_dict(data, seed=7)
    job = client.submit(spec)
    phase = kill_mid_job(stack, client, job["id"], with_worker=True)
    deadline = time.monotonic() + 10
    while not any(p.poll() is not None for p in stack.worker_procs):
        assert time.monotonic() < deadline, "the killed worker is still running"
        time.sleep(0.05)
    # the lost task stays 'started' until its heartbeat lapses (1 + 3 s here), then the
    # surviving worker's sweep re-queues it
    doc = wait_ok(client, job["id"], timeout=120)
    assert_same_model(client.closure_model(doc["model_id"]), spec)
    conn = q.connect(stack.redis_url)
    assert retried_tasks(conn, job["id"]), f"no task was retried (killed in {phase})"


def test_redis_restart_mid_job_loses_nothing(stack, client, data):
    earlier = client.jobs(state="succeeded")
    assert earlier, "runs after the tests above"
    spec = spec_dict(data, seed=8)
    job = client.submit(spec)
    deadline = time.monotonic() + 30
    while client.status(job["id"])["progress"]["phase"] in ("queued", "plan"):
        assert time.monotonic() < deadline
        time.sleep(0.02)
    assert stack.redis.stop() == 0  # SIGTERM: flushes the append-only file, exits 0
    with pytest.raises(ServiceError) as err:
        client.status(job["id"])
    assert err.value.status == 503 and "Redis" in str(err.value)
    time.sleep(1.5)
    stack.redis.start()  # same folder: the append-only file brings every key back
    doc = wait_ok(client, job["id"])
    assert_same_model(client.closure_model(doc["model_id"]), spec)
    # the earlier jobs' live state survived the restart
    for row in earlier:
        status = client.status(row["id"])
        assert status["state"] == "succeeded"
        if not status["reused"]:
            p = status["progress"]
            assert p["snapshots_done"] == p["snapshots_total"] == N_SNAPSHOTS
    # both workers are still the same processes, and both serve the queue again
    assert all(p.poll() is None for p in stack.worker_procs)
    deadline = time.monotonic() + 30
    while client.health()["workers"] < 2:
        assert time.monotonic() < deadline, client.health()
        time.sleep(0.2)
    job2 = client.submit(spec_dict(data, seed=9))
    wait_ok(client, job2["id"])
