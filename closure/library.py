"""Candidate terms for subgrid closures: sympy expressions, presets, user-defined terms.

Every term is a sympy expression first; its numerical evaluation (``sympy.lambdify`` with
numpy), its LaTeX and its C / Fortran / Python code (closure.export) all derive from it.

Symbols
-------
A term is a pointwise function of derivatives of the filtered fields on the coarse grid and of
the filter width. The symbols are valid C and Fortran identifiers:

    du_dx, dv_dy, dc_dz       first derivatives of the filtered velocity u, v, w or a scalar c
    d2u_dxx, d2u_dxy          second derivatives (directions in x, y, z order)
    d3u_dxxy, d4v_dxxyy, ...  higher derivatives: d<order><field>_d<directions>
    c                         the filtered scalar itself (user terms only)
    Delta                     the filter width (coordinate units)

A derivative is computed once per snapshot with closure.derivatives.derivative and the user's
scheme (spectral, fd2 or fd4, the coarse solver's own): ``d3u_dxxy`` is the second x derivative
(the scheme's own second-derivative stencil) followed by the first y derivative.

Terms
-----
``A_ij = d_j u_i`` (``A_xy = du_dy``), ``S = (A + A^T)/2``, ``R = (A - A^T)/2``,
``|S| = sqrt(2 S_ij S_ij)``. Stress targets are fitted as one symmetric tensor with one
coefficient per term shared by its components; force, scalar-flux and vorticity-forcing targets
as one vector (or scalar). Terms that are divergences or curls of tensor terms are expanded with
the chain rule into pointwise expressions of the resolved derivatives (``div_smagorinsky`` is
``d_j (Delta^2 |S| S_ij)`` written out), so the coarse solver needs only the derivative fields.
No built-in term contains a bare velocity, so the library is Galilean invariant.

Each term carries a power ``p`` of Delta: its components include ``Delta**p``, so the fitted
multiplier of a ``design`` column is the Delta-scaled coefficient ``coefficient_scaled``; the
dimensional coefficient of the Delta-free expression is ``coefficient_scaled * Delta**p``. Where
the term times Delta^p has the target's units, ``coefficient_scaled`` is dimensionless
(``Term.dimensionless``); otherwise ``Term.scaled_units`` gives its units (e.g. an eddy viscosity
``{"length": 2, "time": -1}`` for the ``strain`` term).

Divergences of ``|S|`` terms divide by ``|S|``; such components are written
``Piecewise((expr, |S|^2 > 0), (0, True))``: their limit where the strain vanishes is 0, and a
coarse run that starts from rest must not see 0/0.

Presets (``make_library(name, target, dims)``)
----------------------------------------------
``default``  every built-in term for the target; ``classic``  the Smagorinsky form and the
gradient model; ``minimal``  the Smagorinsky form alone (eddy viscosity / diffusivity).

Exact dependencies. A term that is an exact linear combination of earlier terms of its library
(or vanishes) cannot be fitted apart from them, so presets leave it out and list it in
``Library.dropped`` with the combination, e.g. ``"rotation_squared: a linear combination of
earlier terms on any field (rotation_squared = strain_squared - 12 gradient_model -
strain_rotation)"`` (from ``A A^T = S S - (S R - R S) - R R``), and in 2-D ``strain_squared =
1/4 isotropic`` (``S S = |S|^2/4 I`` when ``tr S = 0``). The test is symbolic and exact (see
:func:`find_dependencies`); the preset order puts the preferred terms first (Smagorinsky,
gradient model, strain, isotropic part, then the products), so those survive. Force, flux and
vorticity terms are checked on their own expressions, so a dependency among the stress terms
carries over to their divergences and curls, and new ones (a curl of a gradient) are found
too. ``make_library(..., prune=False)`` keeps every built-in term.

On 2-D and 3-D grids the libraries assume an incompressible filtered velocity: the check uses
``dv_dy = -du_dx`` (2-D) or ``dw_dz = -du_dx - dv_dy`` (3-D) and their derivatives. This holds
for filtered incompressible data on periodic grids (the filters commute with derivatives).
For compressible data, or a 2-D slice of a 3-D flow, list the terms wanted in a terms file
(user terms are never dropped) or build the library with ``prune=False``. In 1-D nothing is
assumed.

Terms files (user-defined terms)
--------------------------------
A YAML or JSON file::

    target: stress              # optional; must match the job's target
    include: classic            # optional; start from a preset
    allow_bare_velocity: false  # optional; bare u, v, w break Galilean invariance
    terms:
      - name: smagorinsky_cubed          # letters, digits, _ ; unique
        delta_power: 2
        description: my eddy viscosity   # optional
        expression: "Delta**2 * S_mag * S_{i}{j}"   # {i}, {j}: the component's directions
      - name: my_tensor
        delta_power: 2
        components:                      # or every component written out
          xx: "Delta**2 * du_dx**2"
          xy: "Delta**2 * du_dx*dv_dx"
          yy: "Delta**2 * dv_dx**2"

Component keys: ``xx, xy, yy, xz, yz, zz`` (stress), ``x, y, z`` (force, flux), and a single
``expression`` for the scalar vorticity forcing. Names usable in expressions: the derivative
symbols above, ``Delta``, ``A_xy`` (= du_dy), ``S_xy``, ``R_xy``, ``kronecker_xy``, ``S_mag``
(|S|), ``omega`` (2-D: dv_dx - du_dy), the scalar names, numbers, ``+ - * / **`` and the
functions ``sqrt, abs, exp, log, tanh`` and ``dx, dy, dz`` (chain-rule derivative of an
expression) and ``lap`` (its Laplacian). Duplicated names are not allowed. A user term that is
an exact linear combination of earlier terms (a duplicated expression, or one equal to a preset
term on incompressible fields) is kept, because the file asked for it, and named with the
combination in ``Library.warnings``, which the model file and its summary carry; the fit's
numerical collinearity check reports it as well.
"""

from __future__ import annotations

import ast
import dataclasses
import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from functools import lru_cache
from pathlib import Path

import numpy as np
import sympy

from closure.derivatives import check_scheme, derivative, derivatives
from closure.errors import UserError
from closure.grid import VELOCITY_OF, Grid

AXES = ("x", "y", "z")
PRESETS = ("default", "classic", "minimal")
DELTA = sympy.Symbol("Delta", positive=True)

_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,39}$")
_TARGET = re.compile(r"^(stress|force|vorticity|heat_flux|pressure_dilatation|"
                     r"flux:([A-Za-z][A-Za-z0-9_]*))$")
_DERIVATIVE = re.compile(r"^d(\d*)([A-Za-z][A-Za-z0-9_]*?)_d([xyz]+)$")
_MAX_ORDER = 8
_MAX_TEXT = 20000
_VELOCITY = ("u", "v", "w")
# functions an expression may contain (after differentiation too) and print in every language
_PRINTABLE = (sympy.Abs, sympy.sign, sympy.exp, sympy.log, sympy.tanh, sympy.Piecewise)

# name -> (field, derivative counts along x, y, z); the symbols' single source of truth
_INFO: dict[str, tuple[str, tuple[int, int, int]]] = {}
_SYMBOLS: dict[str, sympy.Symbol] = {}


# ---------------------------------------------------------------------------------------------
# targets and components


def directions(dims: Iterable[str]) -> tuple[str, ...]:
    """The grid's directions in component order (x, y, z); UserError on bad dims."""
    dims = tuple(dims)
    bad = [d for d in dims if d not in AXES]
    if not dims or bad or len(set(dims)) != len(dims):
        raise UserError(f"grid dims must be distinct names among z, y, x, got {dims}")
    return tuple(d for d in AXES if d in dims)


def parse_target(target: str) -> tuple[str, str | None]:
    """``"flux:c"`` -> ``("flux", "c")``; ``"stress"`` -> ``("stress", None)``."""
    m = _TARGET.match(str(target))
    if not m:
        raise UserError(f"unknown target {target!r}: choose stress, force, vorticity, "
                        "flux:NAME (NAME a scalar, e.g. flux:c), or for compressible data "
                        "heat_flux or pressure_dilatation")
    kind = m.group(1).split(":")[0]
    return kind, m.group(2)


def target_rank(target: str) -> int:
    """2 for stress, 1 for force, flux and heat flux, 0 for vorticity forcing and
    pressure-dilatation."""
    return {"stress": 2, "force": 1, "flux": 1, "vorticity": 0, "heat_flux": 1,
            "pressure_dilatation": 0}[parse_target(target)[0]]


