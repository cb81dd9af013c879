"""What a remote caller can make the service read, allocate or crash: the regression tests of
the service probe (library file reads, declared sizes, bad strings, bounded errors), in
process (TestClient) with a Redis of our own; no worker runs here."""

from __future__ import annotations

import json
import resource
import shutil
import warnings

import netCDF4
import numpy as np
import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient
from service_support import redis_server, turb2d_file  # noqa: F401

from api.app import create_app
from api.deps import Settings

SECRET = "hunter2-PRIVATE-KEY-0xDEADBEEF"
TERMS = [{"name": "smag", "delta_power": 2, "expression": "Delta**2 * S_mag * S_{i}{j}"}]


@pytest.fixture
def setup(tmp_path, redis_server, turb2d_file):  # noqa: F811
    """A client whose data root holds a copy of the turbulence file; a secret outside it."""
    root = tmp_path / "root"
    root.mkdir()
    data = root / "turb2d.nc"
    shutil.copy(turb2d_file, data)
    settings = Settings(store=tmp_path / "store", redis_url=redis_server.url,
                        data_roots=(root,))
    app = create_app(settings)
    secret = tmp_path / "secret.yaml"
    secret.write_text(f"password: {SECRET}\nterms: [{SECRET}]\n")
    with TestClient(app) as c:
        c.root, c.data, c.secret, c.store_root = root, data, secret, tmp_path / "store"
        yield c


def spec_for(path, **extra) -> dict:
    return {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4}, **extra}


# --------------------------------------------------------------------------- library

def test_library_cannot_read_a_file_outside_the_roots(setup):
    r = setup.post("/jobs", json=spec_for(setup.data, library=str(setup.secret)))
    assert 400 <= r.status_code < 500, r.text
    assert SECRET not in r.text and "password" not in r.text
    assert "not a preset" in r.json()["detail"]


def test_every_refused_library_file_gets_the_same_answer(setup):
    """Missing, outside the roots, through a symlink out, not a terms file, not JSON: one
    message (apart from the name the caller gave), never quoting the file."""
    inside_secret = setup.root / "notes.yaml"
    inside_secret.write_text(f"password: {SECRET}\n")
    broken = setup.root / "broken.json"
    broken.write_text("{" + SECRET)
    link = setup.root / "link.yaml"
    link.symlink_to(setup.secret)
    names = [str(setup.secret), str(setup.root / "missing.yaml"), str(inside_secret),
             str(broken), str(link), "../secret.yaml", "/etc/passwd", str(setup.data)]
    answers = set()
    for name in names:
        r = setup.post("/jobs", json=spec_for(setup.data, library=name))
        assert r.status_code == 422, (name, r.text)
        assert SECRET not in r.text and "root:" not in r.text
        answers.add(r.json()["detail"].replace(repr(name), "NAME"))
    assert len(answers) == 1, answers


def test_library_inline_and_terms_file_under_a_root(setup):
    r = setup.post("/jobs", json=spec_for(setup.data, library=TERMS))
    assert r.status_code == 202, r.text
    assert r.json()["spec"]["library"] == TERMS
    terms_file = setup.root / "terms.json"
    terms_file.write_text(json.dumps({"terms": TERMS}))
    r = setup.post("/jobs", json=spec_for(setup.data, library="terms.json"))
    assert r.status_code in (200, 202), r.text
    # the workers get the content inline, never a path to read
    assert r.json()["spec"]["library"] == {"terms": TERMS}


def test_inline_library_errors_name_the_problem(setup):
    bad = [{"name": "x", "delta_power": 2, "expression": "nonsense_symbol * S_{i}{j}"}]
    r = setup.post("/jobs", json=spec_for(setup.data, library=bad))
    assert r.status_code in (400, 422) and "nonsense_symbol" in r.json()["detail"]


# --------------------------------------------------------------------------- sizes

def _declare_huge(path, n=65536):
    """A netCDF-4 file that declares u, v on an n x n grid and writes no data (a few KiB)."""
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("time", 2)
        nc.createDimension("y", n)
        nc.createDimension("x", n)
        for name in ("x", "y"):
            var = nc.createVariable(name, "f8", (name,))
            var.units = "m"
        for name in ("u", "v"):
            nc.createVariable(name, "f8", ("time", "y", "x"), chunksizes=(1, 256, 256))
    return path


