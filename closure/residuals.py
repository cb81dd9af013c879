"""Exact subgrid terms: coarse-grain a fine-grid snapshot and compute what a closure must model.

With ``bar`` the filter of a CoarseGraining (see closure.filters) and fine-grid fields
``u_i`` (and scalars ``c``, and in 2-D the vorticity ``omega = d_x v - d_y u``):

    tau_ij   = bar(u_i u_j) - bar(u_i) bar(u_j)           subgrid stress (i <= j)
    force_i  = d_j tau_ij                                  subgrid force
    flux_c_j = bar(u_j c) - bar(u_j) bar(c)                subgrid scalar flux
    sigma_j  = bar(u_j omega) - bar(u_j) bar(omega)        (2-D) subgrid vorticity flux
    vorticity_forcing  = d_j sigma_j
    pi                 = -tau_ij bar(S)_ij                 energy transfer (sum over all i, j)
    enstrophy_transfer = -sigma_j d_j bar(omega)           (2-D)

with ``bar(S)_ij = (d_j bar(u_i) + d_i bar(u_j)) / 2``. Signs follow DEVELOPERS.md: the filtered
momentum equation reads ``d_t bar(u_i) + d_j(bar(u_i) bar(u_j)) = ... - force_i``, and a positive
``pi`` drains resolved energy to the subgrid scales.

Filters (box, Gaussian, sharp spectral): every term is computed on the fine grid and the result
sampled every ``ratio``-th point. Derivatives are taken on the fine grid (spectral on periodic
data, 4th-order differences otherwise) *before* coarsening: the filtered products of box- and
Gaussian-filtered fields keep content above the coarse Nyquist wavenumber (their transfer
functions are not zero there), and differentiating the coarse samples would alias that content
onto resolved wavenumbers and truncate it. On the fine grid ``d_j`` commutes with the (spectral,
periodic) filter, so ``force_i`` is exactly ``bar(d_j(u_i u_j)) - d_j(bar(u_i) bar(u_j))``.

On periodic grids these sampled fine-grid values are computed in one spectral step: a sampled
filtered (and differentiated) field is the fold of its fine spectrum onto the coarse wavenumbers
(exact; done one direction at a time by CoarseGraining.separable), and sampling commutes with
pointwise products, so one forward transform per field or product and coarse inverse transforms
give the stress, fluxes, ``pi`` and the enstrophy transfer. Only ``force_i`` and the vorticity
forcing, fine-grid derivatives of products of filtered fields, need the filtered velocity on the
fine grid.
``targets`` restricts the work to the target variables asked for. This periodic pass is
written once against the array backend seam (closure.backend): numpy and scipy.fft by
default, torch on a CPU or GPU with ``backend=`` / ``--device`` (the same values to 1e-10 in
float64).

Block averaging has no fine-grid filtered field: the block means of the fields and products
are formed on the coarse grid, and the derivatives in force, strain rate, vorticity and
vorticity forcing are taken there (spectral if periodic, fd4 otherwise) - the derivative a coarse
solver on that grid would see.

The "vorticity" field is ``d_x bar(v) - d_y bar(u)``, the vorticity of the filtered velocity;
with periodic (spectral) filtering it equals ``bar(omega)``. Vorticity terms exist only on
``(y, x)`` grids.

Land (``snapshot.mask``, True = fluid). Land follows one of two conventions (``land=``):
``"zero"`` (default) land is zero velocity and zero scalar, and the ordinary filter acts on the
zero-filled fields (Aluie, Hecht & Vallis 2018, J. Phys. Oceanogr. 48(2),
doi:10.1175/JPO-D-17-0100.1; its treatment of land from memory);
``"fluid"`` fluid-only normalised filtering ``bar_w(f) = bar(w f) / bar(w)`` with the mask as
``w``, every product filtered the same way (``tau_ij = bar_w(u_i u_j) - bar_w(u_i) bar_w(u_j)``).
A coarse point needs a finite footprint, so masked snapshots take the real-space path on every
grid (closure.filters: Gaussian cut at 6 standard deviations, box over its support, wrap-around
when periodic) with 4th-order differences on the fine grid (block averaging: on the coarse
grid), and the sharp spectral filter is refused. ``CoarseSnapshot.valid`` marks the coarse points
whose values do not depend on land at all (:func:`land_validity`): at those points fields and
targets equal the computation on the same data without land, whatever the convention. The
convention changes only the values at the other points (written to coarse files; never fitted).
A mask with every point fluid is no mask: the result is bit for bit the unmasked one.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence

import numpy as np

from closure.backend import get_backend
from closure.derivatives import SCHEMES, derivative
from closure.errors import UserError
from closure.fields import CoarseSnapshot, Snapshot  # re-exported: the types live there
from closure.filters import LAND_CONVENTIONS, CoarseGraining, land_as_zero
from closure.grid import VELOCITY_OF, Grid
from closure.threads import side_by_side

#: Direction pairs of the independent stress components, in output order.
_PAIRS = (("x", "x"), ("x", "y"), ("y", "y"), ("x", "z"), ("y", "z"), ("z", "z"))
# internal keys that no scalar name can collide with
_OMEGA, _TAU = "<omega>", "<tau>"


def directions(dims: Sequence[str]) -> tuple[str, ...]:
    """The grid's directions in velocity order (x, y, z)."""
    return tuple(d for d in ("x", "y", "z") if d in dims)


