"""Units and legibility of the report figures: axis labels carry the units derived from the
data (read back from the matplotlib Figures), lines that coincide get distinct styles and a
caption note saying why, the sweep has one panel per term with its spread printed."""

from __future__ import annotations

import json
import re
from types import SimpleNamespace

import numpy as np
import pytest

from closure.derivatives import derivative
from closure.grid import Grid
from closure.report import plots
from closure.report.page import coincidence_notes, write_report


def labels(fig) -> set[str]:
    out = set()
    for ax in fig.axes:
        if ax.get_visible():
            out |= {ax.get_xlabel(), ax.get_ylabel()}
    return out


# ---------------------------------------------------------------- figures


def test_plot_axes_carry_the_units_they_are_given():
    k = np.arange(1.0, 9.0)
    t = np.linspace(0, 1, 11)
    cases = [
        (plots.aposteriori_spectra({"a": (k, k**-3)}, k_units="m-1", units="m3 s-2"),
         {"wavenumber k (m-1)", "E(k) (m3 s-2)"}),
        (plots.time_series({"a": (t, np.exp(-t))}, "kinetic energy", time_units="s",
                           units="m2 s-2"), {"time (s)", "kinetic energy (m2 s-2)"}),
        (plots.transfer_spectra(k, {"exact": np.sin(k)}, "T", "energy drain T(k)",
                                k_units="m-1", units="m2 s-3"),
         {"wavenumber k (m-1)", "energy drain T(k) (m2 s-3)"}),
        (plots.apriori_hexbin({"tau_xy": k}, {"tau_xy": k}, units={"tau_xy": "m2 s-2"}),
         {"exact (m2 s-2)", "model (m2 s-2)"}),
        (plots.pdfs({"a": (k, 1 / k)}, "vorticity", units="s-1", density_units="s"),
         {"vorticity (s-1)", "probability density (s)"}),
        (plots.sweep_scores([1.0, 2.0], {"r2": [0.9, 0.8]}, length_units="m"),
         {"filter width D (m)", "held-out score (dimensionless)"}),
        (plots.coefficients(["a", "b"], [1.0, 2.0], [0.1, 0.1], units=["1", "1"]),
         {"scaled coefficient c / D^p, +/- 1 std error (dimensionless)"}),
    ]
    for fig, expected in cases:
        assert expected <= labels(fig), labels(fig)


def test_axes_without_units_stay_bare_and_mixed_coefficient_units_go_per_term():
    k = np.arange(1.0, 9.0)
    fig = plots.aposteriori_spectra({"a": (k, k**-3)})
    assert {"wavenumber k", "E(k)"} <= labels(fig)
    fig = plots.coefficients(["smag", "grad"], [0.1, 1.0], [0.01, 0.1],
                             units=["m2 s-1", "1"])
    ticks = [t.get_text() for t in fig.axes[0].get_yticklabels()]
    assert ticks == ["smag (m2 s-1)", "grad (dimensionless)"]


def _styles(ax, names):
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    return {n: (str(lines[n].get_linestyle()), lines[n].get_marker(),
                str(lines[n].get_markevery())) for n in names}


def test_coinciding_runs_get_distinct_line_styles_and_markers():
    t = np.linspace(0, 2, 41)
    e = np.exp(-t)
    series = {"reference": (t, 0.9 * e), "model": (t, 1.1 * e), "none": (t, e),
              "dynamic": (t, e.copy())}
    ax = plots.time_series(series, "kinetic energy", reference="reference").axes[0]
    s = _styles(ax, ["model", "none", "dynamic"])
    assert len({v[0] for v in s.values()}) == 3  # line styles
    assert len({v[1] for v in s.values()}) == 3  # markers
    assert s["none"][2] != s["dynamic"][2]        # markers at interleaved points
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    assert all(lines[n].get_markerfacecolor() == "none" for n in ("none", "dynamic"))
    k = np.arange(1.0, 17.0)
    ax = plots.aposteriori_spectra({"reference": (k, k**-3), "none": (k, 2 * k**-3),
                                    "dynamic": (k, 2 * k**-3)}, "reference").axes[0]
    s = _styles(ax, ["none", "dynamic"])
    assert s["none"][:2] != s["dynamic"][:2]
    ax = plots.pdfs({"none": (k, 1 / k), "dynamic": (k, 1 / k)}, "vorticity").axes[0]
    s = _styles(ax, ["none", "dynamic"])
    assert s["none"][:2] != s["dynamic"][:2]


