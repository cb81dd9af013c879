"""Tests for closure.report: spectra (Parseval, closed forms), figures (PNG size, not blank),
the HTML report folder (links, caution), and gathering the report data from files."""

from __future__ import annotations

import struct
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from sklearn.metrics import r2_score

from closure.derivatives import derivative
from closure.grid import Grid
from closure.report import plots, spectra

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, W3C 2003, sections 5.2, 11.2.2:
    8-byte signature, then a chunk of length 13 named IHDR holding width, height big-endian)."""
    data = Path(path).read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    length, name = struct.unpack(">I4s", data[8:16])
    assert (length, name) == (13, b"IHDR")
    return struct.unpack(">II", data[16:24])


def assert_png(path: Path, width: int = 800, height: int = 600) -> None:
    assert png_size(path) == (width, height)
    pixels = matplotlib.image.imread(path)
    assert pixels.shape[:2] == (height, width)
    rgb = np.rint(pixels[..., :3].reshape(-1, 3) * 255).astype(np.uint32)
    colours = np.unique(rgb[:, 0] << 16 | rgb[:, 1] << 8 | rgb[:, 2])
    assert colours.size > 10, f"{path} is (nearly) blank"
    assert float(rgb.var()) > 0


def grid2(n=32, m=None, lengths=(2 * np.pi, 2 * np.pi)) -> Grid:
    return Grid.regular((n, m or n), lengths, dims=("y", "x"))


# ---------------------------------------------------------------- spectra


def test_cross_spectrum_single_mode_closed_form():
    # a = A cos(3x + 4y), b = B cos(3x + 4y + phi): mean(a b) = A B cos(phi) / 2, all of it in
    # the shell |k| = 5 (product-to-sum identity; exact for a mode resolved on the grid).
    g = grid2(32)
    y, x = g.mesh()
    a = 1.5 * np.cos(3 * x + 4 * y)
    b = 0.7 * np.cos(3 * x + 4 * y + 0.4)
    k, s = spectra.cross_spectrum(a, b, g)
    assert k[5] == pytest.approx(5.0)
    expected = 1.5 * 0.7 * np.cos(0.4) / 2
    assert s[5] == pytest.approx(expected, rel=1e-12)
    assert np.abs(np.delete(s, 5)).max() < 1e-14
    assert s.sum() == pytest.approx(np.mean(a * b), rel=1e-12)


@pytest.mark.parametrize("shape,lengths", [((24, 32), (1.0, 2.0)), ((15, 17), (3.0, 3.0)),
                                           ((16, 16), (2 * np.pi, 2 * np.pi))])
def test_cross_spectrum_parseval_random_fields(shape, lengths):
    # Parseval's theorem for the DFT: mean(a b) = sum_k Re(conj(a_hat) b_hat) / N^2
    # (Oppenheim & Schafer 2010, eq. 8.170), for odd and even axes and unequal sides.
    rng = np.random.default_rng(1)
    g = Grid.regular(shape, lengths, dims=("y", "x"))
    a, b = rng.standard_normal((2, *shape))
    _, s = spectra.cross_spectrum(a, b, g)
    assert s.sum() == pytest.approx(np.mean(a * b), rel=1e-12, abs=1e-14)


def test_energy_transfer_spectrum_sums_to_mean_pointwise_transfer():
    # Integration by parts on a periodic domain: mean(u_i d_j tau_ij) = -mean(tau_ij S_ij)
    # = mean(pi), pi = -tau_ij S_ij (Pope 2000, eq. 13.123 for the sign of the transfer);
    # exact for spectral derivatives, whose operator is skew-adjoint.
    rng = np.random.default_rng(3)
    g = grid2(24)
    vel = {d: rng.standard_normal(g.shape) for d in g.dims}
    tau = {name: rng.standard_normal(g.shape) for name in ("tau_xx", "tau_xy", "tau_yy")}
    force = spectra.stress_divergence(tau, g)
    _, t = spectra.energy_transfer_spectrum(vel, force, g)
    pi = 0.0
    for i in g.dims:
        for j in g.dims:
            s_ij = 0.5 * (derivative(vel[i], g, j) + derivative(vel[j], g, i))
            pi = pi - tau[spectra.stress_name(i, j)] * s_ij
    assert t.sum() == pytest.approx(np.mean(pi), rel=1e-10)


def test_energy_transfer_single_mode_closed_form():
    # u = cos(2y), force_x = c cos(2y): T has c/2 in shell 2 (mean of cos^2 is 1/2).
    g = grid2(16)
    y, x = g.mesh()
    vel = {"x": np.cos(2 * y), "y": np.zeros(g.shape)}
    force = {"x": 0.3 * np.cos(2 * y), "y": np.zeros(g.shape)}
    k, t = spectra.energy_transfer_spectrum(vel, force, g)
    assert t[2] == pytest.approx(0.15, rel=1e-12)
    assert np.abs(np.delete(t, 2)).max() < 1e-15


def test_energy_transfer_from_vorticity_single_mode():
    # omega = cos(3x + 4y) has streamfunction psi = omega / 25 (omega = -lap psi);
    # with g = omega: mean(psi g) = 1 / 50, all in the shell |k| = 5.
    g = grid2(32)
    y, x = g.mesh()
    w = np.cos(3 * x + 4 * y)
    _, t = spectra.energy_transfer_from_vorticity(w, w, g)
    assert t[5] == pytest.approx(1 / 50, rel=1e-12)
    assert t.sum() == pytest.approx(1 / 50, rel=1e-12)
    _, z = spectra.enstrophy_transfer_spectrum(w, 2 * w, g)
    assert z[5] == pytest.approx(1.0, rel=1e-12)


def test_curl_of_rotated_gradient_is_laplacian():
    # f = (-d_y phi, d_x phi) has d_x f_y - d_y f_x = lap phi; phi = sin(2x) cos(3y):
    # lap phi = -13 phi (vector identity, exact for a resolved mode).
    g = grid2(32)
    y, x = g.mesh()
    phi = np.sin(2 * x) * np.cos(3 * y)
    f = {"x": 3 * np.sin(2 * x) * np.sin(3 * y), "y": 2 * np.cos(2 * x) * np.cos(3 * y)}
    np.testing.assert_allclose(spectra.curl_2d(f, g), -13 * phi, atol=1e-12)


def test_transfer_spectra_refuse_non_periodic_grid():
    g = Grid(("y", "x"), (8, 8), (1.0, 1.0), periodic=False)
    with pytest.raises(Exception, match="periodic"):
        spectra.cross_spectrum(np.ones(g.shape), np.ones(g.shape), g)


# ---------------------------------------------------------------- figures


def test_hexbin_titles_match_sklearn(tmp_path):
    rng = np.random.default_rng(4)
    exact = {"tau_xx": rng.standard_normal(2000), "tau_xy": rng.standard_normal(2000)}
    model = {"tau_xx": 0.8 * exact["tau_xx"] + 0.3 * rng.standard_normal(2000),
             "tau_xy": 0.5 * exact["tau_xy"] + 0.1}
    fig = plots.apriori_hexbin(exact, model)
    titles = [ax.get_title() for ax in fig.axes if ax.get_visible() and ax.get_title()]
    for name in exact:
        # reference: scikit-learn r2_score and numpy's Pearson correlation
        r2 = r2_score(exact[name], model[name])
        corr = np.corrcoef(exact[name], model[name])[0, 1]
        expected = f"{name}: R^2 = {r2:.3f}, corr = {corr:.3f}"
        assert expected in titles
        stats = plots.agreement(exact[name], model[name])
        assert stats["r2"] == pytest.approx(r2, rel=1e-12)
        assert stats["correlation"] == pytest.approx(corr, rel=1e-12)
    assert_png(plots.save_png(fig, tmp_path / "h.png"))


def test_every_figure_is_an_800_by_600_png(tmp_path):
    k = np.arange(17.0)
    rng = np.random.default_rng(5)
    figures = {
        "transfer": plots.transfer_spectra(k, {"exact": np.sin(k), "model": 0.8 * np.sin(k)},
                                           "Energy transfer", "T(k)"),
        "coef": plots.coefficients(["a", "b", "c"], [0.1, -0.2, 0.05], [0.01, 0.03, None],
                                   [1.0, 0.6, 0.2]),
        "coef_nofreq": plots.coefficients(["a"], [0.1], [0.01]),
        "sweep_c": plots.sweep_coefficients([4, 8, 16], {"a": [0.1, 0.11, 0.12],
                                                         "b": [np.nan, 0.2, 0.3]},
                                            {"a": [0.01, 0.01, 0.02]}),
        "sweep_s": plots.sweep_scores([4, 8, 16], {"r2": [0.8, 0.7, 0.6]}),
        "spec": plots.aposteriori_spectra({"filtered DNS": (k, (k + 1.0) ** -3),
                                           "model": (k, 1.1 * (k + 1.0) ** -3)},
                                          reference="filtered DNS"),
        "ts": plots.time_series({"model": (k, np.cumsum(rng.random(17))),
                                 "none": (k, np.r_[np.ones(10), np.full(7, np.nan)])},
                                "kinetic energy", blowup={"none": 9.5, "model": None}),
    }
    for name, fig in figures.items():
        assert_png(plots.save_png(fig, tmp_path / f"{name}.png"))


def test_time_series_marks_blowup():
    t = np.arange(10.0)
    fig = plots.time_series({"a": (t, t), "b": (t, np.r_[t[:5], [np.nan] * 5])}, "energy",
                            blowup={"b": 4.5})
    ax = fig.axes[0]
    labels = [line.get_label() for line in ax.get_lines()]
    assert any("b (blow-up t = 4.5)" == lab for lab in labels)
    vertical = [line for line in ax.get_lines() if np.allclose(line.get_xdata(), 4.5)]
    assert vertical, "no vertical line at the blow-up time"


# ---------------------------------------------------------------- the HTML folder

from html.parser import HTMLParser  # noqa: E402
from types import SimpleNamespace  # noqa: E402

from closure.report.page import CAUTION, MARKER, write_report  # noqa: E402


class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.links: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href") and value is not None:
                self.links.append(value)


def check_report_folder(folder: Path) -> list[str]:
    """Every link is relative and names a file in the folder; every PNG is valid; the caution
    is on the page. Returns the linked file names."""
    page = (folder / "index.html").read_text(encoding="utf-8")
    assert CAUTION in page
    parser = _Links()
    parser.feed(page)
    assert "script" not in parser.tags
    for link in parser.links:
        assert "://" not in link and not link.startswith("/") and ".." not in link, link
        assert (folder / link).is_file(), f"{link} is linked but missing"
    for png in folder.glob("*.png"):
        assert png.name in parser.links, f"{png.name} is written but not shown"
        assert_png(png)
    return parser.links


class GradientStandIn:
    """A model-like object: tau_ij = C D^2 d_k u_i d_k u_j (the gradient model's form)."""

    target = "stress"
    scheme = "spectral"

    def __init__(self, c=1 / 12, delta=0.5):
        self.c, self.delta = c, delta
        self.filter = {"kind": "gaussian", "width": delta, "ratio": 2}
        self.terms = [{"name": "grad_u_grad_u", "coefficient": c * delta**2,
                       "coefficient_scaled": c, "std_error": 1e-4 * delta**2,
                       "selection_frequency": 0.9, "delta_power": 2}]
        self.scores = {"train": {"all": {"r2": 0.9}}, "test": {"all": {"r2": 0.8}}}
        self.warnings = ["terms a and b are collinear (correlation 0.999)"]

    def evaluate(self, fields, grid):
        g = {(c, d): derivative(fields[c], grid, d) for c in ("u", "v") for d in grid.dims}
        k = self.c * self.delta**2
        return {"tau_xx": k * sum(g["u", d] ** 2 for d in grid.dims),
                "tau_xy": k * sum(g["u", d] * g["v", d] for d in grid.dims),
                "tau_yy": k * sum(g["v", d] ** 2 for d in grid.dims)}


def stand_in_snapshots(model, n=2, size=16, seed=0):
    g = grid2(size)
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        u, v = rng.standard_normal((2, size, size))
        fields = {"u": u, "v": v, "vorticity": derivative(v, g, "x") - derivative(u, g, "y")}
        targets = {k: 1.2 * a + 0.01 * rng.standard_normal(a.shape)
                   for k, a in model.evaluate(fields, g).items()}
        out.append(SimpleNamespace(fields=fields, targets=targets, grid=g, index=5 + i,
                                   time=None))
    return out


def stand_in_les():
    t = np.linspace(0.0, 1.0, 11)
    k = np.arange(1.0, 9.0)
    runs = {}
    for label, rate, blow in (("filtered DNS", 1.0, None), ("model", 1.1, None),
                              ("no model", 0.3, 0.65)):
        e = np.exp(-rate * t)
        if blow is not None:
            e[t > blow] = np.nan
        runs[label] = {"time": t.tolist(), "energy": e.tolist(), "enstrophy": (2 * e).tolist(),
                       "spectrum": {"k": k.tolist(), "E": (rate * k**-3).tolist()},
                       "blowup_time": blow}
    return {"reference": "filtered DNS", "runs": runs}


def stand_in_sweep():
    entries = [{"delta": d, "width_cells": d / 0.2, "ratio": 2,
                "terms": {"grad_u_grad_u": {"coefficient_scaled": 1 / 12 + 0.001 * d,
                                            "std_error_scaled": 0.002}},
                "test_scores": {"all.r2": 0.9 - 0.05 * d}} for d in (0.4, 0.8, 1.6)]
    return {"kind": "sweep", "spec": {}, "entries": entries}


def test_write_report_full(tmp_path):
    model = GradientStandIn()
    snaps = stand_in_snapshots(model)
    out = write_report(model, tmp_path / "rep", snaps, stand_in_les(), stand_in_sweep())
    assert out == tmp_path / "rep"
    links = check_report_folder(out)
    for name in ("coefficients.png", "apriori_hexbin.png", "transfer_energy.png",
                 "transfer_enstrophy.png", "sweep_coefficients.png", "sweep_scores.png",
                 "aposteriori_spectra.png", "aposteriori_energy.png",
                 "aposteriori_enstrophy.png"):
        assert name in links
    page = (out / "index.html").read_text()
    assert "grad_u_grad_u" in page and "collinear" in page
    assert "0.65" in page  # the blow-up time of the run without a model
    numbers = __import__("json").loads((out / "report.json").read_text())
    # the a priori numbers in report.json are those of scikit-learn on the pooled points
    exact = np.concatenate([s.targets["tau_xy"].ravel() for s in snaps])
    pred = np.concatenate([model.evaluate(s.fields, s.grid)["tau_xy"].ravel() for s in snaps])
    assert numbers["apriori"]["agreement"]["tau_xy"]["r2"] == pytest.approx(
        r2_score(exact, pred), rel=1e-10)
    assert numbers["apriori"]["snapshots"] == [5, 6]
    # Parseval: each transfer spectrum sums to the domain mean of u_i force_i
    energy = next(t for t in numbers["apriori"]["transfers"] if t["name"] == "energy")
    assert energy["exact_total"] == pytest.approx(1.2 * energy["model_total"], rel=0.05)


def test_write_report_minimal_and_rewrite(tmp_path):
    model = GradientStandIn()
    out = write_report(model, tmp_path / "rep")
    links = check_report_folder(out)
    assert links == ["coefficients.png"]
    assert (out / MARKER).exists()
    # a second report replaces the first, and no temporary folders stay behind
    write_report(model, out, stand_in_snapshots(model, n=1))
    assert "apriori_hexbin.png" in check_report_folder(out)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rep"]


def test_write_report_refuses_a_foreign_folder(tmp_path):
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "precious.nc").write_text("x")
    with pytest.raises(Exception, match="not a closure report"):
        write_report(GradientStandIn(), tmp_path / "data")
    assert (tmp_path / "data" / "precious.nc").read_text() == "x"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data"]


