"""Density-weighted (Favre) coarse-graining and the exact subgrid terms of compressible flow.

With ``bar`` the filter of a CoarseGraining (closure.filters) and fine-grid density ``rho``,
velocity ``u_i``, pressure ``p`` and temperature ``T``:

    bar(rho)                                                    filtered density
    u~_i = bar(rho u_i) / bar(rho)                              Favre velocity
    T~   = bar(rho T) / bar(rho)                                Favre temperature
    bar(p)                                                      filtered pressure

    tau_ij      = bar(rho u_i u_j) - bar(rho) u~_i u~_j         subgrid stress (i <= j)
    force_i     = d_j tau_ij                                    subgrid force
    heat_flux_j = bar(rho u_j T) - bar(rho) u~_j T~             subgrid heat flux
    pressure_dilatation = bar(p d_k u_k) - bar(p) d_k u~_k      subgrid pressure-dilatation
    pi          = -tau_ij S~_ij                                 energy transfer (all i, j)

with ``S~_ij = (d_j u~_i + d_i u~_j) / 2``, dilatation included (``S~_kk = d_k u~_k``). The
filtered equations read ``d_t (bar(rho) u~_i) + d_j (bar(rho) u~_i u~_j + bar(p) delta_ij)
= ... - force_i`` (Favre 1983; Garnier, Adams & Sagaut 2009, Large Eddy Simulation for
Compressible Flows, ch. 3, from memory); the trace ``tau_kk`` is twice the subgrid kinetic
energy times ``bar(rho)``, and a positive ``pi`` drains resolved kinetic energy to the subgrid
scales. With constant density every term is the density times its incompressible counterpart
in closure.residuals (and the heat flux is ``rho`` times the scalar flux of ``T``).

Where the work is done: box, Gaussian and sharp spectral filters act on the fine grid
(``CoarseGraining.filter``: spectral on periodic grids, ``scipy.ndimage`` with mirror edges on
bounded ones), quotients and derivatives are formed there (spectral on periodic grids, fd4
otherwise, as in closure.residuals) and every output is sampled every ``ratio``-th point. Block
averaging forms the block means on the coarse grid and takes the derivatives of ``u~`` there;
``d_k u_k`` inside ``bar(p d_k u_k)`` is always the fine-grid dilatation.

The density-weighted filter ``bar(rho f) / bar(rho)`` is the mask-weighted filter
``bar(w f) / bar(w)`` of closure.filters (``CoarseGraining.weighted_filter`` and
``weighted_block_mean``) with the density as the weight. Land (a fluid mask) uses the same
filter with the weight ``rho`` times the mask, and the valid-point rule of closure.residuals
(:func:`favre_validity`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np

from closure.derivatives import derivative
from closure.errors import UserError
from closure.filters import CoarseGraining, land_as_zero
from closure.grid import VELOCITY_OF, Grid
from closure.residuals import (
    CoarseSnapshot,
    _fluid_mask,
    backscatter_fraction,
    directions,
    energy_transfer,
    fine_scheme,
    stencil_dilation,
    stress_component,
    stress_names,
    stress_pairs,
)

if TYPE_CHECKING:
    from closure.io import Snapshot

#: Fine-grid fields a compressible snapshot must carry (besides the velocity).
DENSITY = "rho"
PRESSURE = "p"
TEMPERATURE = "T"

#: Products Favre-averaged in one call of the weighted filter (speed against peak memory).
FAVRE_STACK = 4


def favre_target_names(dims: Sequence[str]) -> list[str]:
    """Every target favre_coarse_grain can compute on a grid of ``dims``, in output order."""
    dirs = directions(dims)
    return (stress_names(dims) + [f"force_{i}" for i in dirs]
            + [f"heat_flux_{j}" for j in dirs] + ["pressure_dilatation", "pi"])


def favre_field_names(dims: Sequence[str]) -> list[str]:
    """Coarse fields of a Favre snapshot: ``rho`` (filtered), ``u, v[, w]`` (Favre), ``p``
    (filtered), ``T`` (Favre)."""
    return [DENSITY, *(VELOCITY_OF[d] for d in directions(dims)), PRESSURE, TEMPERATURE]


def thermodynamic_fields(fields: Mapping[str, np.ndarray],
                         gas_constant: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``(p, T)`` from a snapshot's fields; the missing one from the ideal-gas law
    ``p = rho R T`` when ``gas_constant`` (J kg^-1 K^-1) is given."""
    have_p, have_t = PRESSURE in fields, TEMPERATURE in fields
    if have_p and have_t:
        return (np.asarray(fields[PRESSURE], dtype=float),
                np.asarray(fields[TEMPERATURE], dtype=float))
    if (have_p or have_t) and gas_constant is not None:
        if not (np.isfinite(gas_constant) and gas_constant > 0):
            raise UserError(f"the gas constant must be a positive number (J kg-1 K-1), got "
                            f"{gas_constant!r}")
        rho = np.asarray(fields[DENSITY], dtype=float)
        if have_p:
            p = np.asarray(fields[PRESSURE], dtype=float)
            return p, p / (rho * gas_constant)
        T = np.asarray(fields[TEMPERATURE], dtype=float)
        return rho * gas_constant * T, T
    missing = " and ".join(n for n, h in ((PRESSURE, have_p), (TEMPERATURE, have_t)) if not h)
    raise UserError(f"compressible coarse-graining needs pressure 'p' and temperature 'T': the "
                    f"snapshot has no {missing}; map them with --var, or give the gas "
                    "constant so that one follows from p = rho R T")


