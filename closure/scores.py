"""A priori scores of a closure on held-out snapshots.

Scores of the target itself come from sufficient statistics (no second look at the points):
for a prediction ``p = X c`` with weights ``W``::

    SSE = y^T W y - 2 c^T X^T W y + c^T G c
    R^2 = 1 - SSE / sum W (y - mean y)^2          (as sklearn.metrics.r2_score)
    relative L2 error = sqrt(SSE / y^T W y)
    Pearson correlation of p and y from c^T G c, c^T b, y^T W y and the sums.

With a land mask, coarse points that land excludes (closure.residuals.land_validity) have
point weight 0 in the statistics and are left out of every transfer sum; a transfer, which
differentiates the target again, uses only points whose stencils stay clear of excluded
points for :data:`TRANSFER_PASSES` more derivatives.

Transfers need the points: the energy transfer of a stress ``pi = -tau_ij Sbar_ij``
(Pope 2000, eq. 13.123; positive: resolved energy drained to subgrid scales) is quadratic in
the resolved fields and its sign matters (backscatter), so a second pass over the held-out
snapshots evaluates model and exact transfers pointwise and keeps additive sums
(:class:`TransferSums`), which reduce across snapshots like the statistics do.

Transfer fields, for each target (model and exact evaluated with the same formula, on the
coarse grid, with the model's derivative scheme, so a perfect model scores 1):

    stress       energy      -sum_ij tau_ij Sbar_ij
                 enstrophy   omega * curl(div tau)            (2-D)
    force        energy      u_i f_i                          (same domain mean as pi)
                 enstrophy   omega * curl(f)                  (2-D)
    vorticity    enstrophy   omega * F
    flux:c       variance    -flux_j d_j cbar

On periodic grids ``<omega * curl(div tau)>`` equals the mean of the enstrophy transfer
``-sigma_j d_j omega``, and ``<u_i f_i>`` the mean of ``pi`` (integration by parts).
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, fields

import numpy as np

from closure.derivatives import derivative
from closure.grid import VELOCITY_OF, Grid
from closure.stats import SufficientStats


def _ratio(num: float, den: float) -> float | None:
    return float(num / den) if den > 0 and np.isfinite(num / den) else None


def prediction_scores(stats: SufficientStats, coef: np.ndarray) -> dict[str, dict]:
    """R^2, relative L2 error and Pearson correlation of the prediction ``X @ coef``, per
    component and pooled over components (``"all"``, weighted, one pooled mean).

    Undefined values (a constant target or prediction) are None.
    """
    coef = np.asarray(coef, dtype=float)
    out = {}
    for c, name in enumerate(stats.components):
        out[name] = _scores_one(stats.gram[c], stats.xy[c], stats.yy[c], stats.x_sum[c],
                                stats.y_sum[c], stats.weight_sum[c], coef)
    if stats.n_components > 1:
        s = stats.combined()
        out["all"] = _scores_one(s.gram[0], s.xy[0], s.yy[0], s.x_sum[0], s.y_sum[0],
                                 s.weight_sum[0], coef)
    return out


def _scores_one(G, b, yy, xs, ys, W, coef) -> dict:
    pp = float(coef @ G @ coef)
    py = float(coef @ b)
    sse = max(float(yy) - 2 * py + pp, 0.0)
    my, mp = ys / W, float(coef @ xs) / W
    var_y = float(yy) / W - my**2
    var_p = pp / W - mp**2
    cov = py / W - my * mp
    sst = var_y * W
    corr = None
    if var_y > 1e-14 * yy / W and var_p > 1e-14 * max(pp, 1e-300) / W:
        corr = float(np.clip(cov / np.sqrt(var_y * var_p), -1.0, 1.0))
    r2 = None
    if sst > 1e-14 * yy:
        r2 = float(1.0 - sse / sst)
    return {"r2": r2, "relative_error": None if yy <= 0 else float(np.sqrt(sse / yy)),
            "correlation": corr, "points": int(round(W))}


# ---------------------------------------------------------------------- transfers
def _indices(component: str) -> tuple[str, ...]:
    """Directions of a target component name: tau_xy -> (x, y), force_x / flux_c_x -> (x,)."""
    tail = component.rsplit("_", 1)[-1]
    return tuple(tail) if component.startswith("tau_") else (tail,)


def vorticity_of(fields: Mapping[str, np.ndarray], grid: Grid, scheme: str) -> np.ndarray:
    """2-D vorticity: the coarse field ``vorticity`` if given, else d_x v - d_y u."""
    if "vorticity" in fields:
        return np.asarray(fields["vorticity"])
    return (derivative(fields["v"], grid, "x", 1, scheme)
            - derivative(fields["u"], grid, "y", 1, scheme))


class TransferContext:
    """What the transfer formulas need from one coarse snapshot, computed once: the resolved
    strain rate (stress), velocity (force), vorticity (2-D) or scalar gradient (flux)."""

    def __init__(self, target: str, fields: Mapping[str, np.ndarray], grid: Grid, scheme: str):
        self.target, self.grid, self.scheme = target, grid, scheme
        dims = grid.dims
        self.kind = target.split(":")[0]
        self.names: tuple[str, ...] = ()
        if self.kind == "stress":
            grads = {(i, j): derivative(fields[VELOCITY_OF[i]], grid, j, 1, scheme)
                     for i in dims for j in dims}
            self.strain = {(i, j): 0.5 * (grads[i, j] + grads[j, i]) for i in dims for j in dims}
            self.names = ("energy_transfer",)
        elif self.kind == "force":
            self.velocity = {d: np.asarray(fields[VELOCITY_OF[d]]) for d in dims}
            self.names = ("energy_transfer",)
        elif self.kind == "flux":
            c = target.split(":", 1)[1]
            self.scalar_gradient = {d: derivative(fields[c], grid, d, 1, scheme) for d in dims}
            self.names = ("scalar_variance_transfer",)
        if grid.ndim == 2 and self.kind in ("stress", "force", "vorticity"):
            self.vorticity = vorticity_of(fields, grid, scheme)
            self.names += ("enstrophy_transfer",)

    def _d(self, f, dim):
        return derivative(f, self.grid, dim, 1, self.scheme)

    def nbytes(self) -> int:
        """Bytes of the arrays this context holds."""
        total = 0
        for name in ("strain", "velocity", "scalar_gradient"):
            total += sum(int(a.nbytes) for a in getattr(self, name, {}).values())
        return total + int(getattr(getattr(self, "vorticity", None), "nbytes", 0))

    def rows(self, start: int, stop: int) -> TransferContext:
        """This context over rows ``start:stop`` of the first direction: the transfers of
        those rows of the values, for transfers that :func:`transfers_pointwise` says need
        no derivative of them."""
        out = copy.copy(self)
        g = self.grid
        out.grid = Grid(g.dims, (stop - start, *g.shape[1:]), g.spacing, g.origin, g.periodic,
                        g.units)
        for name in ("strain", "velocity", "scalar_gradient"):
            if hasattr(self, name):
                setattr(out, name, {k: v[start:stop] for k, v in getattr(self, name).items()})
        if hasattr(self, "vorticity"):
            out.vorticity = self.vorticity[start:stop]
        return out

    def transfers(self, values: Mapping[str, np.ndarray],
                  which: tuple[str, ...] | None = None) -> dict[str, np.ndarray]:
        """Transfer fields (grid shape) of target components ``values`` (name -> field).

        Linear in ``values``, so applying it to each term's design column gives the design of
        the transfers; fields may be stacks (leading axes, e.g. one per term, trailing axes
        ``grid.shape``). ``which`` restricts to some of ``self.names``.
        """
        which = self.names if which is None else which
        out = {}
        dims = self.grid.dims
        if self.kind == "stress":
            tau = {}
            for name, v in values.items():
                i, j = _indices(name)
                tau[i, j] = tau[j, i] = np.asarray(v)
            if "energy_transfer" in which:
                out["energy_transfer"] = -sum(tau[i, j] * self.strain[i, j]
                                              for i in dims for j in dims)
            if "enstrophy_transfer" in which:
                force = {i: sum(self._d(tau[i, j], j) for j in dims) for i in dims}
                out["enstrophy_transfer"] = self.vorticity * self._curl(force)
        elif self.kind == "force":
            force = {_indices(n)[0]: np.asarray(v) for n, v in values.items()}
            if "energy_transfer" in which:
                out["energy_transfer"] = sum(self.velocity[d] * force[d] for d in dims)
            if "enstrophy_transfer" in which:
                out["enstrophy_transfer"] = self.vorticity * self._curl(force)
        elif self.kind == "vorticity":
            (F,) = values.values()
            if "enstrophy_transfer" in which:
                out["enstrophy_transfer"] = self.vorticity * np.asarray(F)
        elif self.kind == "flux":
            flux = {_indices(n)[0]: np.asarray(v) for n, v in values.items()}
            if "scalar_variance_transfer" in which:
                out["scalar_variance_transfer"] = -sum(flux[d] * self.scalar_gradient[d]
                                                       for d in dims)
        return out

    def _curl(self, vec):
        return self._d(vec["y"], "x") - self._d(vec["x"], "y")


def transfers_pointwise(target: str, which) -> bool:
    """Whether the transfers ``which`` of ``target`` need no derivative of the target's values
    (all but the enstrophy transfer of the stress and the force), so that rows of them come
    from the same rows of the values (:meth:`TransferContext.rows`)."""
    return not ("enstrophy_transfer" in which and target.split(":")[0] in ("stress", "force"))


def transfer_names(target: str, dims: tuple[str, ...]) -> tuple[str, ...]:
    """Names of the transfers scored for a target on a grid of these dimensions."""
    kind = target.split(":")[0]
    names = {"stress": ("energy_transfer",), "force": ("energy_transfer",),
             "flux": ("scalar_variance_transfer",), "vorticity": ()}.get(kind, ())
    if len(dims) == 2 and kind in ("stress", "force", "vorticity"):
        names += ("enstrophy_transfer",)
    return names


@dataclass
class TransferSums:
    """Additive sums over points of a model transfer ``m`` and the exact one ``e``."""

    count: float = 0.0
    sum_model: float = 0.0
    sum_exact: float = 0.0
    sum_model2: float = 0.0
    sum_exact2: float = 0.0
    sum_cross: float = 0.0
    backscatter_points_model: float = 0.0
    backscatter_points_exact: float = 0.0
    backscatter_sum_model: float = 0.0
    backscatter_sum_exact: float = 0.0
    abs_sum_model: float = 0.0
    abs_sum_exact: float = 0.0

    @classmethod
    def from_fields(cls, model: np.ndarray, exact: np.ndarray,
                    valid: np.ndarray | None = None) -> TransferSums:
        """Sums over the points of ``model`` and ``exact`` (same shape), only where ``valid``
        (boolean, same shape) when given: points a land mask excludes count nowhere."""
        m = np.asarray(model, dtype=np.float64).ravel()
        e = np.asarray(exact, dtype=np.float64).ravel()
        if valid is not None:
            keep = np.asarray(valid, dtype=bool).ravel()
            m, e = m[keep], e[keep]
        return cls(float(m.size), float(m.sum()), float(e.sum()), float(m @ m), float(e @ e),
                   float(m @ e), float((m < 0).sum()), float((e < 0).sum()),
                   float(np.minimum(m, 0).sum()), float(np.minimum(e, 0).sum()),
                   float(np.abs(m).sum()), float(np.abs(e).sum()))

    def __add__(self, other: TransferSums) -> TransferSums:
        if isinstance(other, int) and other == 0:
            return self
        return TransferSums(*(getattr(self, f.name) + getattr(other, f.name)
                              for f in fields(self)))

    __radd__ = __add__

    def to_dict(self) -> dict:
        return {f.name: float(getattr(self, f.name)) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: Mapping) -> TransferSums:
        return cls(**{f.name: float(d[f.name]) for f in fields(cls)})

    def scores(self) -> dict:
        """Correlation, mean ratio <model>/<exact>, and backscatter: the share of points with
        negative transfer, and the share of |transfer| that is negative, exact and model."""
        n = self.count
        if n <= 0:
            return {}
        mm, me = self.sum_model / n, self.sum_exact / n
        var_m = self.sum_model2 / n - mm**2
        var_e = self.sum_exact2 / n - me**2
        cov = self.sum_cross / n - mm * me
        corr = None
        if var_m > 1e-14 * self.sum_model2 / n and var_e > 1e-14 * self.sum_exact2 / n:
            corr = float(np.clip(cov / np.sqrt(var_m * var_e), -1.0, 1.0))
        return {
            "correlation": corr,
            "mean_model": float(mm),
            "mean_exact": float(me),
            "mean_ratio": None if me == 0 else float(mm / me),
            "backscatter_fraction_model": float(self.backscatter_points_model / n),
            "backscatter_fraction_exact": float(self.backscatter_points_exact / n),
            "backscatter_share_model": _ratio(-self.backscatter_sum_model, self.abs_sum_model),
            "backscatter_share_exact": _ratio(-self.backscatter_sum_exact, self.abs_sum_exact),
            "points": int(round(n)),
        }


def transfer_sums(context: TransferContext, model: Mapping[str, np.ndarray],
                  exact: Mapping[str, np.ndarray],
                  valid: np.ndarray | None = None) -> dict[str, TransferSums]:
    """Pointwise sums of every transfer of the model and exact target components (only at
    the ``valid`` points when given)."""
    tm = context.transfers(model)
    te = context.transfers(exact)
    return {k: TransferSums.from_fields(tm[k], te[k], valid) for k in tm}


#: Derivative passes the transfer formulas add to the design's: curl(div tau) in the 2-D
#: enstrophy transfer of a stress is two (the others need at most one).
TRANSFER_PASSES = 2


def transfer_scores(sums: Mapping[str, TransferSums]) -> dict[str, dict]:
    """Scores of each transfer (see :meth:`TransferSums.scores`)."""
    return {k: s.scores() for k, s in sums.items()}


__all__ = ["TRANSFER_PASSES", "TransferContext", "TransferSums", "prediction_scores",
           "transfer_names", "transfer_scores", "transfer_sums", "vorticity_of"]
