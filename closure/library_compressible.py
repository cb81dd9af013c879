"""Candidate terms for compressible (Favre-filtered) subgrid closures, sympy expressions first.

The fields are those of a Favre coarse snapshot (closure.favre): the filtered density ``rho``
(bar(rho)), the Favre velocity ``u, v[, w]`` (u~), the filtered pressure ``p`` (bar(p)) and the
Favre temperature ``T`` (T~). Symbols follow closure.library (``du_dx``, ``drho_dy``,
``d2p_dxy``, ``Delta``); ``A_ij = d_j u_i``, ``S = (A + A^T) / 2`` *with* its trace, the
dilatation ``theta = S_kk = d_k u_k``, ``R = (A - A^T) / 2``, ``|S| = sqrt(2 S_ij S_ij)``.

Targets and their terms (every term Galilean invariant: no bare velocity):

``stress`` (the Favre stress tau_ij = bar(rho u_i u_j) - bar(rho) u~_i u~_j)
    favre_smagorinsky       rho Delta^2 |S| (S_ij - theta delta_ij / d)   (d directions: the
                            deviatoric Smagorinsky form, 1/3 in 3-D)
    favre_gradient_model    rho Delta^2/12 d_k u_i d_k u_j   (coefficient 1: Taylor expansion)
    favre_isotropic         rho Delta^2 |S|^2 delta_ij        (Yoshizawa 1986)
    dilatation_strain       rho Delta^2 |S| theta delta_ij
    dilatation_squared      rho Delta^2 theta^2 delta_ij
    favre_strain_squared, favre_strain_rotation, favre_rotation_squared
                            rho Delta^2 S S, rho Delta^2 (S R - R S), rho Delta^2 R R
    pressure_hessian        Delta^2 d_i d_j p
    pressure_gradient       Delta^2 d_i p d_j p / p
    density_pressure_gradient  Delta^2 (d_i rho d_j p + d_i p d_j rho) / (2 rho)
    density_gradient        Delta^4 |S|^2 d_i rho d_j rho / rho
    temperature_gradient    rho Delta^4 |S|^2 d_i T d_j T / T^2
``heat_flux`` (q_j = bar(rho u_j T) - bar(rho) u~_j T~)
    favre_eddy_diffusivity  rho Delta^2 |S| d_j T
    favre_heat_gradient_model  rho Delta^2/12 d_k u_j d_k T
    strain_temperature_gradient, rotation_temperature_gradient
                            rho Delta^2 S_jk d_k T, rho Delta^2 R_jk d_k T
    dilatation_temperature_gradient  rho Delta^2 theta d_j T
    density_gradient_heat_flux       Delta^2 |S| T d_j rho
``pressure_dilatation`` (bar(p d_k u_k) - bar(p) d_k u~_k)
    pressure_dilatation_gradient_model  Delta^2/12 d_k p d_k theta
    density_gradient_dilatation         Delta^2/12 (p / rho) d_k rho d_k theta
    pressure_dilatation_laplacian       Delta^2 p Laplacian(theta)
    dilatation_strain_squared           rho Delta^2 theta |S|^2
    dilatation_cubed                    rho Delta^2 theta^3

Each term times its coefficient has the target's units with a *dimensionless* Delta-scaled
coefficient; :func:`dimension` derives a term's units from its expression (mass, length, time,
temperature exponents of the fields, a dimension algebra over the sympy tree) and
``Term.scaled_units`` records the coefficient's (empty: dimensionless).

No heat-flux term is built from ``d_j p / p``: on ideal-gas data ``T~ = bar(p) / (R bar(rho))``
exactly (``bar(p) = R bar(rho T)``), so ``d_j p / p = d_j rho / rho + d_j T / T`` and such a
term would be a combination of the others on every data set.

Presets: ``compressible`` (every term for the target), ``compressible_classic`` (stress:
Smagorinsky, isotropic, gradient model; heat flux: eddy diffusivity and gradient model;
pressure-dilatation: its gradient model and dilatation_strain_squared),
``compressible_minimal`` (eddy viscosity and isotropic part; eddy diffusivity;
dilatation_strain_squared).

Exact dependencies are pruned as in closure.library, but *without* assuming a divergence-free
velocity (compressible fields have dilatation) and treating rho, p and T as independent
fields: ``favre_rotation_squared`` is dropped (``R R = S S - (S R - R S) - A A^T`` on any
field, so it is ``favre_strain_squared - favre_strain_rotation - 12 favre_gradient_model``),
and ``rotation_temperature_gradient`` (``A = S + R``: it is ``12 favre_heat_gradient_model -
strain_temperature_gradient``). In 2-D ``favre_strain_squared`` stays: ``S S = S_kk S -
det(S) I`` is not in the span when ``S_kk`` is not zero (the incompressible library drops its
``strain_squared`` as ``|S|^2 / 4 I``). Relations that hold only on some data, such as
``d p = c^2 d rho`` for isentropic fluctuations, are not identities: closure.equivalence finds
them on the training data and the fit keeps one term of each group.
"""