#: Global attributes of a compressible file recorded in models and coarse files
#: (closure synth writes them); gamma, gas_constant and prandtl can be given as options.
GAS_ATTRIBUTES = ("gamma", "gas_constant", "prandtl", "specific_heat_pressure",
                  "viscosity_reference", "viscosity_reference_temperature", "viscosity_exponent")


def gas_constants(src, given: Mapping[str, float] | None = None) -> dict[str, float]:
    """The gas constants among an opened input's global attributes (numbers only), each
    replaced by ``given``'s (the --gamma / --gas-constant / --prandtl options)."""
    out, attrs = {}, getattr(src, "attrs", None) or {}
    for k in GAS_ATTRIBUTES:
        try:
            out[k] = float(attrs[k])
        except (KeyError, TypeError, ValueError):
            continue
    out.update({str(k): float(v) for k, v in (given or {}).items()})
    return out


def open_compressible(opener: Callable[[tuple[str, ...]], object],
                      given: Mapping[str, float] | None = None, scalars: Sequence[str] = (),
                      variables: Mapping[str, str] | None = None):
    """Open a compressible input with rho, p and T besides the velocity and ``scalars``:
    ``opener(scalars)`` opens it (closure.io.open_input / open_fields with the input options).
    With the gas constant known (``given`` or the file's ``gas_constant`` attribute) one of p
    and T suffices, the other following from p = rho R T (:func:`thermodynamic_fields`);
    ``variables`` (the --var mapping) names fields whose absence is an error as it stands.
    UserError naming what is missing otherwise."""
    from closure.errors import InputFileError

    every = tuple(dict.fromkeys((*scalars, DENSITY, PRESSURE, TEMPERATURE)))
    try:
        return opener(every)
    except InputFileError as exc:
        first = exc
    mapped = variables or {}
    for drop in (TEMPERATURE, PRESSURE):
        if drop in mapped:  # a variable the user named: its absence is the error to report
            continue
        try:
            src = opener(tuple(s for s in every if s != drop))
        except InputFileError:
            continue
        if gas_constants(src, given).get("gas_constant") is None:
            src.close()
            what = "temperature" if drop == TEMPERATURE else "pressure"
            raise UserError(f"the input has no {what} {drop!r}: give the gas constant "
                            "(--gas-constant, spec gas.gas_constant, or a global attribute "
                            f"gas_constant) so that it follows from p = rho R T, or map {drop} "
                            "with --var") from None
        return src
    raise first


