"""Time-averaged flow statistics accumulated on the fly, for long coarse runs.

A long run is compared with the filtered DNS by statistics, not trajectories (trajectories of
chaotic flows decorrelate within a few turnover times). :class:`FlowStatistics` takes one
sample at a time (velocity, vorticity, optionally a per-mode transfer density) and keeps only
running sums, so memory does not grow with the length of the run:

- the isotropic energy spectrum (shell sums, as :func:`closure.spectral.energy_spectrum`);
- the one-point vorticity histogram on fixed bin edges, with an underflow and an overflow bin
  (a blowing-up run puts its mass there); in 3-D the three components are pooled;
- the spatial means of kinetic energy ``0.5 <u_i u_i>`` and enstrophy ``0.5 <omega_i omega_i>``;
- a shell-summed transfer spectrum (e.g. the resolved nonlinear energy transfer).

:func:`compare_statistics` turns two summaries (a run and the reference) into the long-run
figures: the energy error per octave band and overall, the Hellinger distance of the
vorticity PDFs, the 0.1 % / 99.9 % vorticity quantiles, and the mean energy and enstrophy
ratios. These are evidence about one flow, not a guarantee: a priori skill does not guarantee
a stable or accurate coarse simulation, and a stable run on one flow says nothing certain
about another.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from closure.grid import Grid
from closure.spectral import fourier, mean_square_hat, shell_spacing

#: quantiles of the vorticity PDF reported for its tails
TAIL_QUANTILES = (0.001, 0.999)
#: bands holding less than this fraction of the reference energy get no relative error
BAND_FLOOR = 1e-10
#: default number of histogram bins between the edges
PDF_BINS = 400


def octave_bands(grid: Grid) -> list[tuple[int, int]]:
    """Octave bands of shell index (mode number) [1, 2), [2, 4), ... covering every shell of
    the grid (the corners included)."""
    top = int(np.ceil(np.sqrt(sum((n // 2) ** 2 for n in grid.shape))))
    bands, lo = [], 1
    while lo <= top:
        bands.append((lo, 2 * lo))
        lo *= 2
    return bands


def resolved_shell(grid: Grid) -> int:
    """The last shell index every direction carries after the 2/3 rule (|m_i| < n_i / 3)."""
    return int(math.ceil(min(grid.shape) / 3.0)) - 1


def symmetric_edges(values: Sequence[np.ndarray], bins: int = PDF_BINS,
                    margin: float = 1.5) -> np.ndarray:
    """Bin edges spanning ``[-R, R]`` with ``R = margin * max |value|`` over ``values``."""
    top = max((float(np.max(np.abs(v))) for v in values if np.size(v)), default=0.0)
    if not (math.isfinite(top) and top > 0):
        top = 1.0
    r = margin * top
    return np.linspace(-r, r, int(bins) + 1)


class FlowStatistics:
    """Running sums of flow statistics on ``grid`` (see the module docstring).

    ``edges`` are the vorticity histogram's bin edges (increasing). Add samples with
    :meth:`add`; :meth:`summary` gives the time means.
    """

    def __init__(self, grid: Grid, edges: np.ndarray):
        self.grid = grid
        self.edges = np.asarray(edges, dtype=float)
        if self.edges.ndim != 1 or self.edges.size < 2 or np.any(np.diff(self.edges) <= 0):
            raise ValueError("histogram edges must be increasing")
        F = fourier(grid)
        self._dk = shell_spacing(grid)
        self._shell = np.rint(np.sqrt(F.k2) / self._dk).astype(int).ravel()
        self._nshell = int(self._shell.max()) + 1
        self.samples = 0
        self.spectrum_sum = np.zeros(self._nshell)
        self.transfer_sum = np.zeros(self._nshell)
        self.transfer_samples = 0
        # [underflow, bins..., overflow]
        self.counts = np.zeros(self.edges.size + 1)
        self.energy_sum = 0.0
        self.enstrophy_sum = 0.0

    def _shells(self, density: np.ndarray) -> np.ndarray:
        return np.bincount(self._shell, weights=np.asarray(density).ravel(),
                           minlength=self._nshell) / self._dk

    def add(self, velocity: Sequence[np.ndarray], vorticity: np.ndarray | Sequence[np.ndarray],
            transfer_density: np.ndarray | None = None) -> None:
        """One sample: velocity components, the vorticity (2-D: one array; 3-D: its three
        components, pooled in the histogram) and optionally a per-mode transfer density in the
        rfftn layout (summed into shells like the energy)."""
        F = fourier(self.grid)
        density = 0.5 * sum(mean_square_hat(F.forward(c), self.grid) for c in velocity)
        self.spectrum_sum += self._shells(density)
        w = np.asarray(vorticity, dtype=float).ravel()
        inside = np.histogram(w, self.edges)[0]
        self.counts[1:-1] += inside
        self.counts[0] += np.count_nonzero(w < self.edges[0])
        self.counts[-1] += np.count_nonzero(w > self.edges[-1])
        self.energy_sum += 0.5 * sum(float(np.mean(np.asarray(c) ** 2)) for c in velocity)
        self.enstrophy_sum += 0.5 * float(np.mean(w**2)) * (w.size / np.prod(self.grid.shape))
        if transfer_density is not None:
            self.transfer_sum += self._shells(transfer_density)
            self.transfer_samples += 1
        self.samples += 1

    def summary(self) -> dict:
        """Time means: ``k`` (rad m^-1), ``E`` (energy spectrum), ``T`` (transfer spectrum or
        None), ``pdf`` {edges, counts (underflow, bins, overflow), density on the bins},
        ``quantiles`` {q: value}, ``energy``, ``enstrophy``, ``samples``. None when empty."""
        if not self.samples:
            return {"samples": 0}
        n = self.samples
        total = float(self.counts.sum())
        widths = np.diff(self.edges)
        density = self.counts[1:-1] / (total * widths) if total > 0 else np.zeros(widths.size)
        return {
            "samples": n,
            "k": self._dk * np.arange(self._nshell),
            "E": self.spectrum_sum / n,
            "T": (self.transfer_sum / self.transfer_samples) if self.transfer_samples else None,
            "pdf": {"edges": self.edges, "counts": self.counts.copy(), "density": density},
            "quantiles": {q: histogram_quantile(self.edges, self.counts, q)
                          for q in TAIL_QUANTILES},
            "energy": self.energy_sum / n,
            "enstrophy": self.enstrophy_sum / n,
        }


def histogram_quantile(edges: np.ndarray, counts: np.ndarray, q: float) -> float:
    """Quantile ``q`` of a histogram with an underflow and an overflow bin (``counts`` has
    ``len(edges) + 1`` entries), interpolated linearly inside the bin; -inf / +inf when it
    falls in the underflow / overflow bin, NaN when empty."""
    counts = np.asarray(counts, dtype=float)
    total = counts.sum()
    if total <= 0:
        return math.nan
    target = q * total
    cum = np.cumsum(counts)
    if target <= cum[0] and counts[0] > 0:
        return -math.inf
    if target > cum[-2]:
        return math.inf
    i = int(np.searchsorted(cum, target))  # counts index; bin i-1 between edges[i-1], edges[i]
    below = cum[i - 1]
    frac = (target - below) / counts[i] if counts[i] > 0 else 0.0
    return float(edges[i - 1] + frac * (edges[i] - edges[i - 1]))


def hellinger(p: np.ndarray, q: np.ndarray) -> float:
    """Hellinger distance sqrt(1 - sum sqrt(p_i q_i)) of two histograms (normalised here)."""
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    if p.sum() <= 0 or q.sum() <= 0:
        return math.nan
    bc = float(np.sum(np.sqrt(p / p.sum() * q / q.sum())))
    return math.sqrt(max(0.0, 1.0 - bc))


def band_energies_of_spectrum(k: np.ndarray, E: np.ndarray, grid: Grid,
                              bands: Sequence[tuple[int, int]]) -> np.ndarray:
    """Energy (m^2 s^-2) of a shell spectrum in each band of shell indices [lo, hi)."""
    dk = shell_spacing(grid)
    j = np.rint(np.asarray(k) / dk).astype(int)
    E = np.asarray(E, dtype=float)
    return np.array([float(np.sum(E[(j >= lo) & (j < hi)]) * dk) for lo, hi in bands])


def _ratio(a: float, b: float) -> float | None:
    if not (math.isfinite(a) and math.isfinite(b)) or b == 0:
        return None
    return float(a / b)


def compare_statistics(run: dict, reference: dict, grid: Grid) -> dict:
    """Long-run figures of a run's statistics summary against the reference's (both from
    :meth:`FlowStatistics.summary` with the same edges).

    ``spectrum_band_error`` is ``|E_b - E_b^ref| / E_b^ref`` per octave band of the time-mean
    spectra (keyed "lo-hi"; None where the reference band is empty); ``spectrum_error`` is
    their mean over the bands that start at or below the last complete shell after
    dealiasing (:func:`resolved_shell`; listed in ``spectrum_bands_counted``): the corner
    bands beyond it hold a few modes with almost no reference energy, whose relative errors
    would swamp the mean. ``vorticity_pdf_distance`` is the Hellinger
    distance of the histograms (under- and overflow bins included), ``vorticity_quantiles``
    the 0.1 % / 99.9 % quantiles of both; ``mean_energy_ratio`` and ``mean_enstrophy_ratio``
    are run / reference time means; ``transfer_error`` is ``sum |T - T_ref| / sum |T_ref|``
    over shells when both have a transfer spectrum.
    """
    if not run.get("samples") or not reference.get("samples"):
        return {"spectrum_band_error": {}, "spectrum_error": None,
                "vorticity_pdf_distance": None, "vorticity_quantiles": None,
                "mean_energy_ratio": None, "mean_enstrophy_ratio": None, "transfer_error": None}
    bands = octave_bands(grid)
    eb = band_energies_of_spectrum(run["k"], run["E"], grid, bands)
    rb = band_energies_of_spectrum(reference["k"], reference["E"], grid, bands)
    floor = BAND_FLOOR * reference["energy"]
    band_err = {f"{lo}-{hi}": (float(abs(a - b) / b) if b > floor and math.isfinite(a)
                               else None)
                for (lo, hi), a, b in zip(bands, eb, rb, strict=True)}
    top = resolved_shell(grid)
    counted = [f"{lo}-{hi}" for lo, hi in bands if lo <= top]
    errs = [band_err[b] for b in counted if band_err[b] is not None]
    transfer_error = None
    if run.get("T") is not None and reference.get("T") is not None:
        t, tr = np.asarray(run["T"]), np.asarray(reference["T"])
        size = min(t.size, tr.size)
        scale = float(np.sum(np.abs(tr)))
        if scale > 0 and np.all(np.isfinite(t)):
            transfer_error = float(np.sum(np.abs(t[:size] - tr[:size])) / scale)
    return {
        "spectrum_band_error": band_err,
        "spectrum_error": float(np.mean(errs)) if errs else None,
        "spectrum_bands_counted": counted,
        "vorticity_pdf_distance": hellinger(run["pdf"]["counts"], reference["pdf"]["counts"]),
        "vorticity_quantiles": {"run": [run["quantiles"][q] for q in TAIL_QUANTILES],
                                "reference": [reference["quantiles"][q]
                                              for q in TAIL_QUANTILES],
                                "levels": list(TAIL_QUANTILES)},
        "mean_energy_ratio": _ratio(run["energy"], reference["energy"]),
        "mean_enstrophy_ratio": _ratio(run["enstrophy"], reference["enstrophy"]),
        "transfer_error": transfer_error,
    }
