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

    def to_dict(self) -> dict:
        return {"name": self.name, "label": self.label, "k": self.k.tolist(),
                "exact": self.exact.tolist(), "model": self.model.tolist(),
                "exact_total": float(self.exact.sum()), "model_total": float(self.model.sum())}


@dataclass
class AprioriData:
    """Pooled exact and modelled values per target component over the given snapshots."""

    exact: dict[str, np.ndarray]
    modelled: dict[str, np.ndarray]
    snapshot_indices: list[int]
    transfers: list[TransferSpectrum] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def agreement(self) -> dict[str, dict[str, float]]:
        """R^2 and correlation per component (see :func:`closure.report.plots.agreement`)."""
        return {n: agreement(self.exact[n], self.modelled[n]) for n in self.exact}

    def to_dict(self) -> dict:
        return {"snapshots": self.snapshot_indices, "agreement": self.agreement(),
                "transfers": [t.to_dict() for t in self.transfers], "notes": self.notes}


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


def apriori_data(model, snapshots: Iterable, transfer: bool = True) -> AprioriData:
    """Evaluate ``model`` on each coarse snapshot (``.fields``, ``.targets``, ``.grid``,
    ``.index``) and pool exact vs modelled values of every component the model predicts.

    Transfer spectra are computed on periodic grids only (a note says when they are skipped);
    stress targets are turned into forces with the model's own derivative scheme, applied
    alike to the exact and the modelled stress.
    """
    exact: dict[str, list] = {}
    modelled: dict[str, list] = {}
    indices: list[int] = []
    sums: dict[str, list] = {}
    notes: list[str] = []
    target = model.target
    scheme = getattr(model, "scheme", "spectral")
    count = 0
    for snap in snapshots:
        pred = model.evaluate(snap.fields, snap.grid)
        names = [n for n in pred if n in snap.targets]
        if not names:
            raise ValueError(f"the model predicts {sorted(pred)}, none of which is among the "
                             f"snapshot's targets {sorted(snap.targets)}")
        for n in names:
            exact.setdefault(n, []).append(np.asarray(snap.targets[n], dtype=float).ravel())
            modelled.setdefault(n, []).append(np.asarray(pred[n], dtype=float).ravel())
        indices.append(int(getattr(snap, "index", count)))
        if transfer and snap.grid.periodic:
            for name, (label, k, te, tm) in _transfers(target, snap.fields, snap.targets, pred,
                                                       snap.grid, scheme).items():
                acc = sums.setdefault(name, [label, k, 0.0, 0.0])
                acc[2] = acc[2] + te
                acc[3] = acc[3] + tm
        count += 1
    if not count:
        raise ValueError("no snapshots to compare the model against")
    if transfer and not sums:
        notes.append("transfer spectra need periodic data (or the resolved velocity / "
                     "vorticity fields); they are left out")
    transfers = [TransferSpectrum(name, label, k, te / count, tm / count)
                 for name, (label, k, te, tm) in sums.items()]
    return AprioriData({n: np.concatenate(v) for n, v in exact.items()},
                       {n: np.concatenate(v) for n, v in modelled.items()},
                       indices, transfers, notes)
