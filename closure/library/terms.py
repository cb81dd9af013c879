"""The term and library types: :class:`Term` (sympy components, LaTeX, compiled evaluation)
and :class:`Library` (an ordered set of terms for one target, with what pruning dropped).
"""


from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import sympy

from closure.errors import UserError
from closure.library.kinematics import (
    _INFO,
    _PRINTABLE,
    AXES,
    DELTA,
    _sorted_symbols,
    component_keys,
    directions,
    target_components,
    target_rank,
)

if TYPE_CHECKING:  # pruning.py imports this module
    from closure.library.pruning import Dependency


# ---------------------------------------------------------------------------------------------
# terms


@dataclass(frozen=True, eq=False)
class Term:
    """One candidate term: a rank-0, -1 or -2 quantity written as sympy expressions.

    ``components`` maps component keys (``"xx", "xy", ...`` / ``"x", ...`` / ``""``) to sympy
    expressions that include ``Delta**delta_power``. ``scaled_units`` are the units of the
    fitted (Delta-scaled) coefficient as exponents of length, time and scalar units (empty when
    dimensionless; None when the term is not dimensionally homogeneous).
    """

    name: str
    rank: int
    components: dict[str, sympy.Expr]
    delta_power: float
    description: str = ""
    source: str = "preset"
    scaled_units: dict[str, float] | None = field(default_factory=dict)
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def dimensionless(self) -> bool:
        return self.scaled_units == {}

    @property
    def symbols(self) -> list[sympy.Symbol]:
        """Field symbols the term uses, in reading order (Delta not included)."""
        syms = set()
        for e in self.components.values():
            syms |= {s for s in e.free_symbols if s.name in _INFO}
        return _sorted_symbols(syms)

    @property
    def latex(self) -> dict[str, str]:
        return {k: to_latex(e) for k, e in self.components.items()}

    def expressions(self) -> dict[str, str]:
        """Components as sympy strings (readable back with :func:`parse_expression`)."""
        return {k: str(e) for k, e in self.components.items()}

    def units_text(self) -> str:
        """The coefficient_scaled's units as text: '1', 'length^2 time^-1', or 'mixed'."""
        if self.scaled_units is None:
            return "mixed (not dimensionally homogeneous)"
        if not self.scaled_units:
            return "1"
        return " ".join(f"{k}^{_num(v)}" for k, v in self.scaled_units.items())

    def function(self):
        """(symbols, f(Delta, *symbol values) -> list of component values), compiled once."""
        if "fn" not in self._cache:
            syms = self.symbols
            fn = sympy.lambdify([DELTA, *syms], list(self.components.values()), modules="numpy",
                                docstring_limit=None)
            self._cache["fn"] = (syms, fn)
        return self._cache["fn"]

    def to_dict(self) -> dict:
        return {"name": self.name, "rank": self.rank, "delta_power": _num(self.delta_power),
                "description": self.description, "source": self.source,
                "dimensionless": self.dimensionless, "scaled_units": self.scaled_units,
                "expression": self.expressions(), "latex": self.latex}


def _num(x):
    return int(x) if float(x).is_integer() else float(x)


_LATEX_DIR = {"x": "x", "y": "y", "z": "z"}


def latex_symbol_names(symbols: Iterable[sympy.Symbol]) -> dict[sympy.Symbol, str]:
    out = {DELTA: r"\Delta"}
    for s in symbols:
        info = _INFO.get(s.name)
        if info is None:
            continue
        f, counts = info
        fl = f if len(f) == 1 else rf"\mathrm{{{f}}}".replace("_", r"\_")
        if sum(counts) == 0:
            out[s] = fl
        else:
            sub = "".join(d * n for d, n in zip(AXES, counts, strict=True))
            out[s] = rf"\partial_{{{sub}}} {fl}"
    return out


def to_latex(expr: sympy.Expr) -> str:
    """LaTeX of an expression with derivative symbols shown as partial derivatives."""
    return sympy.latex(expr, symbol_names=latex_symbol_names(expr.free_symbols))


