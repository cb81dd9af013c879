"""worker/: the rq glue over closure.pipeline, run by a real (forking) rq worker in burst mode
on a Redis of our own. The model a queued job stores equals in-process pipeline.discover.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import zlib

import numpy as np
import pytest
from rq.serializers import JSONSerializer
from service_support import redis_server, turb2d_file  # noqa: F401

from closure import pipeline
from closure.io import sha256_file
from closure.spec import parse_spec
from closure.store import Store, fingerprint_hash, new_job_id
from worker import queue as q
from worker import status as jobs_status
from worker import tasks
from worker.main import ClosureWorker

# each test runs a worker process over a real Redis
pytestmark = pytest.mark.slow


@pytest.fixture
def env(tmp_path, redis_server):  # noqa: F811
    conn = q.connect(redis_server.url)
    store = Store(tmp_path / "store")
    tasks.configure(str(store.root))
    yield conn, store
    tasks.configure("")
    conn.close()


def submit(conn, store, spec_dict) -> str:
    """What POST /jobs does once the input is resolved: a catalog row and the plan task."""
    spec = parse_spec(spec_dict)
    sha = sha256_file(spec.input.path)
    job_id = new_job_id()
    store.create_job(job_id=job_id, spec=spec.model_dump(mode="json"),
                     fingerprint=fingerprint_hash(spec, sha), input_sha256=sha)
    q.enqueue_plan(conn, job_id)
    return job_id


def run_burst(conn, store, max_jobs=None, patch: str = "", db: list[str] = ()) -> None:
    """Run a worker in burst mode in a fresh process (``closure worker --burst``), after the
    Python in ``patch`` (e.g. replacing a pipeline function to make it fail). A fresh process,
    not a fork of the test process: forking a process whose thread pools have run is unsafe.
    """
    url = conn.connection_pool.connection_kwargs.get("path")
    code = patch + "\nimport sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
    args = [sys.executable, "-c", code, "worker", "--burst", "--redis", f"unix://{url}",
            "--store", str(store.root), "--log-level", "WARNING", *db]
    if max_jobs is not None:
        args += ["--max-jobs", str(max_jobs)]
    r = subprocess.run(args, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr[-3000:]


def spec_dict(path, **extra):
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 4}, **extra}


def assert_same_model(a, b):
    assert a.names == b.names
    ca, cb = np.asarray(a.coefficients), np.asarray(b.coefficients)
    assert np.all(np.abs(ca - cb) <= 1e-10 * np.maximum(1.0, np.abs(cb)))
    assert list(a.active) == list(b.active)


def test_split_snapshots_into_map_tasks(monkeypatch):
    monkeypatch.delenv("CLOSURE_SNAPSHOTS_PER_TASK", raising=False)
    idx = list(range(10))
    assert q.split_snapshots(idx, workers=1) == [idx[:5], idx[5:]]
    assert q.split_snapshots(idx, workers=2) == [[0, 1, 2], [3, 4, 5], [6, 7, 8], [9]]
    assert q.split_snapshots(idx, workers=0) == [idx[:5], idx[5:]]  # none registered yet
    assert q.split_snapshots(idx[:3], workers=8) == [[0], [1], [2]]
    assert q.split_snapshots(idx, workers=2, per_task=1) == [[i] for i in idx]
    monkeypatch.setenv("CLOSURE_SNAPSHOTS_PER_TASK", "4")
    assert q.split_snapshots(idx, workers=2) == [idx[:4], idx[4:8], idx[8:]]


def test_heartbeat_ttl_is_interval_plus_grace(env):
    conn, _ = env
    w = ClosureWorker([q.QUEUE_NAME], connection=conn, serializer=JSONSerializer,
                      job_monitoring_interval=2)
    w.abandon_grace_s = 3

    class FakeJob:
        timeout = 3600

    assert w.get_heartbeat_ttl(FakeJob()) == 5
    FakeJob.timeout = 1  # a task about to time out: no longer than its timeout allows
    assert w.get_heartbeat_ttl(FakeJob()) == 4


def test_queued_job_equals_in_process_discover(env, turb2d_file):  # noqa: F811
    conn, store = env
    before = sha256_file(turb2d_file)
    job_id = submit(conn, store, spec_dict(turb2d_file))
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "succeeded", doc
    assert doc["progress"]["snapshots_done"] == doc["progress"]["snapshots_total"] == 6
    stored = store.load_model(doc["model_id"])
    direct = pipeline.discover(parse_spec(spec_dict(turb2d_file)))
    assert_same_model(stored, direct)
    # the model folder is complete and the job's work area is gone
    folder = store.model_dir(doc["model_id"])
    assert {"model.json", "spec.json", "plan.json", "diagnostics.json", "summary.txt",
            "stats"} <= {p.name for p in folder.iterdir()}
    assert len(list((folder / "stats").glob("*.npz"))) == 6
    assert not store.job_dir(job_id).exists()
    row = store.get_model(doc["model_id"])
    assert row["dataset_sha256"] == before and row["target"] == "stress"
    assert row["test_r2"] == pytest.approx(direct.scores["test"]["r2"], rel=1e-12)
    assert store.find_models(dataset=before[:12], min_r2=row["test_r2"])[0]["id"] == row["id"]
    assert store.find_models(filter_kind="box") == []
    # every task on the queue was JSON: inspect one stored payload
    raw = conn.hget(f"rq:job:{q.map_id(job_id, 0)}", "data")
    assert json.loads(zlib.decompress(raw))[2] == [job_id, q.map_tasks(conn, job_id)[0]]
    assert sha256_file(turb2d_file) == before


def test_map_task_rerun_overwrites_its_stats_atomically(env, turb2d_file):  # noqa: F811
    conn, store = env
    job_id = submit(conn, store, spec_dict(turb2d_file))
    run_burst(conn, store, max_jobs=2)  # the plan and the first map task
    groups = q.map_tasks(conn, job_id)
    assert len(groups) == 2 and sorted(sum(groups, [])) == list(range(6))  # 1 worker: 2 tasks
    done = sorted(store.job_dir(job_id).glob("stats/*.npz"))
    assert [int(p.stem) for p in done] == groups[0]
    from closure.stats import SufficientStats

    first = [SufficientStats.load(p) for p in done]
    inodes = [p.stat().st_ino for p in done]
    # run the same map task again (as a retry would)
    q.get_queue(conn).enqueue_call("worker.tasks.map_task", args=(job_id, groups[0]),
                                   job_id=q.map_id(job_id, 0), at_front=True)
    run_burst(conn, store, max_jobs=1)
    for path, inode, stats in zip(done, inodes, first, strict=True):
        assert path.stat().st_ino != inode  # a new file renamed into place ...
        assert SufficientStats.load(path).equals(stats)  # ... with the same statistics
    assert not [p for p in done[0].parent.iterdir() if p.name.startswith(".")]
    run_burst(conn, store)
    assert jobs_status.status(store, conn, job_id)["state"] == "succeeded"


def test_identical_job_in_the_plan_reuses_the_model(env, turb2d_file):  # noqa: F811
    conn, store = env
    first = submit(conn, store, spec_dict(turb2d_file))
    run_burst(conn, store)
    second = submit(conn, store, spec_dict(turb2d_file))  # bypasses the API's check
    run_burst(conn, store)
    a, b = jobs_status.status(store, conn, first), jobs_status.status(store, conn, second)
    assert b["state"] == "succeeded" and b["reused"] and b["model_id"] == a["model_id"]
    assert len(store.find_models()) == 1


def test_user_error_in_plan_fails_the_job_with_its_message(env, turb2d_file):  # noqa: F811
    conn, store = env
    spec = spec_dict(turb2d_file)
    spec["input"]["snapshots"] = [3]
    job_id = submit(conn, store, spec)
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "at least 2" in doc["error"]
    assert doc["progress"]["phase"] == "failed"
    assert store.find_models() == [] and not any((store.root / "models").iterdir())


def test_input_changed_after_planning_fails_with_the_snapshots(env, turb2d_file, tmp_path):  # noqa: F811
    conn, store = env
    copy = tmp_path / "copy.nc"
    copy.write_bytes(turb2d_file.read_bytes())
    job_id = submit(conn, store, spec_dict(copy))
    run_burst(conn, store, max_jobs=1)  # plan only
    import os

    st = copy.stat()
    os.utime(copy, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed"
    assert "snapshot 0:" in doc["error"] and "changed since the job was planned" in doc["error"]
    assert store.find_models() == []


def test_cancel_stops_pending_tasks(env, turb2d_file):  # noqa: F811
    conn, store = env
    job_id = submit(conn, store, spec_dict(turb2d_file))
    run_burst(conn, store, max_jobs=2)  # plan and one map
    assert q.cancel(store, conn, job_id)
    assert not q.cancel(store, conn, job_id)
    states = [q.fetch(conn, q.map_id(job_id, k)).get_status()
              for k in range(len(q.map_tasks(conn, job_id)))]
    assert states == ["finished", "canceled"]
    assert q.fetch(conn, q.reduce_id(job_id)).get_status() == "canceled"
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "canceled" and doc["model_id"] is None
    assert store.find_models() == []


BROKEN_PLAN = """
import closure.pipeline as p
def broken(spec):
    raise RuntimeError("disk on fire")