def component_keys(target: str, dims: Iterable[str]) -> list[str]:
    """Component keys: ``["xx", "xy", "yy"]`` (2-D stress), ``["x", "y"]``, or ``[""]``."""
    kind, _ = parse_target(target)
    dirs = directions(dims)
    if kind == "stress":
        return [dirs[i] + dirs[j] for j in range(len(dirs)) for i in range(j + 1)]
    if kind == "pressure_dilatation":
        return [""]
    if kind == "vorticity":
        if dirs != ("x", "y"):
            raise UserError(f"the vorticity target needs a 2-D (y, x) grid; this grid has "
                            f"directions {', '.join(dirs)}: use --target stress or force")
        return [""]
    return list(dirs)


def target_components(target: str, dims: Iterable[str]) -> list[str]:
    """Target variable names: ``["tau_xx", "tau_xy", "tau_yy"]``, ``["force_x", ...]``,
    ``["flux_c_x", ...]`` or ``["vorticity_forcing"]``."""
    kind, scalar = parse_target(target)
    keys = component_keys(target, dims)
    if kind == "stress":
        return [f"tau_{k}" for k in keys]
    if kind == "force":
        return [f"force_{k}" for k in keys]
    if kind == "flux":
        return [f"flux_{scalar}_{k}" for k in keys]
    if kind in ("heat_flux", "pressure_dilatation"):
        return [f"{kind}_{k}" for k in keys] if keys != [""] else [kind]
    return ["vorticity_forcing"]


def component_weights(target: str, dims: Iterable[str]) -> np.ndarray:
    """Weight of each component in a fit: 2 for off-diagonal stress components (each stands
    for tau_ij and tau_ji, so the weighted sum of squares is the Frobenius norm), else 1."""
    keys = component_keys(target, dims)
    kind, _ = parse_target(target)
    if kind != "stress":
        return np.ones(len(keys))
    return np.array([1.0 if k[0] == k[1] else 2.0 for k in keys])


# ---------------------------------------------------------------------------------------------
# symbols


def symbol_name(field_name: str, counts: Sequence[int] = (0, 0, 0)) -> str:
    """``("u", (1, 0, 0))`` -> ``"du_dx"``; ``("u", (2, 1, 0))`` -> ``"d3u_dxxy"``."""
    order = sum(counts)
    if order == 0:
        return field_name
    dirs = "".join(d * n for d, n in zip(AXES, counts, strict=True))
    return f"d{field_name}_d{dirs}" if order == 1 else f"d{order}{field_name}_d{dirs}"


def field_symbol(field_name: str, counts: Sequence[int] = (0, 0, 0)) -> sympy.Symbol:
    """The real sympy Symbol for a derivative of a filtered field (see the module docstring)."""
    counts = tuple(int(n) for n in counts)
    name = symbol_name(field_name, counts)
    sym = _SYMBOLS.get(name)
    if sym is None:
        sym = sympy.Symbol(name, real=True)
        _SYMBOLS[name] = sym
        _INFO[name] = (field_name, counts)
    elif _INFO[name] != (field_name, counts):
        raise UserError(f"the name {name!r} is both a field and a derivative of "
                        f"{_INFO[name][0]!r}: rename the scalar")
    return sym


def symbol_info(sym: sympy.Symbol | str) -> tuple[str, tuple[int, int, int]] | None:
    """``(field, counts)`` of a derivative symbol (or its name), or None for other names."""
    name = sym if isinstance(sym, str) else sym.name
    if name in _INFO:
        return _INFO[name]
    m = _DERIVATIVE.match(name)
    if m:
        f, dirs = m.group(2), m.group(3)
        counts = tuple(dirs.count(a) for a in AXES)
        if symbol_name(f, counts) == name:
            return f, counts
    return None


def _axis_counts(dim: str) -> tuple[int, int, int]:
    return tuple(1 if a == dim else 0 for a in AXES)


def _sorted_symbols(symbols: Iterable[sympy.Symbol]) -> list[sympy.Symbol]:
    """Field symbols in a stable reading order: velocity first, then by order and name."""
    def key(s):
        f, counts = _INFO[s.name]
        rank = _VELOCITY.index(f) if f in _VELOCITY else 3
        return (sum(counts), rank, f, tuple(-n for n in counts))
    return sorted(symbols, key=key)


def check_scalar_names(scalars: Iterable[str]) -> tuple[str, ...]:
    """Validate scalar names (identifiers, not velocity or reserved names)."""
    out = []
    for c in scalars:
        if not isinstance(c, str) or not _NAME.match(c):
            raise UserError(f"scalar name {c!r} must start with a letter and contain only "
                            "letters, digits and _ (at most 40 characters)")
        if c in _VELOCITY or c in _RESERVED or c.lower() == "delta":
            raise UserError(f"scalar name {c!r} is reserved: rename the scalar")
        if _DERIVATIVE.match(c) or _HELPER.match(c):
            raise UserError(f"scalar name {c!r} looks like a derivative symbol: rename it")
        if c not in out:
            out.append(c)
    return tuple(out)


_HELPER = re.compile(r"^(A|S|R|kronecker)_[xyz]{2}$")
_RESERVED = {"S_mag", "omega", "dx", "dy", "dz", "lap", "sqrt", "abs", "Abs", "exp", "log",
             "tanh", "sign", "Piecewise", "True", "False"}


# ---------------------------------------------------------------------------------------------
# kinematics: the resolved velocity gradient and calculus on expressions


class Kinematics:
    """Velocity gradient tensors and chain-rule derivatives for a set of directions.

    ``A[i, j] = d_j u_i``, ``S``, ``R`` (sympy Matrices in x, y, z order), ``S_sq = 2 S:S``,
    ``S_mag = sqrt(S_sq)``, and in 2-D ``omega = dv_dx - du_dy``.
    """

    def __init__(self, dims: Iterable[str], scalars: Iterable[str] = ()):
        self.dirs = directions(dims)
        self.scalars = check_scalar_names(scalars)
        self.velocity = tuple(VELOCITY_OF[d] for d in self.dirs)
        n = len(self.dirs)
        self.A = sympy.Matrix(n, n, lambda i, j: field_symbol(self.velocity[i],
                                                              _axis_counts(self.dirs[j])))
        self.S = (self.A + self.A.T) / 2
        self.R = (self.A - self.A.T) / 2
        # a sum of squares as written: expanded, round-off could make it negative under sqrt
        self.S_sq = 2 * sum((self.S[i, j] ** 2 for i in range(n) for j in range(n)),
                            sympy.Integer(0))
        self.S_mag = sympy.sqrt(self.S_sq)
        self.omega = self.A[1, 0] - self.A[0, 1] if self.dirs == ("x", "y") else None

    @property
    def fields(self) -> tuple[str, ...]:
        return self.velocity + self.scalars

    def d(self, expr, dim: str) -> sympy.Expr:
        """Chain-rule derivative d/d``dim`` of a pointwise expression of field symbols."""
        if dim not in self.dirs:
            raise UserError(f"d{dim}() is not available on a grid with directions "
                            f"{', '.join(self.dirs)}")
        expr = sympy.sympify(expr)
        step = _axis_counts(dim)
        out = sympy.Integer(0)
        for s in expr.free_symbols:
            info = _INFO.get(s.name)
            if info is None:
                continue
            f, counts = info
            nxt = field_symbol(f, tuple(a + b for a, b in zip(counts, step, strict=True)))
            out += expr.diff(s) * nxt
        for a in out.atoms(sympy.sign):  # x sign(x) = |x|, from differentiating |x| x
            out = out.subs(a.args[0] * a, sympy.Abs(a.args[0]))
        return out

    def lap(self, expr) -> sympy.Expr:
        return sum((self.d(self.d(expr, k), k) for k in self.dirs), sympy.Integer(0))

    def grad(self, c: str) -> list[sympy.Symbol]:
        return [field_symbol(c, _axis_counts(d)) for d in self.dirs]

    def hessian(self, f: str) -> sympy.Matrix:
        n = len(self.dirs)
        return sympy.Matrix(n, n, lambda k, l: field_symbol(
            f, tuple(a + b for a, b in zip(_axis_counts(self.dirs[k]), _axis_counts(self.dirs[l]),
                                           strict=True))))

    def div(self, T: sympy.Matrix) -> list[sympy.Expr]:
        """d_j T_ij for a square matrix T."""
        n = len(self.dirs)
        return [sum((self.d(T[i, j], self.dirs[j]) for j in range(n)), sympy.Integer(0))
                for i in range(n)]

    def div_vector(self, F: Sequence) -> sympy.Expr:
        return sum((self.d(F[j], self.dirs[j]) for j in range(len(self.dirs))),
                   sympy.Integer(0))

    def curl(self, F: Sequence) -> sympy.Expr:
        """2-D curl d_x F_y - d_y F_x."""
        return self.d(F[1], "x") - self.d(F[0], "y")


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
# built-in terms