def _check(snapshot: Snapshot, cg: CoarseGraining, scheme: str | None) -> np.ndarray | None:
    """Refuse what Favre coarse-graining cannot take; the fluid mask (None: no land)."""
    g, f = snapshot.grid, cg.fine
    if g.dims != f.dims or g.shape != f.shape or g.periodic != f.periodic or \
            not np.allclose(g.spacing, f.spacing, rtol=1e-9, atol=0.0):
        raise UserError(f"the snapshot's grid {g.dims} {g.shape} does not match the "
                        f"coarse-graining's fine grid {f.dims} {f.shape}: build the "
                        "coarse-graining from this file's grid")
    needed = [DENSITY, *(VELOCITY_OF[d] for d in directions(g.dims))]
    missing = [c for c in needed if c not in snapshot.fields]
    if missing:
        raise UserError(f"the snapshot has no field {', '.join(map(repr, missing))} (it has "
                        f"{', '.join(snapshot.fields)}): compressible data need the density "
                        "'rho' and the velocity; map them with --var")
    mask = _fluid_mask(snapshot, cg, scheme)  # the incompressible path's refusals
    rho = np.asarray(snapshot.fields[DENSITY])
    if mask is not None:
        rho = rho[mask]
    if not np.all(np.isfinite(rho)) or float(np.min(rho)) <= 0:
        raise UserError("the density 'rho' must be positive and finite at every fluid point: "
                        "check the variable mapped to rho")
    return mask


def favre_validity(mask: np.ndarray, cg: CoarseGraining, targets: Sequence[str],
                   scheme: str | None = None, derivative_passes: int = 1
                   ) -> tuple[np.ndarray, np.ndarray]:
    """(valid, fluid) coarse boolean arrays of a fine fluid ``mask`` for Favre targets: the
    rule of closure.residuals.land_validity (footprint of the filter, fd4 stencils around
    it, the coarse ``scheme``'s stencils ``derivative_passes`` times), with the fine-grid
    dilatation inside bar(p d_k u_k) as the derivative before filtering and the force, the
    transfer and the resolved dilatation of the pressure-dilatation as those after it."""
    mask = np.asarray(mask, dtype=bool)
    fine, coarse = cg.fine, cg.coarse
    before = "pressure_dilatation" in targets
    after = any(t.startswith("force_") or t in ("pi", "pressure_dilatation") for t in targets)
    bad = stencil_dilation(~mask, fine, "fd4", 1) if before else ~mask
    if cg.kind == "block":
        touched = cg.footprint_touches(bad)
        if after:
            touched = stencil_dilation(touched, coarse, "fd4", 1)
        fluid = cg.block_mean(mask.astype(float)) > 0
    else:
        if after:
            bad = stencil_dilation(bad, fine, "fd4", 1)
        touched = cg.footprint_touches(bad)
        fluid = cg.sample(mask)
    if scheme is not None and derivative_passes > 0:
        touched = stencil_dilation(touched, coarse, scheme, derivative_passes)
    return ~touched, fluid


def _wanted(targets, dims) -> list[str]:
    every = favre_target_names(dims)
    if targets is None:
        return every
    if isinstance(targets, str):
        targets = (targets,)
    unknown = sorted(set(targets) - set(every))
    if unknown:
        raise UserError(f"unknown compressible target variable(s) {', '.join(unknown)} on "
                        f"this {len(dims)}-D grid: choose from {', '.join(every)}")
    return [t for t in every if t in set(targets)]


