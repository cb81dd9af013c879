"""Terms the data cannot tell apart, said out loud: groups, the one kept, what would separate them.

Two library terms are *equivalent on this data* when their design columns are nearly parallel
over the training points, or when several of them span a near-null direction of the
standardised Gram matrix (a combination of them is almost zero). A fit then cannot separate
their coefficients: it picks one arbitrarily or trades them off. The classic case in
compressible flow is near-isentropic data: ``d p = c^2 d rho`` and ``T ~ rho^(gamma - 1)``, so
terms built from pressure, density or temperature gradients are nearly proportional.

Detection works on the additive statistics alone (closure.stats), so it costs nothing extra
in a queued fit:

- pairs whose uncentred cosine ``G_ij / sqrt(G_ii G_jj)`` has magnitude at least
  ``cosine_limit`` (principal angle below ``arccos(cosine_limit)``);
- groups of terms that carry a near-null eigenvector of the standardised Gram (eigenvalue
  below ``eigen_limit`` times the largest).

Overlapping groups are merged. In each group the term kept is the **first in library order**
(libraries list their preferred forms first); the others are reported as equivalent to it on
this data. What would separate them follows from what the terms are built from: terms that
differ in which thermodynamic fields (density, pressure, temperature) they use or
differentiate need data whose
pressure and density fluctuations are not tied together (non-isentropic: independent entropy
or temperature fluctuations, or a higher Mach number); terms with different powers of the
filter width need data at several filter widths; otherwise data from other flow states.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from closure.regression import Problem
from closure.stats import SufficientStats

#: Default |cosine| above which two columns count as indistinguishable (angle below 5.7 deg).
COSINE_LIMIT = 0.995
#: Default eigenvalue ratio of the standardised Gram below which a direction is near-null.
EIGEN_LIMIT = 1e-6

THERMODYNAMIC = {"rho": "density", "p": "pressure", "T": "temperature"}

KEEP_RULE = "the first term in library order (libraries list their preferred forms first)"


@dataclass(frozen=True)
class EquivalentGroup:
    """Terms indistinguishable on the fitted data, the one kept, and what would separate them.

    ``cosine``: the smallest |cosine| between the kept term and the others in the group
    (1: parallel columns); ``explained``: R^2 of the kept term's column regressed on the
    others' (1: exactly dependent)."""

    terms: tuple[str, ...]
    kept: str
    cosine: float
    explained: float
    separate_with: str
    rule: str = KEEP_RULE

    @property
    def dropped(self) -> tuple[str, ...]:
        return tuple(t for t in self.terms if t != self.kept)

    def describe(self) -> str:
        return (f"equivalent on this data: {', '.join(self.terms)} (R^2 of {self.kept} on the "
                f"others {self.explained:.6f}); kept {self.kept} by rule: {self.rule}; data "
                f"that would separate them: {self.separate_with}")

    def to_dict(self) -> dict:
        return {"terms": list(self.terms), "kept": self.kept, "dropped": list(self.dropped),
                "rule": self.rule, "cosine": float(self.cosine),
                "explained": float(self.explained), "separate_with": self.separate_with}


def _fields_of(library, name: str) -> tuple[frozenset, float | None]:
    """The (field, differentiated?) pairs a term uses, and its power of Delta."""
    if library is None:
        return frozenset(), None
    from closure.library import _INFO

    term = library.term(name)
    used = frozenset((_INFO[s.name][0], sum(_INFO[s.name][1]) > 0) for s in term.symbols)
    return used, float(term.delta_power)


def separating_data(names: Sequence[str], library=None) -> str:
    """What data would tell the terms ``names`` (of ``library``) apart, in words."""
    used = [_fields_of(library, n) for n in names]
    thermo = [frozenset(u for u in f if u[0] in THERMODYNAMIC) for f, _ in used]
    reasons = []
    if len(set(thermo)) > 1:
        involved = sorted({f for f, _ in set().union(*thermo)}, key=list(THERMODYNAMIC).index)
        words = " and ".join(THERMODYNAMIC[f] for f in involved)
        reasons.append(f"non-isentropic data, whose {words} fluctuations are not tied "
                       "together (independent entropy or temperature fluctuations, e.g. heated "
                       "or mixing flows), or a higher Mach number")
    powers = {p for _, p in used if p is not None}
    if len(powers) > 1:
        reasons.append("data coarse-grained at several filter widths (the terms scale with "
                       "different powers of Delta)")
    if not reasons:
        reasons.append("data from other flow states (other strain, rotation and dilatation "
                       "statistics) where these terms vary independently")
    return "; or ".join(reasons)


def equivalent_groups(stats: SufficientStats | Problem, library=None,
                      cosine_limit: float = COSINE_LIMIT,
                      eigen_limit: float = EIGEN_LIMIT) -> list[EquivalentGroup]:
    """Groups of terms indistinguishable on the data of ``stats`` (or a regression Problem),
    in library order; ``library`` (closure.library.Library) supplies what each term is built
    from, for the advice on separating data. See the module docstring for the rules."""
    problem = stats if isinstance(stats, Problem) else Problem.from_stats(stats)
    names = list(problem.terms)
    act = np.flatnonzero(problem.active)
    if act.size < 2:
        return []
    G = problem.gram[np.ix_(act, act)]
    d = np.sqrt(np.diag(G))
    C = G / np.outer(d, d)
    n = act.size
    parent = list(range(n))

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    def join(i, j):
        a, b = find(i), find(j)
        if a != b:
            parent[max(a, b)] = min(a, b)

    for i in range(n):
        for j in range(i + 1, n):
            if abs(C[i, j]) >= cosine_limit:
                join(i, j)
    w, V = np.linalg.eigh(C)
    for k in np.flatnonzero(w <= eigen_limit * w.max()):
        members = np.flatnonzero(np.abs(V[:, k]) > 0.1 * np.abs(V[:, k]).max())
        for m in members[1:]:
            join(members[0], m)
    groups: dict[int, list[int]] = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(i)
    out = []
    for members in sorted(groups.values()):
        if len(members) < 2:
            continue
        keep, others = members[0], members[1:]
        cosine = float(min(abs(C[keep, j]) for j in others))
        Go = C[np.ix_(others, others)]
        b = C[others, keep]
        explained = float(b @ np.linalg.lstsq(Go, b, rcond=None)[0])
        terms = tuple(names[act[i]] for i in members)
        out.append(EquivalentGroup(terms, terms[0], cosine, min(explained, 1.0),
                                   separating_data(terms, library)))
    return out