def _matrix_components(M: sympy.Matrix, dirs) -> dict[str, sympy.Expr]:
    n = len(dirs)
    return {dirs[i] + dirs[j]: M[i, j] for j in range(n) for i in range(j + 1)}


def _stress_terms(k: Kinematics) -> list[tuple[str, float, str, sympy.Matrix]]:
    D = DELTA
    n = len(k.dirs)
    S, R, A = k.S, k.R, k.A
    H = [k.hessian(u) for u in k.velocity]
    second = sympy.Matrix(n, n, lambda i, j: sum(H[i][a, b] * H[j][a, b]
                                                 for a in range(n) for b in range(n)))
    # preferred terms first: the exact-dependency check keeps the earliest of dependent terms
    return [
        ("smagorinsky", 2, "Smagorinsky eddy-viscosity form Delta^2 |S| S_ij, "
         "|S| = sqrt(2 S_kl S_kl)", D**2 * k.S_mag * S),
        ("gradient_model", 2, "gradient model Delta^2/12 d_k u_i d_k u_j (coefficient 1: the "
         "leading Taylor term of a box or Gaussian filter)", D**2 / 12 * A * A.T),
        ("strain", 0, "strain rate S_ij (constant eddy viscosity; the coefficient has units "
         "length^2/time)", S),
        ("isotropic", 2, "Delta^2 |S|^2 delta_ij (the trace part)",
         D**2 * k.S_sq * sympy.eye(n)),
        ("strain_squared", 2, "Delta^2 S_ik S_kj", D**2 * S * S),
        ("strain_rotation", 2, "Delta^2 (S_ik R_kj - R_ik S_kj), R = (A - A^T)/2",
         D**2 * (S * R - R * S)),
        ("rotation_squared", 2, "Delta^2 R_ik R_kj", D**2 * R * R),
        ("strain_laplacian", 2, "Delta^2 Laplacian of S_ij (the coefficient has units "
         "length^2/time)", D**2 * S.applyfunc(k.lap)),
        ("second_gradient_model", 4, "Delta^4 d_k d_l u_i d_k d_l u_j", D**4 * second),
    ]


def _flux_terms(k: Kinematics, c: str) -> list[tuple[str, float, str, list]]:
    D = DELTA
    n = len(k.dirs)
    g = k.grad(c)
    A, S, R = k.A, k.S, k.R
    Hc = k.hessian(c)
    H = [k.hessian(u) for u in k.velocity]
    lap_c = sum(field_symbol(c, tuple(2 * a for a in _axis_counts(d))) for d in k.dirs)
    return [
        ("eddy_diffusivity", 2, f"Smagorinsky-type eddy diffusivity Delta^2 |S| d_j {c}",
         [D**2 * k.S_mag * g[j] for j in range(n)]),
        ("gradient_model", 2, f"gradient model Delta^2/12 d_k u_j d_k {c}",
         [D**2 / 12 * sum(A[j, a] * g[a] for a in range(n)) for j in range(n)]),
        ("scalar_gradient", 0, f"d_j {c} (constant diffusivity; the coefficient has units "
         "length^2/time)", list(g)),
        ("strain_scalar_gradient", 2, f"Delta^2 S_jk d_k {c} (tensor diffusivity)",
         [D**2 * sum(S[j, a] * g[a] for a in range(n)) for j in range(n)]),
        ("rotation_scalar_gradient", 2, f"Delta^2 R_jk d_k {c}",
         [D**2 * sum(R[j, a] * g[a] for a in range(n)) for j in range(n)]),
        ("second_gradient_model", 4, f"Delta^4 d_k d_l u_j d_k d_l {c}",
         [D**4 * sum(H[j][a, b] * Hc[a, b] for a in range(n) for b in range(n))
          for j in range(n)]),
        ("hyperdiffusivity", 4, f"Delta^4 |S| d_j Laplacian({c})",
         [D**4 * k.S_mag * k.d(lap_c, k.dirs[j]) for j in range(n)]),
    ]


_CLASSIC = {"stress": ("smagorinsky", "gradient_model"),
            "force": ("div_smagorinsky", "div_gradient_model"),
            "vorticity": ("curl_div_smagorinsky", "curl_div_gradient_model"),
            "flux": ("eddy_diffusivity", "gradient_model")}
_MINIMAL = {"stress": ("smagorinsky",), "force": ("div_smagorinsky",),
            "vorticity": ("curl_div_smagorinsky",), "flux": ("eddy_diffusivity",)}


def _builtin_terms(target: str, k: Kinematics) -> list[Term]:
    kind, scalar = parse_target(target)
    dirs = k.dirs
    raw = []  # (name, power, description, components)
    if kind == "stress":
        for name, p, desc, M in _stress_terms(k):
            raw.append((name, p, desc, _matrix_components(M, dirs)))
    elif kind == "force":
        for name, p, desc, M in _stress_terms(k):
            comps = dict(zip(dirs, k.div(M), strict=True))
            raw.append((f"div_{name}", p, f"divergence d_j of the stress term {name}: {desc}",
                        comps))
    elif kind == "vorticity":
        for name, p, desc, M in _stress_terms(k):
            raw.append((f"curl_div_{name}", p, f"curl of the divergence of the stress term "
                        f"{name}: {desc}", {"": k.curl(k.div(M))}))
        w = k.omega
        gw = [k.d(w, d) for d in dirs]
        raw.append(("vorticity_diffusion", 2, "d_j (Delta^2 |S| d_j omega): eddy viscosity "
                    "acting on the vorticity",
                    {"": k.div_vector([DELTA**2 * k.S_mag * g for g in gw])}))
        raw.append(("vorticity_gradient_model", 2, "d_j (Delta^2/12 d_k u_j d_k omega): the "
                    "gradient model of the vorticity flux",
                    {"": k.div_vector([DELTA**2 / 12 * sum(k.A[j, a] * gw[a]
                                                           for a in range(len(dirs)))
                                       for j in range(len(dirs))])}))
    else:
        for name, p, desc, comps in _flux_terms(k, scalar):
            raw.append((name, p, desc, dict(zip(dirs, comps, strict=True))))
    return [_make_term(name, target, k, comps, p, desc, "preset")
            for name, p, desc, comps in raw]


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
        from closure.library_compressible import coefficient_units  # mass, length, time, K

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


# ---------------------------------------------------------------------------------------------
# exact linear dependencies between terms
#
# The fit can only tell terms apart that are linearly independent as functions of the resolved
# field. Dependence is decided exactly: every component is expanded into a polynomial over
# monomials of the derivative symbols (non-polynomial factors such as the square root in |S|
# become atoms after a canonical simplification) with rational coefficients, and a term joins
# the independent set only if it raises the rank (fraction arithmetic). A numerical probe at
# random derivative values screens first: a term clearly independent there (relative residual
# far above round-off) cannot be exactly dependent, so only candidates are expanded. Treating
# atoms as free symbols can miss a dependency (the term is then kept) but never invent one.
# On 2-D and 3-D grids the velocity is taken divergence-free: the last diagonal derivative is
# minus the others (dv_dy = -du_dx; dw_dz = -du_dx - dv_dy), and every derivative of it
# likewise (d2v_dyy = -d2u_dxy).

_MAX_MONOMIALS = 20000  # expansions larger than this are not attempted (the term is kept)
_PROBE_POINTS = 64
_PROBE_INDEPENDENT = 1e-7  # relative residual above which a probe column is independent


