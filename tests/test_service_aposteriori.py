"""A posteriori runs and reports through the service: POST/GET /models/{id}/les (a queued task
run by a real rq worker process over a Redis of our own), GET /models/{id}/report (built on
demand, cached, served with its figures), the client and `closure report ID`, and
`closure demo` ending with the report and the a posteriori table.

The comparisons are checked against closure.les.simulate run in process on the same model
(the queue must only move its inputs and outputs), and the figures against a general PNG
reader (matplotlib.image).
"""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
import threading
import warnings
import zlib
from pathlib import Path
from urllib.parse import urljoin

import numpy as np
import pytest
from service_support import redis_server  # noqa: F401

from api.app import create_app
from api.deps import Settings
from closure.client import Client, ServiceError
from closure.les import BASELINES, simulate
from closure.model import ClosureModel
from closure.spec import AposterioriSpec, JobSpec, parse_aposteriori_spec, parse_spec
from closure.store import Store
from worker import aposteriori as ap
from worker import queue as q

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

CLI = [sys.executable, "-c", "import sys; from closure.cli import main; "
       "sys.exit(main(sys.argv[1:]))"]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948:2004, section 5.2)


def discover_spec(path) -> dict:
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 4}}


@pytest.fixture(scope="module")
def turb2d_file(tmp_path_factory):
    """2-D turbulence from closure.synth, 64 x 64 (a 16 x 16 coarse grid at ratio 4, which
    resolves the forcing shell after dealiasing), 6 snapshots."""
    from closure.synth import turb2d, write

    folder = tmp_path_factory.mktemp("data")
    return write(turb2d(n=64, snapshots=6, spinup=1.0, interval=0.2), folder / "turb2d.nc")


@pytest.fixture(scope="module")
def fitted(turb2d_file):
    """A model discovered in process on the 2-D turbulence file (once per module)."""
    from closure import pipeline

    spec = parse_spec(discover_spec(turb2d_file))
    return spec, pipeline.discover(spec)


def scaled(model: ClosureModel, factor: float) -> ClosureModel:
    """The same terms with every coefficient times ``factor``."""
    return ClosureModel(model.library, model.coefficients_scaled * factor,
                        model.std_errors_scaled, model.selection_frequency,
                        filter=model.filter, grid=model.grid.to_dict(), scheme=model.scheme,
                        delta=model.delta, provenance=model.provenance, method=model.method,
                        settings=model.settings, scores=model.scores,
                        warnings=model.warnings, caution=model.caution)


def add(store: Store, spec: JobSpec, model: ClosureModel, tag: str) -> str:
    """Store a model as the reduce task does; ``tag`` makes its fingerprint (and id) its own."""
    row = store.add_model(model=model, fingerprint=(tag * 64)[:64],
                          dataset_sha256="0" * 64, spec=spec, plan={}, job_id=None)
    return row["id"]


@pytest.fixture
def service(tmp_path, redis_server, turb2d_file, fitted):  # noqa: F811
    """The API in process over our Redis, a store holding the fitted model ("a") and the
    same model with its coefficients times -200 ("b", unstable in the coarse solver)."""
    spec, model = fitted
    store = Store(tmp_path / "store")
    good = add(store, spec, model, "a")
    bad = add(store, spec, scaled(model, -200.0), "b")
    app = create_app(Settings(store=store.root, redis_url=redis_server.url,
                              data_roots=(turb2d_file.parent,)))
    with TestClient(app) as http:
        http.store, http.good, http.bad, http.redis_url = store, good, bad, redis_server.url
        yield http
    store.close()


def run_burst(service) -> subprocess.CompletedProcess:
    """A worker in burst mode in a fresh process (``closure worker --burst``)."""
    r = subprocess.run([*CLI, "worker", "--burst", "--redis", service.redis_url, "--store",
                        str(service.store.root), "--log-level", "WARNING"],
                       capture_output=True, text=True, timeout=180)
    assert r.returncode == 0, r.stderr[-3000:]
    return r


# --------------------------------------------------------------------------- the spec

