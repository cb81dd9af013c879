import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest

from closure.errors import UserError
from closure.grid import Grid
from closure.library import design, make_library, predict
from closure.model import (
    CAUTION,
    MODEL_SCHEMA,
    MODEL_SCHEMA_VERSION,
    ClosureModel,
    validate_schema,
)


def smooth_fields(grid, names, seed=0):
    rng = np.random.default_rng(seed)
    mesh = grid.mesh()
    out = {}
    for n in names:
        a = np.zeros(grid.shape)
        for _ in range(4):
            k = rng.integers(-2, 3, size=grid.ndim)
            phase = rng.uniform(0, 2 * np.pi)
            a += rng.standard_normal() * np.cos(sum(ki * xi for ki, xi in zip(k, mesh,
                                                                             strict=True))
                                                + phase)
        out[n] = a
    return out


def make_model(target="stress", library="default", dims=("y", "x"), shape=(16, 16), delta=0.4,
               **kw):
    g = Grid.regular(shape, 2 * np.pi, dims, units="m")
    L = make_library(library, target, dims)
    coef = np.zeros(len(L))
    coef[0], coef[1] = -0.03, 0.9
    se = [0.001, 0.02] + [None] * (len(L) - 2)
    freq = [1.0, 0.85] + [0.1] * (len(L) - 2)
    args = dict(target=target, filter={"kind": "gaussian", "width": delta, "ratio": 4,
                                       "second_moment": {"x": delta**2 / 12,
                                                         "y": delta**2 / 12}},
                grid=g, scheme="fd4", delta=delta,
                provenance={"input": "fine.nc", "sha256": "ab" * 32, "variables": {"u": "U"},
                            "snapshots": {"train": [0, 1, 2], "test": [3]}},
                method="threshold", settings={"threshold": 0.05},
                scores={"train": {"r2": 0.91, "corr": 0.95}, "test": {"r2": 0.88, "corr": 0.94}},
                warnings=["terms strain and strain_laplacian are nearly collinear"])
    args.update(kw)
    return ClosureModel.from_fit(L, coef, se, freq, **args), g


# --- the file -------------------------------------------------------------------------------

def test_model_dict_matches_its_schema_and_records_everything():
    m, g = make_model()
    d = m.to_dict()
    assert validate_schema(d, MODEL_SCHEMA) == []
    assert d["schema_version"] == MODEL_SCHEMA_VERSION and d["format"] == "closure-model"
    assert d["components"] == ["tau_xx", "tau_xy", "tau_yy"]
    assert d["filter"]["kind"] == "gaussian" and d["delta"] == 0.4
    assert d["provenance"]["snapshots"] == {"train": [0, 1, 2], "test": [3]}
    assert d["provenance"]["closure_version"] and d["provenance"]["created"]
    assert d["library"]["terms"] == m.names
    t0, t1, t2 = d["terms"][:3]
    assert t0["name"] == "smagorinsky" and t0["active"] and not t2["active"]
    # coefficient = coefficient_scaled * Delta^p (p = 2 for both)
    assert math.isclose(t0["coefficient"], -0.03 * 0.4**2)
    assert math.isclose(t1["std_error"], 0.02 * 0.4**2)
    assert t2["std_error"] is None and t2["selection_frequency"] == 0.1
    # keyed by target component, like ``components`` and the exports
    assert set(t0["expression"]) == {"tau_xx", "tau_xy", "tau_yy"}
    assert "sqrt" in t0["expression"]["tau_xx"]
    assert t0["latex"]["tau_xx"].startswith(r"\Delta^{2}")
    assert d["caution"] == CAUTION and "a posteriori" in d["caution"]


def test_save_load_round_trip_is_exact(tmp_path):
    m, g = make_model()
    path = m.save(tmp_path / "sub" / "model.json")
    assert [p.name for p in path.parent.iterdir()] == ["model.json"]  # no temporary left
    back = ClosureModel.load(path)
    assert back.to_dict() == m.to_dict()
    np.testing.assert_array_equal(back.coefficients_scaled, m.coefficients_scaled)
    for a, b in zip(back.terms, m.terms, strict=True):
        assert a.term.components == b.term.components  # sympy expressions, exactly
    f = smooth_fields(g, ["u", "v"])
    ea, eb = back.evaluate(f, g), m.evaluate(f, g)
    for k in ea:
        np.testing.assert_array_equal(ea[k], eb[k])
    # saving again replaces the file atomically
    m2, _ = make_model(delta=0.5)
    m2.save(path)
    assert ClosureModel.load(path).delta == 0.5


