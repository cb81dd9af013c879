"""A :class:`~closure.library.terms.Term` from sympy components: canonical form, the
printable check, and the units of its Delta-scaled coefficient (probed numerically; the
compressible targets by dimensional analysis, closure.library.dimensions).
"""


from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence

import numpy as np
import sympy

from closure.library.dimensions import coefficient_units  # mass, length, time, K
from closure.library.expressions import Namespace, parse_expression
from closure.library.kinematics import (
    _INFO,
    _VELOCITY,
    Kinematics,
    component_keys,
    parse_target,
    target_rank,
)
from closure.library.terms import Term, _check_printable, _guard, _num


def _make_term(name: str, target: str, k: Kinematics, comps: Mapping[str, sympy.Expr],
               delta_power: float, description: str, source: str) -> Term:
    keys = component_keys(target, k.dirs)
    ns = Namespace(k, allow_bare_velocity=True) if source != "preset" else None
    out = {}
    for key in keys:
        e = sympy.sympify(comps[key])
        # a canonical form, so the model file's string reads back as the same expression:
        # built-in polynomials expanded; user terms (whose expansion could be huge) as read back
        if ns is None and e.is_polynomial():
            e = sympy.expand(e)
        elif ns is not None:
            e = parse_expression(str(e), ns, f"term {name!r}")
        e = _guard(e)
        _check_printable(e, f"term {name!r} component {key or 'value'}")
        out[key] = e
    term = Term(name, target_rank(target), out, delta_power, description, source)
    return dataclasses.replace(term, scaled_units=_scaled_units(term, target, k))  # same cache


# ---------------------------------------------------------------------------------------------
# probing terms numerically: dimensions, vanishing terms, duplicates


def _probe_values(symbols: Sequence[sympy.Symbol], n: int = 12) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(20261201)
    return {s.name: rng.standard_normal(n) for s in symbols}


def _probe(term: Term, values: Mapping[str, np.ndarray], delta: float) -> np.ndarray:
    syms, f = term.function()
    n = len(next(iter(values.values()))) if values else 1
    with np.errstate(all="ignore"):
        out = f(delta, *(values[s.name] for s in syms))
    return np.concatenate([np.broadcast_to(np.asarray(v, dtype=float), (n,)) for v in out])


_TARGET_UNITS = {"stress": (2, 0), "force": (2, -1), "flux": (1, 0), "vorticity": (2, -2)}


def _scaled_units(term: Term, target: str, k: Kinematics) -> dict[str, float] | None:
    """Units of coefficient_scaled, by scaling velocity, length and scalar units."""
    kind, scalar = parse_target(target)
    if kind in ("heat_flux", "pressure_dilatation") or (
            kind == "stress" and any(_INFO[s.name][0] == "rho" for s in term.symbols)):
        return coefficient_units(term, target)
    syms = term.symbols
    base = _probe_values(syms)
    delta = 0.7
    v0 = _probe(term, base, delta)
    ok = np.abs(v0) > 1e-12 * max(np.abs(v0).max(), 1e-300)
    if not ok.any():
        return {}

    def exponent(factor_of, delta_factor, base_factor):
        vals = {}
        for s in syms:
            f, counts = _INFO[s.name]
            vals[s.name] = base[s.name] * factor_of(f, counts)
        v = _probe(term, vals, delta * delta_factor)
        with np.errstate(all="ignore"):
            r = v[ok] / v0[ok]
        if np.any(r <= 0) or not np.all(np.isfinite(r)):
            return None
        p = np.log(r) / np.log(base_factor)
        if np.ptp(p) > 1e-6:
            return None
        return float(np.round(p.mean() * 2) / 2) if abs(p.mean() * 2 - round(p.mean() * 2)) \
            < 1e-6 else float(p.mean())

    pu = exponent(lambda f, c: 2.0 if f in _VELOCITY else 1.0, 1.0, 2.0)
    pl = exponent(lambda f, c: 3.0 ** (-sum(c)), 3.0, 3.0)
    if pu is None or pl is None:
        return None
    tu, tl = _TARGET_UNITS[kind]
    a, b = tu - pu, tl - pl
    units = {"length": a + b, "time": -a}
    for c in k.scalars:
        pc = exponent(lambda f, cc, c=c: 5.0 if f == c else 1.0, 1.0, 5.0)
        if pc is None:
            return None
        units[c] = (1.0 if c == scalar else 0.0) - pc
    return {key: _num(v) for key, v in units.items() if abs(v) > 1e-9}