def test_coinciding_finds_equal_and_near_equal_curves_only():
    t = np.linspace(0, 1, 20)
    y = np.sin(3 * t) + 2
    curves = {"a": (t, y), "b": (t, y.copy()), "c": (t, y * (1 + 5e-5)), "d": (t, 1.01 * y),
              "e": (t, np.r_[y[:10], [np.nan] * 10])}
    groups = plots.coinciding(curves)
    assert len(groups) == 1
    names, worst = groups[0]
    assert names == ["a", "b", "c"]
    # the largest difference relative to the largest value: 5e-5 * max(y) / (max(y) (1+5e-5))
    assert worst == pytest.approx(5e-5 / (1 + 5e-5), rel=1e-6)
    assert plots.coinciding({"a": (t, y), "d": (t, 1.01 * y)}) == []


def test_sweep_has_one_panel_per_term_and_prints_the_spread():
    delta = [0.2, 0.4, 0.8, 1.6]
    big = [1.00, 1.04, 1.09, 1.14]          # drifts 14% of its mean
    small = [0.004, 0.004, 0.004, 0.004]    # flat, 250 times smaller
    fig = plots.sweep_coefficients(delta, {"gradient_model": big, "second": small},
                                   units={"gradient_model": "1", "second": "1"},
                                   length_units="m")
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert len(axes) == 2
    titles = {ax.get_title().split(":")[0]: ax for ax in axes}
    assert set(titles) == {"gradient_model", "second"}
    expected = (max(big) - min(big)) / abs(np.mean(big))  # (max - min) / |mean|
    assert plots.spread(big) == pytest.approx(expected, rel=1e-12)
    assert f"spread {expected:.1%} of mean" in titles["gradient_model"].get_title()
    assert "spread 0.0% of mean" in titles["second"].get_title()
    for ax in axes:
        lo, hi = ax.get_ylim()
        assert lo <= 0 <= hi  # every panel includes 0: a drift shows in proportion
        assert ax.get_xlabel() == "filter width D (m)"
    lo, hi = titles["gradient_model"].get_ylim()
    assert (max(big) - min(big)) / (hi - lo) > 0.1  # visibly not flat
    assert plots.spread([np.nan, 0.3, np.nan]) != plots.spread([np.nan, 0.3, np.nan])  # NaN


# ---------------------------------------------------------------- the HTML report


class StressStandIn:
    """A model-like object with a recorded grid and input units: tau_ij = c D^2 d_k u_i
    d_k u_j (the gradient model's form)."""

    target = "stress"
    scheme = "spectral"

    def __init__(self, units=True, c=1 / 12, delta=0.5):
        self.c, self.delta = c, delta
        self.filter = {"kind": "gaussian", "width": delta, "ratio": 2}
        self.grid = Grid.regular((16, 16), 2 * np.pi, ("y", "x"), units="m" if units else None)
        self.provenance = {"units": {"u": "m s-1", "v": "m s-1", "time": "s"}} if units else {}
        self.terms = [{"name": "grad_u_grad_u", "coefficient": c * delta**2,
                       "coefficient_scaled": c, "std_error": 1e-4 * delta**2,
                       "selection_frequency": 0.9, "delta_power": 2,
                       "scaled_units": {} if units else None}]
        self.scores = {"test": {"all": {"r2": 0.8}}}
        self.warnings = []

    def evaluate(self, fields, grid):
        g = {(c, d): derivative(fields[c], grid, d) for c in ("u", "v") for d in grid.dims}
        k = self.c * self.delta**2
        return {"tau_xx": k * sum(g["u", d] ** 2 for d in grid.dims),
                "tau_xy": k * sum(g["u", d] * g["v", d] for d in grid.dims),
                "tau_yy": k * sum(g["v", d] ** 2 for d in grid.dims)}