def test_round_trip_of_user_terms_with_piecewise_and_scalars(tmp_path):
    terms = tmp_path / "t.yaml"
    terms.write_text("""
terms:
  - name: scaled_flux
    delta_power: 2
    expression: "Delta**2 * dc_d{i} * sqrt(dc_dx**2 + dc_dy**2)"
  - name: div_like
    delta_power: 2
    expression: "dx(Delta**2*S_mag*dc_dx) * kronecker_{i}x - (dc_dx - 2*dc_dy)*Delta**2*A_x{i}/2"
""")
    g = Grid.regular((8, 8), 2 * np.pi)
    L = make_library(str(terms), "flux:c", g.dims)
    m = ClosureModel.from_fit(L, [0.2, -0.1], filter={"kind": "box", "ratio": 2}, grid=g,
                              scheme="spectral", delta=0.7)
    assert "Piecewise" in m.to_dict()["terms"][1]["expression"]["flux_c_x"]
    back = ClosureModel.load(m.save(tmp_path / "m.json"))
    assert back.to_dict()["terms"] == m.to_dict()["terms"]
    assert back.scalars == ("c",)
    f = smooth_fields(g, ["u", "v", "c"])
    for k, a in m.evaluate(f, g).items():
        np.testing.assert_allclose(back.evaluate(f, g)[k], a, rtol=1e-14)


def test_evaluate_is_predict_with_the_model_scheme_and_delta():
    m, g = make_model()
    f = smooth_fields(g, ["u", "v"], seed=5)
    out = m.evaluate(f, g)
    ref = predict(m.library, m.coefficients_scaled, f, g, "fd4", 0.4)
    for k in ref:
        np.testing.assert_allclose(out[k], ref[k], rtol=1e-13)
    # the same numbers as the design columns with the Delta-scaled coefficients
    X = design(m.library, f, g, "fd4", 0.4)
    np.testing.assert_allclose(out["tau_xy"].ravel(), X[1] @ m.coefficients_scaled, rtol=1e-12)
    # and as the dimensional coefficients with Delta = 1
    X1 = design(m.library, f, g, "fd4", 1.0)
    np.testing.assert_allclose(out["tau_xy"].ravel(), X1[1] @ m.coefficients, rtol=1e-12)


def test_evaluate_on_another_grid_keeps_the_model_delta():
    m, g = make_model()
    g2 = Grid.regular((32, 32), 2 * np.pi)
    assert "keeps its filter width" in m.grid_warnings(g2)[0]
    f = smooth_fields(g2, ["u", "v"])
    np.testing.assert_allclose(m.evaluate(f, g2)["tau_xx"],
                               predict(m.library, m.coefficients_scaled, f, g2, "fd4",
                                       0.4)["tau_xx"])
    with pytest.raises(UserError, match="model is for a grid with dims"):
        m.evaluate({"u": np.zeros(8)}, Grid.regular((8,), 1.0, ("x",)))


def test_inactive_terms_are_not_evaluated(tmp_path):
    terms = tmp_path / "t.yaml"
    terms.write_text("""
include: classic
terms:
  - name: buoyant
    delta_power: 2
    expression: "Delta**2 * S_{i}{j} * dc_dx"
""")
    g = Grid.regular((8, 8), 2 * np.pi)
    L = make_library(str(terms), "stress", g.dims, scalars=("c",))
    f = smooth_fields(g, ["u", "v"])
    common = dict(filter={"kind": "gaussian", "ratio": 2}, grid=g, scheme="fd2", delta=0.5)
    off = ClosureModel.from_fit(L, [0.0, 1.0, 0.0], **common)
    assert [t.name for t in off.active_terms] == ["gradient_model"]
    off.evaluate(f, g)  # no 'c' needed
    on = ClosureModel.from_fit(L, [0.0, 1.0, 0.3], **common)
    with pytest.raises(UserError, match="field 'c'"):
        on.evaluate(f, g)