def stress_pairs(dims: Sequence[str]) -> list[tuple[str, str]]:
    """Direction pairs (i, j), i <= j, of the independent stress components."""
    return [(i, j) for i, j in _PAIRS if i in dims and j in dims]


def stress_names(dims: Sequence[str]) -> list[str]:
    """``["tau_xx", "tau_xy", "tau_yy"]`` in 2-D, six names in 3-D, ``["tau_xx"]`` in 1-D."""
    return [f"tau_{i}{j}" for i, j in stress_pairs(dims)]


def _pair(i: str, j: str) -> str:
    return i + j if "xyz".index(i) <= "xyz".index(j) else j + i


def stress_component(stress: Mapping[str, np.ndarray], i: str, j: str) -> np.ndarray:
    """tau_ij from the independent components (``tau_yx`` is ``tau_xy``)."""
    return stress[f"tau_{_pair(i, j)}"]


def deviatoric(stress: Mapping[str, np.ndarray], dims: Sequence[str]) -> dict[str, np.ndarray]:
    """Deviatoric part tau_ij - delta_ij tau_kk / d of the stress components, d = len(dims)."""
    dirs = directions(dims)
    trace = sum(stress[f"tau_{d}{d}"] for d in dirs) / len(dirs)
    return {f"tau_{i}{j}": stress[f"tau_{i}{j}"] - (trace if i == j else 0.0)
            for i, j in stress_pairs(dims)}


def velocity_gradient(velocity: Mapping[str, np.ndarray], grid: Grid,
                      scheme: str) -> dict[tuple[str, str], np.ndarray]:
    """``{(i, j): d_j u_i}`` for the velocity components of the grid's directions.

    ``velocity`` maps ``u, v, w`` to arrays (or stacks) whose trailing axes are ``grid.shape``.
    """
    dirs = directions(grid.dims)
    stack = np.stack([velocity[VELOCITY_OF[i]] for i in dirs])
    out = {}
    for j in dirs:
        dj = derivative(stack, grid, j, 1, scheme)
        for a, i in enumerate(dirs):
            out[(i, j)] = dj[a]
    return out


def strain_rate(velocity: Mapping[str, np.ndarray], grid: Grid,
                scheme: str = "spectral") -> dict[str, np.ndarray]:
    """Strain rate S_ij = (d_j u_i + d_i u_j) / 2, keyed ``"xx", "xy", ...`` (i <= j)."""
    grad = velocity_gradient(velocity, grid, scheme)
    return {i + j: 0.5 * (grad[(i, j)] + grad[(j, i)]) for i, j in stress_pairs(grid.dims)}


