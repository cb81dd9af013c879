"""The restricted expression parser of user terms and model files: :class:`Namespace`
(the names an expression may use) and :func:`parse_expression` (an AST whitelist, no eval).
"""


from __future__ import annotations

import ast

import sympy

from closure.errors import UserError
from closure.library.kinematics import (
    _DERIVATIVE,
    _MAX_ORDER,
    _MAX_TEXT,
    _VELOCITY,
    AXES,
    DELTA,
    Kinematics,
    _axis_counts,
    field_symbol,
    symbol_name,
)

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