def test_with_delta_keeps_the_dimensionless_coefficients():
    m, _ = make_model()
    m2 = m.with_delta(0.8)
    np.testing.assert_array_equal(m2.coefficients_scaled, m.coefficients_scaled)
    np.testing.assert_allclose(m2.coefficients[:2], m.coefficients_scaled[:2] * 0.8**2)
    assert "filter width changed" in m2.warnings[-1]


def test_from_fit_rejects_bad_numbers():
    L = make_library("classic", "stress", ("x",))
    g = Grid.regular((8,), 1.0, ("x",))
    common = dict(filter={"kind": "box", "ratio": 2}, grid=g, scheme="fd2", delta=0.1)
    with pytest.raises(UserError, match="NaN or infinite"):
        ClosureModel.from_fit(L, [np.nan, 1.0], **common)
    with pytest.raises(ValueError, match="2 library terms"):
        ClosureModel.from_fit(L, [1.0], **common)
    with pytest.raises(UserError, match="positive number"):
        ClosureModel.from_fit(L, [1.0, 1.0], **{**common, "delta": 0.0})
    with pytest.raises(UserError, match="unknown derivative scheme"):
        ClosureModel.from_fit(L, [1.0, 1.0], **{**common, "scheme": "fd8"})


def test_summary_reads_well():
    m, _ = make_model()
    text = m.summary()
    assert "Closure model for stress (tau_xx, tau_xy, tau_yy)" in text
    assert "smagorinsky" in text and "-0.0048 +/- 0.00016" in text  # -0.03 * 0.4^2 +/- ...
    assert "-0.03 +/- 0.001 x Delta^2 [1]" in text
    assert "selected 85%" in text
    assert "Inactive terms: strain" in text
    lines = text.splitlines()
    start = lines.index("A priori scores    test   train")
    assert lines[start:start + 4] == ["A priori scores    test   train",
                                      "  r2             0.8800  0.9100",
                                      "  corr           0.9400  0.9500",
                                      "  test = held-out snapshots, train = fitted snapshots"]
    # the terms the default 2-D library left out, with their exact combinations
    assert "  strain_squared = 1/4 isotropic  (on incompressible fields)" in lines
    assert "nearly collinear" in text
    assert "does not guarantee a stable or accurate coarse simulation" in text
    assert "a posteriori" in text


# --- loading errors -------------------------------------------------------------------------