def energy_transfer(stress: Mapping[str, np.ndarray], strain: Mapping[str, np.ndarray],
                    dims: Sequence[str]) -> np.ndarray:
    """pi = -tau_ij S_ij summed over all i, j (off-diagonal pairs count twice).

    ``stress`` has ``tau_xy``-style keys, ``strain`` ``"xy"``-style keys (as strain_rate).
    """
    total = 0.0
    for i, j in stress_pairs(dims):
        total = total + (1.0 if i == j else 2.0) * stress[f"tau_{i}{j}"] * strain[i + j]
    return -total


def backscatter_fraction(transfer: np.ndarray) -> float:
    """Fraction of points where a transfer (``pi``, ``enstrophy_transfer``) is negative,
    i.e. where subgrid scales return energy (enstrophy) to the resolved scales."""
    a = np.asarray(transfer)
    return float(np.count_nonzero(a < 0) / a.size) if a.size else float("nan")


def fine_scheme(grid: Grid) -> str:
    """Derivative scheme for exact terms: spectral on periodic grids, fd4 otherwise."""
    return "spectral" if grid.periodic else "fd4"


def _check_inputs(snapshot: Snapshot, cg: CoarseGraining, scalars: Sequence[str]) -> None:
    g, f = snapshot.grid, cg.fine
    if g.dims != f.dims or g.shape != f.shape or g.periodic != f.periodic or \
            not np.allclose(g.spacing, f.spacing, rtol=1e-9, atol=0.0):
        raise UserError(f"the snapshot's grid {g.dims} {g.shape} does not match the "
                        f"coarse-graining's fine grid {f.dims} {f.shape}: build the "
                        "coarse-graining from this file's grid")
    for c in scalars:
        if c in VELOCITY_OF.values():
            raise UserError(f"{c!r} is a velocity component, not a scalar: drop it from the "
                            "scalars")
        if c == "vorticity" and g.dims == ("y", "x"):
            raise UserError("the scalar name 'vorticity' is taken by the filtered vorticity "
                            "of a 2-D coarse file: carry it under another name "
                            "(--var NAME=vorticity --scalar NAME)")
    for c in (*(VELOCITY_OF[d] for d in directions(g.dims)), *scalars):
        if c not in snapshot.fields:
            raise UserError(f"the snapshot has no field {c!r} (it has "
                            f"{', '.join(snapshot.fields)}): add it with --scalar or --var")


def target_names(dims: Sequence[str], scalars: Sequence[str] = ()) -> list[str]:
    """Every target variable coarse_grain_snapshot can compute on a grid of ``dims``, in output
    order: stress, force, scalar fluxes, ``pi``, and in 2-D the vorticity terms."""
    dirs = directions(dims)
    out = stress_names(dims) + [f"force_{i}" for i in dirs]
    out += [f"flux_{c}_{j}" for c in scalars for j in dirs]
    out.append("pi")
    if tuple(dims) == ("y", "x"):
        out += ["vorticity_forcing", "enstrophy_transfer"]
    return out


def _wanted(targets, dims, scalars) -> list[str]:
    every = target_names(dims, scalars)
    if targets is None:
        return every
    if isinstance(targets, str):
        targets = (targets,)
    asked = set(targets)
    unknown = sorted(asked - set(every))
    if unknown:
        raise UserError(f"unknown target variable(s) {', '.join(unknown)} on this "
                        f"{len(dims)}-D grid with scalars ({', '.join(scalars) or 'none'}): "
                        f"choose from {', '.join(every)} (a flux needs its scalar in scalars)")
    return [t for t in every if t in asked]


