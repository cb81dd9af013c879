"""The built-in presets (``default``, ``classic``, ``minimal``): the term builders for each
target, pruned once per (target, directions, scalars) and cached in process and on disk.
"""


from __future__ import annotations

from functools import lru_cache
from pathlib import Path

import sympy

from closure.errors import UserError
from closure.library.build import _make_term
from closure.library.expressions import Namespace, parse_expression
from closure.library.kinematics import (
    DELTA,
    Kinematics,
    _axis_counts,
    field_symbol,
    parse_target,
)
from closure.library.pruning import Dependency, _prune
from closure.library.terms import Library, Term

PRESETS = ("default", "classic", "minimal")


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


def _cache_sources() -> list[Path]:
    """The files the built terms depend on: every module of the closure.library package."""
    return sorted(Path(__file__).parent.glob("*.py"))


def _disk_cache(kind: str, key: tuple, value=None):
    """Built preset terms (sympy expressions, pruning) stored between processes: building
    and pruning them took about a second of every command's start-up. Keyed by the sources of
    the closure.library package and the sympy version, so an edit of the presets never reads
    a stale entry. With ``value``: store it (best effort) and return it; without: the stored
    value or None. The entries are JSON: term expressions as text, read back with the
    restricted expression parser of model files (closure.library.expressions), so a cache
    entry can hold nothing but terms."""
    import hashlib
    import json
    from fractions import Fraction

    folder = _cache_folder()
    if folder is None:
        return value
    target, dirs, scalars, _ = key
    try:
        h = hashlib.sha256()
        for source in _cache_sources():
            h.update(source.name.encode() + b"\0" + source.read_bytes())
        h.update(repr((sympy.__version__, kind, key)).encode())
        path = folder / f"{kind}-{h.hexdigest()[:32]}.json"
        if value is None:
            if not path.exists():
                return None
            doc = json.loads(path.read_text(encoding="utf-8"))
            k = Kinematics(dirs, scalars)
            ns = Namespace(k, allow_bare_velocity=True)
            terms = tuple(
                _make_term(t["name"], target, k,
                           {c: parse_expression(e, ns, f"cache term {t['name']}")
                            for c, e in t["expression"].items()},
                           t["delta_power"], t["description"], "preset")
                for t in doc["terms"])
            dropped = tuple(
                Dependency(d["term"], tuple((n, Fraction(c), float(p))
                                            for n, c, p in d["combination"]),
                           bool(d["incompressible"]), int(d["ndim"]))
                for d in doc["dropped"])
            return terms, dropped
        from closure.atomic import write_text

        doc = {"terms": [{"name": t.name, "delta_power": t.delta_power,
                          "description": t.description, "expression": t.expressions()}
                         for t in value[0]],
               "dropped": [{"term": d.term, "incompressible": d.incompressible, "ndim": d.ndim,
                            "combination": [[n, str(c), float(p)] for n, c, p in d.combination]}
                           for d in value[1]]}
        folder.mkdir(parents=True, exist_ok=True)
        write_text(path, json.dumps(doc))
    except (OSError, ValueError, TypeError, KeyError, UserError):
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