def test_aposteriori_spec_defaults_and_messages():
    spec = parse_aposteriori_spec(None)
    assert spec == AposterioriSpec() == parse_aposteriori_spec({})
    assert tuple(spec.baselines) == BASELINES  # the schema lists what closure.les runs
    assert spec.input is None and spec.forcing == "file" and spec.energy_bound == 10.0
    assert parse_aposteriori_spec({"forcing": "shell:4:0.5:3"}).forcing == "shell:4:0.5:3"
    with pytest.raises(Exception, match="forcing") as err:
        parse_aposteriori_spec({"forcing": "gusty", "baselines": ["wale"], "cfl": 0})
    msg = str(err.value)
    assert "baselines.0" in msg and "'smagorinsky'" in msg and "cfl" in msg
    with pytest.raises(Exception, match="exactly one of path or dataset_id"):
        parse_aposteriori_spec({"input": {}})
    # the discovery spec is unchanged: same fields, same fingerprint as before this schema
    job = parse_spec({"input": {"path": "/x.nc"}})
    assert job.kind == "discover" and "aposteriori" not in json.dumps(job.fingerprint())


# --------------------------------------------------------------------------- queued runs

@pytest.mark.slow
def test_queued_run_stores_every_baseline_and_equals_in_process(service, turb2d_file,
                                                                 fitted):
    model_id = service.good
    r = service.post(f"/models/{model_id}/les", json={})
    assert r.status_code == 202, r.text
    job = r.json()
    assert job["state"] == "queued" and job["model_id"] == model_id
    assert job["spec"]["kind"] == "aposteriori"
    assert job["spec"]["input"]["path"] == str(turb2d_file.resolve())  # the model's input
    # before it ran: 404 naming the run to follow
    r = service.get(f"/models/{model_id}/les")
    assert r.status_code == 404 and f"GET /jobs/{job['id']}" in r.json()["detail"]
    assert "queued" in r.json()["detail"]
    # the task on the queue is JSON (zlib-compressed by rq), never a pickle
    conn = q.connect(service.redis_url)
    raw = conn.hget(f"rq:job:{ap.task_id(job['id'])}", "data")
    assert json.loads(zlib.decompress(raw))[:3] == ["worker.aposteriori.les_task", None,
                                                     [job["id"]]]
    run_burst(service)
    doc = service.get(f"/jobs/{job['id']}").json()
    assert doc["state"] == "succeeded" and doc["progress"]["phase"] == "done", doc
    assert doc["progress"]["phase_done"] == doc["progress"]["phase_total"] == 1 + len(BASELINES)

    r = service.get(f"/models/{model_id}/les")
    assert r.status_code == 200, r.text
    out = r.json()
    runs = out["result"]["runs"]
    assert set(runs) == {"model", *BASELINES, "reference"}
    assert set(out["runs"]) == {"model", *BASELINES}
    assert all(v["status"] in ("completed", "blew up") for v in out["runs"].values())
    for name in ("model", *BASELINES):
        assert re.search(rf"^{re.escape(name)}\s", out["table"], re.M), name
    # the stored files, beside the model
    folder = service.store.aposteriori_dir(model_id) / out["run"]
    assert json.loads((folder / "les.json").read_text())["runs"].keys() == runs.keys()
    assert (folder / "table.txt").read_text().strip() == out["table"]
    # the queue only moved inputs and outputs: the same numbers as simulate in process
    _, model = fitted
    direct = simulate(model, turb2d_file, baselines=list(BASELINES)).to_dict()
    for name in ("model", "smagorinsky", "dynamic", "reference"):
        np.testing.assert_allclose(runs[name]["energy"], direct["runs"][name]["energy"],
                                   rtol=1e-12)
        assert runs[name]["status"] == direct["runs"][name]["status"]
    # the same request again is answered from the store: a finished job, nothing queued
    again = service.post(f"/models/{model_id}/les")
    assert again.status_code == 200 and again.json()["reused"]
    assert again.json()["state"] == "succeeded" and again.json()["id"] != job["id"]
    assert q.get_queue(conn).count == 0
    # other options are another run, kept beside the first
    other = service.post(f"/models/{model_id}/les", json={"baselines": ["none"],
                                                           "energy_bound": 5})
    assert other.status_code == 202
    conn.close()