@dataclass(frozen=True)
class Dependency:
    """An exact linear relation of a term to earlier ones of its library:
    ``term = sum_k coefficient_k * Delta**delta_power_k * other_k`` (as written, with Delta),
    on every field (``incompressible`` False) or on divergence-free fields only."""

    term: str
    combination: tuple[tuple[str, Fraction, float], ...]  # (other term, coefficient, power)
    incompressible: bool
    ndim: int

    @property
    def where(self) -> str:
        if self.ndim == 1:
            return "on any 1-D field"
        return "on incompressible fields" if self.incompressible else "on any field"

    @property
    def equation(self) -> str:
        """``"rotation_squared = strain_squared - strain_rotation - 12 gradient_model"``."""
        parts = []
        # positive coefficients first, each group in library order
        for name, c, p in sorted(self.combination, key=lambda item: item[1] < 0):
            mag = abs(c)
            text = "" if mag == 1 else f"{mag} "
            if p:
                text += f"Delta^{_num(p)} "
            text += name
            parts.append(("-" if c < 0 else "+", text))
        if not parts:
            return f"{self.term} = 0"
        first_sign, first = parts[0]
        rhs = ("-" if first_sign == "-" else "") + first
        rhs += "".join(f" {s} {t}" for s, t in parts[1:])
        return f"{self.term} = {rhs}"

    def describe(self) -> str:
        """``"name: <kind> <where> (<equation>)"``, the form of ``Library.dropped`` entries."""
        if not self.combination:
            return f"{self.term}: vanishes identically {self.where}"
        if len(self.combination) == 1:
            kind = f"a constant multiple of {self.combination[0][0]}"
        else:
            kind = "a linear combination of earlier terms"
        return f"{self.term}: {kind} {self.where} ({self.equation})"

    def to_dict(self) -> dict:
        return {"term": self.term, "incompressible": self.incompressible,
                "combination": [{"term": n, "coefficient": str(c), "delta_power": _num(p)}
                                for n, c, p in self.combination]}


class _TooLarge(Exception):
    pass


def _monomial_bound(e: sympy.Basic, limit: int) -> int:
    """An upper bound of the number of monomials of expand(e) (capped just above limit)."""
    if e.is_Atom or not e.args:
        return 1
    if e.is_Add:
        return min(sum(_monomial_bound(a, limit) for a in e.args), limit + 1)
    if e.is_Mul:
        n = 1
        for a in e.args:
            n = min(n * _monomial_bound(a, limit), limit + 1)
        return n
    if e.is_Pow and e.exp.is_Integer and e.exp > 0:
        m = _monomial_bound(e.base, limit)
        return min(math.comb(m + int(e.exp) - 1, int(e.exp)), limit + 1)
    return 1  # an atom after canonicalisation (its own expansion is bounded separately)


class _DependencyCheck:
    """Exact rank test of terms on one set of directions (see the comment above)."""

    def __init__(self, dirs: tuple[str, ...], incompressible: bool = True):
        self.dirs = dirs
        self.incompressible = incompressible and len(dirs) >= 2
        last = dirs[-1]
        self._last_field, self._last_axis = VELOCITY_OF[last], AXES.index(last)
        self._atoms: dict[tuple, sympy.Dummy] = {}
        self._with_delta: set[sympy.Dummy] = set()
        self._values: dict[str, np.ndarray] = {}
        self._rng = np.random.default_rng(20261202)
        self._exact: dict[tuple[int, bool], tuple[dict, float]] = {}

    # -- incompressibility ---------------------------------------------------------------------

    def _replacement(self, name: str) -> list[str] | None:
        """Symbols whose negated sum replaces ``name`` on divergence-free fields, or None."""
        if not self.incompressible:
            return None
        f, counts = _INFO[name]
        if f != self._last_field or counts[self._last_axis] == 0:
            return None
        out = []
        for d in self.dirs[:-1]:
            c = list(counts)
            c[self._last_axis] -= 1
            c[AXES.index(d)] += 1
            out.append(field_symbol(VELOCITY_OF[d], tuple(c)).name)
        return out

    def _value(self, name: str) -> np.ndarray:
        if name not in self._values:
            repl = self._replacement(name) if name in _INFO else None
            if repl is None:
                self._values[name] = self._rng.standard_normal(_PROBE_POINTS)
            else:
                self._values[name] = -sum(self._value(r) for r in repl)
        return self._values[name]

    # -- numbers at random divergence-free derivative values -------------------------------------

    def probe(self, term: Term) -> np.ndarray:
        syms, f = term.function()
        with np.errstate(all="ignore"):
            out = f(1.0, *(self._value(s.name) for s in syms))
        return np.concatenate([np.broadcast_to(np.asarray(v, dtype=float), (_PROBE_POINTS,))
                               for v in out])

    # -- exact polynomial vectors ---------------------------------------------------------------

    def _atomize(self, e: sympy.Basic) -> sympy.Basic:
        """``e`` with non-polynomial parts replaced by Dummy atoms, one per canonical form."""
        if e.is_Atom or not e.args:
            return e
        if isinstance(e, sympy.Piecewise) and len(e.args) == 2 and e.args[1].cond is sympy.true \
                and e.args[1].expr == 0:
            return self._atomize(e.args[0].expr)  # the _guard form: 0 only where |S| = 0
        if e.is_Pow and e.exp.is_Rational and not e.exp.is_Integer:
            base = self._expand(self._atomize(e.base))
            content, prim = base.primitive() if base.is_Add else (sympy.Integer(1), base)
            whole = sympy.floor(e.exp)
            atom = self._atom(("pow", prim, e.exp - whole))
            return content ** e.exp * prim ** whole * atom
        if isinstance(e, sympy.Function | sympy.Piecewise) or e.is_Pow and not e.exp.is_Integer:
            args = tuple(self._expand(self._atomize(a)) if isinstance(a, sympy.Expr) else a
                         for a in e.args)
            return self._atom(("function", e.func(*args)))
        return e.func(*[self._atomize(a) for a in e.args])

    def _atom(self, key: tuple) -> sympy.Dummy:
        d = self._atoms.get(key)
        if d is None:
            d = self._atoms[key] = sympy.Dummy("atom")
            if any(DELTA in getattr(x, "free_symbols", ()) for x in key[1:]):
                self._with_delta.add(d)
        return d

    @staticmethod
    def _expand(e: sympy.Basic) -> sympy.Basic:
        if _monomial_bound(e, _MAX_MONOMIALS) > _MAX_MONOMIALS:
            raise _TooLarge
        return sympy.expand(e)

    def exact(self, i: int, term: Term, incompressible: bool) -> tuple[dict, float]:
        """({(component, monomial): Fraction}, Delta power): the Delta-free part of a term that
        carries one power of Delta, else the whole polynomial with power 0. Raises _TooLarge."""
        key = (i, incompressible)
        if key in self._exact:
            return self._exact[key]
        rows: dict = {}
        degrees: set = set()
        mixed = False
        for comp, e in term.components.items():
            if incompressible and self.incompressible:
                sub = {}
                for s in e.free_symbols:
                    repl = self._replacement(s.name) if s.name in _INFO else None
                    if repl is not None:
                        sub[s] = -sympy.Add(*[_SYMBOLS[r] for r in repl])
                e = e.xreplace(sub)
            e = self._expand(self._atomize(e))
            for mono, c in e.as_coefficients_dict().items():
                if c == 0 or mono == 0:
                    continue
                powers = mono.as_powers_dict()
                mixed |= any(a in self._with_delta for a in powers)
                degrees.add(powers.get(DELTA, 0))
                rows[(comp, mono)] = _fraction(c)
        if mixed or len(degrees) > 1:
            vector, power = {("mixed", *k): v for k, v in rows.items()}, 0.0
        else:
            p = degrees.pop() if degrees else 0
            scale = DELTA ** p
            vector = {}
            for (comp, mono), v in rows.items():
                k = (comp, mono / scale)
                vector[k] = v
            power = float(p)
        self._exact[key] = (vector, power)
        return vector, power

    # -- the greedy rank test -------------------------------------------------------------------

    def run(self, terms: Sequence[Term], independent: int = 0) -> list[Dependency | None]:
        """For each term: None when it raises the rank of the earlier independent ones, else
        its exact relation to them. The first ``independent`` terms are taken as independent
        (already checked). Terms too large to expand count as independent."""
        cols = [self.probe(t) for t in terms]
        finite = [bool(np.all(np.isfinite(c))) for c in cols]
        norms = [float(np.linalg.norm(c)) if ok else 0.0 for c, ok in zip(cols, finite,
                                                                            strict=True)]
        ref = max(norms + [1e-300])
        basis: list[int] = []  # independent term indices
        out: list[Dependency | None] = []
        for i in range(len(terms)):
            if i < independent or not finite[i]:
                out.append(None)
                basis.append(i)
                continue
            support = self._numeric_support(cols, norms, ref, basis, i)
            dep = None
            if support is not None:
                try:
                    dep = self._relation(terms, i, support)
                    if dep is None and len(support) < len(basis):
                        dep = self._relation(terms, i, basis)
                except _TooLarge:
                    dep = None
            out.append(dep)
            if dep is None:
                basis.append(i)
        return out

    @staticmethod
    def _numeric_support(cols, norms, ref, basis, i) -> list[int] | None:
        """Indices of ``basis`` a probe column seems to be a combination of; None when it is
        clearly independent of them."""
        if norms[i] <= 1e-9 * ref:
            return []
        usable = [k for k in basis if norms[k] > 0]
        if not usable:
            return None
        K = np.stack([cols[k] / norms[k] for k in usable], axis=1)
        y = cols[i] / norms[i]
        a, *_ = np.linalg.lstsq(K, y, rcond=None)
        if np.linalg.norm(y - K @ a) > _PROBE_INDEPENDENT:
            return None
        big = np.abs(a).max(initial=0.0)
        return [k for k, ak in zip(usable, a, strict=True) if abs(ak) > 1e-9 * big]

    def _relation(self, terms, i, support) -> Dependency | None:
        """The exact relation of term i to the terms ``support``, or None if it has none."""
        target, p_i = self.exact(i, terms[i], True)
        combination = _solve([self.exact(k, terms[k], True)[0] for k in support], target)
        if combination is None:
            return None
        combo = []
        for k, c in zip(support, combination, strict=True):
            if c:
                combo.append((terms[k].name, c, p_i - self.exact(k, terms[k], True)[1]))
        needs = False
        if self.incompressible:  # does the relation hold without div u = 0 as well?
            raw, _ = self.exact(i, terms[i], False)
            rest = dict(raw)
            for k, c in zip(support, combination, strict=True):
                for key, v in self.exact(k, terms[k], False)[0].items():
                    rest[key] = rest.get(key, 0) - c * v
            needs = any(v != 0 for v in rest.values())
        return Dependency(terms[i].name, tuple(combo), needs, len(self.dirs))


