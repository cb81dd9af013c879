"""Tests for closure.library_compressible: compressible presets, units, pruning, evaluation."""

import numpy as np
import pytest
import sympy as sp
from sympy.physics import units as U

from closure.errors import UserError
from closure.grid import Grid
from closure.library import _INFO, DELTA, evaluate_terms, make_library
from closure.library_compressible import (
    PRESETS,
    TARGET_DIMENSIONS,
    Inhomogeneous,
    builtin_terms,
    dimension,
)

DIMS = {2: ("y", "x"), 3: ("z", "y", "x")}
TARGETS = ("stress", "heat_flux", "pressure_dilatation")
# SI units of the fields and of the targets (rho u u, rho u T, p / time)
FIELD_UNITS = {"u": U.meter / U.second, "v": U.meter / U.second, "w": U.meter / U.second,
               "rho": U.kilogram / U.meter**3, "p": U.pascal, "T": U.kelvin}
TARGET_UNITS = {"stress": U.kilogram / (U.meter * U.second**2),
                "heat_flux": U.kilogram * U.kelvin / (U.meter**2 * U.second),
                "pressure_dilatation": U.pascal / U.second}


def _unguarded(e):
    if isinstance(e, sp.Piecewise):
        return e.args[0].expr
    return e


@pytest.mark.parametrize("ndim", [2, 3])
@pytest.mark.parametrize("target", TARGETS)
def test_every_term_has_the_target_units_with_a_dimensionless_coefficient(ndim, target):
    # independent check with sympy.physics.units: give every symbol a value in SI units
    # (a derivative of order n divides by metre^n, Delta is in metres), evaluate the sympy
    # expression and convert to base units; the result must be a number times the target's
    # units. Sums of unlike units would not collapse and fail the check.
    rng = np.random.default_rng(0)
    terms = builtin_terms(target, DIMS[ndim])
    assert len(terms) >= 5
    for term in terms:
        assert term.scaled_units == {}, term.name  # our own dimension algebra agrees
        for key, e in term.components.items():
            e = _unguarded(e)
            if e == 0:
                continue
            sub = {}
            for s in e.free_symbols:
                if s == DELTA:
                    sub[s] = sp.Float(0.3) * U.meter
                    continue
                f, counts = _INFO[s.name]
                sub[s] = sp.Float(rng.uniform(0.5, 2.0)) * FIELD_UNITS[f] / U.meter ** sum(counts)
            value = U.convert_to(e.xreplace(sub), [U.kilogram, U.meter, U.second, U.kelvin])
            want = U.convert_to(TARGET_UNITS[target], [U.kilogram, U.meter, U.second, U.kelvin])
            ratio = sp.simplify(value / want)
            assert not ratio.atoms(U.Quantity), f"{term.name}[{key}]: {value}"
            assert ratio.is_number


def test_the_dimension_algebra_rejects_inhomogeneous_sums():
    rho, du_dx = sp.Symbol("rho", real=True), sp.Symbol("du_dx", real=True)
    make_library("compressible", "stress", DIMS[2])  # registers the symbols
    assert dimension(rho * du_dx**2 * DELTA**2) == tuple(map(sp.Rational,
                                                              TARGET_DIMENSIONS["stress"]))
    with pytest.raises(Inhomogeneous):
        dimension(rho + du_dx)
    with pytest.raises(Inhomogeneous):
        dimension(sp.exp(rho))


def test_pruning_does_not_assume_a_divergence_free_velocity():
    # in 2-D an incompressible library drops strain_squared (S S = |S|^2/4 I when S_kk = 0,
    # Cayley-Hamilton); with dilatation S S = S_kk S - det(S) I is not in the span, so the
    # compressible library keeps it. R R = S S - (S R - R S) - A A^T holds on any field
    # (A = S + R), so favre_rotation_squared is dropped with that relation.
    inc = make_library("default", "stress", DIMS[2])
    assert any(d.startswith("strain_squared") for d in inc.dropped)
    lib = make_library("compressible", "stress", DIMS[2])
    assert "favre_strain_squared" in lib.names
    assert [d.term for d in lib.dependencies] == ["favre_rotation_squared"]
    assert "on any field" in lib.dropped[0]
    assert "favre_strain_squared - 12 favre_gradient_model - favre_strain_rotation" in \
        lib.dropped[0]
    heat = make_library("compressible", "heat_flux", DIMS[3])
    assert [d.term for d in heat.dependencies] == ["rotation_temperature_gradient"]
    unpruned = make_library("compressible", "stress", DIMS[2], prune=False)
    assert "favre_rotation_squared" in unpruned.names


def _trig_fields(grid):
    y, x = grid.mesh()
    return {
        "rho": 1.2 + 0.3 * np.sin(x) * np.cos(2 * y),
        "u": np.sin(x) * np.cos(y) + 0.4 * np.cos(2 * x),  # divergent
        "v": -np.cos(x) * np.sin(y) + 0.2 * np.sin(y),
        "p": 1e5 + 300 * np.cos(x + y),
        "T": 300 + 5 * np.sin(2 * x) * np.sin(y),
    }, x, y


