"""worker/selection.py: selection by coarse runs on the queue (real Redis, burst workers).

A tiny case (32^2 -> 16^2, short runs) where one candidate is made to blow up: the queued job
runs each candidate as its own task, shows the phase "coarse runs" with runs done / total,
and stores the same choice as closure.selection.discover_and_select in process.
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from service_support import redis_server  # noqa: F401

from closure.io import sha256_file
from closure.spec import parse_spec
from closure.store import Store, fingerprint_hash, new_job_id
from worker import queue as q
from worker import selection, tasks
from worker import status as jobs_status

pytestmark = pytest.mark.slow

# the constructed unstable candidate of tests/test_selection.py: an anti-diffusive
# Smagorinsky term (energy injected at every scale), put first on the candidate list; it is
# the sparsest, so a rule that ignored stability would choose it
ADD_UNSTABLE = """
import closure.selection as S
_plan = S.plan_from_stats
def _with_unstable(*args, **kwargs):
    out = _plan(*args, **kwargs)
    terms = out[0].terms
    coef = tuple(5.0 if t == "smagorinsky" else 0.0 for t in terms)
    return [S.Candidate("unstable", 0.0, 0.0, coef, terms, {"test": {}}), *out]
S.plan_from_stats = _with_unstable
"""


@pytest.fixture
def env(tmp_path, redis_server, monkeypatch):  # noqa: F811
    monkeypatch.setenv("CLOSURE_SNAPSHOTS_PER_TASK", "100")  # one map task: counts below
    conn = q.connect(redis_server.url)
    store = Store(tmp_path / "store")
    tasks.configure(str(store.root))
    yield conn, store
    tasks.configure("")
    conn.close()


@pytest.fixture(scope="module")
def dns(tmp_path_factory):
    from closure.synth import turb2d, write

    path = tmp_path_factory.mktemp("sel") / "dns.nc"
    return write(turb2d(n=32, snapshots=5, interval=0.3, spinup=0.6, viscosity=2e-3,
                        forcing_wavenumber=3, seed=2), path)


def spec_dict(path):
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 2},
            "fit": {"resamples": 0, "folds": 2, "select": "aposteriori", "duration": 1.0,
                    "spinup": 0.3, "transfer_weights": [0.0], "max_candidates": 2}}


def submit(conn, store, spec_dict) -> str:
    spec = parse_spec(spec_dict)
    sha = sha256_file(spec.input.path)
    job_id = new_job_id()
    store.create_job(job_id=job_id, spec=spec.model_dump(mode="json"),
                     fingerprint=fingerprint_hash(spec, sha), input_sha256=sha)
    q.enqueue_plan(conn, job_id)
    return job_id


def worker_args(conn, store, max_jobs=None):
    url = conn.connection_pool.connection_kwargs.get("path")
    code = ADD_UNSTABLE + "\nimport sys; from closure.cli import main; sys.exit(main(sys.argv[1:]))"
    args = [sys.executable, "-c", code, "worker", "--burst", "--redis", f"unix://{url}",
            "--store", str(store.root), "--log-level", "WARNING"]
    return args + (["--max-jobs", str(max_jobs)] if max_jobs is not None else [])


def run_burst(conn, store, max_jobs=None, workers=1) -> None:
    procs = [subprocess.Popen(worker_args(conn, store, max_jobs), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(workers)]
    for p in procs:
        _, err = p.communicate(timeout=300)
        assert p.returncode == 0, err[-3000:]


def test_queued_selection_runs_each_candidate_and_equals_in_process(env, dns, monkeypatch):
    import closure.selection as S

    conn, store = env
    job_id = submit(conn, store, spec_dict(dns))
    run_burst(conn, store, max_jobs=3)  # plan, map, reduce: the coarse runs are queued
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "running"
    n = doc["progress"]["phase_total"]
    assert doc["progress"]["phase"] == selection.PHASE and doc["progress"]["phase_done"] == 0
    assert n >= 2
    assert q.fetch(conn, selection.run_id(job_id, n - 1)) is not None
    run_burst(conn, store, max_jobs=1)
    assert jobs_status.status(store, conn, job_id)["progress"]["phase_done"] == 1
    run_burst(conn, store, workers=2)  # the other runs in parallel, then the choice
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "succeeded", doc
    stored = store.load_model(doc["model_id"])
    queued = stored.settings["aposteriori_selection"]
    assert len(queued["candidates"]) == n
    by = {r["label"]: r for r in queued["candidates"]}
    assert by["unstable"]["long_run"]["stable"] is False
    assert queued["chosen"] not in (None, "unstable")
    assert not store.job_dir(job_id).exists()

    # the same selection in process, with the same unstable candidate added
    monkeypatch.setattr(S, "plan_from_stats", S.plan_from_stats)  # undone after the test
    exec(ADD_UNSTABLE, {})
    _, direct, chosen = S.discover_and_select(parse_spec(spec_dict(dns)))
    assert queued["chosen"] == direct.chosen
    assert [r["label"] for r in queued["candidates"]] == [r["label"]
                                                          for r in direct.candidates]
    for a, b in zip(queued["candidates"], direct.candidates, strict=True):
        assert a["long_run"]["stable"] == b["long_run"]["stable"]
        if a["score"] is not None:
            assert a["score"] == pytest.approx(b["score"], rel=1e-9)
    assert list(stored.coefficients_scaled) == pytest.approx(list(chosen.coefficients_scaled),
                                                             rel=1e-10, abs=1e-14)


def test_a_candidate_whose_input_vanished_fails_the_job_with_its_reason(env, tmp_path):
    import shutil

    conn, store = env
    src = tmp_path / "copy.nc"
    from closure.synth import turb2d, write

    write(turb2d(n=32, snapshots=5, interval=0.3, spinup=0.6, viscosity=2e-3,
                 forcing_wavenumber=3, seed=2), src)
    job_id = submit(conn, store, spec_dict(src))
    run_burst(conn, store, max_jobs=3)
    shutil.move(src, tmp_path / "moved.nc")
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "failed"
    assert "is gone since the job was submitted" in doc["error"]
    assert "candidate" in doc["error"]


def test_canceling_during_the_coarse_runs_stops_them_and_stores_nothing(env, dns):
    from rq.job import JobStatus

    conn, store = env
    job_id = submit(conn, store, spec_dict(dns))
    run_burst(conn, store, max_jobs=3)
    n = jobs_status.status(store, conn, job_id)["progress"]["phase_total"]
    assert q.cancel(store, conn, job_id)
    for k in range(n):  # the queued coarse runs and the choice are canceled, not run
        assert q.fetch(conn, selection.run_id(job_id, k)).get_status() == JobStatus.CANCELED
    assert q.fetch(conn, selection.choose_id(job_id)).get_status() == JobStatus.CANCELED
    run_burst(conn, store)
    doc = jobs_status.status(store, conn, job_id)
    assert doc["state"] == "canceled" and doc["model_id"] is None
    assert not store.job_dir(job_id).exists()