def _fraction(c) -> Fraction:
    if c.is_Rational:
        return Fraction(int(c.p), int(c.q))
    if c.is_Float:
        return Fraction(float(c))  # the binary value the evaluation uses
    raise _TooLarge  # a coefficient we cannot do exact arithmetic with: not checked


def _solve(vectors: Sequence[Mapping], target: Mapping) -> list[Fraction] | None:
    """Exact coefficients a with target = sum_k a_k vectors[k] (vectors independent), or None.

    Fraction-exact Gaussian elimination on sparse vectors (dicts key -> Fraction)."""
    basis: list[tuple[object, dict, dict]] = []  # (pivot, reduced vector, as combination)
    for k, v in enumerate(vectors):
        r, taken = dict(v), {}
        _reduce(r, taken, basis)
        if r:  # r = v_k - taken, as a combination of the original vectors
            rep = {n: -c for n, c in taken.items()}
            rep[k] = rep.get(k, Fraction(0)) + 1
            basis.append((next(iter(r)), r, rep))
    r, taken = dict(target), {}
    _reduce(r, taken, basis)
    if r:
        return None
    return [taken.get(k, Fraction(0)) for k in range(len(vectors))]  # target = taken


def _reduce(r: dict, taken: dict, basis) -> None:
    """Subtract basis vectors from r until it has no basis pivot; ``taken`` accumulates what
    was subtracted, as a combination of the original vectors."""
    for pivot, b, brep in basis:
        f = r.get(pivot)
        if not f:
            continue
        f = f / b[pivot]
        for key, bv in b.items():
            nv = r.get(key, 0) - f * bv
            if nv:
                r[key] = nv
            else:
                r.pop(key, None)
        for n, cv in brep.items():
            nv = taken.get(n, 0) + f * cv
            if nv:
                taken[n] = nv
            else:
                taken.pop(n, None)


def find_dependencies(terms: Sequence[Term], dims: Iterable[str],
                      independent: int = 0, *, incompressible: bool = True
                      ) -> list[Dependency | None]:
    """Exact linear dependencies of each term on the earlier independent terms (greedy, in
    order), on divergence-free fields for 2-D and 3-D grids unless ``incompressible`` is False
    (compressible libraries): ``None`` for a term that raises the rank, else its
    :class:`Dependency`. The first ``independent`` terms are assumed independent."""
    return _DependencyCheck(directions(dims), incompressible).run(list(terms), independent)


def _prune(terms: list[Term], dims) -> tuple[list[Term], list[Dependency]]:
    """Leave out terms that are exact linear combinations of earlier ones (or vanish)."""
    kept, dropped = [], []
    for t, dep in zip(terms, find_dependencies(terms, dims), strict=True):
        if dep is None:
            kept.append(t)
        else:
            dropped.append(dep)
    return kept, dropped


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