def snapshots(model, n=1, size=16):
    g = Grid.regular((size, size), 2 * np.pi, ("y", "x"), units="m")
    rng = np.random.default_rng(0)
    out = []
    for i in range(n):
        u, v = rng.standard_normal((2, size, size))
        fields = {"u": u, "v": v, "vorticity": derivative(v, g, "x") - derivative(u, g, "y")}
        targets = {k: 1.2 * a for k, a in model.evaluate(fields, g).items()}
        out.append(SimpleNamespace(fields=fields, targets=targets, grid=g, index=i, time=None))
    return out


def les_with_a_clipped_dynamic_run():
    """'none' and 'dynamic' identical (the dynamic constant stayed negative, clipped to 0)."""
    t = np.linspace(0.0, 1.0, 11)
    k = np.arange(1.0, 9.0)
    runs = {}
    for label, rate in (("reference", 1.0), ("model", 1.1), ("none", 0.3), ("dynamic", 0.3)):
        e = np.exp(-rate * t)
        runs[label] = {"time": t.tolist(), "energy": e.tolist(), "enstrophy": (2 * e).tolist(),
                       "spectrum": {"k": k.tolist(), "E": (rate * k**-3).tolist()},
                       "vorticity_pdf": {"x": k.tolist(), "density": (rate / k).tolist()},
                       "blowup_time": None}
    runs["dynamic"]["diagnostics"] = {"dynamic_constant": [-0.0063, -0.0041, -0.0024]}
    return {"reference": "reference", "runs": runs,
            "settings": {"grid": {"units": "m"}}}


def sweep():
    entries = [{"delta": d, "width_cells": d / 0.2, "ratio": 2,
                "terms": {"grad_u_grad_u": {"coefficient_scaled": c, "std_error_scaled": 0.002,
                                            "scaled_units": {}}},
                "test_scores": {"r2": 0.9 - 0.05 * d}}
               for d, c in ((0.4, 1.0), (0.8, 1.07), (1.6, 1.14))]
    return {"kind": "sweep", "spec": {}, "entries": entries}


@pytest.fixture
def figures(monkeypatch):
    """Axis labels of every figure the report saves, by file name."""
    seen: dict[str, set[str]] = {}
    save = plots.save_png

    def record(fig, path, *a, **kw):
        seen[str(path).rsplit("/", 1)[-1]] = labels(fig)
        return save(fig, path, *a, **kw)

    monkeypatch.setattr(plots, "save_png", record)
    return seen


def captions(page: str) -> dict[str, str]:
    return dict(re.findall(r'<img src="([^"]+)".*?<figcaption>(.*?)</figcaption>', page))


def test_report_figures_and_tables_carry_the_data_units(tmp_path, figures):
    model = StressStandIn()
    out = write_report(model, tmp_path / "rep", snapshots(model),
                       les_with_a_clipped_dynamic_run(), sweep())
    expected = {
        "coefficients.png": {"scaled coefficient c / D^p, +/- 1 std error (dimensionless)"},
        "apriori_hexbin.png": {"exact (m2 s-2)", "model (m2 s-2)"},
        "transfer_energy.png": {"wavenumber k (m-1)", "energy drain T(k) (m2 s-3)"},
        "transfer_enstrophy.png": {"wavenumber k (m-1)", "enstrophy drain Z(k) (s-3)"},
        "sweep_coefficients.png": {"filter width D (m)", "c / D^p (dimensionless)"},
        "sweep_scores.png": {"filter width D (m)", "held-out score (dimensionless)"},
        "aposteriori_spectra.png": {"wavenumber k (m-1)", "E(k) (m3 s-2)"},
        "aposteriori_energy.png": {"time (s)", "kinetic energy (m2 s-2)"},
        "aposteriori_enstrophy.png": {"time (s)", "enstrophy (s-2)"},
        "vorticity_pdf.png": {"vorticity (s-1)", "probability density (s)"},
    }
    for name, want in expected.items():
        assert want <= figures[name], (name, figures[name])
    page = (out / "index.html").read_text()
    assert "units not recorded" not in page
    assert "<td>filter width D</td><td>0.5 m</td>" in page
    assert "length m, velocity m s-1, time s" in page
    assert "<td>m2</td>" in page  # the dimensional coefficient c of a D^2 term
    assert "blow-up time (s)" in page and "final kinetic energy (m2 s-2)" in page
    assert "<th>D (m)</th>" in page
    numbers = json.loads((out / "report.json").read_text())
    assert numbers["units"] == {"length": "m", "velocity": "m s-1", "time": "s",
                                "scalars": {}}
    # the sweep's spread: (max - min) / |mean| of 1.0, 1.07, 1.14
    assert numbers["sweep"]["spread"]["grad_u_grad_u"] == pytest.approx(0.14 / 1.07)
    assert "grad_u_grad_u 13.1%" in page and "<td>13.1%</td>" in page