def test_write_report_escapes_text(tmp_path):
    model = GradientStandIn()
    model.warnings = ["<script>alert(1)</script> & more"]
    out = write_report(model, tmp_path / "rep")
    page = (out / "index.html").read_text()
    assert "<script>" not in page and "&lt;script&gt;" in page


# ---------------------------------------------------------------- from files, real modules

import json  # noqa: E402

from closure.errors import UserError  # noqa: E402
from closure.report import build_report  # noqa: E402


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """Demo 2-D turbulence (closure.synth.turb2d, 32^2, 4 snapshots) and a model fitted on
    it (the last snapshot held out)."""
    from closure import pipeline
    from closure.spec import parse_spec
    from closure.synth import turb2d, write

    root = tmp_path_factory.mktemp("fitted")
    data = write(turb2d(n=32, snapshots=4, interval=0.2, spinup=0.5), root / "turb.nc")
    spec = parse_spec({"input": {"path": str(data)}, "filter": {"ratio": 2},
                       "fit": {"resamples": 2}})
    model = pipeline.discover(spec)
    path = model.save(root / "model.json")
    return {"root": root, "data": data, "model": model, "path": path}


def test_build_report_from_model_file(fitted, tmp_path):
    out = build_report(fitted["path"], tmp_path / "rep")
    links = check_report_folder(out)
    assert {"coefficients.png", "apriori_hexbin.png", "transfer_energy.png",
            "transfer_enstrophy.png"} <= set(links)
    numbers = json.loads((out / "report.json").read_text())
    model = fitted["model"]
    test = model.provenance["snapshots"]["test"]
    assert numbers["apriori"]["snapshots"] == test
    # the report re-reads and re-coarse-grains the held-out snapshots itself; its pooled R^2
    # equals scikit-learn's on those points, and the model's own held-out score (computed
    # from sufficient statistics, another code path)
    from closure.filters import make_coarse_graining
    from closure.io import open_fields
    from closure.residuals import coarse_grain_snapshot

    with open_fields(fitted["data"]) as src:
        cg = make_coarse_graining("gaussian", src.grid, 2)
        snaps = [coarse_grain_snapshot(src.snapshot(i), cg) for i in test]
    for comp in model.components:
        exact = np.concatenate([s.targets[comp].ravel() for s in snaps])
        pred = np.concatenate([model.evaluate(s.fields, s.grid)[comp].ravel() for s in snaps])
        got = numbers["apriori"]["agreement"][comp]["r2"]
        assert got == pytest.approx(r2_score(exact, pred), rel=1e-9)
        assert got == pytest.approx(model.scores["test"][f"r2_{comp}"], rel=1e-6)
    # the transfer spectra sum to the domain means of the pointwise transfers (Parseval), so
    # their model/exact ratio is the model's held-out mean-transfer ratio
    for t in numbers["apriori"]["transfers"]:
        ratio = model.scores["test"][f"{t['name']}_transfer_mean_ratio"]
        assert t["model_total"] / t["exact_total"] == pytest.approx(ratio, rel=1e-6)
    page = (out / "index.html").read_text()
    for r in [t for t in model.to_dict()["terms"] if t["active"]]:
        assert r["name"] in page
    assert "held-out snapshots" in page


