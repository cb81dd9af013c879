"""Tests for closure.units: the unit algebra against sympy.physics.units, the derived units of
every quantity the reports and exports show, and reading the base units a model records."""

from __future__ import annotations

import pytest
import sympy
from sympy.physics import units as su

from closure.grid import Grid
from closure.units import (
    QUANTITIES,
    Units,
    combine,
    is_dimensionless,
    label,
    model_units,
    parse,
    run_units,
    simplify,
    variable_units,
)


def as_sympy(text: str) -> sympy.Expr:
    """Our unit text as a sympy.physics.units expression (m, s, kg, K only)."""
    symbols = {"m": su.meter, "s": su.second, "kg": su.kilogram, "K": su.kelvin}
    expr = sympy.Integer(1)
    for name, power in parse(text).powers.items():
        expr *= symbols[name] ** sympy.Rational(power.numerator, power.denominator)
    return expr


# UDUNITS-2 unit syntax (Unidata, UDUNITS-2 manual, "Unit syntax": juxtaposition, "." or "*"
# multiply, "/" or "per" divides, an integer after a symbol, with or without "^" or "**", is its
# power); from memory for the exact grammar, common practice in CF files.
@pytest.mark.parametrize("text,expected", [
    ("m s-1", "m s-1"), ("m/s", "m s-1"), ("m.s^-1", "m s-1"), ("m*s**-1", "m s-1"),
    ("(m s-1)/(m)", "s-1"), ("(m s-1)^2/(m)", "m s-2"), ("(m s-1)^2", "m2 s-2"),
    ("m m-1", "1"), ("1", "1"), ("kg m-3 m3", "kg"), ("metres per", None),
    ("meter second-1", "m s-1"), ("metres per second", "m s-1"), ("m PER s", "m s-1"),
    ("percent", "percent"),
])
def test_simplify_common_forms(text, expected):
    if expected is None:
        assert parse(text) is None and simplify(text) == text
    else:
        assert simplify(text) == expected


@pytest.mark.parametrize("text", ["10 m", "seconds since 2000-01-01", "m s-1 /", "(m", ""])
def test_parse_refuses_what_it_cannot_read(text):
    assert parse(text) is None
    assert simplify(text) == text.strip()


def test_derived_units_agree_with_sympy_dimensional_algebra():
    # each quantity built independently with sympy.physics.units from its definition (common
    # practice; E(k) per Pope 2000, "Turbulent Flows", eq. 6.188: the integral of E over k is
    # the kinetic energy, so E has units velocity^2 x length; transfer spectra here are shell
    # sums whose total is the mean of pi = -tau_ij S_ij, closure.report.spectra)
    m, s = su.meter, su.second
    velocity, length = m / s, m
    time = length / velocity
    expected = {
        "dimensionless": 1, "length": length, "filter_width": length, "wavenumber": 1 / length,
        "time": time, "velocity": velocity, "energy": velocity**2,
        "energy_spectrum": velocity**2 * length, "vorticity": velocity / length,
        "enstrophy": (velocity / length) ** 2, "stress": velocity**2,
        "force": velocity**2 / length, "vorticity_forcing": velocity**2 / length**2,
        "energy_transfer": velocity**2 * velocity / length,
        "enstrophy_transfer": (velocity / length) ** 3, "vorticity_pdf": length / velocity,
    }
    assert set(expected) == set(QUANTITIES)
    base = Units("m", "m s-1", "s")
    for quantity, want in expected.items():
        got = base.of(quantity)
        assert sympy.simplify(as_sympy(got) / want) == 1, (quantity, got)


def test_time_comes_from_length_and_velocity_else_the_recorded_time():
    assert Units("m", "m s-1", None).of("vorticity") == "s-1"
    assert Units(None, None, "s").of("vorticity") == "s-1"
    assert Units(None, "m s-1", None).of("vorticity") is None
    assert Units("m", None, "s").of("energy_spectrum") == "m3 s-2"
    assert Units("m", None, None).of("energy") is None
    assert Units("km", "km h-1", None).of("vorticity") == "h-1"
    # different symbols are never converted: cm s-1 over m stays as it is
    assert Units("m", "cm s-1", None).of("vorticity") == "cm m-1 s-1"