def test_load_errors_say_what_is_wrong(tmp_path):
    m, _ = make_model()
    good = m.to_dict()
    with pytest.raises(UserError, match="no model file"):
        ClosureModel.load(tmp_path / "missing.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    with pytest.raises(UserError, match="invalid JSON at line 1"):
        ClosureModel.load(bad)

    def load(d):
        p = tmp_path / "m.json"
        p.write_text(json.dumps(d))
        return ClosureModel.load(p)

    with pytest.raises(UserError, match="not a closure model file"):
        load({"format": "something-else"})
    with pytest.raises(UserError, match="schema version 3; .* reads versions 1, 2"):
        load({**good, "schema_version": 3})
    d = copy.deepcopy(good)
    d["scheme"] = "fd6"
    d["terms"][0]["coefficient_scaled"] = "big"
    del d["delta"]
    with pytest.raises(UserError) as err:
        load(d)
    msg = str(err.value)
    assert "$.scheme: must be one of ['spectral', 'fd2', 'fd4']" in msg
    assert "$.terms[0].coefficient_scaled: expected number" in msg
    assert "missing required field 'delta'" in msg
    d = copy.deepcopy(good)
    d["terms"][0]["expression"]["tau_xx"] = "Delta**2 * du_dq"
    with pytest.raises(UserError, match="unknown symbol 'du_dq'"):
        load(d)
    d = copy.deepcopy(good)
    d["terms"][0]["coefficient"] *= 2
    with pytest.raises(UserError, match="coefficient_scaled \\* delta \\*\\* delta_power"):
        load(d)
    d = copy.deepcopy(good)
    d["components"] = ["tau_xx"]
    with pytest.raises(UserError, match="do not match target stress"):
        load(d)


# --- the schema checker itself -----------------------------------------------------------------

def test_schema_checker_follows_json_schema_semantics():
    # expected outcomes from the JSON Schema 2020-12 Validation specification (sections 6.1
    # type/enum/const, 6.2 numeric bounds, 6.3 string length and pattern, 6.4 array items and
    # minItems, 6.5 object required / properties / additionalProperties)
    schema = {"type": "object", "required": ["a"], "additionalProperties": False,
              "properties": {"a": {"type": "integer", "minimum": 1},
                             "b": {"type": ["string", "null"], "pattern": "^x"},
                             "c": {"type": "array", "items": {"enum": [1, 2]}, "minItems": 1},
                             "d": {"const": "k"},
                             "e": {"type": "number", "exclusiveMinimum": 0, "maximum": 2},
                             "f": {"type": "object", "additionalProperties": {"type": "boolean"}}}}
    assert validate_schema({"a": 1, "b": None, "c": [2], "d": "k", "e": 2, "f": {"z": True}},
                           schema) == []
    assert validate_schema({"a": 2.0}, schema) == []  # 2.0 is an integer in JSON Schema
    cases = [
        ({}, "missing required field 'a'"),
        ({"a": 0}, "must be >= 1"),
        ({"a": True}, "expected integer"),  # booleans are not numbers
        ({"a": 1, "b": "yz"}, "does not match"),
        ({"a": 1, "c": []}, "at least 1 item"),
        ({"a": 1, "c": [3]}, "$.c[0]: must be one of [1, 2]"),
        ({"a": 1, "d": "j"}, "must be 'k'"),
        ({"a": 1, "e": 0}, "must be > 0"),
        ({"a": 1, "e": 2.5}, "must be <= 2"),
        ({"a": 1, "f": {"z": 1}}, "$.f.z: expected boolean"),
        ({"a": 1, "g": 1}, "$.g: unknown field"),
        ({"a": float("nan")}, "expected integer"),
        ([], "expected object"),
    ]
    for instance, message in cases:
        errors = validate_schema(instance, schema)
        assert any(message in e for e in errors), (instance, errors)


def test_schema_is_strict_about_term_records():
    m, _ = make_model()
    d = m.to_dict()
    d["terms"][0]["colour"] = "red"
    d["terms"][1]["selection_frequency"] = 1.5
    errors = validate_schema(d, MODEL_SCHEMA)
    assert any("$.terms[0].colour: unknown field" in e for e in errors)
    assert any("$.terms[1].selection_frequency: must be <= 1" in e for e in errors)


def test_summary_scores_table_of_a_pipeline_model():
    # the keys closure.pipeline.reduce stores: pooled metrics, per-component ones, transfers,
    # points, and the Smagorinsky-only reference fit
    test = {"r2": 0.99751, "correlation": 0.9988, "relative_error": 0.046164,
            "r2_tau_xx": 0.99718, "correlation_tau_xx": 0.9986, "relative_error_tau_xx": 0.04298,
            "r2_tau_xy": 0.9962, "correlation_tau_xy": 0.9981, "relative_error_tau_xy": 0.06087,
            "r2_tau_yy": 0.9966, "correlation_tau_yy": 0.9983, "relative_error_tau_yy": 0.0456,
            "energy_transfer_correlation": 0.96294, "energy_transfer_mean_ratio": None,
            "points": 8192}
    train = {"r2": 0.9981, "correlation": 0.999, "relative_error": 0.03992, "points": 24576}
    smag = {"r2": -0.151412, "correlation": 0.0106713, "relative_error": 0.99991,
            "energy_transfer_correlation": 0.12663, "points": 8192}
    m, _ = make_model(scores={"test": test, "train": train, "smagorinsky_only_test": smag})
    lines = m.summary().splitlines()
    start = lines.index(next(x for x in lines if x.startswith("A priori scores")))
    assert lines[start:start + 16] == [
        "A priori scores                   test    train  smagorinsky_only_test",
        "  r2                            0.9975   0.9981                -0.1514",
        "  correlation                   0.9988   0.9990                0.01067",
        "  relative_error               0.04616  0.03992                 0.9999",
        "  energy_transfer_correlation   0.9629        -                 0.1266",
        "  energy_transfer_mean_ratio       n/a        -                      -",
        "  points                          8192    24576                   8192",
        "  test = held-out snapshots, train = fitted snapshots",
        "  smagorinsky_only_test = the smagorinsky term alone, least squares on train, scored "
        "on test",
        "",
        "Per component (test)      r2  correlation  relative_error",
        "  tau_xx              0.9972       0.9986         0.04298",
        "  tau_xy              0.9962       0.9981         0.06087",
        "  tau_yy              0.9966       0.9983         0.04560",
        "",
        "Warnings:"]
    # a single split of a few numbers stays on one line
    m, _ = make_model(scores={"test": {"r2": 0.5}})
    assert "Scores (test): r2 0.5000" in m.summary()


def test_library_warnings_reach_the_model_and_its_file(tmp_path):
    terms = tmp_path / "t.yaml"
    terms.write_text("""
include: classic
terms:
  - name: smagorinsky_again
    delta_power: 2
    expression: "Delta**2 * sqrt(2*(S_xx**2 + 2*S_xy**2 + S_yy**2)) * S_{i}{j}"
""")
    g = Grid.regular((8, 8), 2 * np.pi)
    L = make_library(str(terms), "stress", g.dims)
    m = ClosureModel.from_fit(L, [0.1, 1.0, 0.0], filter={"kind": "box", "ratio": 2}, grid=g,
                              scheme="spectral", delta=0.5, warnings=["from the fit"])
    assert m.warnings[1] == "from the fit"
    assert "smagorinsky_again is an exact linear combination of smagorinsky" in m.warnings[0]
    assert m.warnings[0] in m.summary()
    back = ClosureModel.load(m.save(tmp_path / "m.json"))
    assert back.warnings == m.warnings  # read back once, not twice


OLD_FILE = Path(__file__).parent / "data" / "model_v1_force.json"


def test_a_version_1_model_file_loads_and_is_written_back_as_version_2(tmp_path):
    # tests/data/model_v1_force.json was written by closure before schema version 2: its term
    # expressions are keyed by library key ("x", "y"), the exports' by component ("force_x")
    old = json.loads(OLD_FILE.read_text())
    assert old["schema_version"] == 1 and set(old["terms"][0]["expression"]) == {"x", "y"}
    m = ClosureModel.load(OLD_FILE)
    assert m.names == ["div_smagorinsky", "div_gradient_model"]
    assert list(m.coefficients_scaled) == [-0.03, 0.9]
    d = m.to_dict()
    assert d["schema_version"] == MODEL_SCHEMA_VERSION == 2
    for t_old, t_new in zip(old["terms"], d["terms"], strict=True):
        assert t_new["expression"] == {"force_x": t_old["expression"]["x"],
                                       "force_y": t_old["expression"]["y"]}
        assert t_new["latex"] == {"force_x": t_old["latex"]["x"],
                                  "force_y": t_old["latex"]["y"]}
    # the same keys as the JSON export
    from closure.export import export_model

    exported = json.loads(export_model(m, "json"))
    assert set(exported["terms"][0]["expression"]) == set(d["terms"][0]["expression"])
    # the old and the converted model predict the same on the same fields
    back = ClosureModel.load(m.save(tmp_path / "m2.json"))
    g = m.grid
    f = smooth_fields(g, ["u", "v"])
    a, b = m.evaluate(f, g), back.evaluate(f, g)
    assert set(a) == {"force_x", "force_y"} and np.abs(a["force_x"]).max() > 0
    assert all(np.array_equal(a[c], b[c]) for c in a)


def test_a_model_file_with_the_wrong_expression_keys_is_refused(tmp_path):
    m, _ = make_model()
    d = m.to_dict()
    d["terms"][0]["expression"] = {"xx": "0", "xy": "0", "yy": "0"}  # version 1 keys in 2
    p = tmp_path / "m.json"
    p.write_text(json.dumps(d))
    with pytest.raises(UserError, match=r"terms\[0\] \('smagorinsky'\): expression must "
                                        "have the components tau_xx, tau_xy, tau_yy"):
        ClosureModel.load(p)