p.plan = broken
"""


def test_task_that_keeps_failing_fails_the_job(env, turb2d_file):  # noqa: F811
    conn, store = env

    job_id = submit(conn, store, spec_dict(turb2d_file))
    run_burst(conn, store, patch=BROKEN_PLAN)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "RuntimeError: disk on fire" in doc["error"]


def test_status_reconciles_a_failure_rq_recorded_without_callback(env, turb2d_file):  # noqa: F811
    conn, store = env
    job_id = submit(conn, store, spec_dict(turb2d_file))
    # a killed work-horse on its last attempt runs no failure callback: model that here
    run_burst(conn, store, patch=BROKEN_PLAN
              + "\nimport worker.tasks as t; t.on_task_failure = lambda *a, **k: None")
    assert store.get_job(job_id)["state"] == "running"
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed"
    assert doc["error"].startswith("planning failed after")
    assert "RuntimeError: disk on fire" in doc["error"]


@pytest.mark.postgres
def test_queued_job_with_a_postgresql_catalog(tmp_path, redis_server, turb2d_file):  # noqa: F811
    from service_support import POSTGRES_URL, postgres_reason

    reason = postgres_reason()
    if reason:
        pytest.skip(reason)
    schema = f"closure_test_{os.urandom(6).hex()}"
    store = Store(tmp_path / "store", POSTGRES_URL, schema=schema)
    conn = q.connect(redis_server.url)
    try:
        job_id = submit(conn, store, spec_dict(turb2d_file, scheme="fd4"))
        run_burst(conn, store, db=["--db", POSTGRES_URL, "--db-schema", schema])
        doc = jobs_status.status(store, conn, job_id)
        assert doc["state"] == "succeeded", doc
        assert_same_model(store.load_model(doc["model_id"]),
                          pipeline.discover(parse_spec(spec_dict(turb2d_file, scheme="fd4"))))
        assert [r["id"] for r in store.find_models(target="stress")] == [doc["model_id"]]
    finally:
        conn.close()
        store.drop_schema()
        store.close()


# --------------------------------------------------------------------------- containment at open

def test_a_symlink_swapped_in_after_submission_is_not_read(env, turb2d_file, tmp_path):  # noqa: F811
    """The file is replaced by a link to a file outside the data root between submission and
    planning; the outside file has the same bytes, so the location check alone refuses it."""
    import shutil

    conn, store = env
    root = tmp_path / "root"
    root.mkdir()
    inside = root / "a.nc"
    shutil.copy(turb2d_file, inside)
    outside = tmp_path / "outside.nc"
    shutil.copy(turb2d_file, outside)
    job_id = submit(conn, store, spec_dict(inside))
    inside.unlink()
    inside.symlink_to(outside)
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "leads elsewhere" in doc["error"], doc
    assert store.find_models() == []


def test_input_changed_after_submission_fails_on_its_checksum(env, turb2d_file, tmp_path):  # noqa: F811
    import shutil

    import netCDF4

    conn, store = env
    copy = tmp_path / "copy.nc"
    shutil.copy(turb2d_file, copy)
    job_id = submit(conn, store, spec_dict(copy))
    with netCDF4.Dataset(copy, "a") as nc:  # still a valid file, other values
        nc["u"][0, 0, 0] = nc["u"][0, 0, 0] + 1.0
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "SHA-256 differs" in doc["error"], doc
    assert store.find_models() == []


def test_worker_data_roots_are_checked_when_a_task_opens_the_input(env, turb2d_file, tmp_path):  # noqa: F811
    conn, store = env
    root = tmp_path / "root"
    root.mkdir()
    job_id = submit(conn, store, spec_dict(turb2d_file))  # outside the worker's root
    run_burst(conn, store, db=["--data-root", str(root)])
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "not under the worker's data roots" in doc["error"]


def test_a_library_file_in_a_queued_spec_is_refused(env, turb2d_file, tmp_path):  # noqa: F811
    conn, store = env
    secret = tmp_path / "secret.yaml"
    secret.write_text("password: hunter2-PRIVATE\n")
    job_id = submit(conn, store, spec_dict(turb2d_file, library=str(secret)))
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed" and "inline" in doc["error"]
    assert "hunter2" not in json.dumps(doc)


# --------------------------------------------------------------------------- one copy at a time

def test_a_lease_keeps_a_second_copy_of_a_task_out(redis_server):  # noqa: F811
    conn = q.connect(redis_server.url)
    first = q.Lease(conn, "j-x-map-0", ttl=3).acquire()
    with pytest.raises(q.LeaseHeld):
        q.Lease(conn, "j-x-map-0", ttl=3).acquire(wait=1.0)
    import time

    time.sleep(4)  # renewed while its holder lives: still held past one ttl
    assert first.held()
    first.release()
    second = q.Lease(conn, "j-x-map-0", ttl=3).acquire(wait=1.0)
    assert second.held() and not first.held()
    # a holder that stops renewing (its process died) loses it after ttl; the new holder
    # then sees itself as the owner and the old one, were it still alive, does not
    second._stop.set()
    time.sleep(3.5)
    third = q.Lease(conn, "j-x-map-0", ttl=3).acquire(wait=1.0)
    assert third.held() and not second.held()
    third.release()
    # the lease of a dead work-horse is dropped by its worker at once
    import os

    os.environ["RQ_WORKER_ID"] = "w1"
    try:
        held = q.Lease(conn, "j-y-plan", ttl=30).acquire()
    finally:
        del os.environ["RQ_WORKER_ID"]
    held._stop.set()
    assert not q.release_dead_lease(conn, "j-y-plan", "w2", os.getpid())
    assert q.release_dead_lease(conn, "j-y-plan", "w1", os.getpid())
    assert not held.held()
    conn.close()


EXTRA = ""  # (a test of the test: "import worker.main as m; m.die_with_parent = print" fails it)


def test_the_work_horse_dies_with_its_worker_killed_by_sigkill(env, turb2d_file, tmp_path):  # noqa: F811
    """kill -9 of the worker: its work-horse (in a process group of its own) must not go on
    running the task beside the copy the queue re-runs."""
    import signal
    import time

    from service_support import child_pids, pid_alive

    conn, store = env
    job_id = submit(conn, store, spec_dict(turb2d_file))
    url = conn.connection_pool.connection_kwargs.get("path")
    patch = "import time, closure.pipeline as p; p.plan = lambda spec: time.sleep(120)" + EXTRA
    code = patch + "\nimport sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
    worker = subprocess.Popen(
        [sys.executable, "-c", code, "worker", "--burst", "--redis", f"unix://{url}",
         "--store", str(store.root), "--log-level", "WARNING"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    horse = None
    try:
        deadline = time.time() + 60
        while horse is None and time.time() < deadline:
            kids = [p for p in child_pids(worker.pid) if os.getpgid(p) == p]
            horse = kids[0] if kids else None
            time.sleep(0.2)
        assert horse is not None, "no work-horse started"
        time.sleep(0.5)
        assert pid_alive(horse)
        os.kill(worker.pid, signal.SIGKILL)
        worker.wait(10)
        deadline = time.time() + 10
        while pid_alive(horse) and time.time() < deadline:
            time.sleep(0.1)
        assert not pid_alive(horse), "the work-horse outlived its worker"
    finally:
        if worker.poll() is None:
            worker.kill()
        if horse is not None and pid_alive(horse):
            os.kill(horse, signal.SIGKILL)  # only when the test failed
    assert job_id


def test_a_starting_worker_sweeps_the_store(env):
    conn, store = env
    leftovers = [store.root / "uploads" / ".upload-dead.nc",
                 store.root / "models" / ".tmp-m-dead-0000" / "model.json",
                 store.job_dir("j-gone") / "stats" / ".000000.npz.abc.tmp"]
    for path in leftovers:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(b"half")
        for p in (path, *path.parents):
            if p == store.root:
                break
            os.utime(p, (0, 0))  # untouched since 1970: a crash long ago
    run_burst(conn, store)
    for path in leftovers:
        assert not path.exists(), path
    assert not (store.root / "jobs" / "j-gone").exists()


# --------------------------------------------------------------------------- slab tasks

#: the first attempt of the rows task 1 of snapshot 0 dies at once (SIGKILL of its own
#: work-horse, as the kernel's OOM killer or a lost machine would); its retry runs normally
KILL_ONE_SLAB_TASK = """
import os, signal, closure.slabtasks as s
run = s.run_phase
def dying(slabs, cg, folder, phase, task, n_tasks, *a, **k):
    mark = os.path.join(os.environ["CLOSURE_TEST_MARK"], "killed")
    if phase == "rows" and task == 1 and slabs.index == 0 and not os.path.exists(mark):
        open(mark, "w").close()
        os.kill(os.getpid(), signal.SIGKILL)
    return run(slabs, cg, folder, phase, task, n_tasks, *a, **k)