def test_build_report_without_the_input_file(fitted, tmp_path):
    d = fitted["model"].to_dict()
    d["provenance"]["input"] = str(tmp_path / "gone.nc")
    out = build_report(d, tmp_path / "rep")
    assert check_report_folder(out) == ["coefficients.png"]
    assert "gone.nc is not available here" in (out / "index.html").read_text()


def test_build_report_notes_a_different_input(fitted, tmp_path):
    from closure.synth import turb2d, write

    other = write(turb2d(n=32, snapshots=4, interval=0.2, spinup=0.5, seed=7),
                  tmp_path / "other.nc")
    out = build_report(fitted["path"], tmp_path / "rep", other)
    assert "apriori_hexbin.png" in check_report_folder(out)
    assert "not the one the model was fitted on" in (out / "index.html").read_text()


def test_build_report_refuses_a_mismatched_grid(fitted, tmp_path):
    from closure.synth import turb2d, write

    other = write(turb2d(n=16, snapshots=2, interval=0.2, spinup=0.2), tmp_path / "small.nc")
    with pytest.raises(UserError, match="differs from the model's training grid"):
        build_report(fitted["path"], tmp_path / "rep", other)
    assert not (tmp_path / "rep").exists()


def test_report_command(fitted, tmp_path, capsys):
    from closure.cli import main

    les = tmp_path / "les.json"
    les.write_text(json.dumps(stand_in_les()))
    rc = main(["report", str(fitted["path"]), "-o", str(tmp_path / "rep"), "--les", str(les),
               "--snapshots", "2-3", "-q"])
    assert rc == 0
    assert capsys.readouterr().out.strip() == str(tmp_path / "rep" / "index.html")
    links = check_report_folder(tmp_path / "rep")
    assert "aposteriori_spectra.png" in links
    numbers = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert numbers["apriori"]["snapshots"] == [2, 3]