def favre_coarse_grain(snapshot: Snapshot, cg: CoarseGraining,
                       targets: Sequence[str] | None = None,
                       gas_constant: float | None = None, scheme: str | None = None,
                       derivative_passes: int = 1) -> CoarseSnapshot:
    """Favre-filter and coarsen one compressible snapshot; exact subgrid terms on the coarse grid.

    The snapshot carries ``rho``, ``u, v[, w]`` and ``p`` and/or ``T`` (the other from
    ``p = rho R T`` with ``gas_constant``). ``targets`` restricts the computed targets (see
    :func:`favre_target_names`); None computes all. Returns a CoarseSnapshot whose fields are
    :func:`favre_field_names` and whose targets are named as in the module docstring.

    With land in ``snapshot.mask`` (True = fluid) every filter is normalised over the fluid:
    ``bar_m(f) = bar(m f) / bar(m)`` for rho, p and bar(p d_k u_k), and the Favre averages
    weight with ``rho m``; real-space filters and fd4 derivatives throughout. ``valid``
    excludes the coarse points that see land (:func:`favre_validity`; ``scheme`` and
    ``derivative_passes`` as in closure.residuals.coarse_grain_snapshot), and land points hold
    0. At valid points the values are those of the same data without land.
    """
    mask = _check(snapshot, cg, scheme)
    fine = cg.fine
    want = _wanted(targets, fine.dims)
    dirs = directions(fine.dims)
    rho = np.asarray(snapshot.fields[DENSITY], dtype=float)
    vel = {i: np.asarray(snapshot.fields[VELOCITY_OF[i]], dtype=float) for i in dirs}
    with np.errstate(divide="ignore", invalid="ignore"):  # land may hold anything
        p, T = thermodynamic_fields(snapshot.fields, gas_constant)

    # the filtered quantities the wanted targets need; Favre averages bar(rho f) / bar(rho)
    # by the weighted filter of closure.filters (the one masks use), FAVRE_STACK products at
    # a time (the weight is filtered once per stack; peak memory a few stacks of fine fields)
    block = cg.kind == "block"
    grid = cg.coarse if block else fine
    if mask is None:
        scheme_fine = fine_scheme(fine)
        weight = rho
        plain = cg.block_mean if block else cg.filter
        weighted = cg.weighted_block_mean if block else cg.weighted_filter
    else:  # land: zero there, every filter normalised over the fluid, in real space
        scheme_fine = "fd4"
        rho, p, T = (land_as_zero(a, mask) for a in (rho, p, T))
        vel = {i: land_as_zero(a, mask) for i, a in vel.items()}
        weight = rho  # rho times the fluid mask

        def plain(f):
            return (cg.weighted_block_mean(f, mask) if block
                    else cg.weighted_filter(f, mask, real_space=True))

        def weighted(f, w):
            return (cg.weighted_block_mean(f, w) if block
                    else cg.weighted_filter(f, w, real_space=True))
    products = {"T": lambda: T}
    for i in dirs:
        products[("u", i)] = lambda i=i: vel[i]
    if any(t.startswith(("tau_", "force_")) or t == "pi" for t in want):
        for i, j in stress_pairs(fine.dims):
            products[("uu", i, j)] = lambda i=i, j=j: vel[i] * vel[j]
    if any(t.startswith("heat_flux_") for t in want):
        for j in dirs:
            products[("uT", j)] = lambda j=j: vel[j] * T
    tilde = {}
    keys = list(products)
    for start in range(0, len(keys), FAVRE_STACK):
        chunk = keys[start:start + FAVRE_STACK]
        averaged = weighted(np.stack([products[k]() for k in chunk]), weight)
        tilde.update(zip(chunk, averaged, strict=True))
        del averaged
    bar = {"rho": plain(rho), "p": plain(p)}
    if "pressure_dilatation" in want:
        bar["pdiv"] = plain(p * sum(derivative(vel[i], fine, i, 1, scheme_fine)
                                    for i in dirs))

    fields, out = favre_terms(bar, tilde, grid, dirs, want,
                              fine_scheme(grid) if mask is None else "fd4")
    if cg.kind != "block":
        fields = {k: cg.sample(v) for k, v in fields.items()}
        out = {k: cg.sample(v) for k, v in out.items()}
    valid = fluid = None
    if mask is not None:
        valid, fluid = favre_validity(mask, cg, want, scheme, derivative_passes)
        fields = {k: np.where(fluid, v, 0.0) for k, v in fields.items()}
        out = {k: np.where(fluid, v, 0.0) for k, v in out.items()}
    fields = {k: np.ascontiguousarray(v) for k, v in fields.items()}
    out = {k: np.ascontiguousarray(out[k]) for k in want}
    return CoarseSnapshot(fields, out, cg.coarse, cg, snapshot.index, snapshot.time, valid,
                          fluid, None if mask is None else "fluid")