def coarse_grain_snapshot(snapshot: Snapshot, cg: CoarseGraining, scalars: Sequence[str] = (),
                          targets: Sequence[str] | None = None, land: str = "zero",
                          scheme: str | None = None,
                          derivative_passes: int = 1, backend=None) -> CoarseSnapshot:
    """Filter and coarsen one snapshot and compute its exact subgrid terms (coarse grid).

    ``scalars`` names the snapshot's scalar fields to carry (filtered) and whose fluxes may be
    computed. ``targets`` names the target variables to compute (see :func:`target_names`);
    None computes every one. The fields (filtered velocity, scalars, 2-D vorticity) are always
    returned. See the module docstring for the definitions and where derivatives are taken.

    With land in ``snapshot.mask``: ``land`` is the convention (``"zero"`` or ``"fluid"``),
    and ``valid`` excludes the coarse points whose footprint meets land and, when ``scheme``
    (the coarse solver's: fd2 or fd4) is given, those whose coarse derivative stencils, applied
    ``derivative_passes`` times, reach an excluded point (see :func:`land_validity`).

    ``backend``: a closure.backend backend or a ``--device`` value (None: numpy) for the
    periodic pass without land (box, Gaussian, sharp filters), the one path of every device;
    the other passes (land, block averaging, bounded grids) run on numpy. Results are float64
    numpy arrays whatever the backend.
    """
    if isinstance(scalars, str):
        scalars = (scalars,)
    scalars = tuple(dict.fromkeys(scalars))
    _check_inputs(snapshot, cg, scalars)
    if land not in LAND_CONVENTIONS:
        raise UserError(f"unknown land convention {land!r}: choose --land "
                        f"{' or '.join(LAND_CONVENTIONS)}")
    want = _wanted(targets, cg.fine.dims, scalars)
    mask = _fluid_mask(snapshot, cg, scheme)
    if mask is not None:
        fields, out = _grid_terms(snapshot, cg, scalars, set(want), mask, land)
    elif cg.kind != "block" and cg.fine.periodic:
        fields, out = _spectral_terms(snapshot, cg, scalars, set(want), get_backend(backend))
    else:
        fields, out = _grid_terms(snapshot, cg, scalars, set(want))
    valid = fluid = None
    if mask is not None:
        valid, fluid = land_validity(mask, cg, want, scheme, derivative_passes)
        for group in (fields, out):
            for k in group:
                group[k] = np.where(fluid, group[k], 0.0)
    fields = {k: np.ascontiguousarray(v) for k, v in fields.items()}
    out = {k: np.ascontiguousarray(out[k]) for k in want}
    return CoarseSnapshot(fields, out, cg.coarse, cg, snapshot.index, snapshot.time, valid,
                          fluid, None if mask is None else land)


def _fluid_mask(snapshot: Snapshot, cg: CoarseGraining, scheme: str | None):
    """The snapshot's fluid mask as booleans, or None when there is no land; refuses the
    filters and schemes whose footprint or stencil is the whole domain."""
    mask = getattr(snapshot, "mask", None)
    if mask is None:
        return None
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != cg.fine.shape:
        raise UserError(f"the land mask has shape {mask.shape}, the fields {cg.fine.shape}: "
                        "give a mask variable on the fields' grid")
    if mask.all():
        return None
    if cg.kind == "spectral":
        raise UserError("the data have land, and the sharp spectral filter's kernel "
                        "sin(x)/x reaches across the whole domain, so every coarse point would "
                        "see land: use --filter gaussian or box (or block)")
    if scheme == "spectral":
        raise UserError("the data have land, and spectral derivatives use every coarse point "
                        "of the domain, so every coarse point would see land: use --scheme "
                        "fd2 or fd4")
    if scheme is not None and scheme not in SCHEMES:
        raise UserError(f"unknown derivative scheme {scheme!r}: choose fd2 or fd4")
    return mask


#: Coarse stencils of closure.derivatives per scheme: interior half-width, number of one-sided
#: rows at a non-periodic edge, and the longest one-sided row (first or second derivative).
_STENCIL_REACH = {"fd2": (1, 1, 4), "fd4": (2, 2, 6)}