@pytest.mark.parametrize("args,message", [
    (["missing.json"], "no model file"),
    (["MODEL", "--snapshots", "1,a"], "--snapshots expects indices like 0,2,5-9"),
    (["MODEL", "--snapshots", "9"], "out of range"),
    (["MODEL", "--les", "missing-les.json"], "no a posteriori result file"),
])
def test_report_command_user_errors(fitted, tmp_path, capsys, args, message):
    from closure.cli import main

    args = [str(fitted["path"]) if a == "MODEL" else a for a in args]
    rc = main(["report", *args, "-o", str(tmp_path / "rep")])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and message in err
    assert not (tmp_path / "rep").exists()


def test_report_with_a_real_a_posteriori_comparison(fitted, tmp_path):
    from closure.les import simulate

    comparison = simulate(fitted["model"], fitted["data"], baselines=["none", "smagorinsky"])
    out = build_report(fitted["path"], tmp_path / "rep", les=comparison)
    links = check_report_folder(out)
    for name in ("aposteriori_spectra.png", "aposteriori_energy.png",
                 "aposteriori_enstrophy.png", "vorticity_pdf.png"):
        assert name in links
    summary = json.loads((out / "report.json").read_text())["aposteriori"]
    assert set(summary["runs"]) == set(comparison.to_dict()["runs"])
    for label, run in comparison.runs.items():
        assert summary["runs"][label]["final_energy"] == pytest.approx(float(run.energy[-1]))
        assert summary["runs"][label]["mean_energy_error"] == pytest.approx(
            comparison.metrics[label]["mean_energy_error"])


