import numpy as np
import pytest
import xarray as xr

from closure.cli import main
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot, open_coarse, write_coarse
from closure.library import design, make_library
from closure.model import ClosureModel
from closure.residuals import coarse_grain_snapshot


def fine_snapshots(n=2, size=32, seed=0):
    """Smooth random 2-D velocity (a few Fourier modes) with a scalar c."""
    g = Grid.regular((size, size), 2 * np.pi, units="m")
    y, x = g.mesh()
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        f = {}
        for name in ("u", "v", "c"):
            f[name] = sum(rng.standard_normal() * np.cos(kx * x + ky * y + rng.uniform(0, 6))
                          for kx, ky in rng.integers(-6, 7, size=(6, 2)))
        out.append(Snapshot(f, g, i, float(i)))
    return g, out


@pytest.fixture
def coarse_file(tmp_path):
    g, snaps = fine_snapshots()
    cg = make_coarse_graining("gaussian", g, 4)
    coarse = [coarse_grain_snapshot(s, cg, ("c",)) for s in snaps]
    path = write_coarse(tmp_path / "coarse.nc", coarse,
                        {"file": "fine.nc", "sha256": "0" * 64, "names": {},
                         "units": {"u": "m s-1", "v": "m s-1", "c": "K"}})
    return path, cg, coarse


def fitted_model(coarse, cg, target="stress", library="classic"):
    """Least-squares coefficients of the library on the coarse snapshots (a real fit)."""
    cs = coarse[0]
    L = make_library(library, target, cs.grid.dims, ("c",))
    X = np.concatenate([design(L, s.fields, s.grid, "spectral", cg.delta).reshape(-1, len(L))
                        for s in coarse])
    y = np.concatenate([np.stack([s.targets[c] for c in L.components]).reshape(-1)
                        for s in coarse])
    coef = np.linalg.lstsq(X, y, rcond=None)[0]
    return ClosureModel.from_fit(L, coef, filter=cg, grid=cs.grid, scheme="spectral",
                                 delta=cg.delta, provenance={"input": "fine.nc"},
                                 method="least_squares", scores={"test": {"r2": 0.5}})


