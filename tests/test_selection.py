"""Tests for closure.selection (choosing a closure by coarse runs, in process)."""

from types import SimpleNamespace

import numpy as np
import pytest

from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.selection import (
    Candidate,
    candidate_model,
    choose,
    plan_candidates,
    select_by_coarse_runs,
)
from closure.synth import turb2d, write

TWO_PI = 2 * np.pi


def record(label, n, stable, spectrum, pdf):
    return {"label": label, "n_terms": n,
            "long_run": {"stable": stable, "spectrum_error": spectrum,
                         "vorticity_pdf_distance": pdf}}


def test_choose_takes_the_sparsest_stable_candidate_within_the_tolerance():
    records = [record("a", 1, False, 0.01, 0.01),   # best score, but blew up
               record("b", 2, True, 0.30, 0.10),    # 0.40: outside 10 % of 0.30
               record("c", 3, True, 0.25, 0.07),    # 0.32: within 10 % of 0.30
               record("d", 4, True, 0.20, 0.10)]    # 0.30: the best stable
    assert choose(records, 0.1) == "c"
    assert choose(records, 0.5) == "b"
    assert choose(records, 0.0) == "d"
    assert choose([record("a", 1, False, 0.1, 0.1)]) is None
    with pytest.raises(OptionError, match="tolerance"):
        choose(records, -1)


def test_plan_candidates_follows_each_path_sparsest_first():
    terms = ("a", "b", "c")
    fit = SimpleNamespace(terms=terms, cv=SimpleNamespace(mean=np.array([1.0, 2.0, 3.0, 4.0])),
                          path=SimpleNamespace(
                              parameters=np.array([0.0, 0.1, 0.2, 0.3]),
                              coefficients=np.array([[1.0, 2.0, 3.0], [1.0, 0.0, 3.0],
                                                     [1.1, 0.0, 3.1], [0.0, 0.0, 0.0]]),
                              supports=np.array([[1, 1, 1], [1, 0, 1], [1, 0, 1], [0, 0, 0]],
                                                dtype=bool)))
    out = plan_candidates({0.0: fit, 1.0: fit}, max_per_path=2)
    assert [c.label for c in out] == ["w0-2terms", "w0-3terms", "w1-2terms", "w1-3terms"]
    assert out[0].coefficients == (1.0, 0.0, 3.0) and out[0].apriori["cv_error"] == 2.0
    assert out[0].active_terms == ["a", "c"] and out[1].n_terms == 3
    assert plan_candidates({0.0: fit}, max_per_path=1)[0].parameter == 0.1


def test_selection_skips_a_candidate_that_blows_up(tmp_path):
    # constructed case: the sparsest candidate is an anti-diffusive Smagorinsky term (energy
    # injected at every scale: it must blow up); the other is Smagorinsky with the usual
    # negative sign (tau = -2 (C_s D)^2 |S| S, C_s = 0.17) plus the gradient model: stable
    from closure.filters import make_coarse_graining
    from closure.library import make_library
    from closure.model import ClosureModel

    path = tmp_path / "dns.nc"
    write(turb2d(n=48, snapshots=3, interval=0.3, spinup=0.6, viscosity=2e-3,
                 forcing_wavenumber=3, seed=2), path)
    fine = Grid.regular((48, 48), TWO_PI, dims=("y", "x"))
    cg = make_coarse_graining("gaussian", fine, 2, 4.0)
    lib = make_library("default", "stress", ("y", "x"))
    names = list(lib.names)

    def coef(**values):
        return tuple(float(values.get(n, 0.0)) for n in names)

    base = ClosureModel(lib, coef(gradient_model=1.0), filter=cg, grid=cg.coarse,
                        scheme="spectral", delta=cg.delta)
    candidates = [
        Candidate("anti", 0.0, 0.0, coef(smagorinsky=5.0), tuple(names)),
        Candidate("stable", 0.0, 0.0, coef(smagorinsky=-2 * 0.17**2, gradient_model=1.0),
                  tuple(names)),
    ]
    selection, model = select_by_coarse_runs(base, candidates, path, long_duration=2.0,
                                             spinup=0.5)
    by = {r["label"]: r for r in selection.candidates}
    assert by["anti"]["long_run"]["stable"] is False
    assert by["anti"]["long_run"]["blowup_time"] is not None
    assert by["stable"]["long_run"]["stable"] is True
    assert selection.chosen == "stable"
    # every candidate ran the fine run's own physics, read from the file turb2d wrote
    for r in selection.candidates:
        assert r["physics"]["viscosity"] == 2e-3 and r["physics"]["drag"] == 0.1
        assert r["physics"]["forcing"]["forcing_wavenumber"] == 3.0
        assert r["physics"]["assumed_physics"] == [] and r["wall_seconds"] > 0
    assert model.coefficients_scaled.tolist() == list(candidates[1].coefficients)
    recorded = model.settings["aposteriori_selection"]
    assert recorded["chosen"] == "stable" and len(recorded["candidates"]) == 2
    assert "chosen" in selection.table()
    with pytest.raises(UserError, match="no candidate"):
        select_by_coarse_runs(base, [], path, long_duration=1.0)
    with pytest.raises(UserError, match="library terms"):
        candidate_model(base, Candidate("x", 0, 0, (1.0,), ("other",)))


