import json
import shutil
import subprocess

import numpy as np
import pytest

from closure.errors import UserError
from closure.export import export_model, inputs
from closure.grid import Grid
from closure.library import derivative_fields, make_library
from closure.model import ClosureModel

CASES = [("stress", ("y", "x")), ("force", ("z", "y", "x")), ("vorticity", ("y", "x")),
         ("flux:c", ("y", "x")), ("force", ("x",)), ("stress", ("z", "y", "x"))]


def model_for(target, dims, zero_every=None, scheme="spectral", seed=0):
    g = Grid.regular((8,) * len(dims), 2 * np.pi, dims, units="m")
    L = make_library("default", target, dims)
    rng = np.random.default_rng(seed)
    coef = rng.uniform(-1.5, 1.5, len(L))
    if zero_every:
        coef[::zero_every] = 0.0
    return ClosureModel.from_fit(L, coef, filter={"kind": "gaussian", "ratio": 4}, grid=g,
                                 scheme=scheme, delta=0.37)


def python_function(model):
    namespace = {}
    exec(compile(export_model(model, "python"), "<export>", "exec"), namespace)  # noqa: S102
    return namespace["closure_model"], namespace


def random_inputs(model, n=6, seed=1):
    """Rows of random derivative values and Delta; the first row has a zero velocity gradient
    (where the |S| terms' guard must give 0, not 0/0)."""
    rng = np.random.default_rng(seed)
    names = inputs(model)
    X = rng.standard_normal((n, len(names)))
    X[:, -1] = rng.uniform(0.3, 1.2, n)  # Delta
    first = [i for i, a in enumerate(names) if a.startswith("d") and "_d" in a
             and len(a.split("_d")[1]) == 1]
    X[0, first] = 0.0
    return names, X


def smooth(grid, names, seed=0):
    rng = np.random.default_rng(seed)
    mesh = grid.mesh()
    out = {}
    for n in names:
        out[n] = sum(rng.standard_normal() * np.sin(sum(int(k) * x for k, x in
                                                        zip(rng.integers(-2, 3, grid.ndim), mesh,
                                                            strict=True)) + rng.uniform(0, 6))
                     for _ in range(4))
    return out


# --- Python -----------------------------------------------------------------------------------

@pytest.mark.parametrize("target,dims", CASES)
def test_python_export_matches_model_evaluate(target, dims):
    m = model_for(target, dims, zero_every=3)
    fn, ns = python_function(m)
    assert ns["OUTPUTS"] == tuple(m.components)
    g = m.grid
    f = smooth(g, ["u", "v", "w", "c"][: len(dims)] + (["c"] if target.startswith("flux")
                                                        else []))
    syms = m.library.subset([t.name for t in m.active_terms]).symbols
    d = derivative_fields(syms, f, g, m.scheme)
    got = fn(**{s.name: d[s.name] for s in syms})
    want = m.evaluate(f, g)
    for k in want:
        scale = np.abs(want[k]).max()
        np.testing.assert_allclose(got[k], want[k], rtol=1e-12, atol=1e-12 * scale)
        assert got[k].shape == g.shape


def test_python_export_of_an_empty_model_returns_zeros():
    L = make_library("classic", "stress", ("x",))
    m = ClosureModel.from_fit(L, [0.0, 0.0], filter={"kind": "box", "ratio": 2},
                              grid=Grid.regular((8,), 1.0, ("x",)), scheme="fd2", delta=0.25)
    fn, _ = python_function(m)
    assert fn() == {"tau_xx": 0.0}
    assert "none: the model predicts zero" in export_model(m, "c")


# --- C and Fortran: compile, run, compare with the numpy function to 1e-12 -----------------