def _max_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def test_a_file_declaring_a_huge_grid_is_refused_without_memory_growth(setup):
    huge = _declare_huge(setup.root / "huge.nc")
    assert huge.stat().st_size < 1 << 20
    before = _max_rss_mib()
    r = setup.post("/datasets?name=huge.nc", content=huge.read_bytes(),
                   headers={"Content-Type": "application/octet-stream"})
    assert r.status_code == 413, r.text
    assert "CLOSURE_MAX_POINTS" in r.json()["detail"] and "65536 x 65536" in r.json()["detail"]
    r = setup.post("/jobs", json=spec_for(huge))
    assert r.status_code == 413 and "CLOSURE_MAX_POINTS" in r.json()["detail"]
    # a 65536^2 float64 field is 32 GiB; the peak memory of this process grew by < 200 MiB
    assert _max_rss_mib() - before < 200
    assert not any((setup.store_root / "datasets").iterdir())


def test_snapshot_and_byte_limits_are_configurable(tmp_path, redis_server, turb2d_file):  # noqa: F811
    settings = Settings(store=tmp_path / "store", redis_url=redis_server.url,
                        data_roots=(turb2d_file.parent,), max_snapshots=3)
    with TestClient(create_app(settings)) as c:
        r = c.post("/jobs", json=spec_for(turb2d_file))
        assert r.status_code == 413 and "CLOSURE_MAX_SNAPSHOTS" in r.json()["detail"]
    settings = Settings(store=tmp_path / "store", redis_url=redis_server.url,
                        data_roots=(turb2d_file.parent,), max_input_gb=1e-6)
    with TestClient(create_app(settings)) as c:
        r = c.post("/jobs", json=spec_for(turb2d_file))
        assert r.status_code == 413 and "CLOSURE_MAX_INPUT_GB" in r.json()["detail"]


def test_limits_from_the_environment(monkeypatch, tmp_path):
    monkeypatch.setenv("CLOSURE_MAX_POINTS", "1000")
    monkeypatch.setenv("CLOSURE_MAX_SNAPSHOTS", "7")
    monkeypatch.setenv("CLOSURE_MAX_INPUT_GB", "0.5")
    s = Settings.from_env(store=tmp_path, redis_url="redis://x")
    assert (s.max_points, s.max_snapshots, s.max_input_gb) == (1000, 7, 0.5)
    monkeypatch.setenv("CLOSURE_MAX_POINTS", "lots")
    with pytest.raises(Exception, match="CLOSURE_MAX_POINTS"):
        Settings.from_env(store=tmp_path, redis_url="redis://x")


def test_submission_reads_no_field_values(setup, monkeypatch):
    """The API answers from the header: loading a snapshot in its process is a bug."""
    from closure import io

    def refuse(*args, **kwargs):
        raise AssertionError("field values read in the API process")

    monkeypatch.setattr(io.FieldSource, "snapshot", refuse)
    monkeypatch.setattr(io.FieldSource, "read", refuse)
    r = setup.post("/jobs", json=spec_for(setup.data))
    assert r.status_code == 202, r.text


# --------------------------------------------------------------------------- bad strings

@pytest.mark.parametrize("field,value", [
    ("path", "turb2d.nc\x00.png"), ("path", "a/" * 3000 + "x.nc"), ("path", "x" * 300 + ".nc"),
    ("library", "default\x00"), ("library", "t" * 5000 + ".yaml"),
    ("dataset_id", "d-\x00"), ("path", "~nobody-here/x.nc")])
def test_bad_strings_are_4xx(setup, field, value):
    spec = spec_for(setup.data)
    if field == "library":
        spec["library"] = value
    else:
        spec["input"] = {field: value}
    r = setup.post("/jobs", json=spec)
    assert 400 <= r.status_code < 500, r.text
    assert len(r.text) < 4000


def test_null_byte_in_ids_and_queries_is_4xx(setup):
    for url in ("/datasets/d-%00", "/jobs/j-%00x", "/models/m-%00/export", "/models?target=%00",
                "/models/m-%00/report?format=json", "/models/m-%00/les"):
        r = setup.get(url)
        assert 400 <= r.status_code < 500, (url, r.text)
    r = setup.post("/datasets?name=a%00b.nc", content=b"CDF\x01" + b"\0" * 100)
    assert 400 <= r.status_code < 500


@pytest.mark.parametrize("seed", [-1, 2**32, 10**30])
def test_seed_out_of_range_is_422(setup, seed):
    r = setup.post("/jobs", json=spec_for(setup.data, fit={"seed": seed}))
    assert r.status_code == 422 and "fit.seed" in r.json()["detail"]