@pytest.mark.slow
def test_blow_up_is_reported_with_its_time_and_the_worker_takes_the_next_job(service):
    # a run the solver refuses (no reference snapshot within 1 ms of the start) ...
    refused = service.post(f"/models/{service.good}/les", json={"time": 1e-3}).json()
    bad = service.post(f"/models/{service.bad}/les", json={"baselines": ["none"]}).json()
    good = service.post(f"/models/{service.good}/les",
                        json={"baselines": ["smagorinsky"]}).json()
    run_burst(service)  # one worker process takes all three, in order
    conn = q.connect(service.redis_url)
    tasks = [q.fetch(conn, ap.task_id(j["id"])) for j in (refused, bad, good)]
    assert [t.get_status() for t in tasks] == ["finished"] * 3
    assert len({t.worker_name for t in tasks}) == 1  # the same worker, still alive
    assert tasks[0].ended_at <= tasks[1].started_at and tasks[1].ended_at <= tasks[2].started_at
    conn.close()
    doc = service.get(f"/jobs/{refused['id']}").json()
    assert doc["state"] == "failed" and "no snapshot after the initial time" in doc["error"]
    for j in (bad, good):
        assert service.get(f"/jobs/{j['id']}").json()["state"] == "succeeded"
    out = service.get(f"/models/{service.bad}/les").json()
    run = out["runs"]["model"]
    t0 = out["result"]["settings"]["times"][0]
    assert run["status"] == "blew up" and "exceeded 10 x the initial" in run["message"]
    assert t0 <= run["blowup_time"] <= out["result"]["settings"]["times"][-1]
    assert re.search(r"^model\s+blew up\s+\d", out["table"], re.M)
    assert out["runs"]["none"]["status"] == "completed"  # no closure stays finite
    ok = service.get(f"/models/{service.good}/les").json()
    assert set(ok["runs"]) == {"model", "smagorinsky"}
    assert ok["runs"]["smagorinsky"]["status"] == "completed"


def test_openapi_documents_the_new_routes(service):
    doc = service.get("/openapi.json").json()
    for path in ("/models/{model_id}/les", "/models/{model_id}/report",
                 "/models/{model_id}/report/", "/models/{model_id}/report/{filename}"):
        assert path in doc["paths"], path
    assert {"post", "get"} <= set(doc["paths"]["/models/{model_id}/les"])
    assert "AposterioriSpec" in doc["components"]["schemas"]


def test_unknown_model_bad_options_and_no_result_yet(service, tmp_path):
    for method, url in (("GET", "/models/m-nope/les"), ("POST", "/models/m-nope/les"),
                        ("GET", "/models/m-nope/report"), ("GET", "/models/m-nope/report/"),
                        ("GET", "/models/m-nope/report?format=json"),
                        ("GET", "/models/m-nope/report/index.html")):
        r = service.request(method, url)
        assert r.status_code == 404, (url, r.text)
        assert "no model with id 'm-nope'" in r.json()["detail"]
    r = service.get(f"/models/{service.good}/les")
    assert r.status_code == 404
    assert f"start a run with POST /models/{service.good}/les" in r.json()["detail"]
    r = service.post(f"/models/{service.good}/les", json={"forcing": "gusty", "cfl": -1})
    assert r.status_code == 422
    assert "forcing" in r.json()["detail"] and "cfl" in r.json()["detail"]
    r = service.post(f"/models/{service.good}/les", json={"model_id": service.bad})
    assert r.status_code == 422 and "differs from the URL's" in r.json()["detail"]
    outside = tmp_path / "elsewhere.nc"
    outside.write_bytes(b"CDF\x01")
    r = service.post(f"/models/{service.good}/les", json={"input": {"path": str(outside)}})
    assert r.status_code == 403 and "outside the data roots" in r.json()["detail"]
    r = service.post(f"/models/{service.good}/les", json={"reference": {"dataset_id": "d-0"}})
    assert r.status_code == 404 and "no dataset" in r.json()["detail"]
    assert not service.store.aposteriori_dir(service.good).exists()