def make_library(name_or_path: str, target: str, dims: Iterable[str],
                 scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """A preset (``default``, ``classic``, ``minimal``; for Favre-filtered compressible data
    ``compressible``, ``compressible_classic``, ``compressible_minimal`` from
    closure.library_compressible) or a terms file, for ``target`` on a grid with ``dims``.
    ``scalars`` are the scalar fields available (the target's own scalar is added). Preset
    terms that depend exactly on earlier ones (on incompressible fields in 2-D and 3-D; on any
    field for the compressible presets) are left out and listed in ``Library.dropped``, unless
    ``prune`` is False; user terms are kept and their dependencies reported in
    ``Library.warnings``. Presets are cached per (preset, target, dims, scalars). Raises
    UserError naming the problem."""
    kind, scalar = parse_target(target)
    dims = tuple(dims)
    component_keys(target, dims)  # checks vorticity needs (y, x)
    scalars = tuple(scalars) if not isinstance(scalars, str) else (scalars,)
    if scalar is not None and scalar not in scalars:
        scalars = (*scalars, scalar)
    scalars = check_scalar_names(scalars)
    from closure import library_compressible as compressible

    if name_or_path in compressible.PRESETS:
        return compressible.compressible_library(str(name_or_path), target, dims, bool(prune))
    if kind in compressible.TARGETS and kind != "stress":
        raise UserError(f"the target {target} needs a compressible library: choose "
                        f"{', '.join(compressible.PRESETS)}")
    if name_or_path in PRESETS:
        return _preset(str(name_or_path), target, directions(dims), scalars, dims, bool(prune))
    path = Path(str(name_or_path))
    if not path.suffix and not path.exists():
        raise UserError(f"unknown library {name_or_path!r}: choose {', '.join(PRESETS)} or give "
                        "the path of a terms file (.yaml, .yml or .json)")
    return load_terms_file(path, target, dims, scalars, prune=prune)


@lru_cache(maxsize=64)
def _default_terms(target: str, dirs: tuple[str, ...], scalars: tuple[str, ...], prune: bool
                   ) -> tuple[tuple[Term, ...], tuple[Dependency, ...]]:
    cached = _disk_cache("default_terms", (target, dirs, scalars, prune))
    if cached is not None:
        return cached
    terms = _builtin_terms(target, Kinematics(dirs, scalars))
    if not prune:
        return _disk_cache("default_terms", (target, dirs, scalars, prune), (tuple(terms), ()))
    kept, dropped = _prune(terms, dirs)
    return _disk_cache("default_terms", (target, dirs, scalars, prune),
                       (tuple(kept), tuple(dropped)))


def _cache_folder() -> Path | None:
    """Where built preset terms are kept between processes: ``CLOSURE_CACHE`` (``off``: not
    kept), else ``$XDG_CACHE_HOME/closure`` or ``~/.cache/closure``."""
    import os

    env = os.environ.get("CLOSURE_CACHE")
    if env is not None:
        return None if env.strip().lower() in ("", "off", "0", "no") else Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "closure"


def _private(path: Path) -> bool:
    """Owned by this user and writable by nobody else (a cache entry we may unpickle)."""
    import os

    st = path.stat()
    return st.st_uid == os.getuid() and not st.st_mode & 0o022


def _disk_cache(kind: str, key: tuple, value=None):
    """Built preset terms (sympy expressions, pruning) stored between processes: building
    and pruning them took about a second of every command's start-up. Keyed by this module's
    source and the sympy version, so an edit of the presets never reads a stale entry. With
    ``value``: store it (best effort) and return it; without: the stored value or None. The
    files are this user's own cache (pickles of sympy expressions), read only when this user
    owns them and their folder and nobody else may write them."""
    import hashlib
    import pickle

    folder = _cache_folder()
    if folder is None:
        return value
    try:
        h = hashlib.sha256(Path(__file__).read_bytes())
        h.update(repr((sympy.__version__, kind, key)).encode())
        path = folder / f"{kind}-{h.hexdigest()[:32]}.pickle"
        if value is None:
            if not path.exists() or not _private(path) or not _private(folder):
                return None  # read only what this user alone could have written
            terms, dropped, symbols = pickle.loads(path.read_bytes())
            for f, counts in symbols:  # the symbol registry the terms' names resolve in
                field_symbol(f, counts)
            return terms, dropped
        from closure.atomic import write_bytes

        symbols = sorted({_INFO[s.name] for t in value[0] for s in t.symbols})
        bare = tuple(dataclasses.replace(t, _cache={}) for t in value[0])  # no compiled code
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        write_bytes(path, pickle.dumps((bare, value[1], symbols)))
        path.chmod(0o600)
    except (OSError, pickle.PickleError, EOFError, AttributeError, ValueError, TypeError,
            KeyError, UserError):
        pass  # a cache: any problem means building the terms again
    return value


def _preset_terms(name: str, target: str, dirs: tuple[str, ...], scalars: tuple[str, ...],
                  prune: bool = True) -> tuple[tuple[Term, ...], tuple[Dependency, ...]]:
    kept, dropped = _default_terms(target, dirs, scalars, prune)
    if name != "default":
        wanted = (_CLASSIC if name == "classic" else _MINIMAL)[parse_target(target)[0]]
        kept = tuple(t for t in kept if t.name in wanted)
        dropped = tuple(d for d in dropped if d.term in wanted)
    return kept, dropped


@lru_cache(maxsize=64)
def _preset(name, target, dirs, scalars, dims, prune) -> Library:
    terms, dropped = _preset_terms(name, target, dirs, scalars, prune)
    return Library(name, target, tuple(dims), scalars, terms,
                   tuple(d.describe() for d in dropped), (), dropped)


# ---------------------------------------------------------------------------------------------
# parsing expressions (user terms and model files)


class Namespace:
    """The names an expression may use for a set of directions and fields."""

    def __init__(self, kinematics: Kinematics, allow_bare_velocity: bool = False):
        k = self.k = kinematics
        self.allow_bare_velocity = allow_bare_velocity
        names: dict[str, object] = {"Delta": DELTA, "S_mag": k.S_mag}
        n = len(k.dirs)
        for i in range(n):
            for j in range(n):
                ij = k.dirs[i] + k.dirs[j]
                names[f"A_{ij}"] = k.A[i, j]
                names[f"S_{ij}"] = k.S[i, j]
                names[f"R_{ij}"] = k.R[i, j]
                names[f"kronecker_{ij}"] = sympy.Integer(1 if i == j else 0)
        if k.omega is not None:
            names["omega"] = k.omega
        for c in k.scalars:
            names[c] = field_symbol(c)
        funcs = {"sqrt": sympy.sqrt, "abs": sympy.Abs, "Abs": sympy.Abs, "exp": sympy.exp,
                 "log": sympy.log, "tanh": sympy.tanh, "sign": sympy.sign,
                 "Piecewise": sympy.Piecewise, "lap": k.lap}
        for d in k.dirs:
            funcs[f"d{d}"] = (lambda e, d=d: k.d(e, d))
        self.values = names
        self.functions = funcs

    def lookup(self, name: str, where: str):
        if name in self.values:
            return self.values[name]
        if name in self.functions:
            return self.functions[name]
        if name in ("True", "False"):
            return sympy.true if name == "True" else sympy.false
        if name in _VELOCITY and name in self.k.velocity:
            if not self.allow_bare_velocity:
                raise UserError(f"{where}: the bare velocity {name!r} is not Galilean invariant; "
                                "use its derivatives (e.g. d" + name + "_dx) or set "
                                "allow_bare_velocity: true in the terms file")
            return field_symbol(name)
        m = _DERIVATIVE.match(name)
        if m:
            return self._derivative(name, m, where)
        raise UserError(f"{where}: unknown symbol {name!r}; {self.allowed()}")

    def _derivative(self, name, m, where):
        digits, f, dirs = m.groups()
        fields = self.k.fields
        if f not in fields:
            raise UserError(f"{where}: {name!r} is a derivative of {f!r}, which is not a field "
                            f"here (fields: {', '.join(fields)}); {self.allowed()}")
        bad = [d for d in dirs if d not in self.k.dirs]
        if bad:
            raise UserError(f"{where}: {name!r} differentiates along {bad[0]}, which this grid "
                            f"does not have (directions: {', '.join(self.k.dirs)})")
        counts = tuple(dirs.count(a) for a in AXES)
        order = len(dirs)
        good = symbol_name(f, counts)
        if name != good or (digits and int(digits) != order):
            raise UserError(f"{where}: {name!r} is not a valid derivative name; write {good!r} "
                            "(d<order><field>_d<directions>, order omitted for first "
                            "derivatives, directions in x, y, z order)")
        if order > _MAX_ORDER:
            raise UserError(f"{where}: {name!r} has order {order}; at most {_MAX_ORDER}")
        return field_symbol(f, counts)

    def allowed(self) -> str:
        k = self.k
        first = [symbol_name(f, _axis_counts(d)) for f in k.fields for d in k.dirs]
        helpers = ["Delta", "S_mag"] + (["omega"] if k.omega is not None else [])
        helpers += [f"{h}_{i}{j}" for h in ("A", "S", "R") for i in k.dirs[:1]
                    for j in k.dirs[-1:]]
        funcs = ["sqrt", "abs", "exp", "log", "tanh", *(f"d{d}" for d in k.dirs), "lap"]
        scal = f"; scalars {', '.join(k.scalars)}" if k.scalars else ""
        return ("allowed are " + ", ".join(helpers) + " (A_ij, S_ij, R_ij, kronecker_ij for "
                f"directions {', '.join(k.dirs)}), derivatives " + ", ".join(first)
                + " and higher ones named d<order><field>_d<directions> (e.g. "
                f"{symbol_name(k.velocity[0], (2, 0, 0))}){scal}; functions " + ", ".join(funcs))


_ALLOWED_NODES = (ast.Expression, ast.BinOp, ast.UnaryOp, ast.Constant, ast.Name, ast.Load,
                  ast.Call, ast.Tuple, ast.Compare, ast.Add, ast.Sub, ast.Mult, ast.Div,
                  ast.Pow, ast.BitXor, ast.BitAnd, ast.BitOr, ast.USub, ast.UAdd, ast.Gt,
                  ast.Lt, ast.GtE, ast.LtE)


def _constant_value(node) -> float | None:
    if isinstance(node, ast.Constant) and isinstance(node.value, int | float) \
            and not isinstance(node.value, bool):
        return float(node.value)
    if isinstance(node, ast.UnaryOp):
        v = _constant_value(node.operand)
        return None if v is None else (-v if isinstance(node.op, ast.USub) else v)
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add | ast.Sub | ast.Mult | ast.Div):
        a, b = _constant_value(node.left), _constant_value(node.right)
        if a is None or b is None or (isinstance(node.op, ast.Div) and b == 0):
            return None
        return {ast.Add: a + b, ast.Sub: a - b, ast.Mult: a * b,
                ast.Div: a / b if b else 0.0}[type(node.op)]
    return None