s.run_phase = dying
"""


def test_slab_tasks_give_the_in_process_model_and_a_killed_one_is_retried(
        env, three_d_file, tmp_path, monkeypatch):
    conn, store = env
    extra = {"library": "minimal", "memory_limit": 20_000}
    job_id = submit(conn, store, spec_dict(three_d_file, slab_tasks=3, **extra))
    monkeypatch.setenv("CLOSURE_TEST_MARK", str(tmp_path))
    run_burst(conn, store, patch=KILL_ONE_SLAB_TASK)
    assert (tmp_path / "killed").exists()
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "succeeded", doc
    assert doc["progress"]["snapshots_done"] == doc["progress"]["snapshots_total"] == 3
    # no map task: each snapshot went through 2 phases of 3 slab tasks and a finishing task
    assert q.map_tasks(conn, job_id) == []
    ids = q.slab_tasks(conn, job_id)
    assert len(ids) == 3 * (2 * 3 + 1) and q.slab_id(job_id, 0, "rows", 1) in ids
    killed = q.fetch(conn, q.slab_id(job_id, 0, "rows", 1))
    assert killed.get_status() == "finished" and killed.retries_left == q.TASK_RETRIES - 1
    # the in-process model (one pass per snapshot in memory) to round-off
    direct = pipeline.discover(parse_spec(spec_dict(three_d_file, library="minimal")))
    stored = store.load_model(doc["model_id"])
    assert stored.names == direct.names and list(stored.active) == list(direct.active)
    a, b = np.asarray(stored.coefficients), np.asarray(direct.coefficients)
    assert np.abs(a - b).max() <= 1e-12 * np.abs(b).max()
    assert not store.job_dir(job_id).exists()  # pieces, stats and plan are gone
    raw = conn.hget(f"rq:job:{q.slab_id(job_id, 2, 'columns', 0)}", "data")
    assert json.loads(zlib.decompress(raw))[2] == [job_id, 2, "columns", 0, 3]  # JSON only


def test_a_slab_task_that_keeps_failing_fails_the_job_naming_it(env, three_d_file):
    conn, store = env
    patch = ("import closure.slabtasks as s\ndef broken(slabs, cg, folder, phase, task, *a, **k):"
             "\n    if phase == 'rows' and task == 2:\n        raise RuntimeError('disk on fire')"
             "\n    return run(slabs, cg, folder, phase, task, *a, **k)\nrun = s.run_phase\n"
             "s.run_phase = broken\n")
    job_id = submit(conn, store, spec_dict(three_d_file, library="minimal", slab_tasks=3,
                                           input={"path": str(three_d_file),
                                                  "snapshots": [0, 1]}))
    run_burst(conn, store, patch=patch)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed", doc
    assert (f"snapshot 0: slab task rows 2 failed after {q.TASK_RETRIES + 1} attempts: "
            "RuntimeError: disk on fire") in doc["error"]
    assert not store.job_dir(job_id).exists()


def test_cancel_stops_pending_slab_tasks(env, three_d_file):
    conn, store = env
    job_id = submit(conn, store, spec_dict(three_d_file, library="minimal", slab_tasks=2))
    run_burst(conn, store, max_jobs=2)  # the plan and one slab task
    assert q.cancel(store, conn, job_id)
    states = [q.fetch(conn, rq_id).get_status() for rq_id in q.slab_tasks(conn, job_id)]
    assert states.count("finished") == 1 and states.count("canceled") == len(states) - 1
    assert q.fetch(conn, q.reduce_id(job_id)).get_status() == "canceled"
    run_burst(conn, store)
    assert jobs_status.status(store, conn, job_id)["state"] == "canceled"
    assert store.find_models() == [] and not store.job_dir(job_id).exists()
