"""Tests for closure.equivalence: indistinguishable terms named, one kept, separation advice."""

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression

from closure.equivalence import KEEP_RULE, equivalent_groups
from closure.favre import favre_coarse_grain
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot
from closure.library import component_weights, design, make_library
from closure.stats import SufficientStats
from tests.test_favre import smooth_field

R, GAMMA = 287.0, 1.4


def _snapshot(grid, rng, isentropic):
    rho = 1.2 * np.exp(smooth_field(grid, rng, 6, 0.0, 0.1))
    u, v = smooth_field(grid, rng, 6), smooth_field(grid, rng, 6)
    if isentropic:  # p / p0 = (rho / rho0)^gamma: constant entropy (Landau & Lifshitz sec. 2)
        p = 1e5 * (rho / 1.2) ** GAMMA
    else:  # pressure fluctuations independent of the density: entropy fluctuations
        p = 1e5 * np.exp(smooth_field(grid, rng, 6, 0.0, 0.1))
    return Snapshot({"rho": rho, "u": u, "v": v, "p": p, "T": p / (rho * R)}, grid, 0, None)


def _stats(isentropic, target):
    grid = Grid.regular((64, 64), 2 * np.pi, dims=("y", "x"))
    snap = _snapshot(grid, np.random.default_rng(1), isentropic)
    cg = make_coarse_graining("gaussian", grid, 2)
    cs = favre_coarse_grain(snap, cg)
    lib = make_library("compressible", target, grid.dims)
    X = design(lib, cs.fields, cs.grid, "spectral", cg.delta)
    y = np.stack([cs.targets[c].ravel() for c in lib.components])
    stats = SufficientStats.from_design(X, y, component_weights(target, grid.dims), lib.names,
                                        lib.components)
    return stats, lib, X


PAIRS = {"stress": ("pressure_gradient", "density_pressure_gradient"),
         "heat_flux": ("favre_eddy_diffusivity", "density_gradient_heat_flux"),
         "pressure_dilatation": ("pressure_dilatation_gradient_model",
                                 "density_gradient_dilatation")}


@pytest.mark.parametrize("target", list(PAIRS))
def test_isentropic_fluctuations_make_pressure_and_density_terms_indistinguishable(target):
    # isentropic: grad p = c^2 grad rho and grad T / T = (gamma - 1) grad rho / rho, so each pair
    # is proportional on the fine grid (Delta^2 grad p grad p / p = gamma * the mixed term;
    # rho |S| grad T = (gamma - 1) |S| T grad rho), up to O(Delta^2) after filtering
    stats, lib, _ = _stats(True, target)
    groups = equivalent_groups(stats, lib)
    a, b = PAIRS[target]
    group = next(g for g in groups if a in g.terms)
    assert b in group.terms
    assert group.kept == a  # the earlier in library order
    assert group.rule == KEEP_RULE
    assert "non-isentropic" in group.separate_with
    text = group.describe()
    assert text.startswith("equivalent on this data:") and a in text and b in text


@pytest.mark.parametrize("target", list(PAIRS))
def test_independent_entropy_fluctuations_separate_them(target):
    stats, lib, _ = _stats(False, target)
    groups = equivalent_groups(stats, lib)
    a, b = PAIRS[target]
    assert not any(a in g.terms and b in g.terms for g in groups)


def test_explained_fraction_matches_scikit_learn():
    # R^2 of the kept column on the others, through the origin, on unit-norm columns: the same
    # as scikit-learn's LinearRegression(fit_intercept=False) score on the stacked design
    stats, lib, X = _stats(True, "heat_flux")
    group = next(g for g in equivalent_groups(stats, lib)
                 if "favre_eddy_diffusivity" in g.terms)
    w = np.sqrt(component_weights("heat_flux", ("y", "x")))
    cols = {n: np.concatenate([w[c] * X[c, :, k] for c in range(X.shape[0])])
            for k, n in enumerate(lib.names)}
    unit = {n: c / np.linalg.norm(c) for n, c in cols.items()}
    A = np.stack([unit[n] for n in group.dropped], axis=1)
    y = unit[group.kept]
    reg = LinearRegression(fit_intercept=False).fit(A, y)
    # uncentred R^2 = 1 - |y - A b|^2 / |y|^2 (|y| = 1)
    r2 = 1 - np.sum((y - reg.predict(A)) ** 2)
    assert group.explained == pytest.approx(r2, abs=1e-9)
    assert group.explained > 0.999


def test_generic_groups_and_advice_without_a_library():
    # columns: x, 3 x + tiny noise, independent z; the near-null direction joins the first two
    rng = np.random.default_rng(0)
    x, z = rng.standard_normal(500), rng.standard_normal(500)
    X = np.stack([x, 3 * x + 1e-6 * rng.standard_normal(500), z], axis=1)
    stats = SufficientStats.from_design(X[None], (x + z)[None], None, ("a", "b", "c"), ("y",))
    groups = equivalent_groups(stats)
    assert [g.terms for g in groups] == [("a", "b")]
    assert groups[0].kept == "a" and groups[0].dropped == ("b",)
    assert "other flow states" in groups[0].separate_with
    assert groups[0].to_dict()["dropped"] == ["b"]