def _guard(expr: sympy.Expr) -> sympy.Expr:
    """Wrap an expression dividing by a square root in Piecewise(..., base > 0), 0 otherwise."""
    bases = set()
    for p in expr.atoms(sympy.Pow):
        ex = p.exp
        if ex.is_Rational and ex < 0 and not ex.is_Integer and p.base.free_symbols:
            bases.add(p.base)
    if not bases or isinstance(expr, sympy.Piecewise):
        return expr
    cond = sympy.And(*[b > 0 for b in sorted(bases, key=sympy.default_sort_key)])
    if cond is sympy.true:
        return expr
    return sympy.Piecewise((expr, cond), (sympy.Integer(0), True))


def _check_printable(expr: sympy.Expr, where: str) -> None:
    for f in expr.atoms(sympy.Function):
        if not isinstance(f, _PRINTABLE):
            raise UserError(f"{where}: the expression contains {f.func.__name__}(...), which has "
                            "no pointwise value in the exported code; rewrite it without "
                            f"differentiating abs/sign (allowed: sqrt, abs, exp, log, tanh)")



# ---------------------------------------------------------------------------------------------
# the library


@dataclass(frozen=True, eq=False)
class Library:
    """An ordered set of candidate terms for one target on one set of grid directions.

    ``name`` is the preset name or the terms file path; ``dropped`` lists preset terms left
    out on this grid and why (``"name: reason (name = combination)"``); ``dependencies`` the
    exact relations found (of dropped preset terms and of kept user terms); ``warnings`` what
    a user should hear about the terms (a user term that depends exactly on earlier ones).
    """

    name: str
    target: str
    dims: tuple[str, ...]
    scalars: tuple[str, ...]
    terms: tuple[Term, ...]
    dropped: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    dependencies: tuple[Dependency, ...] = ()
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def names(self) -> list[str]:
        return [t.name for t in self.terms]

    @property
    def directions(self) -> tuple[str, ...]:
        return directions(self.dims)

    @property
    def rank(self) -> int:
        return target_rank(self.target)

    @property
    def keys(self) -> list[str]:
        return component_keys(self.target, self.dims)

    @property
    def components(self) -> list[str]:
        """Target variable names, e.g. ``["tau_xx", "tau_xy", "tau_yy"]``."""
        return target_components(self.target, self.dims)

    @property
    def symbols(self) -> list[sympy.Symbol]:
        """Every field symbol the terms use, in reading order."""
        return _sorted_symbols({s for t in self.terms for s in t.symbols})

    @property
    def fields(self) -> list[str]:
        """Filtered fields the terms need (e.g. ``["u", "v", "c"]``)."""
        return list(dict.fromkeys(_INFO[s.name][0] for s in self.symbols))

    def __len__(self) -> int:
        return len(self.terms)

    def term(self, name: str) -> Term:
        for t in self.terms:
            if t.name == name:
                return t
        raise UserError(f"no term {name!r} in the library (terms: {', '.join(self.names)})")

    def subset(self, names: Iterable[str]) -> Library:
        """The terms named, in library order."""
        names = list(names)
        for n in names:
            self.term(n)
        key = ("subset", tuple(sorted(set(names))))
        if key not in self._cache:
            keep = tuple(t for t in self.terms if t.name in set(names))
            self._cache[key] = Library(self.name, self.target, self.dims, self.scalars, keep,
                                       self.dropped, self.warnings, self.dependencies)
        return self._cache[key]

    def to_dict(self) -> dict:
        return {"name": self.name, "target": self.target, "dims": list(self.dims),
                "scalars": list(self.scalars), "terms": [t.to_dict() for t in self.terms],
                "dropped": list(self.dropped), "warnings": list(self.warnings),
                "dependencies": [d.to_dict() for d in self.dependencies]}

    def _compiled(self):
        """(symbols, function(Delta, *symbol arrays) -> flat list [term][component])."""
        if "design" not in self._cache:
            syms = self.symbols
            exprs = [t.components[k] for t in self.terms for k in self.keys]
            fn = sympy.lambdify([DELTA, *syms], exprs, modules="numpy", cse=True)
            self._cache["design"] = (syms, fn)
        return self._cache["design"]