def test_apply_writes_the_model_prediction(tmp_path, coarse_file, capsys):
    path, cg, coarse = coarse_file
    model = fitted_model(coarse, cg)
    mpath = model.save(tmp_path / "model.json")
    out = tmp_path / "pred.nc"
    assert main(["apply", str(mpath), str(path), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "wrote" in text and "2 snapshot(s) of tau_xx, tau_xy, tau_yy" in text
    # the file's source checksum is not the model's input: every snapshot is new to it
    assert "a priori on the snapshots new to the model (2)" in text and "a posteriori" in text
    assert "fitted on them" not in text
    ds = xr.open_dataset(out)
    try:
        assert set(ds.data_vars) == {"tau_xx", "tau_xy", "tau_yy"}
        assert ds["tau_xy"].dims == ("time", "y", "x")
        assert ds["tau_xx"].attrs["units"] == "m2 s-2"  # (m s-1)^2, simplified
        assert "modelled subgrid stress" in ds["tau_xx"].attrs["long_name"]
        assert "a posteriori" in ds.attrs["caution"]
        np.testing.assert_allclose(ds["x"].values, coarse[0].grid.coords("x"))
        for i, cs in enumerate(coarse):
            want = model.evaluate(cs.fields, cs.grid)
            for c in want:
                np.testing.assert_allclose(ds[c].values[i], want[c], rtol=1e-13)
    finally:
        ds.close()


def test_apply_a_priori_skill_matches_a_direct_computation(tmp_path, coarse_file, capsys):
    # r2 = 1 - sum w (y - p)^2 / sum w (y - mean)^2 with the Frobenius weights (common practice)
    path, cg, coarse = coarse_file
    model = fitted_model(coarse, cg, "flux:c")
    mpath = model.save(tmp_path / "m.json")
    assert main(["apply", str(mpath), str(path), "-o", str(tmp_path / "p.nc")]) == 0
    text = capsys.readouterr().out
    ys, ps = [], []
    for cs in coarse:
        pred = model.evaluate(cs.fields, cs.grid)
        for c in model.components:
            ys.append(cs.targets[c].ravel())
            ps.append(pred[c].ravel())
    y, p = np.concatenate(ys), np.concatenate(ps)
    r2 = 1 - np.sum((y - p) ** 2) / np.sum((y - y.mean()) ** 2)
    assert f"r2 {r2:.4f}" in text
    assert f"correlation {np.corrcoef(y, p)[0, 1]:.4f}" in text


def test_apply_scores_training_and_held_out_snapshots_apart(tmp_path, coarse_file, capsys):
    # a coarse file made from the model's own input (same source checksum): snapshot 0 was
    # fitted, snapshot 1 held out; each part is scored on its own snapshots only
    path, cg, coarse = coarse_file
    model = fitted_model(coarse, cg, "flux:c")
    model.provenance.update(sha256="0" * 64, snapshots={"train": [0], "test": [1]})
    mpath = model.save(tmp_path / "m.json")
    assert main(["apply", str(mpath), str(path), "-o", str(tmp_path / "p.nc")]) == 0
    text = capsys.readouterr().out
    assert "1 snapshot(s) were used to fit it, 1 were held out" in text

    def r2_of(cs):  # r2 = 1 - SSE / SST (common practice), Frobenius weights
        pred = model.evaluate(cs.fields, cs.grid)
        y = np.concatenate([cs.targets[c].ravel() for c in model.components])
        p = np.concatenate([pred[c].ravel() for c in model.components])
        return 1 - np.sum((y - p) ** 2) / np.sum((y - y.mean()) ** 2)

    held = next(line for line in text.splitlines() if "held-out snapshots (1)" in line)
    train = next(line for line in text.splitlines() if "training snapshots" in line)
    assert f"r2 {r2_of(coarse[1]):.4f}" in held and "optimistic" in train
    assert f"r2 {r2_of(coarse[0]):.4f}" in train
    assert text.index(held) < text.index(train)  # the honest figure first


def test_apply_reads_plain_netcdf_fields(tmp_path, coarse_file, make_netcdf, capsys):
    path, cg, coarse = coarse_file
    model = fitted_model(coarse, cg, "force")
    mpath = model.save(tmp_path / "m.json")
    g = coarse[0].grid
    plain = make_netcdf({"U": np.stack([cs.fields["u"] for cs in coarse]),
                         "V": np.stack([cs.fields["v"] for cs in coarse])}, name="plain.nc",
                        coords={"time": [0.0, 1.0], "y": g.coords("y"), "x": g.coords("x")})
    out = tmp_path / "pred.nc"
    assert main(["apply", str(mpath), str(plain), "-o", str(out), "--var", "u=U",
                 "--var", "v=V"]) == 0
    assert "a priori on the" not in capsys.readouterr().out  # no exact targets there
    with xr.open_dataset(out) as ds:
        want = model.evaluate(coarse[1].fields, g)
        np.testing.assert_allclose(ds["force_y"].values[1], want["force_y"], rtol=1e-12)


def test_apply_errors_are_one_line(tmp_path, coarse_file, capsys):
    path, cg, coarse = coarse_file
    assert main(["apply", str(tmp_path / "none.json"), str(path), "-o",
                 str(tmp_path / "p.nc")]) == 2
    assert "error: no model file" in capsys.readouterr().err
    mpath = fitted_model(coarse, cg).save(tmp_path / "m.json")
    assert main(["apply", str(mpath), str(path), "-o", str(path)]) == 2
    assert "is the input file" in capsys.readouterr().err
    L = make_library("classic", "stress", ("z", "y", "x"))
    g3 = Grid.regular((8, 8, 8), 2 * np.pi)
    m3 = ClosureModel.from_fit(L, [0.1, 1.0], filter={"kind": "box", "ratio": 2}, grid=g3,
                               scheme="spectral", delta=0.5).save(tmp_path / "m3.json")
    assert main(["apply", str(m3), str(path), "-o", str(tmp_path / "p.nc")]) == 2
    assert "error: the model is for a grid with dims ('z', 'y', 'x')" in capsys.readouterr().err
    assert not (tmp_path / "p.nc").exists()
    # the input was never written
    with open_coarse(path) as src:
        assert src.n_snapshots == 2


def test_show_and_export_a_model_file(tmp_path, coarse_file, capsys):
    path, cg, coarse = coarse_file
    mpath = fitted_model(coarse, cg).save(tmp_path / "m.json")
    assert main(["show", str(mpath)]) == 0
    text = capsys.readouterr().out
    assert "Closure model for stress" in text and "gradient_model" in text
    assert "Scores (test): r2 0.5" in text and "a posteriori" in text
    out = tmp_path / "code" / "model.f90"
    assert main(["export", str(mpath), "--lang", "fortran", "-o", str(out)]) == 0
    assert "module closure_model_mod" in out.read_text()
    assert main(["export", str(mpath), "--lang", "c", "--name", "sgs"]) == 0
    assert "void sgs(" in capsys.readouterr().out
    # one default language for files and stored models: python
    assert main(["export", str(mpath)]) == 0
    assert "def closure_model(" in capsys.readouterr().out
    assert main(["export", str(mpath), "--lang", "cobol"]) == 2
    assert "unknown export language 'cobol'" in capsys.readouterr().err
    assert main(["export", str(mpath), "-o", str(mpath)]) == 2
    assert "is the model file" in capsys.readouterr().err


def test_show_model_and_export_model_stay_as_hidden_aliases(tmp_path, coarse_file, capsys):
    path, cg, coarse = coarse_file
    mpath = fitted_model(coarse, cg).save(tmp_path / "m.json")
    assert main(["show-model", str(mpath)]) == 0
    assert "Closure model for stress" in capsys.readouterr().out
    assert main(["export-model", str(mpath), "--lang", "c"]) == 0
    assert "void closure_model(" in capsys.readouterr().out
    assert main(["--help"]) == 0
    help_text = capsys.readouterr().out
    assert " show " in help_text and " export " in help_text
    assert "show-model" not in help_text and "export-model" not in help_text


class _FakeService:
    """Stands in for the HTTP client: one stored model, 404 for any other id."""

    def __init__(self, model):
        self.model_doc = model
        self.asked = []

    def __call__(self, server, token):
        return self

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def model(self, model_id):
        from closure.client import ServiceError

        self.asked.append(model_id)
        if model_id != "m-stored":
            raise ServiceError(f"no model {model_id} (HTTP 404)", status=404)
        return {"id": model_id, "model": self.model_doc.to_dict(),
                "summary": "stored summary", "created": "2026-12-02T07:30:00Z"}


def test_show_and_export_fetch_a_stored_model_id(tmp_path, coarse_file, capsys, monkeypatch):
    import closure.cli.service as service

    path, cg, coarse = coarse_file
    model = fitted_model(coarse, cg)
    fake = _FakeService(model)
    monkeypatch.setattr(service, "_client", fake)
    assert main(["show", "m-stored"]) == 0
    assert capsys.readouterr().out.strip() == "stored summary"
    assert main(["show", "m-stored", "--json"]) == 0
    assert '"id": "m-stored"' in capsys.readouterr().out
    out = tmp_path / "stored.py"
    assert main(["export", "m-stored", "--name", "sgs", "-o", str(out)]) == 0
    assert "def sgs(" in out.read_text()
    assert f"wrote {out} (python)" in capsys.readouterr().out
    # the same text as exporting the file itself
    mpath = model.save(tmp_path / "m.json")
    assert main(["export", str(mpath), "--name", "sgs"]) == 0
    assert capsys.readouterr().out == out.read_text()
    assert main(["show", "m-missing"]) == 2
    err = capsys.readouterr().err
    assert "'m-missing' is neither a model file" in err and "closure models" in err
    # a path that exists is a file: the service is not asked
    fake.asked.clear()
    assert main(["show", str(mpath)]) == 0
    assert fake.asked == []


def test_apply_on_a_coarse_file_with_land_leaves_land_out(tmp_path, make_netcdf, capsys):
    # a coarse file written with land holds NaN where subgrid terms see land: the prediction
    # is NaN exactly there, and the a priori figures use only the other points
    g, snaps = fine_snapshots(n=4, size=64)
    fluid = np.ones(g.shape, dtype=bool)
    fluid[:, :10] = False  # a straight coast
    u = np.stack([np.where(fluid, s.fields["u"], np.nan) for s in snaps])
    v = np.stack([np.where(fluid, s.fields["v"], np.nan) for s in snaps])
    fine = make_netcdf({"u": u, "v": v}, name="coast.nc")
    coarse, model = tmp_path / "c.nc", tmp_path / "m.json"
    assert main(["coarse-grain", str(fine), "--ratio", "2", "--width", "4", "-o",
                 str(coarse)]) == 0
    assert main(["discover", str(fine), "--ratio", "2", "--width", "4", "--scheme", "fd4",
                 "--library", "classic", "--resamples", "0", "-q", "-o", str(model)]) == 0
    capsys.readouterr()
    out = tmp_path / "p.nc"
    assert main(["apply", str(model), str(coarse), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "r2 " in text and "nan" not in text.lower()
    with xr.open_dataset(coarse) as c, xr.open_dataset(out) as p:
        excluded = np.isnan(c["tau_xx"].values)
        assert excluded.any() and not excluded.all()
        np.testing.assert_array_equal(np.isnan(p["tau_xx"].values), excluded)