def stencil_dilation(bad: np.ndarray, grid: Grid, scheme: str, passes: int = 1) -> np.ndarray:
    """Points whose derivatives (closure.derivatives stencils of ``scheme``, ``passes`` times
    along every direction, first or second derivatives) use a ``bad`` point.

    ``bad`` is a boolean array of ``grid.shape``. Interior points use +-1 (fd2) or +-2 (fd4)
    neighbours; at a non-periodic edge the one-sided rows use the first 4 (fd2) or 6 (fd4)
    points. A conservative superset when a term takes fewer derivatives along some direction.
    """
    if scheme not in _STENCIL_REACH:
        raise UserError(f"derivative scheme {scheme!r} has no finite stencil: use fd2 or fd4")
    half, edge, longest = _STENCIL_REACH[scheme]
    out = np.asarray(bad, dtype=bool).copy()
    for _ in range(int(passes)):
        for axis in range(grid.ndim):
            b = np.moveaxis(out, axis, 0)
            new = b.copy()
            n = b.shape[0]
            for s in range(1, half + 1):
                if grid.periodic:
                    new |= np.roll(b, s, axis=0) | np.roll(b, -s, axis=0)
                elif s < n:
                    new[s:] |= b[:-s]
                    new[:-s] |= b[s:]
            if not grid.periodic:
                m = min(longest, n)
                new[:edge] |= b[:m].any(axis=0)
                new[n - edge:] |= b[n - m:].any(axis=0)
            out = np.moveaxis(new, 0, axis).copy()
    return out


def _fine_depth(want, dims) -> tuple[int, int]:
    """(fd4 passes before the filter, fd4 passes after it) in the outputs: the fine vorticity
    (2-D vorticity flux terms) before; force, strain rate in pi, the vorticity field and the
    derivatives of the vorticity flux after."""
    sigma = tuple(dims) == ("y", "x") and bool(set(want) & {"vorticity_forcing",
                                                             "enstrophy_transfer"})
    after = (tuple(dims) == ("y", "x")
             or any(t.startswith("force_") or t == "pi" for t in want))
    return int(sigma), int(after)


def land_validity(mask: np.ndarray, cg: CoarseGraining, targets: Sequence[str],
                  scheme: str | None = None, derivative_passes: int = 1
                  ) -> tuple[np.ndarray, np.ndarray]:
    """(valid, fluid) coarse boolean arrays of a fine fluid ``mask`` (True = fluid).

    A coarse point is invalid when anything it is computed from touches land: the fine land
    widened by the fine-grid fd4 stencil (+-2 cells, one-sided rows at bounded edges) for the
    2-D vorticity that is filtered, then the filter's footprint (Gaussian: 6 standard
    deviations; box: its support; block: its block), then the fd4 stencil again for the
    derivatives taken after filtering (force, pi, vorticity; on the coarse grid for block
    averaging). With a coarse ``scheme``, a point is also invalid when its coarse stencils,
    ``derivative_passes`` times, reach an invalid point: then the design's library terms at
    every valid point are those of the same data without land. ``fluid``: the coarse point
    itself is fluid.
    """
    mask = np.asarray(mask, dtype=bool)
    fine, coarse = cg.fine, cg.coarse
    before, after = _fine_depth(targets, fine.dims)
    bad = stencil_dilation(~mask, fine, "fd4", before) if before else ~mask
    if cg.kind == "block":
        touched = cg.footprint_touches(bad)
        if after:
            touched = stencil_dilation(touched, coarse, "fd4", after)
        fluid = cg.block_mean(mask.astype(float)) > 0
    else:
        if after:
            bad = stencil_dilation(bad, fine, "fd4", after)
        touched = cg.footprint_touches(bad)
        fluid = cg.sample(mask)
    if scheme is not None and derivative_passes > 0:
        touched = stencil_dilation(touched, coarse, scheme, derivative_passes)
    return ~touched, fluid


