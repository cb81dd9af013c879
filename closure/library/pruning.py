"""Exact linear dependencies between terms (:func:`find_dependencies`): presets drop the
terms that are combinations of earlier ones; user terms files are warned.
"""


from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import sympy

from closure.grid import VELOCITY_OF
from closure.library.kinematics import _INFO, _SYMBOLS, AXES, DELTA, directions, field_symbol
from closure.library.terms import Term, _num

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
