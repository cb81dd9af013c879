"""Dimensional analysis of term expressions: the dimension (mass, length, time, temperature)
of an expression of field symbols and Delta, and the units of a term's Delta-scaled
coefficient. Used for the compressible targets and terms (closure.library_compressible,
which re-exports these names) and by closure.library.build."""

from __future__ import annotations

from fractions import Fraction
from typing import TYPE_CHECKING

import sympy

from closure.library.kinematics import _INFO, DELTA, parse_target

if TYPE_CHECKING:
    from closure.library.terms import Term

BASE = ("mass", "length", "time", "temperature")
#: Dimensions of the fields (exponents of mass, length, time, temperature).
FIELD_DIMENSIONS = {
    "u": (0, 1, -1, 0), "v": (0, 1, -1, 0), "w": (0, 1, -1, 0),
    "rho": (1, -3, 0, 0), "p": (1, -1, -2, 0), "T": (0, 0, 0, 1),
}
#: Dimensions of the targets: rho u u, rho u T, p / time.
TARGET_DIMENSIONS = {
    "stress": (1, -1, -2, 0),
    "heat_flux": (1, -2, -1, 1),
    "pressure_dilatation": (1, -1, -3, 0),
}


class Inhomogeneous(ValueError):
    """An expression adds quantities of different dimensions."""


def dimension(expr: sympy.Expr) -> tuple[Fraction, ...]:
    """Dimension of an expression of field symbols and Delta: exponents of (mass, length,
    time, temperature). A derivative symbol ``d<n>f_d...`` has the dimension of ``f`` over
    length^n; ``Delta`` is a length; numbers are dimensionless. Raises Inhomogeneous when a sum
    mixes dimensions or a transcendental function has a dimensional argument."""
    zero = (Fraction(0),) * 4
    if expr.is_Number:
        return zero
    if expr.is_Symbol:
        if expr == DELTA:
            return (Fraction(0), Fraction(1), Fraction(0), Fraction(0))
        info = _INFO.get(expr.name)
        if info is None or info[0] not in FIELD_DIMENSIONS:
            raise Inhomogeneous(f"no dimension known for the symbol {expr.name}")
        f, counts = info
        base = [Fraction(x) for x in FIELD_DIMENSIONS[f]]
        base[1] -= sum(counts)
        return tuple(base)
    if isinstance(expr, sympy.Piecewise):
        dims = {dimension(e) for e, _ in expr.args if e != 0}
        if len(dims) > 1:
            raise Inhomogeneous(f"branches of different dimensions in {expr}")
        return dims.pop() if dims else zero
    if expr.is_Mul:
        out = zero
        for a in expr.args:
            out = tuple(x + y for x, y in zip(out, dimension(a), strict=True))
        return out
    if expr.is_Pow:
        if not expr.exp.is_Rational:
            raise Inhomogeneous(f"a non-rational power in {expr}")
        e = Fraction(int(expr.exp.p), int(expr.exp.q))
        return tuple(e * x for x in dimension(expr.base))
    if expr.is_Add:
        dims = {dimension(a) for a in expr.args}
        if len(dims) > 1:
            raise Inhomogeneous(f"a sum of terms with different dimensions: {expr}")
        return dims.pop()
    if isinstance(expr, sympy.Abs):
        return dimension(expr.args[0])
    if isinstance(expr, sympy.Function):
        for a in expr.args:
            if dimension(a) != zero:
                raise Inhomogeneous(f"{expr.func.__name__} of a dimensional argument")
        return zero
    raise Inhomogeneous(f"cannot take the dimension of {expr}")


def coefficient_units(term: Term, target: str) -> dict[str, float] | None:
    """Units of a term's Delta-scaled coefficient (``{}``: dimensionless; None:
    inhomogeneous), from the dimensions of its components and the target's."""
    want = TARGET_DIMENSIONS[parse_target(target)[0]]
    dims = set()
    try:
        for e in term.components.values():
            if e != 0:
                dims.add(dimension(e))
    except Inhomogeneous:
        return None
    if len(dims) != 1:
        return None if dims else {}
    have = dims.pop()
    out = {}
    for name, w, h in zip(BASE, want, have, strict=True):
        x = Fraction(w) - h
        if x:
            out[name] = int(x) if x.denominator == 1 else float(x)
    return out