def test_report_without_recorded_units_says_so_once_per_caption(tmp_path, figures):
    model = StressStandIn(units=False)
    les = les_with_a_clipped_dynamic_run()
    del les["settings"]
    out = write_report(model, tmp_path / "rep", snapshots(model), les)
    page = (out / "index.html").read_text()
    caps = captions(page)
    assert caps, "no figures"
    for name, cap in caps.items():
        assert cap.count("(units not recorded)") == 1, (name, cap)
    # labels are left bare, never invented
    assert {"wavenumber k", "E(k)"} <= figures["aposteriori_spectra.png"]
    assert "<td>filter width D</td><td>0.5 (units not recorded)</td>" in page


def test_report_notes_a_baseline_that_equals_another_and_why(tmp_path, figures):
    model = StressStandIn()
    out = write_report(model, tmp_path / "rep", les_result=les_with_a_clipped_dynamic_run())
    page = (out / "index.html").read_text()
    caps = captions(page)
    for name in ("aposteriori_spectra.png", "aposteriori_energy.png",
                 "aposteriori_enstrophy.png", "vorticity_pdf.png"):
        assert "&#x27;none&#x27; and &#x27;dynamic&#x27; coincide (identical" in caps[name]
        assert "dynamic constant clipped to 0 throughout" in caps[name]
        assert "model" not in caps[name].split("coincide")[0]
    # the full reason once, with the numbers `closure les` prints
    assert page.count("Germano-Lilly C = C_s^2 from -0.0063 to -0.0024 (negative values "
                      "clipped to 0)") == 1
    numbers = json.loads((out / "report.json").read_text())
    groups = numbers["aposteriori"]["coinciding"]
    assert {g["figure"] for g in groups} == {"spectrum", "energy", "enstrophy",
                                             "vorticity_pdf"}
    assert all(g["runs"] == ["none", "dynamic"] for g in groups)


def test_coincidence_notes_say_nothing_of_a_dynamic_constant_that_was_positive():
    t = np.linspace(0, 1, 5)
    raw = {"runs": {"dynamic": {"diagnostics": {"dynamic_constant": [0.01, 0.02]}}}}
    notes = coincidence_notes({"none": (t, t), "dynamic": (t, t)}, raw)
    assert len(notes) == 1
    group, short, full = notes[0]
    assert group == ["none", "dynamic"] and "clipped to 0 throughout" not in short
    assert "from 0.01 to 0.02" in full
    assert coincidence_notes({"none": (t, t), "dynamic": (t, 2 * t)}, raw) == []


def test_report_of_a_fitted_model_shows_its_grid_units(tmp_path):
    from closure.library import make_library
    from closure.model import ClosureModel

    g = Grid.regular((8, 8), 2 * np.pi, ("y", "x"), units="m")
    lib = make_library("default", "stress", ("y", "x"))
    coef = np.zeros(len(lib))
    coef[lib.names.index("strain")] = -0.02      # an eddy viscosity: m2 s-1 when time known
    coef[lib.names.index("gradient_model")] = 1.0
    model = ClosureModel.from_fit(lib, coef, filter={"kind": "gaussian", "ratio": 4}, grid=g,
                                  scheme="spectral", delta=0.37,
                                  provenance={"units": {"u": "m s-1", "v": "m s-1"}})
    page = (write_report(model, tmp_path / "rep") / "index.html").read_text()
    assert "<td>filter width D</td><td>0.37 m</td>" in page
    row = re.search(r"<code>strain</code>.*?</tr>", page).group(0)
    assert "<td>m2 s-1</td>" in row
    row = re.search(r"<code>gradient_model</code>.*?</tr>", page).group(0)
    assert "<td>m2</td>" in row and "<td>dimensionless</td>" in row