def test_moments_merge_matches_scikit_learn_despite_a_large_mean():
    # pooled R^2 (scikit-learn r2_score) and Pearson correlation (numpy corrcoef) from merged
    # per-chunk moments; a mean 1e6 times the spread would ruin naive sums of squares
    from closure.report.apriori import Moments

    rng = np.random.default_rng(6)
    y = 1e6 + rng.standard_normal(30000)
    p = y + 0.3 * rng.standard_normal(30000)
    chunks = np.array_split(np.arange(y.size), 7)
    total = sum((Moments.of(y[c], p[c]) for c in chunks), Moments())
    got = total.agreement()
    assert got["r2"] == pytest.approx(r2_score(y, p), rel=1e-9)
    assert got["correlation"] == pytest.approx(np.corrcoef(y, p)[0, 1], rel=1e-9)


def test_apriori_scatter_is_capped_but_scores_use_every_point():
    from closure.report.apriori import apriori_data

    model = GradientStandIn()
    snaps = stand_in_snapshots(model, n=3, size=16)
    data = apriori_data(model, snaps, max_points=200)
    assert data.stride > 1 and data.exact["tau_xx"].size <= 200
    exact = np.concatenate([s.targets["tau_xx"].ravel() for s in snaps])
    pred = np.concatenate([model.evaluate(s.fields, s.grid)["tau_xx"].ravel() for s in snaps])
    assert data.agreement()["tau_xx"]["r2"] == pytest.approx(r2_score(exact, pred), rel=1e-10)
    assert any("every" in n for n in data.notes)
    np.testing.assert_array_equal(data.exact["tau_xx"], exact[::data.stride])