from __future__ import annotations

from functools import lru_cache

import sympy

from closure.errors import UserError
from closure.library import dimensions as _dimensions
from closure.library.kinematics import (
    DELTA,
    Kinematics,
    component_keys,
    directions,
    field_symbol,
    parse_target,
    target_rank,
)
from closure.library.presets import _matrix_components
from closure.library.pruning import Dependency, find_dependencies
from closure.library.terms import Library, Term, _guard

# re-exported: the dimensional analysis lived here before closure.library.dimensions
BASE, FIELD_DIMENSIONS, TARGET_DIMENSIONS = (
    _dimensions.BASE, _dimensions.FIELD_DIMENSIONS, _dimensions.TARGET_DIMENSIONS)
Inhomogeneous, dimension, coefficient_units = (
    _dimensions.Inhomogeneous, _dimensions.dimension, _dimensions.coefficient_units)

PRESETS = ("compressible", "compressible_classic", "compressible_minimal")


def every_preset() -> tuple[str, ...]:
    """Every preset library name (closure.library's and the compressible ones): what a queued
    job may name besides inline term definitions."""
    from closure.library.presets import PRESETS as PLAIN

    return (*PLAIN, *PRESETS)

TARGETS = ("stress", "heat_flux", "pressure_dilatation")
#: Fields of a Favre coarse snapshot that terms may use besides the velocity.
THERMO = ("rho", "p", "T")

_CLASSIC = {
    "stress": ("favre_smagorinsky", "favre_isotropic", "favre_gradient_model"),
    "heat_flux": ("favre_eddy_diffusivity", "favre_heat_gradient_model"),
    "pressure_dilatation": ("pressure_dilatation_gradient_model", "dilatation_strain_squared"),
}
_MINIMAL = {
    "stress": ("favre_smagorinsky", "favre_isotropic"),
    "heat_flux": ("favre_eddy_diffusivity",),
    "pressure_dilatation": ("dilatation_strain_squared",),
}


# ---------------------------------------------------------------------------------------------
# terms


