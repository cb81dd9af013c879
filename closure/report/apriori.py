"""A priori comparison data: the model evaluated on held-out coarse snapshots vs the exact
subgrid terms, pooled per component, plus the energy / enstrophy transfer spectra of both."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from closure.grid import VELOCITY_OF
from closure.report import spectra
from closure.report.plots import agreement


@dataclass
class TransferSpectrum:
    """Shell spectra of one transfer, exact and modelled, averaged over snapshots."""

    name: str
    label: str
    k: np.ndarray
    exact: np.ndarray
    model: np.ndarray
    network: np.ndarray | None = None  # the neural reference closure's, when it was given

    def to_dict(self) -> dict:
        out = {"name": self.name, "label": self.label, "k": self.k.tolist(),
               "exact": self.exact.tolist(), "model": self.model.tolist(),
               "exact_total": float(self.exact.sum()), "model_total": float(self.model.sum())}
        if self.network is not None:
            out.update(network=self.network.tolist(), network_total=float(self.network.sum()))
        return out


@dataclass
class Moments:
    """Count, means, centred second moments and squared error of exact values y and model
    values p, mergeable across snapshots (pairwise update of Chan, Golub & LeVeque 1979,
    "Updating formulae and a pairwise algorithm for computing sample variances"), so pooled
    R^2 and correlation need no pooled arrays and suffer no cancellation."""

    n: float = 0.0
    mean_y: float = 0.0
    mean_p: float = 0.0
    m2_y: float = 0.0
    m2_p: float = 0.0
    c_yp: float = 0.0
    sse: float = 0.0

    @classmethod
    def of(cls, y: np.ndarray, p: np.ndarray) -> Moments:
        y = np.asarray(y, dtype=float).ravel()
        p = np.asarray(p, dtype=float).ravel()
        my, mp = float(y.mean()), float(p.mean())
        dy, dp = y - my, p - mp
        return cls(float(y.size), my, mp, float(dy @ dy), float(dp @ dp), float(dy @ dp),
                   float(np.sum((y - p) ** 2)))

    def __add__(self, o: Moments) -> Moments:
        n = self.n + o.n
        if n == 0:
            return Moments()
        dy, dp = o.mean_y - self.mean_y, o.mean_p - self.mean_p
        w = self.n * o.n / n
        return Moments(n, self.mean_y + dy * o.n / n, self.mean_p + dp * o.n / n,
                       self.m2_y + o.m2_y + dy * dy * w, self.m2_p + o.m2_p + dp * dp * w,
                       self.c_yp + o.c_yp + dy * dp * w, self.sse + o.sse)

    def agreement(self) -> dict[str, float]:
        """R^2 of p as a prediction of y, and their Pearson correlation (NaN if undefined)."""
        r2 = 1.0 - self.sse / self.m2_y if self.m2_y > 0 else float("nan")
        den = np.sqrt(self.m2_y * self.m2_p)
        corr = self.c_yp / den if den > 0 else float("nan")
        return {"r2": float(r2), "correlation": float(corr)}


@dataclass
class AprioriData:
    """Exact and modelled values per target component over the given snapshots.

    ``moments`` cover every point; ``exact`` / ``modelled`` hold the points for the scatter
    figure, every ``stride``-th one when there were more than the cap (``stride`` 1: all).
    """

    exact: dict[str, np.ndarray]
    modelled: dict[str, np.ndarray]
    snapshot_indices: list[int]
    transfers: list[TransferSpectrum] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    moments: dict[str, Moments] | None = None
    stride: int = 1
    #: the neural reference closure on the same points (None: not given)
    network: dict[str, np.ndarray] | None = None
    network_moments: dict[str, Moments] | None = None

    def network_agreement(self) -> dict[str, dict[str, float]] | None:
        """R^2 and correlation of the reference network per component (None: no network)."""
        if self.network_moments is None:
            return None
        return {n: m.agreement() for n, m in self.network_moments.items()}

    def agreement(self) -> dict[str, dict[str, float]]:
        """R^2 and correlation per component over every point (see
        :func:`closure.report.plots.agreement`)."""
        if self.moments is not None:
            return {n: m.agreement() for n, m in self.moments.items()}
        return {n: agreement(self.exact[n], self.modelled[n]) for n in self.exact}

    def to_dict(self) -> dict:
        out = {"snapshots": self.snapshot_indices, "agreement": self.agreement(),
               "points": {n: int(m.n) for n, m in (self.moments or {}).items()},
               "scatter_stride": self.stride,
               "transfers": [t.to_dict() for t in self.transfers], "notes": self.notes}
        if self.network_moments is not None:
            out["network_agreement"] = self.network_agreement()
        return out


def _dirs_field(fields, grid, prefix):
    return {d: fields[f"{prefix}{d}"] for d in grid.dims}


def _transfers(target: str, fields: dict, exact: dict, modelled: dict, grid,
               scheme: str) -> dict[str, tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
    """Per-snapshot transfer spectra {name: (label, k, exact, model)} for a target kind."""
    out = {}
    velocity = {d: fields[VELOCITY_OF[d]] for d in grid.dims if VELOCITY_OF[d] in fields}
    forces = None
    if target == "stress":
        forces = [spectra.stress_divergence(t, grid, scheme) for t in (exact, modelled)]
    elif target == "force":
        forces = [_dirs_field(t, grid, "force_") for t in (exact, modelled)]
    if forces is not None and len(velocity) == grid.ndim:
        k, te = spectra.energy_transfer_spectrum(velocity, forces[0], grid)
        _, tm = spectra.energy_transfer_spectrum(velocity, forces[1], grid)
        out["energy"] = ("energy drain T(k)", k, te, tm)
        if grid.ndim == 2 and "vorticity" in fields:
            g = [spectra.curl_2d(f, grid, scheme) for f in forces]
            k, ze = spectra.enstrophy_transfer_spectrum(fields["vorticity"], g[0], grid)
            _, zm = spectra.enstrophy_transfer_spectrum(fields["vorticity"], g[1], grid)
            out["enstrophy"] = ("enstrophy drain Z(k)", k, ze, zm)
    elif target == "vorticity" and "vorticity" in fields:
        w = fields["vorticity"]
        ge, gm = exact["vorticity_forcing"], modelled["vorticity_forcing"]
        k, te = spectra.energy_transfer_from_vorticity(w, ge, grid)
        _, tm = spectra.energy_transfer_from_vorticity(w, gm, grid)
        out["energy"] = ("energy drain T(k)", k, te, tm)
        k, ze = spectra.enstrophy_transfer_spectrum(w, ge, grid)
        _, zm = spectra.enstrophy_transfer_spectrum(w, gm, grid)
        out["enstrophy"] = ("enstrophy drain Z(k)", k, ze, zm)
    elif target.startswith("flux:"):
        c = target.split(":", 1)[1]
        if c in fields:
            from closure.derivatives import divergence

            div = [divergence(_dirs_field(t, grid, f"flux_{c}_"), grid, scheme)
                   for t in (exact, modelled)]
            k, se = spectra.cross_spectrum(fields[c], div[0], grid)
            _, sm = spectra.cross_spectrum(fields[c], div[1], grid)
            out["scalar"] = (f"{c} variance drain S(k)", k, se, sm)
    return out


def reference_network_of(model, notes: list[str]):
    """The model's neural reference closure for the figures, or None (no network stored, or
    torch missing: then a note in ``notes`` says why it is left out)."""
    if getattr(model, "reference_net", None) is None or not hasattr(model,
                                                                    "reference_network"):
        return None
    from closure.errors import UserError

    try:
        return model.reference_network()
    except UserError as exc:
        notes.append(f"the model's reference network is left out of the figures: {exc}")
        return None


#: Most points per component kept for the scatter figure (statistics use every point).
MAX_SCATTER_POINTS = 1_000_000


def apriori_data(model, snapshots: Iterable, transfer: bool = True,
                 max_points: int = MAX_SCATTER_POINTS, network=None) -> AprioriData:
    """Evaluate ``model`` on each coarse snapshot (``.fields``, ``.targets``, ``.grid``,
    ``.index``) and compare exact and modelled values of every component the model predicts.

    R^2 and correlation pool every point of every snapshot; the scatter keeps at most about
    ``max_points`` per component (a regular stride, doubled whenever the cap is passed).
    Transfer spectra are computed on periodic grids only (a note says when they are skipped);
    stress targets are turned into forces with the model's own derivative scheme, applied
    alike to the exact and the modelled stress. ``network``: the model's neural reference
    closure (anything with ``predict(fields, grid)``, e.g. :class:`closure.neural.ReferenceNet`),
    compared on the same points and in the same spectra.
    """
    exact: dict[str, list] = {}
    modelled: dict[str, list] = {}
    moments: dict[str, Moments] = {}
    indices: list[int] = []
    sums: dict[str, list] = {}
    notes: list[str] = []
    target = model.target
    scheme = getattr(model, "scheme", "spectral")
    count, stride, kept = 0, 1, 0
    net_values: dict[str, list] | None = None if network is None else {}
    net_moments: dict[str, Moments] = {}
    for snap in snapshots:
        pred = model.evaluate(snap.fields, snap.grid)
        net_pred = None if network is None else network.predict(snap.fields, snap.grid)
        names = [n for n in pred if n in snap.targets]
        valid = getattr(snap, "valid", None)  # land: only points clear of it are compared
        keep = None if valid is None else np.asarray(valid, dtype=bool).ravel()
        if not names:
            raise ValueError(f"the model predicts {sorted(pred)}, none of which is among the "
                             f"snapshot's targets {sorted(snap.targets)}")
        for n in names:
            y = np.asarray(snap.targets[n], dtype=float).ravel()
            p = np.asarray(pred[n], dtype=float).ravel()
            if keep is not None:
                y, p = y[keep], p[keep]
            moments[n] = moments.get(n, Moments()) + Moments.of(y, p)
            exact.setdefault(n, []).append(y[::stride])
            modelled.setdefault(n, []).append(p[::stride])
            if net_pred is not None:
                q = np.asarray(net_pred[n], dtype=float).ravel()
                q = q if keep is None else q[keep]
                net_moments[n] = net_moments.get(n, Moments()) + Moments.of(y, q)
                net_values.setdefault(n, []).append(q[::stride])
        kept += exact[names[0]][-1].size
        while kept > max_points:  # thin what is kept so far, and what comes, by 2
            stride *= 2
            for store in (exact, modelled) + ((net_values,) if net_values is not None else ()):
                for n in store:
                    store[n] = [a[::2] for a in store[n]]
            kept = sum(a.size for a in exact[names[0]])
        indices.append(int(getattr(snap, "index", count)))
        if transfer and snap.grid.periodic and keep is not None:
            if "land" not in " ".join(notes):
                notes.append("transfer spectra leave out snapshots with land (a spectrum needs "
                             "the whole periodic field)")
        elif transfer and snap.grid.periodic:
            for name, (label, k, te, tm) in _transfers(target, snap.fields, snap.targets, pred,
                                                       snap.grid, scheme).items():
                acc = sums.setdefault(name, [label, k, 0.0, 0.0, None])
                acc[2] = acc[2] + te
                acc[3] = acc[3] + tm
            if net_pred is not None:
                for name, (_, _, _, tn) in _transfers(target, snap.fields, snap.targets,
                                                      net_pred, snap.grid, scheme).items():
                    sums[name][4] = tn if sums[name][4] is None else sums[name][4] + tn
        count += 1
    if not count:
        raise ValueError("no snapshots to compare the model against")
    if transfer and not sums:
        notes.append("transfer spectra need periodic data (or the resolved velocity / "
                     "vorticity fields); they are left out")
    if stride > 1:
        notes.append(f"the scatter figure shows every {stride}-th point; the scores use all "
                     "of them")
    transfers = [TransferSpectrum(name, label, k, te / count, tm / count,
                                  None if tn is None else tn / count)
                 for name, (label, k, te, tm, tn) in sums.items()]
    return AprioriData({n: np.concatenate(v) for n, v in exact.items()},
                       {n: np.concatenate(v) for n, v in modelled.items()},
                       indices, transfers, notes, moments, stride,
                       None if net_values is None else
                       {n: np.concatenate(v) for n, v in net_values.items()},
                       None if network is None else net_moments)