# ---------------------------------------------------------------- long runs and selection

def test_long_run_figures_are_pngs_with_the_band_the_stability_and_the_front(tmp_path):
    k = np.arange(1.0, 17.0)
    e = k ** -3.0
    fig = plots.long_run_spectra({"reference": (k, e), "model": (k, 1.2 * e)}, "reference",
                                 band=(k, 0.5 * e, 2.0 * e))
    ax = fig.axes[0]
    assert any("range of the snapshots" in h.get_label() for h in ax.collections)
    assert_png(plots.save_png(fig, tmp_path / "spec.png"))
    fig = plots.stability_lines({"model": {"duration": 10.0, "stable": True},
                                 "none": {"duration": 10.0, "stable": False,
                                          "blowup_time": 3.5}})
    texts = [t.get_text() for t in fig.axes[0].texts]
    assert "stable for 10" in texts and "blew up at 3.5" in texts
    ends = sorted(max(line.get_xdata()) for line in fig.axes[0].get_lines())
    assert ends[0] == 3.5 and ends[-1] == 10.0
    plots.save_png(fig, tmp_path / "stab.png")
    cands = [{"label": "a", "n_terms": 1, "score": None, "apriori": {"test": {
                 "relative_error": 0.5}}, "long_run": {"stable": False}},
             {"label": "b", "n_terms": 2, "score": 0.3, "apriori": {"test": {
                 "relative_error": 0.4}}, "long_run": {"stable": True}}]
    fig = plots.selection_front(cands, "b")
    right = fig.axes[1]
    # the unstable candidate sits at the top of the long-run panel, drawn as x
    xs = [line for line in right.get_lines() if line.get_marker() == "x"]
    assert xs and xs[0].get_ydata()[0] == pytest.approx(1.2 * 0.3)
    assert_png(plots.save_png(fig, tmp_path / "front.png"))