def _stress_terms(k: Kinematics) -> list[tuple[str, float, str, sympy.Matrix]]:
    D, n = DELTA, len(k.dirs)
    rho, p, T = (field_symbol(f) for f in THERMO)
    S, R, A = k.S, k.R, k.A
    theta = S.trace()
    g_rho, g_p, g_T = (sympy.Matrix(k.grad(f)) for f in THERMO)
    Hp = k.hessian("p")
    return [
        ("favre_smagorinsky", 2, "deviatoric Smagorinsky form bar(rho) Delta^2 |S| (S_ij - "
         "S_kk delta_ij / d), |S| = sqrt(2 S_kl S_kl) with the dilatation",
         rho * D**2 * k.S_mag * (S - theta / n * sympy.eye(n))),
        ("favre_gradient_model", 2, "density-weighted gradient model bar(rho) Delta^2/12 "
         "d_k u~_i d_k u~_j (coefficient 1: the leading Taylor term of a box or Gaussian "
         "filter)", rho * D**2 / 12 * A * A.T),
        ("favre_isotropic", 2, "isotropic part bar(rho) Delta^2 |S|^2 delta_ij (Yoshizawa "
         "1986)", rho * D**2 * k.S_sq * sympy.eye(n)),
        ("dilatation_strain", 2, "bar(rho) Delta^2 |S| S_kk delta_ij (bulk eddy viscosity)",
         rho * D**2 * k.S_mag * theta * sympy.eye(n)),
        ("dilatation_squared", 2, "bar(rho) Delta^2 (S_kk)^2 delta_ij",
         rho * D**2 * theta**2 * sympy.eye(n)),
        ("favre_strain_squared", 2, "bar(rho) Delta^2 S_ik S_kj", rho * D**2 * S * S),
        ("favre_strain_rotation", 2, "bar(rho) Delta^2 (S_ik R_kj - R_ik S_kj)",
         rho * D**2 * (S * R - R * S)),
        ("favre_rotation_squared", 2, "bar(rho) Delta^2 R_ik R_kj", rho * D**2 * R * R),
        ("pressure_hessian", 2, "Delta^2 d_i d_j bar(p)", D**2 * Hp),
        ("pressure_gradient", 2, "Delta^2 d_i bar(p) d_j bar(p) / bar(p)",
         D**2 * g_p * g_p.T / p),
        ("density_pressure_gradient", 2, "Delta^2 (d_i bar(rho) d_j bar(p) + d_i bar(p) d_j "
         "bar(rho)) / (2 bar(rho))", D**2 * (g_rho * g_p.T + g_p * g_rho.T) / (2 * rho)),
        ("density_gradient", 4, "Delta^4 |S|^2 d_i bar(rho) d_j bar(rho) / bar(rho)",
         D**4 * k.S_sq * g_rho * g_rho.T / rho),
        ("temperature_gradient", 4, "bar(rho) Delta^4 |S|^2 d_i T~ d_j T~ / T~^2",
         rho * D**4 * k.S_sq * g_T * g_T.T / T**2),
    ]


def _heat_flux_terms(k: Kinematics) -> list[tuple[str, float, str, list]]:
    D, n = DELTA, len(k.dirs)
    rho, _, T = (field_symbol(f) for f in THERMO)
    S, R, A = k.S, k.R, k.A
    theta = S.trace()
    gT, g_rho = k.grad("T"), k.grad("rho")
    return [
        ("favre_eddy_diffusivity", 2, "eddy diffusivity bar(rho) Delta^2 |S| d_j T~",
         [rho * D**2 * k.S_mag * gT[j] for j in range(n)]),
        ("favre_heat_gradient_model", 2, "gradient model bar(rho) Delta^2/12 d_k u~_j d_k T~",
         [rho * D**2 / 12 * sum(A[j, a] * gT[a] for a in range(n)) for j in range(n)]),
        ("strain_temperature_gradient", 2, "bar(rho) Delta^2 S_jk d_k T~ (tensor diffusivity)",
         [rho * D**2 * sum(S[j, a] * gT[a] for a in range(n)) for j in range(n)]),
        ("rotation_temperature_gradient", 2, "bar(rho) Delta^2 R_jk d_k T~",
         [rho * D**2 * sum(R[j, a] * gT[a] for a in range(n)) for j in range(n)]),
        ("dilatation_temperature_gradient", 2, "bar(rho) Delta^2 S_kk d_j T~",
         [rho * D**2 * theta * gT[j] for j in range(n)]),
        ("density_gradient_heat_flux", 2, "Delta^2 |S| T~ d_j bar(rho)",
         [D**2 * k.S_mag * T * g_rho[j] for j in range(n)]),
    ]