def test_components_inputs_and_coefficients():
    base = Units("m", "m s-1", "s", {"c": "K"})
    assert base.component("tau_xy") == "m2 s-2"
    assert base.component("force_y") == "m s-2"
    assert base.component("flux_c_x") == "m K s-1"
    assert base.component("vorticity_forcing") == "s-2"
    assert base.component("pi") == "m2 s-3"
    assert base.component("vorticity") == "s-1"
    assert base.component("unknown") is None
    assert base.derivative("u", 1) == "s-1"
    assert base.derivative("v", 2) == "m-1 s-1"
    assert base.derivative("c", 1) == "K m-1"
    assert base.coefficient({}) == "1"
    assert base.coefficient({}, 2) == "m2"
    assert base.coefficient({"length": 2, "time": -1}) == "m2 s-1"  # an eddy viscosity
    assert base.coefficient(None) is None
    assert Units().coefficient({"length": 2, "time": -1}) is None
    assert Units().coefficient({}) == "1"


def test_combine_label_and_dimensionless():
    assert combine(("m s-1", 2), ("m", 1)) == "m3 s-2"
    assert combine(("m s-1", 1), (None, 0)) == "m s-1"
    assert combine(("m s-1", 1), (None, 1)) is None
    assert combine(("10 m", 2)) == "(10 m)^2"  # text we cannot read is kept whole
    assert is_dimensionless("1") and is_dimensionless("m m-1") and not is_dimensionless("m")
    assert label("wavenumber k", "m-1") == "wavenumber k (m-1)"
    assert label("R^2", "1") == "R^2 (dimensionless)"
    assert label("time", None) == "time"


def test_model_units_reads_the_grid_and_the_recorded_input_units():
    d = {"grid": Grid.regular((8, 8), 1.0, ("y", "x"), units="m").to_dict(),
         "scalars": ["c"],
         "provenance": {"units": {"u": "m/s", "v": "m s-1", "x": "m", "y": "m",
                                  "time": "seconds since 2000-01-01", "c": "K"}}}
    base = model_units(d)
    assert (base.length, base.velocity, base.time, base.scalars) == ("m", "m s-1", "s",
                                                                     {"c": "K"})
    # the velocity components disagree: not recorded rather than guessed
    d["provenance"]["units"]["v"] = "cm s-1"
    assert model_units(d).velocity is None
    d["provenance"]["velocity_units"] = "m s-1"
    assert model_units(d).velocity == "m s-1"
    # nothing recorded: None everywhere
    bare = model_units({"grid": Grid.regular((4,), 1.0, ("x",)).to_dict(), "provenance": {}})
    assert (bare.length, bare.velocity, bare.time) == (None, None, None)


def test_run_units_prefer_the_run_then_the_model():
    fallback = Units("m", "m s-1", "s")
    assert run_units({"settings": {"grid": {"units": "km"}}}, fallback).length == "km"
    assert run_units({"settings": {}}, fallback) == fallback
    assert run_units({}, None) == Units()


def test_variable_units_give_one_form_for_every_file():
    # the same quantity gets the same text whichever file writes it: vorticity from m s-1
    # over m is s-1, as the demo data record it (closure.synth), never "(m s-1)/(m)"
    units = {"u": "m s-1", "v": "m s-1", "x": "m", "y": "m", "time": "s", "c": "K"}
    assert variable_units("vorticity", units, "m") == "s-1"
    assert variable_units("vorticity", {**units, "vorticity": "s^-1"}, "m") == "s-1"
    assert variable_units("u", units, "m") == "m s-1"
    assert variable_units("c", units, "m") == "K"
    assert variable_units("tau_xy", units, "m") == "m2 s-2"
    assert variable_units("force_x", units, "m") == "m s-2"
    assert variable_units("flux_c_y", units, "m") == "m K s-1"
    assert variable_units("vorticity_forcing", units, "m") == "s-2"
    assert variable_units("pi", units, "m") == "m2 s-3"
    assert variable_units("enstrophy_transfer", units, "m") == "s-3"
    assert variable_units("tau_xy", {"u": "m s-1", "v": "cm s-1"}, "m") is None
    assert variable_units("force_x", {"u": "m s-1"}, None) is None
