"""Symbolic kinematics: targets and their components, the derivative symbols (one registry,
``_INFO``), and :class:`Kinematics` (the velocity gradient, strain, rotation and chain-rule
derivatives of expressions on a set of directions).
"""


from __future__ import annotations

import re
from collections.abc import Iterable, Sequence

import numpy as np
import sympy

from closure.errors import UserError
from closure.grid import VELOCITY_OF

AXES = ("x", "y", "z")
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