def parse_expression(text: str, namespace: Namespace, where: str = "expression") -> sympy.Expr:
    """Parse ``text`` into a sympy expression using only the names of ``namespace``.

    The text is checked as a Python expression tree first (numbers, names, + - * / ** ^,
    calls of the allowed functions, comparisons inside Piecewise), then handed to
    ``sympy.sympify`` with the namespace as its only names. UserError names the bad symbol.
    """
    if not isinstance(text, str | int | float) or isinstance(text, bool):
        raise UserError(f"{where}: expected an expression string, got {type(text).__name__}")
    text = str(text)
    if len(text) > _MAX_TEXT:
        raise UserError(f"{where}: the expression is longer than {_MAX_TEXT} characters")
    try:
        tree = ast.parse(text.replace("^", "**").strip(), mode="eval")
    except SyntaxError as exc:
        raise UserError(f"{where}: cannot parse {text!r}: {exc.msg} at column "
                        f"{exc.offset or 0}") from None
    local = {}
    for node in ast.walk(tree):
        if not isinstance(node, _ALLOWED_NODES):
            raise UserError(f"{where}: {type(node).__name__} is not allowed in an expression "
                            f"({text!r}); use numbers, symbols, + - * / ** and functions")
        if isinstance(node, ast.Constant) and not isinstance(node.value, int | float):
            raise UserError(f"{where}: the constant {node.value!r} is not a number")
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.keywords:
                raise UserError(f"{where}: only plain calls like sqrt(x) are allowed")
            if node.func.id not in namespace.functions:
                raise UserError(f"{where}: unknown function {node.func.id!r}; "
                                f"{namespace.allowed()}")
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow | ast.BitXor):
            v = _constant_value(node.right)
            if v is None or abs(v) > 64:
                raise UserError(f"{where}: exponents must be numbers of size at most 64 "
                                f"({text!r})")
        if isinstance(node, ast.Name):
            local[node.id] = namespace.lookup(node.id, where)
    try:
        expr = sympy.sympify(text, locals=local)
    except UserError:
        raise
    except Exception as exc:
        raise UserError(f"{where}: cannot evaluate {text!r}: {exc}") from None
    if not isinstance(expr, sympy.Expr):
        raise UserError(f"{where}: {text!r} is not an algebraic expression")
    return expr


# ---------------------------------------------------------------------------------------------
# terms files

_FILE_KEYS = {"format", "target", "include", "allow_bare_velocity", "terms", "description"}
_TERM_KEYS = {"name", "delta_power", "description", "expression", "components"}