def test_a_task_lost_on_its_last_attempt_fails_the_run_with_a_reason(service):
    """A work-horse killed on its last attempt runs no failure callback: reading the result
    reconciles the job with what the queue recorded."""
    from rq.job import JobStatus

    job = service.post(f"/models/{service.good}/les", json={}).json()
    conn = q.connect(service.redis_url)
    task = q.fetch(conn, ap.task_id(job["id"]))
    task.set_status(JobStatus.FAILED)  # what rq records for the lost task
    r = service.get(f"/models/{service.good}/les")
    assert r.status_code == 404
    assert f"run {job['id']} failed (the a posteriori run failed after" in r.json()["detail"]
    assert service.get(f"/jobs/{job['id']}").json()["state"] == "failed"
    # a new request is a new run, not the failed one
    again = service.post(f"/models/{service.good}/les", json={})
    assert again.status_code == 202 and again.json()["id"] != job["id"]
    conn.close()


# --------------------------------------------------------------------------- reports

@pytest.fixture
def with_result(service, turb2d_file, fitted):
    """An a posteriori result of the good model stored as the task stores it."""
    _, model = fitted
    comparison = simulate(model, turb2d_file, baselines=["smagorinsky", "gradient"])
    ap.save_result(service.store, service.good, comparison,
                   {"job_id": None, "fingerprint": "f" * 64, "input_sha256": None,
                    "spec": {}})
    return service


def test_report_page_and_figures_resolve_through_the_api(with_result):
    service = with_result
    r = service.get(f"/models/{service.good}/report", follow_redirects=False)
    assert r.status_code == 307
    page_url = r.headers["location"]
    assert page_url.endswith(f"/models/{service.good}/report/")
    r = service.get(page_url)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    html = r.text
    assert "A priori skill does not guarantee a stable or accurate coarse simulation" in html
    sources = re.findall(r'<img[^>]+src="([^"]+)"', html)
    assert "aposteriori_spectra.png" in sources and "apriori_hexbin.png" in sources
    from matplotlib.image import imread

    for src in sources:
        img = service.get(urljoin(page_url, src))  # relative links, as a browser resolves
        assert img.status_code == 200 and img.headers["content-type"] == "image/png", src
        assert img.content.startswith(PNG_MAGIC)
        pixels = imread(io.BytesIO(img.content), format="png")
        assert pixels.ndim == 3 and min(pixels.shape[:2]) > 50
    listing = service.get(f"/models/{service.good}/report?format=json").json()
    assert set(sources) | {"index.html", "report.json"} <= set(listing["files"])
    assert listing["aposteriori_run"] == "f" * 16
    assert service.get(f"/models/{service.good}/report/index.html").text == html


def test_report_file_names_cannot_leave_the_report(with_result):
    service = with_result
    base = f"/models/{service.good}/report"
    assert service.get(base + "/").status_code == 200
    # (a bare ".." is resolved by the HTTP client itself, to another route)
    for name in ("..%2Fmodel.json", "%2E%2E%2Fspec.json", "%2e%2e", ".source.json",
                 ".closure-report", "..%5Cmodel.json", "%2Fetc%2Fpasswd", "a..b.png"):
        r = service.get(f"{base}/{name}")
        assert r.status_code in (403, 404), (name, r.status_code)
        assert '"format"' not in r.text and "root:" not in r.text
    r = service.get(f"{base}/.source.json")
    assert r.status_code == 403 and "plain file name" in r.json()["detail"]
    r = service.get(f"{base}/model.json")  # in the model folder, not in the report
    assert r.status_code == 404 and "index.html" in r.json()["detail"]