@pytest.mark.parametrize("scheme", ["spectral", "fd2", "fd4"])
def test_a_ratio_leaving_too_few_coarse_points_is_422(setup, scheme):
    # the file has 32 points a side; ratio 16 leaves 2, fewer than any scheme needs
    spec = spec_for(setup.data, scheme=scheme)
    spec["filter"] = {"kind": "box", "ratio": 16, "width": 16}
    r = setup.post("/jobs", json=spec)
    assert r.status_code in (400, 422), r.text
    assert "smaller ratio" in r.json()["detail"] and scheme in r.json()["detail"]


def test_thousands_of_errors_are_truncated(setup):
    spec = spec_for(setup.data)
    spec["input"]["snapshots"] = [-1] * 5000
    r = setup.post("/jobs", json=spec)
    assert r.status_code == 422 and len(r.text) < 8000
    assert "more error" in r.json()["detail"]
    spec["input"]["snapshots"] = list(range(100, 5100))
    r = setup.post("/jobs", json=spec)
    assert r.status_code == 422 and len(r.text) < 4000 and "out of range" in r.text


def test_dataset_errors_name_the_dataset_not_the_store(setup):
    ds = setup.post("/datasets?name=t.nc", content=setup.data.read_bytes()).json()
    r = setup.post("/jobs", json={"input": {"dataset_id": ds["id"],
                                            "variables": {"v": "NOPE"}}})
    assert r.status_code == 422, r.text
    assert ds["id"] in r.json()["detail"] and str(setup.store_root) not in r.text


def test_the_client_sends_a_local_terms_file_inline(tmp_path):
    from closure.client import inline_local_library

    terms = tmp_path / "terms.yaml"
    terms.write_text("terms:\n  - name: smag\n    delta_power: 2\n"
                     "    expression: \"Delta**2 * S_mag * S_{i}{j}\"\n")
    spec = {"input": {"path": "x.nc"}, "library": str(terms)}
    assert inline_local_library(spec)["library"] == {"terms": TERMS}
    for lib in ("default", "/srv/not/here.yaml", TERMS):
        assert inline_local_library({**spec, "library": lib})["library"] == lib


def test_job_errors_name_the_dataset_and_stay_bounded(tmp_path):
    from closure.store import Store
    from worker.queue import public_error

    st = Store(tmp_path / "store")
    path = st.root / "datasets" / "d-x" / "a.nc"
    ds = st.add_dataset(sha256="a" * 64, path=path, source="upload", size=1)
    row = {"error": f"variable 'u' has 3 NaN values at snapshot 2 of {path}; " + "x" * 5000,
           "dataset_id": ds["id"]}
    shown = public_error(st, row)
    assert f"dataset {ds['id']}" in shown and str(st.root) not in shown
    assert len(shown) < 2100 and "left out" in shown
    st.close()


def test_an_inline_library_runs_like_the_same_terms_file(turb2d_file, tmp_path):  # noqa: F811
    """The inline definitions give the model the terms file gives (in process)."""
    from closure import pipeline
    from closure.spec import parse_spec

    terms_file = tmp_path / "terms.json"
    terms_file.write_text(json.dumps({"terms": TERMS + [
        {"name": "grad", "delta_power": 2, "expression": "Delta**2 * A_{i}x * A_{j}x"}]}))
    base = {"input": {"path": str(turb2d_file)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 2}}
    by_file = pipeline.discover(parse_spec({**base, "library": str(terms_file)}))
    inline = pipeline.discover(parse_spec({**base,
                                           "library": json.loads(terms_file.read_text())}))
    assert inline.names == by_file.names == ["smag", "grad"]
    assert np.allclose(inline.coefficients, by_file.coefficients, rtol=1e-12, atol=0)


def test_a_report_reads_its_input_only_under_the_roots_and_limits(tmp_path, turb2d_file):  # noqa: F811
    """The a priori figures of a report read the model's input in the API process: the same
    containment and size limits as a job's input apply (else the figures are left out)."""
    from api.routers.reports import _check_report_input
    from closure.errors import InputTooLargeError, UserError
    from closure.store import Store

    root = tmp_path / "root"
    root.mkdir()
    inside = root / "t.nc"
    shutil.copy(turb2d_file, inside)
    st = Store(tmp_path / "store")
    settings = Settings(store=st.root, redis_url="redis://x", data_roots=(root,))
    _check_report_input(inside, st, settings)
    with pytest.raises(UserError, match="not under the data roots"):
        _check_report_input(turb2d_file, st, settings)
    link = root / "link.nc"
    link.symlink_to(turb2d_file)
    with pytest.raises(UserError):
        _check_report_input(link, st, settings)
    huge = _declare_huge(root / "huge.nc")
    with pytest.raises(InputTooLargeError):
        _check_report_input(huge, st, settings)
    st.close()