def _pressure_dilatation_terms(k: Kinematics) -> list[tuple[str, float, str, sympy.Expr]]:
    D, n = DELTA, len(k.dirs)
    rho, p, _ = (field_symbol(f) for f in THERMO)
    theta = k.S.trace()
    g_theta = [k.d(theta, d) for d in k.dirs]
    gp, g_rho = k.grad("p"), k.grad("rho")
    return [
        ("pressure_dilatation_gradient_model", 2, "gradient model Delta^2/12 d_k bar(p) d_k "
         "S_mm", D**2 / 12 * sum(gp[a] * g_theta[a] for a in range(n))),
        ("density_gradient_dilatation", 2, "Delta^2/12 (bar(p) / bar(rho)) d_k bar(rho) d_k "
         "S_mm", D**2 / 12 * p / rho * sum(g_rho[a] * g_theta[a] for a in range(n))),
        ("pressure_dilatation_laplacian", 2, "Delta^2 bar(p) Laplacian(S_mm)",
         D**2 * p * k.lap(theta)),
        ("dilatation_strain_squared", 2, "bar(rho) Delta^2 S_mm |S|^2",
         rho * D**2 * theta * k.S_sq),
        ("dilatation_cubed", 2, "bar(rho) Delta^2 (S_mm)^3", rho * D**2 * theta**3),
    ]


def builtin_terms(target: str, dims) -> list[Term]:
    """Every compressible term for ``target`` on ``dims``, in preference order (unpruned)."""
    kind, _ = parse_target(target)
    if kind not in TARGETS:
        raise UserError(f"the compressible presets have terms for {', '.join(TARGETS)}, not "
                        f"{target!r}: choose one of those targets")
    k = Kinematics(directions(dims), THERMO)
    keys = component_keys(target, k.dirs)
    if kind == "stress":
        raw = [(nm, p, desc, _matrix_components(M, k.dirs)) for nm, p, desc, M in
               _stress_terms(k)]
    elif kind == "heat_flux":
        raw = [(nm, p, desc, dict(zip(k.dirs, comps, strict=True)))
               for nm, p, desc, comps in _heat_flux_terms(k)]
    else:
        raw = [(nm, p, desc, {"": e}) for nm, p, desc, e in _pressure_dilatation_terms(k)]
    out = []
    for name, power, desc, comps in raw:
        exprs = {}
        for key in keys:
            e = sympy.sympify(comps[key])
            if e.is_polynomial():
                e = sympy.expand(e)
            exprs[key] = _guard(e)
        term = Term(name, target_rank(target), exprs, power, desc, "preset")
        out.append(Term(name, term.rank, exprs, power, desc, "preset",
                        coefficient_units(term, target)))
    return out


@lru_cache(maxsize=32)
def compressible_library(name: str, target: str, dims: tuple[str, ...],
                         prune: bool = True) -> Library:
    """A compressible preset (see the module docstring) for ``target`` on ``dims``."""
    if name not in PRESETS:
        raise UserError(f"unknown compressible library {name!r}: choose {', '.join(PRESETS)}")
    kind, _ = parse_target(target)
    terms = builtin_terms(target, dims)
    dropped: list[Dependency] = []
    if prune:
        kept = []
        deps = find_dependencies(terms, dims, incompressible=False)
        for t, dep in zip(terms, deps, strict=True):
            (kept if dep is None else dropped).append(t if dep is None else dep)
        terms = kept
    if name != "compressible":
        wanted = (_CLASSIC if name == "compressible_classic" else _MINIMAL)[kind]
        terms = [t for t in terms if t.name in wanted]
        dropped = [d for d in dropped if d.term in wanted]
    return Library(name, target, tuple(dims), THERMO, tuple(terms),
                   tuple(d.describe() for d in dropped), (), tuple(dropped))