# ---------------------------------------------------------------------- periodic: spectral
def _spectral_terms(snapshot, cg, scalars, want, backend=None):
    """Periodic filters: every output as per-direction spectral operators sampled onto the
    coarse grid (CoarseGraining.separable: filter, derivative, fold, coarse inverse), on the
    array ``backend`` (closure.backend: numpy by default, torch with --device); float64 numpy
    results.

    Sampling commutes with pointwise products, so the stress, fluxes, ``pi`` and the enstrophy
    transfer are products of sampled fields. Only the terms with a fine-grid derivative of a
    product of filtered fields (force, vorticity forcing) and the fluxes of the fine vorticity
    need fields on the fine grid, from one n-D transform of the velocity. Each output's
    transforms do not depend on which other outputs are computed, so a target has the same
    bits whatever else is asked for.
    """
    be = get_backend(backend)
    fine = cg.fine
    dims = fine.dims
    dirs = directions(dims)
    two_d = dims == ("y", "x")
    pairs = stress_pairs(dims)
    F = ("f",) * fine.ndim  # filtered

    def op(code, j):  # ``code`` along direction j, the filter (or nothing) along the others
        return tuple(code if d == j else ("f" if "f" in code else "") for d in dims)

    def sampled(f, ops, times=None):
        return cg.separable(f, ops, backend=be, times=times)

    Fd = {j: op("fd", j) for j in dirs}  # d_j of the filtered field
    D = {j: op("d", j) for j in dirs}  # d_j alone

    def together(calls):  # independent transforms side by side on numpy's threads
        return side_by_side(calls) if be.name == "numpy" else [c() for c in calls]

    vel = {d: be.asarray(snapshot.fields[VELOCITY_OF[d]]) for d in dirs}
    a_of = {d: a for a, d in enumerate(dirs)}
    out = {}
    need_force = any(t.startswith("force_") for t in want)
    need_vf = two_d and "vorticity_forcing" in want
    need_sigma = two_d and bool(want & {"vorticity_forcing", "enstrophy_transfer"})
    # fine-grid fields, from one n-D transform of the velocity: the filtered velocity (force,
    # vorticity forcing) and the vorticity and its filter (vorticity terms)
    fine_ubar = omega = fine_omega_bar = None
    if need_force or need_sigma:
        U = be.rfftn(be.stack([vel[d] for d in dirs]), fine.ndim)
        T = cg.backend_constant("spectral_multiplier", be)
        if need_force or need_vf:
            fine_ubar = be.irfftn(U * T, fine.shape)
        if need_sigma:
            ik = cg.backend_constant("ik", be)
            W = ik["x"] * U[a_of["y"]] - ik["y"] * U[a_of["x"]]  # omega = d_x v - d_y u
            omega = be.irfftn(W, fine.shape)
            if need_vf:
                fine_omega_bar = be.irfftn(W * T, fine.shape)
            del W
        del U

    # the filtered velocity, its derivatives d_j bar(u_i) that are used, the filtered scalars
    # and the products' terms: independent transforms, side by side
    vjs = {i: [j for j in dirs if "pi" in want or (two_d and j != i)] for i in dirs}
    calls = [functools.partial(sampled, vel[i], [F, *(Fd[j] for j in vjs[i])]) for i in dirs]
    calls += [functools.partial(sampled, be.asarray(snapshot.fields[c]), [F]) for c in scalars]
    products = list(pairs) if want & {*stress_names(dims), "pi"} or need_force else []

    def product_terms(i, j):
        # d_j tau_ij = d_j bar(u_i u_j) - d_j (bar(u_i) bar(u_j)) on the fine grid, sampled;
        # the products u_i u_j are formed by blocks of rows as they are transformed
        js = sorted({i, j}) if need_force else []
        bar_p, *d_bar_p = sampled(vel[i], [F, *(Fd[d] for d in js)], times=vel[j])
        d_p = (sampled(fine_ubar[a_of[i]], [D[d] for d in js], times=fine_ubar[a_of[j]])
               if need_force else [])
        return js, bar_p, d_bar_p, d_p

    calls += [functools.partial(product_terms, i, j) for i, j in products]
    results = together(calls)
    ubar, grad, cbar = {}, {}, {}
    for i, (ubar[i], *dj) in zip(dirs, results, strict=False):
        grad.update({(i, j): a for j, a in zip(vjs[i], dj, strict=True)})
    for c, (bar_c,) in zip(scalars, results[len(dirs):], strict=False):
        cbar[c] = bar_c
    fields = {VELOCITY_OF[d]: ubar[d] for d in dirs}
    fields.update(cbar)
    if two_d:
        fields["vorticity"] = grad[("y", "x")] - grad[("x", "y")]

    if products:
        for (i, j), (js, bar_p, d_bar_p, d_p) in zip(
                products, results[len(dirs) + len(scalars):], strict=True):
            out[f"tau_{i}{j}"] = bar_p - ubar[i] * ubar[j]
            if need_force:
                for d, a, b in zip(js, d_bar_p, d_p, strict=True):
                    # d_j tau_ij adds to force_i; d_i tau_ij (= d_i tau_ji) to force_j
                    key = f"force_{j if d == i else i}"
                    out[key] = out[key] + (a - b) if key in out else a - b
    if "pi" in want:
        strain = {i + j: 0.5 * (grad[(i, j)] + grad[(j, i)]) for i, j in pairs}
        out["pi"] = energy_transfer(out, strain, dims)
    for c in scalars:
        if not want & {f"flux_{c}_{j}" for j in dirs}:
            continue
        field = be.asarray(snapshot.fields[c])
        (bar_q,) = sampled(be.stack([vel[j] * field for j in dirs]), [F])
        for a, j in enumerate(dirs):
            out[f"flux_{c}_{j}"] = bar_q[a] - ubar[j] * cbar[c]
    if need_sigma:
        omega_bar, *d_omega_bar = sampled(omega, [F, *(Fd[j] for j in dirs)])
        sigma, vf = {}, 0.0
        for j in dirs:
            bar_s, *d_bar_s = sampled(vel[j] * omega, [F, *([Fd[j]] if need_vf else [])])
            sigma[j] = bar_s - ubar[j] * omega_bar
            if need_vf:
                (d_s,) = sampled(fine_ubar[a_of[j]] * fine_omega_bar, [D[j]])
                vf = vf + (d_bar_s[0] - d_s)
        if "enstrophy_transfer" in want:
            out["enstrophy_transfer"] = -sum(sigma[j] * d_omega_bar[a]
                                             for a, j in enumerate(dirs))
        if need_vf:
            out["vorticity_forcing"] = vf
    return ({k: be.numpy(v) for k, v in fields.items()},
            {k: be.numpy(v) for k, v in out.items()})