def test_terms_match_closed_forms_on_a_trigonometric_field():
    # closed forms differentiated by hand (common practice)
    grid = Grid.regular((32, 32), 2 * np.pi, dims=("y", "x"))
    f, x, y = _trig_fields(grid)
    ux = np.cos(x) * np.cos(y) - 0.8 * np.sin(2 * x)
    uy = -np.sin(x) * np.sin(y)
    vx = np.sin(x) * np.sin(y)
    vy = -np.cos(x) * np.cos(y) + 0.2 * np.cos(y)
    px = py = -300 * np.sin(x + y)
    Tx = 10 * np.cos(2 * x) * np.sin(y)
    Ty = 5 * np.sin(2 * x) * np.cos(y)
    theta = ux + vy
    theta_x = -np.sin(x) * np.cos(y) - 1.6 * np.cos(2 * x) + np.sin(x) * np.cos(y)
    theta_y = -np.cos(x) * np.sin(y) + np.cos(x) * np.sin(y) - 0.2 * np.sin(y)
    sxy = 0.5 * (uy + vx)
    smag = np.sqrt(2 * (ux**2 + vy**2 + 2 * sxy**2))
    D = 0.4
    rho = f["rho"]
    stress = make_library("compressible", "stress", DIMS[2])
    values = dict(zip(stress.names, evaluate_terms(stress, f, grid, "spectral", D),
                      strict=True))
    xx, xy, yy = values["favre_smagorinsky"]
    np.testing.assert_allclose(xx, rho * D**2 * smag * (ux - theta / 2), atol=1e-10)
    np.testing.assert_allclose(xy, rho * D**2 * smag * sxy, atol=1e-10)
    np.testing.assert_allclose(xx + yy, 0, atol=1e-10)  # deviatoric
    xx, xy, yy = values["favre_gradient_model"]
    np.testing.assert_allclose(xy, rho * D**2 / 12 * (ux * vx + uy * vy), atol=1e-10)
    np.testing.assert_allclose(yy, rho * D**2 / 12 * (vx**2 + vy**2), atol=1e-10)
    xx, xy, yy = values["favre_isotropic"]
    np.testing.assert_allclose(xx, rho * D**2 * smag**2, atol=1e-10)
    np.testing.assert_allclose(xy, 0, atol=1e-12)
    np.testing.assert_allclose(values["pressure_gradient"][1], D**2 * px * py / f["p"],
                               rtol=1e-9, atol=1e-9)
    heat = make_library("compressible", "heat_flux", DIMS[2])
    hv = dict(zip(heat.names, evaluate_terms(heat, f, grid, "spectral", D), strict=True))
    np.testing.assert_allclose(hv["favre_eddy_diffusivity"][0], rho * D**2 * smag * Tx,
                               atol=1e-9)
    np.testing.assert_allclose(hv["favre_heat_gradient_model"][1],
                               rho * D**2 / 12 * (vx * Tx + vy * Ty), atol=1e-9)
    pd = make_library("compressible", "pressure_dilatation", DIMS[2])
    pv = dict(zip(pd.names, evaluate_terms(pd, f, grid, "spectral", D), strict=True))
    np.testing.assert_allclose(pv["pressure_dilatation_gradient_model"][0],
                               D**2 / 12 * (px * theta_x + py * theta_y), atol=1e-8)
    np.testing.assert_allclose(pv["dilatation_cubed"][0], rho * D**2 * theta**3, atol=1e-9)


def test_terms_are_galilean_invariant():
    # no bare velocity symbol: adding a uniform velocity changes no term (common practice)
    grid = Grid.regular((16, 16), 2 * np.pi, dims=("y", "x"))
    f, _, _ = _trig_fields(grid)
    moved = {**f, "u": f["u"] + 3.0, "v": f["v"] - 2.0}
    for target in TARGETS:
        lib = make_library("compressible", target, DIMS[2])
        for s in lib.symbols:
            field, counts = _INFO[s.name]
            assert field not in ("u", "v", "w") or sum(counts) > 0
        a = evaluate_terms(lib, f, grid, "spectral", 0.3)
        b = evaluate_terms(lib, moved, grid, "spectral", 0.3)
        for ta, tb in zip(a, b, strict=True):
            scale = max(float(np.max(np.abs(c))) for c in ta)
            for ca, cb in zip(ta, tb, strict=True):
                # spectral derivatives of u + 3 and of u differ by round-off only
                np.testing.assert_allclose(ca, cb, rtol=1e-9, atol=1e-9 * scale + 1e-12)


def test_presets_and_targets():
    assert PRESETS == ("compressible", "compressible_classic", "compressible_minimal")
    classic = make_library("compressible_classic", "stress", DIMS[3])
    assert classic.names == ["favre_smagorinsky", "favre_gradient_model", "favre_isotropic"]
    assert classic.components == ["tau_xx", "tau_xy", "tau_yy", "tau_xz", "tau_yz", "tau_zz"]
    assert set(classic.fields) == {"rho", "u", "v", "w"}
    heat = make_library("compressible_minimal", "heat_flux", DIMS[2])
    assert heat.names == ["favre_eddy_diffusivity"]
    assert heat.components == ["heat_flux_x", "heat_flux_y"]
    pd = make_library("compressible", "pressure_dilatation", DIMS[2])
    assert pd.components == ["pressure_dilatation"]
    with pytest.raises(UserError, match="needs a compressible library"):
        make_library("default", "heat_flux", DIMS[2])
    with pytest.raises(UserError, match="compressible presets have terms for"):
        make_library("compressible", "force", DIMS[2])