def run_c(tmp_path, model, X):
    if shutil.which("gcc") is None:
        pytest.skip("gcc is not installed: cannot compile the exported C")
    names, outs = inputs(model), model.components
    (tmp_path / "model.c").write_text(export_model(model, "c"))
    driver = "\n".join([
        "#include <stdio.h>",
        "void closure_model(" + ", ".join(["double"] * len(names) + ["double *"] * len(outs))
        + ");",
        "int main(void) {",
        f"  double in[{len(names)}], out[{len(outs)}];",
        "  for (;;) {",
        f"    for (int i = 0; i < {len(names)}; i++) if (scanf(\"%lf\", &in[i]) != 1) return 0;",
        "    closure_model(" + ", ".join([f"in[{i}]" for i in range(len(names))]
                                       + [f"&out[{j}]" for j in range(len(outs))]) + ");",
        f"    for (int j = 0; j < {len(outs)}; j++) printf(\"%.17g \", out[j]);",
        "    printf(\"\\n\");",
        "  }",
        "}",
    ])
    (tmp_path / "driver.c").write_text(driver)
    exe = tmp_path / "c_model"
    subprocess.run(["gcc", "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-pedantic",
                    "model.c", "driver.c", "-o", str(exe), "-lm"], cwd=tmp_path, check=True,
                   capture_output=True)
    text = "\n".join(" ".join(repr(float(v)) for v in row) for row in X)
    res = subprocess.run([str(exe)], input=text, capture_output=True, text=True, check=True)
    return np.array([[float(v) for v in line.split()] for line in res.stdout.splitlines()])


def gfortran():
    path = shutil.which("gfortran")
    if path is None:
        pytest.skip("gfortran is not installed (apt-get install -y gfortran): cannot compile "
                    "the exported Fortran")
    return path


def run_fortran(tmp_path, model, X):
    fc = gfortran()
    names, outs = inputs(model), model.components
    (tmp_path / "model.f90").write_text(export_model(model, "fortran"))
    lines = ["program driver", "  use closure_model_mod", "  implicit none",
             f"  double precision :: x({len(names)}), y({len(outs)})", "  integer :: ios",
             "  do", "    read(*, *, iostat=ios) x", "    if (ios /= 0) exit",
             "    call closure_model( &"]
    args = [f"x({i + 1})" for i in range(len(names))] + [f"y({j + 1})" for j in range(len(outs))]
    lines += [f"      {a}{', &' if i < len(args) - 1 else ')'}" for i, a in enumerate(args)]
    lines += ["    write(*, '(*(es26.17e3, 1x))') y", "  end do", "end program driver"]
    (tmp_path / "driver.f90").write_text("\n".join(lines) + "\n")
    exe = tmp_path / "f_model"
    subprocess.run([fc, "-std=f2008", "-O2", "-Wall", "model.f90", "driver.f90", "-o", str(exe)],
                   cwd=tmp_path, check=True, capture_output=True)
    text = "\n".join(" ".join(f"{v:.17e}" for v in row) for row in X)
    res = subprocess.run([str(exe)], input=text + "\n", capture_output=True, text=True,
                         check=True)
    return np.array([[float(v) for v in line.split()] for line in res.stdout.splitlines()])


def numpy_reference(model, X):
    fn, _ = python_function(model)
    names = inputs(model)
    got = fn(**{n: X[:, i] for i, n in enumerate(names)})
    return np.stack([got[c] for c in model.components], axis=1)


@pytest.mark.parametrize("target,dims", CASES)
@pytest.mark.parametrize("lang", ["c", "fortran"])
def test_compiled_export_matches_numpy(tmp_path, target, dims, lang):
    m = model_for(target, dims, zero_every=4, seed=2)
    names, X = random_inputs(m)
    ref = numpy_reference(m, X)
    got = (run_c if lang == "c" else run_fortran)(tmp_path, m, X)
    assert got.shape == ref.shape
    assert np.all(np.isfinite(got))
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())


def test_exports_of_a_one_dimensional_smagorinsky_force_handle_abs_and_zero(tmp_path):
    # d/dx (sqrt(2) |u_x| u_x) = 2 sqrt(2) |u_x| u_xx: a closed form (derived by hand)
    m = model_for("force", ("x",), seed=3)
    L = make_library("minimal", "force", ("x",))
    m = ClosureModel.from_fit(L, [1.0], filter={"kind": "box", "ratio": 2}, grid=m.grid,
                              scheme="fd2", delta=0.5)
    assert inputs(m) == ["du_dx", "d2u_dxx", "Delta"]
    X = np.array([[0.3, -2.0, 0.5], [-0.7, 1.5, 0.5], [0.0, 4.0, 0.5]])
    want = 2 * np.sqrt(2) * 0.25 * np.abs(X[:, 0]) * X[:, 1]
    np.testing.assert_allclose(numpy_reference(m, X)[:, 0], want, rtol=1e-14)
    np.testing.assert_allclose(run_c(tmp_path, m, X)[:, 0], want, rtol=1e-14)


# --- text ------------------------------------------------------------------------------------