def favre_terms(bar: Mapping, tilde: Mapping, grid: Grid, dirs: Sequence[str],
                want: Sequence[str], scheme: str) -> tuple[dict[str, np.ndarray],
                                                           dict[str, np.ndarray]]:
    """Fields and wanted targets from the filtered quantities ``bar`` (``rho``, ``p``, and
    ``pdiv`` = bar(p d_k u_k)) and the Favre averages ``tilde`` (``("u", i)``, ``T``,
    ``("uu", i, j)``, ``("uT", j)``), all on ``grid``."""
    rho_bar = bar["rho"]
    ut = {i: tilde[("u", i)] for i in dirs}
    Tt = tilde["T"]
    fields = {DENSITY: rho_bar, **{VELOCITY_OF[i]: ut[i] for i in dirs},
              PRESSURE: bar["p"], TEMPERATURE: Tt}
    # bar(rho f g) - bar(rho) f~ g~ = bar(rho) ((f g)~ - f~ g~)
    stress = ({f"tau_{i}{j}": rho_bar * (tilde[("uu", i, j)] - ut[i] * ut[j])
               for i, j in stress_pairs(grid.dims)}
              if ("uu", dirs[0], dirs[0]) in tilde else {})
    out = dict(stress)
    for j in dirs:
        if ("uT", j) in tilde:
            out[f"heat_flux_{j}"] = rho_bar * (tilde[("uT", j)] - ut[j] * Tt)
    want = set(want)
    if want & {"pi", "pressure_dilatation"}:
        grad = {}
        for j in dirs:
            dj = derivative(np.stack([ut[i] for i in dirs]), grid, j, 1, scheme)
            for a, i in enumerate(dirs):
                grad[(i, j)] = dj[a]
        strain = {i + j: 0.5 * (grad[(i, j)] + grad[(j, i)]) for i, j in stress_pairs(grid.dims)}
        if "pi" in want:
            out["pi"] = energy_transfer(stress, strain, grid.dims)
        if "pressure_dilatation" in want:
            out["pressure_dilatation"] = bar["pdiv"] - bar["p"] * sum(grad[(i, i)]
                                                                      for i in dirs)
    if any(t.startswith("force_") for t in want):
        for i in dirs:
            out[f"force_{i}"] = sum(derivative(stress_component(stress, i, j), grid, j, 1,
                                               scheme) for j in dirs)
    return fields, {k: v for k, v in out.items() if k in want}


def backscatter_fractions(coarse: CoarseSnapshot) -> dict[str, float]:
    """Backscatter of a Favre snapshot's energy transfer ``pi``: ``points`` the fraction of
    coarse points with ``pi < 0`` (energy returned to the resolved scales) and ``share`` the
    backscattered part of the total transfer, sum(|pi| where pi < 0) / sum(|pi|)."""
    if "pi" not in coarse.targets:
        raise UserError("backscatter needs the energy transfer: compute the target 'pi'")
    pi = np.asarray(coarse.targets["pi"])
    total = float(np.sum(np.abs(pi)))
    share = float(np.sum(np.abs(pi[pi < 0]))) / total if total > 0 else float("nan")
    return {"points": backscatter_fraction(pi), "share": share}
