"""worker.aposteriori.les_task's progress: the run counter reaches its total when the job ends,
also when a run blows up before its last output time. The solver is replaced by a stand-in
that only reports progress (tests/test_service_aposteriori.py runs the real one)."""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from service_support import redis_server  # noqa: F401

from closure.spec import AposterioriSpec
from closure.store import Store
from worker import aposteriori as ap
from worker import queue as q
from worker import tasks


@pytest.fixture
def env(tmp_path, redis_server, monkeypatch):  # noqa: F811
    conn = q.connect(redis_server.url)
    store = Store(tmp_path / "store")
    monkeypatch.setattr(tasks, "store", lambda: store)
    monkeypatch.setattr(ap, "get_current_job", lambda: SimpleNamespace(connection=conn))
    monkeypatch.setattr(ap, "_check_files", lambda *a: None)
    monkeypatch.setattr(ap, "save_result", lambda *a: tmp_path / "run-1")
    yield conn, store
    conn.close()


def _job(store, baselines) -> str:
    spec = AposterioriSpec(model_id="m-1", baselines=baselines).model_dump(mode="json")
    store.create_job(job_id="j-1", spec=spec, fingerprint="f" * 64, input_sha256=None,
                     model_id="m-1")
    return "j-1"


def test_a_finished_run_reports_every_run_done(env, monkeypatch):
    conn, store = env
    job_id = _job(store, ["none", "smagorinsky", "dynamic", "gradient", "gradient-clipped"])
    seen = []

    def fake_run(st, spec, progress=None):
        names = ["model", *spec.baselines]
        for name in names:
            # "dynamic" blows up after its first output time: it never reports 4 of 4
            for done in range(1, 2 if name == "dynamic" else 5):
                progress(name, done, 4)
                seen.append(q.read_progress(conn, job_id))
        return SimpleNamespace(runs={n: SimpleNamespace(status="completed") for n in names})

    monkeypatch.setattr(ap, "run", fake_run)
    out = ap.les_task(job_id)
    assert out["model_id"] == "m-1"
    # during the runs: the runs before the current one are done, out of 6
    assert [p["phase_total"] for p in seen] == [6] * len(seen)
    assert seen[0]["phase_done"] == 0 and seen[-1]["phase_done"] == 5
    assert seen[-1]["phase"] == "les gradient-clipped"
    # at the end: 6 of 6, phase done
    final = q.read_progress(conn, job_id)
    assert (final["phase"], final["phase_done"], final["phase_total"]) == ("done", 6, 6)
    assert store.get_job(job_id)["state"] == "succeeded"


def test_a_failed_run_keeps_its_count(env, monkeypatch):
    from closure.errors import UserError

    conn, store = env
    job_id = _job(store, ["none"])

    def fake_run(st, spec, progress=None):
        progress("model", 1, 4)
        raise UserError("the reference has no snapshot after the initial one")

    monkeypatch.setattr(ap, "run", fake_run)
    ap.les_task(job_id)
    final = q.read_progress(conn, job_id)
    assert (final["phase"], final["phase_done"], final["phase_total"]) == ("failed", 0, 2)
    assert "no snapshot after" in store.get_job(job_id)["error"]