def test_headers_say_target_filter_scheme_units_inputs_and_caution():
    m = model_for("stress", ("y", "x"), scheme="fd4")
    for lang in ("python", "c", "fortran"):
        text = export_model(m, lang)
        for needle in ("Closure model for the subgrid stress tau_ij", "Filter: gaussian",
                       "width Delta = 0.37", "Derivatives: fd4 scheme", "coordinates: m",
                       "d2u_dxy: d^2 u / dx dy", "Delta: filter width", "tau_xx, tau_xy",
                       "does not guarantee a stable", "a posteriori"):
            assert needle in text.replace("\n! ", " ").replace("\n * ", " ").replace(
                "\n# ", " "), (lang, needle)


def test_json_export_has_coefficients_and_expressions_only():
    m = model_for("force", ("y", "x"), zero_every=2)
    doc = json.loads(export_model(m, "json"))
    active = [t.name for t in m.active_terms]
    assert [t["name"] for t in doc["terms"]] == active
    t = doc["terms"][0]
    assert set(t) == {"name", "coefficient", "coefficient_scaled", "delta_power", "expression"}
    assert set(t["expression"]) == {"force_x", "force_y"}
    assert doc["inputs"][-1] == "Delta" and "a posteriori" in doc["caution"]


def test_export_errors(tmp_path):
    m = model_for("stress", ("x",))
    with pytest.raises(UserError, match="unknown export language 'rust'"):
        export_model(m, "rust")
    with pytest.raises(UserError, match="also a variable name"):
        export_model(m, "c", name="du_dx")
    terms = tmp_path / "t.yaml"
    terms.write_text("terms:\n  - name: both\n    delta_power: 2\n"
                     "    expression: 'Delta**2 * S_mag * (dc_d{i} + dC_d{i})'\n")
    L = make_library(str(terms), "flux:c", ("x",), scalars=("C",))
    m = ClosureModel.from_fit(L, [0.5], filter={"kind": "box", "ratio": 2},
                              grid=Grid.regular((8,), 1.0, ("x",)), scheme="fd2", delta=0.25)
    export_model(m, "c")  # C distinguishes case
    with pytest.raises(UserError, match="differ only in case"):
        export_model(m, "fortran")


def test_exports_carry_the_units_the_model_records():
    # units derived by dimensional analysis (common practice): d u/dx in s-1, d2u/dx2 in
    # m-1 s-1, tau_ij in (m s-1)^2, the Delta-scaled coefficient of a D^2 term dimensionless,
    # its dimensional coefficient in m2
    m = model_for("stress", ("y", "x"))
    d = m.to_dict()
    d["provenance"]["units"] = {"u": "m s-1", "v": "m s-1", "x": "m", "y": "m", "time": "s"}
    m = ClosureModel.from_dict(d)
    for lang in ("python", "c", "fortran"):
        text = export_model(m, lang).replace("\n! ", " ").replace("\n * ", " ").replace(
            "\n# ", " ")
        for needle in ("coordinates: m; velocity: m s-1; time: s", "du_dx: du/dx [s-1]",
                       "d2u_dxy: d^2 u / dx dy [m-1 s-1]", "Delta: filter width (coordinate "
                       "units) [m]", "tau_xy [m2 s-2]"):
            assert needle in text, (lang, needle)
        assert "not recorded" not in text
    doc = json.loads(export_model(m, "json"))
    assert doc["units"]["base"]["velocity"] == "m s-1"
    assert doc["units"]["outputs"] == {"tau_xx": "m2 s-2", "tau_xy": "m2 s-2",
                                       "tau_yy": "m2 s-2"}
    assert doc["units"]["inputs"]["Delta"] == "m"
    for t in m.active_terms:
        scaled = doc["units"]["coefficient_scaled"][t.name]
        if t.term.dimensionless:
            assert scaled == "1"
            p = t.delta_power
            assert doc["units"]["coefficient"][t.name] == ("1" if p == 0 else
                                                           "m" if p == 1 else f"m{p:g}")


def test_exports_say_which_units_were_not_recorded():
    m = model_for("vorticity", ("y", "x"))
    text = export_model(m, "c")
    assert "velocity: units not recorded" in text and "coordinates: m;" in text
    assert "vorticity_forcing [units not recorded]" in text
    doc = json.loads(export_model(m, "json"))
    assert doc["units"]["outputs"] == {"vorticity_forcing": None}
    assert doc["units"]["inputs"]["Delta"] == "m"
