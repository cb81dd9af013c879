"""A posteriori run data for the report, read from a coarse-solver result in one plain shape.

The report needs, per run (the model, each baseline and the filtered reference): a time axis,
kinetic energy and enstrophy series, optionally a final energy spectrum and a vorticity PDF,
and the blow-up time (None when the run stayed finite). :func:`as_runs` reads that from a
result object or its JSON dict, 2-D or 3-D alike (a 3-D run's vorticity PDF pools the three
components); a run's ``long_run`` record (``closure les --duration``) adds the
``long_run_*`` metrics.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from closure.errors import UserError


@dataclass
class RunSeries:
    """One coarse run: ``time`` (s), ``series`` name -> values on ``time``, an energy
    spectrum ``(k, E)``, a vorticity PDF ``(values, density)``, and the blow-up time."""

    time: np.ndarray
    series: dict[str, np.ndarray] = field(default_factory=dict)
    spectrum: tuple[np.ndarray, np.ndarray] | None = None
    vorticity_pdf: tuple[np.ndarray, np.ndarray] | None = None
    blowup_time: float | None = None
    status: str | None = None
    metrics: dict = field(default_factory=dict)
    #: the run's ``long_run`` record as ``closure les --json`` writes it (time-mean spectrum,
    #: vorticity PDF, transfer spectrum, energy and enstrophy series), or None
    long_run: dict | None = None

    def final(self, name: str) -> float | None:
        """Last finite value of a series (None when missing or never finite)."""
        y = self.series.get(name)
        if y is None:
            return None
        ok = np.isfinite(y)
        return float(y[ok][-1]) if ok.any() else None


@dataclass
class AposterioriRuns:
    """All runs of one a posteriori comparison, keyed by label; ``reference`` names the
    filtered fine-grid run (drawn black in the figures)."""

    runs: dict[str, RunSeries]
    reference: str | None = None
    spectrum_time: float | None = None

    def long_run_curves(self, kind: str) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Time-mean curves of the long runs (and the reference's statistics): ``kind``
        "spectrum" -> (k, E), "vorticity_pdf" -> (x, density), "transfer" -> (k, T);
        runs without a long-run record are left out."""
        keys = {"spectrum": ("k", "E"), "vorticity_pdf": ("x", "density"),
                "transfer": ("k", "T")}
        if kind not in keys:
            raise UserError(f"unknown long-run curve {kind!r}: choose from {', '.join(keys)}")
        a, b = keys[kind]
        out = {}
        for label, r in self.runs.items():
            stats = (r.long_run or {}).get("statistics") or {}
            curve = stats.get(kind)
            if isinstance(curve, Mapping) and a in curve and b in curve:
                out[label] = (_arr(curve[a]), _arr(curve[b]))
        return out

    def summary(self) -> dict:
        return {"reference": self.reference,
                "runs": {k: {"status": r.status, "blowup_time": r.blowup_time,
                             "final_energy": r.final("energy"),
                             "final_enstrophy": r.final("enstrophy"),
                             **{m: r.metrics.get(m) for m in METRICS if m in r.metrics}}
                         for k, r in self.runs.items()}}


#: Summary errors of a run against the reference, as ``closure.les`` names them; the
#: ``long_run_*`` ones come from a run's ``long_run`` record (``closure les --duration``).
METRICS = {"mean_energy_error": "energy error", "mean_enstrophy_error": "enstrophy error",
           "mean_hellinger": "vorticity PDF distance",
           "long_run_stable": "stable for the long run",
           "long_run_spectrum_error": "long-run spectrum error",
           "long_run_vorticity_pdf_distance": "long-run vorticity PDF distance",
           "long_run_mean_energy_ratio": "long-run mean energy / reference",
           "long_run_mean_enstrophy_ratio": "long-run mean enstrophy / reference"}
#: the fields of a ``long_run`` record copied into the metrics (prefixed ``long_run_``)
LONG_RUN_FIELDS = ("stable", "duration", "blowup_time", "spectrum_error",
                   "vorticity_pdf_distance", "mean_energy_ratio", "mean_enstrophy_ratio")

_SERIES_KEYS = {"energy": ("energy", "kinetic_energy"), "enstrophy": ("enstrophy",)}


def _arr(x) -> np.ndarray:
    return np.asarray([math.nan if v is None else v for v in x], dtype=float)


def _pair(d, first, second):
    if d is None:
        return None
    if isinstance(d, Mapping):
        a = next((d[k] for k in first if k in d), None)
        b = next((d[k] for k in second if k in d), None)
        if a is None or b is None:
            return None
        return _arr(a), _arr(b)
    a, b = d
    return _arr(a), _arr(b)


def _run(d: Mapping, label: str) -> RunSeries:
    if "time" not in d:
        raise UserError(f"the a posteriori run {label!r} has no 'time' series: pass the JSON "
                        "written by `closure les`")
    t = _arr(d["time"])
    series = {}
    for name, keys in _SERIES_KEYS.items():
        for k in keys:
            if k in d and d[k] is not None:
                y = _arr(d[k])
                if y.shape != t.shape:
                    raise UserError(f"run {label!r}: {k} has {y.size} values for {t.size} "
                                    "times")
                series[name] = y
                break
    spectrum = _pair(d.get("spectrum"), ("k", "wavenumber"), ("E", "energy", "spectrum"))
    pdf = _pair(d.get("vorticity_pdf"), ("x", "values", "bins", "centres", "centers"),
                ("density", "pdf", "p"))
    blowup = d.get("blowup_time", d.get("blow_up_time"))
    blowup = None if blowup is None or not math.isfinite(float(blowup)) else float(blowup)
    metrics = dict(d.get("metrics")) if isinstance(d.get("metrics"), Mapping) else {}
    long_run = d.get("long_run")
    if isinstance(long_run, Mapping) and "stable" in long_run:
        metrics.update({f"long_run_{k}": long_run.get(k) for k in LONG_RUN_FIELDS})
    status = d.get("status")
    return RunSeries(t, series, spectrum, pdf, blowup, None if status is None else str(status),
                     dict(metrics), dict(long_run) if isinstance(long_run, Mapping) else None)


def as_runs(result) -> AposterioriRuns:
    """Read an a posteriori result: an object with ``to_dict()`` or a dict shaped
    ``{"runs": {label: {"time", "energy", "enstrophy", "spectrum": {"k", "E"},
    "vorticity_pdf": {"x", "density"}, "blowup_time", "status", "metrics"}},
    "reference": label, "spectrum_time"}`` (the JSON of ``closure les --json``)."""
    if isinstance(result, AposterioriRuns):
        return result
    d = result.to_dict() if callable(getattr(result, "to_dict", None)) else result
    if not isinstance(d, Mapping) or not isinstance(d.get("runs"), Mapping) or not d["runs"]:
        raise UserError("the a posteriori result has no runs: pass the JSON written by "
                        "`closure les`")
    runs = {str(k): _run(v, str(k)) for k, v in d["runs"].items()}
    ref = d.get("reference")
    if ref is not None and ref not in runs:
        raise UserError(f"the a posteriori reference {ref!r} is not among the runs "
                        f"{sorted(runs)}")
    return AposterioriRuns(runs, ref, d.get("spectrum_time"))