def test_discover_and_select_runs_the_path_candidates(tmp_path):
    from closure.selection import discover_and_select
    from closure.spec import parse_spec

    path = tmp_path / "dns.nc"
    write(turb2d(n=48, snapshots=6, interval=0.3, spinup=0.6, viscosity=2e-3,
                 forcing_wavenumber=3, seed=2), path)
    spec = parse_spec({"input": {"path": str(path)}, "filter": {"kind": "gaussian",
                                                                 "ratio": 2},
                       "fit": {"resamples": 0, "folds": 2}})
    apriori, selection, chosen = discover_and_select(spec, long_duration=1.0, spinup=0.3,
                                                     transfer_weights=(0.0, 1.0),
                                                     max_per_path=2)
    assert 1 <= len(selection.candidates) <= 4
    for r in selection.candidates:
        assert "test" in r["apriori"] and r["long_run"]["duration"] == 1.0
    # this short run of gradient-type candidates is stable: one is chosen, and the record of
    # every candidate travels with the model file
    assert selection.chosen == choose(selection.candidates, selection.tolerance)
    assert chosen is not None and "test" in chosen.scores
    d = chosen.to_dict()
    assert d["settings"]["aposteriori_selection"]["chosen"] == selection.chosen
    assert len(d["settings"]["aposteriori_selection"]["candidates"]) == len(
        selection.candidates)


def test_the_spec_carries_the_selection_without_changing_earlier_fingerprints():
    from closure.spec import parse_spec, parse_sweep_spec

    plain = parse_spec({"input": {"path": "a.nc"}})
    fp = plain.fingerprint()
    # a job that selects a priori keeps the fingerprint it had before these fields existed
    assert set(fp["fit"]) == {"method", "test_fraction", "resamples", "transfer_weight", "seed",
                              "folds", "selection"}
    spec = parse_spec({"input": {"path": "a.nc"},
                       "fit": {"select": "aposteriori", "duration": 3.0, "spinup": 1.0}})
    assert spec.fit.transfer_weights == [0.0, 1.0] and spec.fit.tolerance == 0.1
    assert spec.fingerprint()["fit"]["duration"] == 3.0
    longer = parse_spec({"input": {"path": "a.nc"},
                         "fit": {"select": "aposteriori", "duration": 6.0, "spinup": 1.0}})
    assert longer.fingerprint() != spec.fingerprint()
    with pytest.raises(OptionError, match="fit.duration"):
        parse_spec({"input": {"path": "a.nc"}, "fit": {"select": "aposteriori"}})
    with pytest.raises(OptionError, match="shorter than"):
        parse_spec({"input": {"path": "a.nc"},
                    "fit": {"select": "aposteriori", "duration": 1.0, "spinup": 2.0}})
    with pytest.raises(OptionError, match="per_level"):
        parse_spec({"input": {"path": "a.nc", "levels": [0, 1], "per_level": True},
                    "fit": {"select": "aposteriori", "duration": 1.0}})
    with pytest.raises(OptionError, match="a priori"):
        parse_sweep_spec({"discovery": spec.model_dump(mode="json"), "widths": [2.0]})
    sweep = parse_sweep_spec({"discovery": plain.model_dump(mode="json"), "widths": [2.0]})
    assert "select" not in sweep.fingerprint()["discovery"]["fit"]