# ---------------------------------------------------------------------- block or non-periodic
def _grid_terms(snapshot, cg, scalars, want, mask=None, land="zero"):
    """Block averaging, or real-space filters on non-periodic grids: filter on the fine grid (or
    average onto the coarse one), differentiate there, then sample. With a fluid ``mask``:
    real-space filters on every grid, fd4 derivatives, land zero-filled and filtered as the
    ``land`` convention says."""
    fine = cg.fine
    dirs = directions(fine.dims)
    vel_names = [VELOCITY_OF[d] for d in dirs]

    def read(name):
        a = np.asarray(snapshot.fields[name], dtype=float)
        return a if mask is None else land_as_zero(a, mask)

    vel = {VELOCITY_OF[d]: read(VELOCITY_OF[d]) for d in dirs}
    two_d = fine.dims == ("y", "x")
    need_sigma = two_d and bool(want & {"vorticity_forcing", "enstrophy_transfer"})
    fluxes = [c for c in scalars if any(t.startswith(f"flux_{c}_") for t in want)]

    # fine-grid quantities: linear fields and the products whose filters we need
    linear = {**vel, **{c: read(c) for c in scalars}}
    if need_sigma:
        scheme = fine_scheme(fine) if mask is None else "fd4"
        linear[_OMEGA] = (derivative(vel["v"], fine, "x", 1, scheme)
                          - derivative(vel["u"], fine, "y", 1, scheme))
    products = {}
    if want & {*stress_names(fine.dims), "pi"} or any(t.startswith("force_") for t in want):
        for i, j in stress_pairs(fine.dims):
            products[(_TAU, i + j)] = vel[VELOCITY_OF[i]] * vel[VELOCITY_OF[j]]
    for c in (*fluxes, *([_OMEGA] if need_sigma else [])):
        for j in dirs:
            products[(c, j)] = vel[VELOCITY_OF[j]] * linear[c]

    # one filter pass per stack (block averaging lands on the coarse grid directly)
    lin_keys, prod_keys = list(linear), list(products)
    grid = cg.coarse if cg.kind == "block" else fine
    if mask is None:
        apply = cg.block_mean if cg.kind == "block" else cg.filter
    elif land == "fluid":
        def apply(stack):
            if cg.kind == "block":
                return cg.weighted_block_mean(stack, mask)
            return cg.weighted_filter(stack, mask, real_space=True)
    else:
        def apply(stack):
            return cg.block_mean(stack) if cg.kind == "block" else cg.filter(stack, True)
    bar_lin = dict(zip(lin_keys, apply(np.stack([linear[k] for k in lin_keys])), strict=True))
    bar_prod = (dict(zip(prod_keys, apply(np.stack([products[k] for k in prod_keys])),
                         strict=True)) if prod_keys else {})
    del linear, products

    scheme = fine_scheme(grid) if mask is None else "fd4"
    out_fields, targets = _terms(bar_lin, bar_prod, grid, scheme, dirs, vel_names,
                                 scalars, fluxes, two_d, want)
    if cg.kind != "block":
        names_f, names_t = list(out_fields), list(targets)
        sampled = cg.sample(np.stack([out_fields[k] for k in names_f]
                                     + [targets[k] for k in names_t]))
        out_fields = dict(zip(names_f, sampled[:len(names_f)], strict=True))
        targets = dict(zip(names_t, sampled[len(names_f):], strict=True))
    return out_fields, targets