def test_report_is_cached_rebuilt_after_a_new_result_and_built_once_at_a_time(
        with_result, monkeypatch, turb2d_file, fitted):
    service = with_result
    import closure.report
    from api.routers.reports import ensure_report

    real = closure.report.build_report
    calls = []

    def counting(*args, **kwargs):
        calls.append(threading.get_ident())
        return real(*args, **kwargs)

    monkeypatch.setattr(closure.report, "build_report", counting)
    threads = [threading.Thread(target=ensure_report, args=(service.store, service.good))
               for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(calls) == 1  # concurrent requests waited for one build
    index = service.store.report_dir(service.good) / "index.html"
    stamp = index.stat().st_mtime_ns
    assert service.get(f"/models/{service.good}/report/").status_code == 200
    assert len(calls) == 1 and index.stat().st_mtime_ns == stamp  # served from the cache
    # a new a posteriori result makes the next request rebuild the report with it
    _, model = fitted
    comparison = simulate(model, turb2d_file, baselines=["none"])
    ap.save_result(service.store, service.good, comparison,
                   {"job_id": None, "fingerprint": "e" * 64, "input_sha256": None, "spec": {}})
    listing = service.get(f"/models/{service.good}/report?format=json").json()
    assert len(calls) == 2 and listing["aposteriori_run"] == "e" * 16


def test_client_and_cli_fetch_a_stored_models_report(with_result, tmp_path, monkeypatch):
    service = with_result
    client = Client("http://testserver", http=service)
    with pytest.raises(ServiceError, match="no model with id 'm-nope'"):
        client.report_files("m-nope")
    out = client.download_report(service.good, tmp_path / "rep")
    stored = service.store.report_dir(service.good)
    names = sorted(p.name for p in out.iterdir() if not p.name.startswith("."))
    assert names == sorted(p.name for p in stored.iterdir() if not p.name.startswith("."))
    for name in names:
        assert (out / name).read_bytes() == (stored / name).read_bytes()
    # `closure report ID -o DIR` goes to the server when ID is not a file
    import closure.cli.service as cli_service
    from closure.cli import main

    class InProcess(Client):
        def close(self):
            """Keep the test client open for the next command."""

    monkeypatch.setattr(cli_service, "_client",
                        lambda server, token: InProcess("http://testserver", http=service))
    monkeypatch.chdir(tmp_path)
    assert main(["report", service.good, "-o", str(tmp_path / "cli")]) == 0
    assert (tmp_path / "cli" / "index.html").read_bytes() == (stored / "index.html").read_bytes()
    # a folder that is not a report is never replaced
    other = tmp_path / "keep"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    assert main(["report", service.good, "-o", str(other)]) == 2
    assert (other / "notes.txt").read_text() == "mine"
    assert main(["report", service.good, "-o", str(tmp_path / "x"), "--les", "r.json"]) == 2


# --------------------------------------------------------------------------- the demo

@pytest.mark.slow
def test_demo_ends_with_the_report_path_and_the_aposteriori_table(tmp_path):
    home = tmp_path / "home"
    r = subprocess.run([*CLI, "demo"], capture_output=True, text=True,
                       timeout=300, env={**__import__("os").environ, "CLOSURE_HOME": str(home)})
    assert r.returncode == 0, r.stderr[-3000:]
    out = r.stdout
    assert "Closure model for stress" in out
    report = Path(re.search(r"^report: (\S+)$", out, re.M).group(1))
    assert report.is_file() and report.name == "index.html"
    assert home / "demo" in report.parents  # the state folder, kept after the demo
    assert "aposteriori_spectra.png" in report.read_text()
    # the stored model was chosen by coarse runs, and the report shows the long runs
    assert "Selection by coarse runs" in out and re.search(r"\schosen$", out, re.M)
    page = report.read_text()
    for name in ("selection_front.png", "long_run_spectra.png", "long_run_stability.png"):
        assert name in page, name
    table = out.split("A posteriori", 1)[1]
    for name in ("model", *BASELINES):
        assert re.search(rf"^{re.escape(name)}\s+(completed|blew up)", table, re.M), name
    assert "does not guarantee a stable or accurate coarse simulation" in out


# --------------------------------------------------------------------------- long runs

def test_aposteriori_spec_takes_long_runs_physics_and_forcing_families():
    spec = parse_aposteriori_spec({"long_duration": 5.0, "spinup": 1.0, "sample_interval": 0.1,
                                   "hypoviscosity": 0.2, "hypoviscosity_order": 2})
    assert spec.long_duration == 5.0 and spec.hypoviscosity_order == 2
    for forcing in ("steady:2:0.5", "steady:2:0.5:7", "power:2:0.1", "modes:forcing.txt"):
        assert parse_aposteriori_spec({"forcing": forcing}).forcing == forcing
    assert parse_aposteriori_spec({"forcing": "modes:a/b.txt"}).modes_path == "a/b.txt"
    for bad in ("steady:2", "power:x:1", "modes:"):
        with pytest.raises(Exception, match="steady:K:A"):
            parse_aposteriori_spec({"forcing": bad})
    with pytest.raises(Exception, match="give long_duration too"):
        parse_aposteriori_spec({"spinup": 1.0})
    with pytest.raises(Exception, match="shorter than long_duration"):
        parse_aposteriori_spec({"long_duration": 1.0, "spinup": 1.0})
    # options left unset keep the fingerprints of runs stored before they existed; a modes
    # table counts by its content, not its location
    assert "long_duration" not in AposterioriSpec().fingerprint()
    assert spec.fingerprint()["long_duration"] == 5.0
    assert parse_aposteriori_spec({"forcing": "modes:/a.txt"}).fingerprint()["forcing"] == \
        "modes:file"
    fp = ap.fingerprint("m", AposterioriSpec(), "0" * 64, None)
    assert fp == ap.fingerprint("m", AposterioriSpec(), "0" * 64, None, None)
    assert fp != ap.fingerprint("m", AposterioriSpec(), "0" * 64, None, "1" * 64)


def test_a_modes_table_must_lie_under_the_data_roots(service, tmp_path):
    outside = tmp_path / "modes.txt"
    outside.write_text("0 3 1.0 0.0\n")
    r = service.post(f"/models/{service.good}/les", json={"forcing": f"modes:{outside}"})
    assert r.status_code == 403 and "forcing modes path" in r.json()["detail"]
    assert "outside the data roots" in r.json()["detail"]
    r = service.post(f"/models/{service.good}/les", json={"forcing": "modes:nothing-here.txt"})
    assert r.status_code == 422 and "no such file" in r.json()["detail"]


@pytest.mark.slow
def test_queued_long_run_with_a_modes_forcing_equals_in_process(service, turb2d_file, fitted):
    modes = turb2d_file.parent / "modes.txt"
    modes.write_text("# m_y m_x a b\n0 3 0.5 0.0\n3 0 0.0 0.5\n")
    body = {"baselines": ["none"], "long_duration": 1.0, "spinup": 0.2,
            "forcing": f"modes:{modes.name}", "hypoviscosity": 0.01}
    r = service.post(f"/models/{service.good}/les", json=body)
    assert r.status_code == 202, r.text
    assert r.json()["spec"]["forcing"] == f"modes:{modes.resolve()}"
    run_burst(service)
    out = service.get(f"/models/{service.good}/les").json()
    runs = out["result"]["runs"]
    assert set(runs) >= {"model", "none"}
    _, model = fitted
    direct = simulate(model, turb2d_file, baselines=["none"], long_duration=1.0, spinup=0.2,
                      forcing=f"modes:{modes.resolve()}", hypoviscosity=0.01).to_dict()
    for name in ("model", "none"):
        assert runs[name]["long_run"]["duration"] == 1.0
        assert runs[name]["long_run"]["stable"] == direct["runs"][name]["long_run"]["stable"]
        np.testing.assert_allclose(runs[name]["energy"], direct["runs"][name]["energy"],
                                   rtol=1e-12)


@pytest.mark.slow
def test_a_3d_model_runs_a_posteriori_on_the_queue(service, turb2d_file):
    from closure import pipeline
    from closure.synth import turb3d, write

    box = write(turb3d(n=16, snapshots=3), turb2d_file.parent / "box.nc")
    spec = parse_spec({"input": {"path": str(box)}, "filter": {"ratio": 2},
                       "fit": {"resamples": 0, "folds": 2}})
    model_id = add(service.store, spec, pipeline.discover(spec), "c")
    r = service.post(f"/models/{model_id}/les", json={
        "input": {"path": box.name}, "baselines": ["none", "smagorinsky"],
        "long_duration": 0.5, "spinup": 0.1})
    assert r.status_code == 202, r.text
    run_burst(service)
    out = service.get(f"/models/{model_id}/les").json()
    assert out["result"]["settings"]["grid"]["shape"] == [8, 8, 8]
    for name in ("model", "none", "smagorinsky"):
        assert out["result"]["runs"][name]["long_run"]["duration"] == 0.5