def load_terms_file(path: str | Path, target: str, dims: Iterable[str],
                    scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """Read user-defined terms (format in the module docstring) for ``target``."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"no terms file {path}: give a preset ({', '.join(PRESETS)}) or the path "
                        "of a .yaml/.json terms file")
    text = path.read_text(encoding="utf-8", errors="replace")
    try:
        if path.suffix.lower() == ".json":
            data = json.loads(text)
        else:
            import yaml

            data = yaml.safe_load(text)
    except Exception as exc:
        kind = "JSON" if path.suffix.lower() == ".json" else "YAML"
        raise UserError(f"terms file {path} is not valid {kind}: {exc}") from None
    return terms_from_data(data, target, dims, scalars, name=str(path), prune=prune)


def terms_from_inline(definitions, target: str, dims: Iterable[str],
                      scalars: Iterable[str] = (), *, prune: bool = True) -> Library:
    """A Library from term definitions given inline (a job spec's ``library``): a terms
    file's content as parsed JSON, either its whole mapping or just its list of terms."""
    data = {"terms": definitions} if isinstance(definitions, list) else definitions
    return terms_from_data(data, target, dims, scalars, name="(inline)", prune=prune)


def terms_from_data(data, target: str, dims: Iterable[str], scalars: Iterable[str] = (),
                    name: str = "terms", *, prune: bool = True) -> Library:
    """Build a Library from the parsed contents of a terms file. An included preset is
    pruned as by :func:`make_library`; a user term that depends exactly on earlier terms is
    kept (the file asked for it) and named with the relation in ``Library.warnings``."""
    where = f"terms file {name}"
    if not isinstance(data, dict):
        raise UserError(f"{where}: expected a mapping with a 'terms' list at the top")
    unknown = set(data) - _FILE_KEYS
    if unknown:
        raise UserError(f"{where}: unknown key(s) {', '.join(sorted(map(str, unknown)))}; allowed "
                        f"are {', '.join(sorted(_FILE_KEYS))}")
    if data.get("format", 1) != 1:
        raise UserError(f"{where}: format {data['format']!r} is not supported (use format: 1)")
    if "target" in data and data["target"] != target:
        raise UserError(f"{where} is written for target {data['target']!r}, not {target!r}: "
                        "use a terms file for this target or change the target")
    allow = data.get("allow_bare_velocity", False)
    if not isinstance(allow, bool):
        raise UserError(f"{where}: allow_bare_velocity must be true or false")
    dims = tuple(dims)
    k = Kinematics(dims, scalars)
    ns = Namespace(k, allow_bare_velocity=allow)
    terms: list[Term] = []
    dropped: tuple[Dependency, ...] = ()
    if "include" in data:
        inc = data["include"]
        if inc not in PRESETS:
            raise UserError(f"{where}: include must be one of {', '.join(PRESETS)}, got {inc!r}")
        base, dropped = _preset_terms(inc, target, k.dirs, k.scalars, prune)
        terms.extend(base)
    n_base = len(terms)
    items = data.get("terms", [])
    if not isinstance(items, list) or (not items and not terms):
        raise UserError(f"{where}: 'terms' must be a non-empty list of terms")
    keys = component_keys(target, dims)
    for n, item in enumerate(items):
        terms.append(_user_term(item, n, target, keys, k, ns, where))
    seen = set()
    for t in terms:
        if t.name in seen:
            raise UserError(f"{where}: the term name {t.name!r} is used twice; names must be "
                            "unique")
        seen.add(t.name)
    found = find_dependencies(terms, k.dirs, independent=n_base) if prune else []
    user_deps = [d for d in found if d is not None]
    warnings = tuple(_user_dependency_warning(where, d) for d in user_deps)
    return Library(name, target, dims, k.scalars, tuple(terms),
                   tuple(d.describe() for d in dropped), warnings, (*dropped, *user_deps))


def _user_dependency_warning(where: str, dep: Dependency) -> str:
    if not dep.combination:
        return (f"{where}: term {dep.term} vanishes identically {dep.where}; it is kept as "
                "listed, but it cannot be fitted: remove it")
    others = [n for n, _, _ in dep.combination]
    return (f"{where}: term {dep.term} is an exact linear combination of {', '.join(others)} "
            f"{dep.where} ({dep.equation}); it is kept as listed, but the fit cannot separate "
            f"its coefficient from theirs: remove {dep.term} or the terms it repeats")


def _user_term(item, n, target, keys, k, ns, where) -> Term:
    here = f"{where}, term {n + 1}"
    if not isinstance(item, dict):
        raise UserError(f"{here}: each term must be a mapping with name, delta_power and "
                        "expression or components")
    unknown = set(item) - _TERM_KEYS
    if unknown:
        raise UserError(f"{here}: unknown key(s) {', '.join(sorted(map(str, unknown)))}; allowed "
                        f"are {', '.join(sorted(_TERM_KEYS))}")
    name = item.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise UserError(f"{here}: name {name!r} must start with a letter and contain only "
                        "letters, digits and _ (at most 40 characters)")
    here = f"{where}, term {name!r}"
    p = item.get("delta_power")
    if isinstance(p, bool) or not isinstance(p, int | float) or not math.isfinite(p):
        raise UserError(f"{here}: delta_power must be a number (the power of Delta the "
                        "expression carries), got {p!r}")
    desc = item.get("description", "")
    if not isinstance(desc, str):
        raise UserError(f"{here}: description must be text")
    has_e, has_c = "expression" in item, "components" in item
    if has_e == has_c:
        raise UserError(f"{here}: give exactly one of 'expression' (with {{i}}, {{j}} for the "
                        "component directions) or 'components'")
    comps = {}
    if has_c:
        given = item["components"]
        if not isinstance(given, dict):
            raise UserError(f"{here}: components must map component keys to expressions")
        given = {str(a): b for a, b in given.items()}
        extra = set(given) - set(keys)
        missing = [c for c in keys if c not in given]
        if keys == [""]:
            raise UserError(f"{here}: the vorticity forcing is a scalar: use 'expression'")
        if extra or missing:
            raise UserError(f"{here}: components must be exactly {', '.join(keys)} for target "
                            f"{target} (missing: {', '.join(missing) or 'none'}; unexpected: "
                            f"{', '.join(sorted(extra)) or 'none'})")
        for key in keys:
            comps[key] = parse_expression(given[key], ns, f"{here} component {key}")
    else:
        tmpl = item["expression"]
        if not isinstance(tmpl, str):
            raise UserError(f"{here}: expression must be a string")
        rank = target_rank(target)
        uses = [m for m in ("{i}", "{j}") if m in tmpl]
        if rank == 2 and "{i}" not in tmpl and "{j}" not in tmpl:
            raise UserError(f"{here}: a stress expression must use {{i}} and {{j}} for the "
                            "component directions, e.g. Delta**2 * S_mag * S_{i}{j}")
        if rank == 1 and ("{i}" not in tmpl or "{j}" in tmpl):
            raise UserError(f"{here}: a vector expression uses {{i}} for the component "
                            "direction (and no {j}), e.g. Delta**2 * S_mag * dc_d{i}")
        if rank == 0 and uses:
            raise UserError(f"{here}: the vorticity forcing is a scalar: no {{i}}/{{j}}")
        for key in keys:
            text = tmpl
            if rank >= 1:
                text = text.replace("{i}", key[0])
            if rank == 2:
                text = text.replace("{j}", key[1])
            comps[key] = parse_expression(text, ns, f"{here} component {key or 'value'}")
    return _make_term(name, target, k, comps, p, desc, "user")


def terms_from_dicts(items: Sequence[Mapping], target: str, dims: Iterable[str],
                     scalars: Iterable[str] = (), name: str = "model") -> Library:
    """Rebuild terms from ``Term.to_dict()`` records (model files): expressions are parsed
    with the restricted parser, bare velocities allowed (a user term may have had them)."""
    k = Kinematics(dims, scalars)
    ns = Namespace(k, allow_bare_velocity=True)
    keys = component_keys(target, dims)
    terms = []
    for n, item in enumerate(items):
        tname = item.get("name")
        where = f"{name}: term {n + 1} ({tname!r})"
        if not isinstance(tname, str) or not _NAME.match(tname):
            raise UserError(f"{where}: invalid term name")
        exprs = item.get("expression")
        if not isinstance(exprs, dict) or sorted(exprs) != sorted(keys):
            raise UserError(f"{where}: expression must have components {', '.join(keys)}")
        comps = {key: parse_expression(exprs[key], ns, f"{where} component {key or 'value'}")
                 for key in keys}
        terms.append(_make_term(tname, target, k, comps, item.get("delta_power", 0),
                                str(item.get("description", "")),
                                str(item.get("source", "preset"))))
    if len({t.name for t in terms}) != len(terms):
        raise UserError(f"{name}: term names must be unique")
    return Library(name, target, tuple(dims), k.scalars, tuple(terms))


# ---------------------------------------------------------------------------------------------
# evaluation


def derivative_fields(symbols: Iterable[sympy.Symbol], fields: Mapping[str, np.ndarray],
                      grid: Grid, scheme: str) -> dict[str, np.ndarray]:
    """Each needed derivative field once: ``{symbol name: array of grid.shape}``.

    Derivatives along x, then y, then z, each with the scheme's own stencil of that order;
    fields sharing a derivative are stacked into one call (one FFT pass).
    """
    check_scheme(scheme, grid)
    wanted = {}
    for s in symbols:
        f, counts = _INFO[s.name]
        if f not in fields:
            raise UserError(f"the terms need the field {f!r}, which is not among the fields "
                            f"given ({', '.join(fields)}): add it (e.g. --scalar {f})")
        wanted[s.name] = (f, counts)
    for d, n in zip(AXES, (max((c[i] for _, c in wanted.values()), default=0)
                           for i in range(3)), strict=True):
        if n and d not in grid.dims:
            raise UserError(f"the terms differentiate along {d}, which the grid "
                            f"{grid.dims} does not have")
    # nodes: (field, partial counts); derivatives applied in x, y, z order
    cache: dict[tuple[str, tuple], np.ndarray] = {}
    for f in {f for f, _ in wanted.values()}:
        a = np.asarray(fields[f], dtype=float)
        if a.shape != grid.shape:
            raise UserError(f"field {f!r} has shape {a.shape}, the grid {grid.shape}")
        cache[(f, (0, 0, 0))] = a
    for axis, d in enumerate(AXES):
        # group the steps of this axis by (parent counts, order) across fields
        steps: dict[tuple, list[str]] = {}
        for f, counts in wanted.values():
            n = counts[axis]
            if n == 0:
                continue
            parent = counts[:axis] + (0,) * (3 - axis)
            steps.setdefault((parent, n), [])
            if f not in steps[(parent, n)]:
                steps[(parent, n)].append(f)
        # one transform of a parent stack for all the orders taken of it
        by_parent: dict[tuple, dict[tuple, list[int]]] = {}
        for (parent, n), fs in steps.items():
            child = parent[:axis] + (n,) + (0,) * (2 - axis)
            todo = tuple(f for f in fs if (f, child) not in cache)
            if todo:
                by_parent.setdefault(parent, {}).setdefault(todo, []).append(n)
        for parent, groups in by_parent.items():
            for todo, orders in groups.items():
                stack = np.stack([cache[(f, parent)] for f in todo])
                outs = ([derivative(stack, grid, d, orders[0], scheme)] if len(orders) == 1
                        else derivatives(stack, grid, d, orders, scheme))
                for n, out in zip(orders, outs, strict=True):
                    child = parent[:axis] + (n,) + (0,) * (2 - axis)
                    for f, a in zip(todo, out, strict=True):
                        cache[(f, child)] = a
    return {name: cache[(f, counts)] for name, (f, counts) in wanted.items()}


def _check_library_grid(library: Library, grid: Grid, delta: float) -> None:
    if directions(grid.dims) != library.directions:
        raise UserError(f"the library is for directions {', '.join(library.directions)} but the "
                        f"grid has {', '.join(directions(grid.dims))}")
    if not (isinstance(delta, int | float | np.floating) and math.isfinite(delta) and delta > 0):
        raise UserError(f"the filter width Delta must be a positive number, got {delta!r}")


def evaluate_terms(library: Library, fields: Mapping[str, np.ndarray], grid: Grid,
                   scheme: str = "spectral", delta: float = 1.0) -> list[list[np.ndarray]]:
    """Every term's components on the grid: ``out[term][component]``, arrays of grid.shape."""
    _check_library_grid(library, grid, delta)
    syms, fn = library._compiled()
    deriv = derivative_fields(syms, fields, grid, scheme)
    with np.errstate(all="ignore"):
        flat = fn(float(delta), *(deriv[s.name] for s in syms))
    nc = len(library.keys)
    out = []
    for t in range(len(library.terms)):
        comps = []
        for c in range(nc):
            a = np.asarray(flat[t * nc + c], dtype=float)
            comps.append(np.broadcast_to(a, grid.shape) if a.shape != grid.shape else a)
        out.append(comps)
    return out


def design(library: Library, fields: Mapping[str, np.ndarray], grid: Grid,
           scheme: str = "spectral", delta: float = 1.0) -> np.ndarray:
    """The design tensor: float64 of shape (n_components, n_points, n_terms).

    ``fields`` maps ``u, v[, w]`` and scalars to coarse-grid arrays of ``grid.shape``;
    points are the grid in C order; column ``k`` is term ``k`` with Delta = ``delta``
    (coordinate units), so its fitted coefficient is the Delta-scaled one.
    """
    cols = evaluate_terms(library, fields, grid, scheme, delta)
    nc, npts, nt = len(library.keys), int(np.prod(grid.shape)), len(library.terms)
    out = np.empty((nc, npts, nt))
    for c in range(nc if nt else 0):  # one interleaving copy per component (faster than
        # writing column by column)
        np.stack([comps[c].reshape(-1) for comps in cols], axis=1, out=out[c])
    return out


def predict(library: Library, coefficients: Sequence[float], fields: Mapping[str, np.ndarray],
            grid: Grid, scheme: str = "spectral", delta: float = 1.0) -> dict[str, np.ndarray]:
    """Sum of ``coefficients[k] * term k`` (Delta-scaled coefficients, one per term) as the
    target variables: ``{"tau_xx": array of grid.shape, ...}``. Terms with a zero coefficient
    are not evaluated."""
    coefficients = np.asarray(coefficients, dtype=float).reshape(-1)
    if coefficients.size != len(library.terms):
        raise ValueError(f"{coefficients.size} coefficients for {len(library.terms)} terms")
    if not np.all(np.isfinite(coefficients)):
        raise UserError("the model has NaN or infinite coefficients: refit it")
    _check_library_grid(library, grid, delta)
    active = [t.name for t, c in zip(library.terms, coefficients, strict=True) if c != 0]
    names = library.components
    out = {n: np.zeros(grid.shape) for n in names}
    if not active:
        return out
    sub = library.subset(active)
    coef = [c for c in coefficients if c != 0]
    cols = evaluate_terms(sub, fields, grid, scheme, delta)
    for c_k, comps in zip(coef, cols, strict=True):
        for n, a in zip(names, comps, strict=True):
            out[n] += c_k * a
    return out