def _terms(bar_lin, bar_prod, grid, scheme, dirs, vel_names, scalars, fluxes, two_d, want):
    """Fields and the wanted targets from filtered fields and products, all on ``grid``."""
    ubar = {c: bar_lin[c] for c in vel_names}
    need_force = any(t.startswith("force_") for t in want)
    stress = {}
    if (_TAU, dirs[0] * 2) in bar_prod:
        for i, j in stress_pairs(grid.dims):
            stress[f"tau_{i}{j}"] = (bar_prod[(_TAU, i + j)]
                                     - ubar[VELOCITY_OF[i]] * ubar[VELOCITY_OF[j]])
    sigma = {}
    if (_OMEGA, dirs[0]) in bar_prod:
        for j in dirs:
            sigma[j] = bar_prod[(_OMEGA, j)] - ubar[VELOCITY_OF[j]] * bar_lin[_OMEGA]

    # every d_j in one call per direction: tau_ij (all i), the filtered velocity, sigma_j,
    # bar(omega) - each only where a wanted output uses it
    need_grad = "pi" in want or two_d
    deriv = {}
    for j in dirs:
        keys, arrays = [], []
        if need_force:
            keys += [("tau", i) for i in dirs]
            arrays += [stress_component(stress, i, j) for i in dirs]
        if need_grad:
            keys += [("u", i) for i in dirs]
            arrays += [ubar[VELOCITY_OF[i]] for i in dirs]
        if sigma:
            keys += [("sigma", j), ("omega", j)]
            arrays += [sigma[j], bar_lin[_OMEGA]]
        if not arrays:
            continue
        dj = derivative(np.stack(arrays), grid, j, 1, scheme)
        for key, a in zip(keys, dj, strict=True):
            deriv[(*key, j)] = a

    targets = dict(stress)
    if need_force:
        for i in dirs:
            targets[f"force_{i}"] = sum(deriv[("tau", i, j)] for j in dirs)
    for c in fluxes:
        for j in dirs:
            targets[f"flux_{c}_{j}"] = bar_prod[(c, j)] - ubar[VELOCITY_OF[j]] * bar_lin[c]
    if "pi" in want:
        strain = {i + j: 0.5 * (deriv[("u", i, j)] + deriv[("u", j, i)])
                  for i, j in stress_pairs(grid.dims)}
        targets["pi"] = energy_transfer(stress, strain, grid.dims)

    fields = {**ubar, **{c: bar_lin[c] for c in scalars}}
    if two_d:
        fields["vorticity"] = deriv[("u", "y", "x")] - deriv[("u", "x", "y")]
        if sigma:
            targets["vorticity_forcing"] = (deriv[("sigma", "x", "x")]
                                            + deriv[("sigma", "y", "y")])
            targets["enstrophy_transfer"] = -(sigma["x"] * deriv[("omega", "x", "x")]
                                              + sigma["y"] * deriv[("omega", "y", "y")])
    return fields, {k: v for k, v in targets.items() if k in want}