def test_discover_cli_selects_by_coarse_runs(tmp_path, capsys):
    from closure.cli import main
    from closure.model import ClosureModel

    path = tmp_path / "dns.nc"
    write(turb2d(n=32, snapshots=5, interval=0.3, spinup=0.6, viscosity=2e-3,
                 forcing_wavenumber=3, seed=2), path)
    out = tmp_path / "model.json"
    rc = main(["discover", str(path), "--ratio", "2", "--resamples", "0", "-o", str(out),
               "--select", "aposteriori", "--duration", "0.8", "--spinup", "0.2",
               "--selection-weights", "0", "--selection-tolerance", "0.2"])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert "rule: sparsest candidate stable" in text and f"written: {out}" in text
    record = ClosureModel.load(out).settings["aposteriori_selection"]
    assert record["tolerance"] == 0.2 and record["settings"]["long_duration"] == 0.8
    assert all(r["transfer_weight"] == 0.0 for r in record["candidates"])
    # the options of the selection are refused without --select aposteriori, and it needs a
    # run length
    assert main(["discover", str(path), "-o", str(out), "--duration", "1"]) == 2
    assert "add --select aposteriori" in capsys.readouterr().err
    assert main(["discover", str(path), "-o", str(out), "--select", "aposteriori"]) == 2
    assert "--duration T" in capsys.readouterr().err
    assert main(["discover", str(path), "-o", str(out), "--select", "aposteriori",
                 "--duration", "1", "--selection-weights", "x"]) == 2
    assert "--selection-weights" in capsys.readouterr().err


def test_selection_by_coarse_runs_runs_3d_candidates(tmp_path):
    from closure.selection import discover_and_select
    from closure.spec import parse_spec
    from closure.synth import turb3d

    path = tmp_path / "box.nc"
    write(turb3d(n=16, snapshots=4), path)
    spec = parse_spec({"input": {"path": str(path)}, "filter": {"ratio": 2},
                       "fit": {"resamples": 0, "folds": 2, "select": "aposteriori",
                               "duration": 0.5, "spinup": 0.1, "max_candidates": 2}})
    _, selection, chosen = discover_and_select(spec)
    assert {r["transfer_weight"] for r in selection.candidates} == {0.0, 1.0}
    assert all(r["long_run"]["duration"] == 0.5 for r in selection.candidates)
    # eddy-viscosity companions run beside their candidates, scored a priori like them
    by = {r["label"]: r for r in selection.candidates}
    for label, r in by.items():
        if label.endswith("+eddy"):
            parent = by[label[:-len("+eddy")]]
            assert r["apriori"]["germano_constant"] > 0 and "test" in r["apriori"]
            assert r["n_terms"] == parent["n_terms"] + 1
            assert set(r["terms"]) == set(parent["terms"]) | {"smagorinsky"}
    assert selection.chosen == choose(selection.candidates, 0.1)
    assert chosen is not None and chosen.grid.ndim == 3