def test_report_with_long_runs_and_a_model_chosen_by_coarse_runs(fitted, tmp_path):
    from closure.les import simulate
    from closure.selection import Candidate, select_by_coarse_runs

    model = fitted["model"]
    names = tuple(model.library.names)
    unstable = tuple(5.0 if n == "smagorinsky" else 0.0 for n in names)
    cands = [Candidate("unstable", 0.0, 0.0, unstable, names, {"test": {"relative_error": 2}}),
             Candidate("fitted", 0.0, 0.0, tuple(float(c) for c in model.coefficients_scaled),
                       names, {"test": {"relative_error": 0.5}})]
    selection, chosen = select_by_coarse_runs(model, cands, fitted["data"], long_duration=1.0,
                                              spinup=0.2)
    assert selection.chosen == "fitted"
    comparison = simulate(chosen, fitted["data"], baselines=["none"], long_duration=1.0,
                          spinup=0.2)
    out = write_report(chosen, tmp_path / "rep", les_result=comparison)
    links = check_report_folder(out)
    for name in ("long_run_spectra.png", "long_run_vorticity_pdf.png",
                 "long_run_stability.png", "selection_front.png"):
        assert name in links
    page = (out / "index.html").read_text()
    assert "Selection by coarse runs" in page and "Chosen: <code>fitted</code>" in page
    assert "does not guarantee a stable or accurate coarse simulation" in page
    # turb2d states the fine run's cost: the page gives the coarse/fine ratio
    assert "wall-clock time (s)" in page and "The fine run took" in page
    numbers = json.loads((out / "report.json").read_text())
    assert numbers["selection"]["chosen"] == "fitted"
    assert numbers["aposteriori"]["long_runs"]["model"]["duration"] == 1.0
    # the band is the range of the reference snapshots' spectra, computed directly here
    from closure.les import coarse_data
    from closure.report.aposteriori import as_runs
    from closure.report.page import reference_band
    from closure.spectral import energy_spectrum

    band = reference_band(as_runs(comparison.to_dict()))
    data = coarse_data(fitted["data"], "gaussian", 2, None, "grid", None)
    direct = np.array([energy_spectrum([f["u"], f["v"]], data.grid)[1] for f in data.fields])
    # the solver's reference is dealiased (2/3 rule): compare on the shells it keeps
    # (the mean mode k = 0 holds round-off only)
    keep = (band[0] > 0) & (band[0] < data.grid.shape[0] / 3 - 1)
    np.testing.assert_allclose(band[2][keep], direct.max(axis=0)[keep], rtol=1e-8)
    np.testing.assert_allclose(band[1][keep], direct.min(axis=0)[keep], rtol=1e-8)


def test_cost_rows_ratio_when_the_file_states_the_fine_run(fitted):
    """The coarse/fine cost is (coarse wall s per simulated s) / (fine wall s per simulated
    s), the fine figures being the ones turb2d wrote in the file (closure.synth run_cost)."""
    import xarray as xr

    from closure.les import simulate
    from closure.report.page import cost_rows

    comparison = simulate(fitted["model"], fitted["data"], long_duration=0.5, spinup=0.1)
    raw = comparison.to_dict()
    with xr.open_dataset(fitted["data"]) as ds:
        fine_rate = ds.attrs["wall_seconds"] / ds.attrs["simulated_time"]
    rows, text = cost_rows(raw)
    run = raw["runs"]["model"]
    expected = run["wall_seconds"] / run["long_run"]["reached"] / fine_rate
    assert [r[0] for r in rows] == ["model"]
    assert rows[0][4] == pytest.approx(expected, rel=1e-12)
    assert "The fine run took" in text and "as its file states" in text
    # a file that does not state it: no ratio, and the text says why
    raw["settings"]["fine_cost"] = {"steps": 10}
    rows, text = cost_rows(raw)
    assert rows[0][4] is None and "does not state the fine run's wall-clock" in text