def test_when_no_candidate_is_stable_the_a_priori_model_says_so(tmp_path):
    from closure.filters import make_coarse_graining
    from closure.library import make_library
    from closure.model import ClosureModel
    from closure.selection import Selection, conclude, unselected_model

    fine = Grid.regular((32, 32), TWO_PI, dims=("y", "x"))
    cg = make_coarse_graining("gaussian", fine, 2, 4.0)
    lib = make_library("default", "stress", ("y", "x"))
    coef = tuple(1.0 if n == "gradient_model" else 0.0 for n in lib.names)
    base = ClosureModel(lib, coef, filter=cg, grid=cg.coarse, scheme="spectral",
                        delta=cg.delta)
    cand = Candidate("only", 0.0, 0.0, coef, tuple(lib.names))
    records = [dict(record("only", 1, False, None, None), score=None)]
    selection, chosen = conclude(base, [cand], records, long_duration=3.0)
    assert chosen is None and isinstance(selection, Selection) and selection.chosen is None
    model = unselected_model(base, selection)
    assert "NOT chosen by coarse runs" in model.provenance["notes"][-1]
    assert "3 s" in model.provenance["notes"][-1]
    assert model.settings["aposteriori_selection"]["chosen"] is None
    assert model.coefficients_scaled.tolist() == list(coef)
    # the file keeps the record and the note
    again = ClosureModel.load(model.save(tmp_path / "m.json"))
    assert again.settings["aposteriori_selection"]["candidates"][0]["label"] == "only"


def test_eddy_companions_add_the_dynamic_mixed_eddy_viscosity(tmp_path):
    # the companion of a candidate without the Smagorinsky term adds it with coefficient
    # -2 C, C the dynamic mixed constant (Zang, Street & Koseff 1993) of that candidate on the
    # resolved snapshots; C is linear in the model part, so of the candidates +50 and -50 x
    # the gradient model one asks for an eddy viscosity (C > 0) and the other for none
    from closure.filters import make_coarse_graining
    from closure.les import coarse_data, dynamic_mixed_constant
    from closure.library import make_library
    from closure.model import ClosureModel
    from closure.selection import EDDY_SUFFIX, eddy_companions

    path = write(turb2d(n=48, snapshots=3, interval=0.3, spinup=0.6, viscosity=2e-3,
                        forcing_wavenumber=3, seed=2), tmp_path / "dns.nc")
    fine = Grid.regular((48, 48), TWO_PI, dims=("y", "x"))
    cg = make_coarse_graining("gaussian", fine, 2, 4.0)
    lib = make_library("default", "stress", ("y", "x"))
    names = tuple(lib.names)

    def coef(**values):
        return tuple(float(values.get(n, 0.0)) for n in names)

    base = ClosureModel(lib, coef(gradient_model=1.0), filter=cg, grid=cg.coarse,
                        scheme="spectral", delta=cg.delta)
    data = coarse_data(path, "gaussian", 2, 4.0)
    cands = [Candidate("up", 0.0, 0.1, coef(gradient_model=50.0), names),
             Candidate("down", 0.0, 0.2, coef(gradient_model=-50.0), names),
             Candidate("has", 0.0, 0.3, coef(smagorinsky=-0.05, gradient_model=1.0), names)]
    constants = {c.label: dynamic_mixed_constant(candidate_model(base, c), data.fields,
                                                 data.grid, data.delta) for c in cands[:2]}
    assert (constants["up"] > 0) != (constants["down"] > 0)
    out = eddy_companions(base, cands, data.fields, data.grid, data.delta)
    assert len(out) == 1
    parent = next(c for c in cands if constants.get(c.label, 0) > 0)
    comp = out[0]
    assert comp.label == parent.label + EDDY_SUFFIX and comp.n_terms == parent.n_terms + 1
    k = names.index("smagorinsky")
    assert comp.coefficients[k] == pytest.approx(-2 * constants[parent.label], rel=1e-12)
    assert comp.apriori["germano_constant"] == pytest.approx(constants[parent.label])
    assert [c for i, c in enumerate(comp.coefficients) if i != k] == \
        [c for i, c in enumerate(parent.coefficients) if i != k]
    assert (comp.transfer_weight, comp.parameter) == (parent.transfer_weight, parent.parameter)
