"""Filter-width sweep: the same discovery (data, library, fit) at several filter widths.

A closure whose D-scaling is right has scaled coefficients (c / D^p) that do not change with
the filter width D; the sweep measures that, together with the held-out scores per width. Each
width is an independent :func:`closure.pipeline.discover` run with the base spec's other
settings; the result is plain JSON.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from closure.atomic import write_text
from closure.errors import OptionError, UserError
from closure.spec import JobSpec, parse_spec

SWEEP_VERSION = 1

Progress = Callable[[str, int, int], None]


@dataclass
class SweepEntry:
    """The model fitted at one filter width.

    ``delta``: the filter width D in coordinate units (geometric mean over directions);
    ``width_cells``: D in fine-grid spacings; ``terms``: name -> coefficient, coefficient_scaled,
    std_error, std_error_scaled, selection_frequency, delta_power; ``test_scores`` /
    ``train_scores``: the model's a priori scores; ``model``: the model file's dict.
    """

    delta: float
    width_cells: float | None
    ratio: int
    filter: dict
    terms: dict[str, dict]
    test_scores: dict = field(default_factory=dict)
    train_scores: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    model: dict | None = None

    def to_dict(self) -> dict:
        return {"delta": self.delta, "width_cells": self.width_cells, "ratio": self.ratio,
                "filter": self.filter, "terms": self.terms, "test_scores": self.test_scores,
                "train_scores": self.train_scores, "warnings": self.warnings,
                "model": self.model}

    @classmethod
    def from_dict(cls, d: Mapping) -> SweepEntry:
        return cls(float(d["delta"]), d.get("width_cells"), int(d["ratio"]),
                   dict(d.get("filter") or {}), dict(d["terms"]),
                   dict(d.get("test_scores") or {}), dict(d.get("train_scores") or {}),
                   list(d.get("warnings") or []), d.get("model"))


@dataclass
class SweepResult:
    """All widths of one sweep (``entries`` in the order run) and the base spec."""

    spec: dict
    entries: list[SweepEntry]
    version: int = SWEEP_VERSION

    def to_dict(self) -> dict:
        return {"version": self.version, "kind": "sweep", "spec": self.spec,
                "entries": [e.to_dict() for e in self.entries]}

    @classmethod
    def from_dict(cls, d: Mapping) -> SweepResult:
        if d.get("kind") != "sweep" or "entries" not in d:
            raise UserError("this is not a sweep result (no kind 'sweep'): pass the JSON "
                            "written by `closure sweep`")
        return cls(dict(d.get("spec") or {}), [SweepEntry.from_dict(e) for e in d["entries"]],
                   int(d.get("version", SWEEP_VERSION)))

    def coefficients(self) -> dict[str, list[float]]:
        """Scaled coefficient per term and entry (in entry order), NaN where the term was not
        selected; only terms selected at some width."""
        return selected_coefficients([e.to_dict() for e in self.entries])[0]

    def save(self, path: str | os.PathLike) -> Path:
        """Write the result as JSON, atomically (temp file + rename)."""
        path = Path(path)
        return write_text(path, json.dumps(_jsonable(self.to_dict()), indent=1))

    @classmethod
    def load(cls, path: str | os.PathLike) -> SweepResult:
        try:
            d = json.loads(Path(path).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise UserError(f"no sweep file at {path}") from None
        except json.JSONDecodeError as exc:
            raise UserError(f"{path} is not JSON ({exc}): pass the file written by "
                            "`closure sweep`") from None
        return cls.from_dict(d)


def _num(v) -> float:
    return math.nan if v is None else float(v)


def selected_coefficients(entries: Sequence[Mapping]) -> tuple[dict[str, list[float]],
                                                              dict[str, list[float]]]:
    """``(scaled, std_error_scaled)``: per term selected at some width, one value per entry,
    NaN where the term was not selected at that width."""
    names: list[str] = []
    for e in entries:
        names += [n for n, t in e["terms"].items() if t.get("active", True) and n not in names]
    scaled, errors = {}, {}
    for n in names:
        rows = [e["terms"].get(n) or {} for e in entries]
        on = [bool(r) and r.get("active", True) for r in rows]
        scaled[n] = [_num(r.get("coefficient_scaled")) if a else math.nan
                     for r, a in zip(rows, on, strict=True)]
        errors[n] = [_num(r.get("std_error_scaled")) if a else math.nan
                     for r, a in zip(rows, on, strict=True)]
    return scaled, errors


def _jsonable(x):
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_jsonable(v) for v in x]
    if hasattr(x, "item") and callable(x.item) and not isinstance(x, str | bytes):
        with contextlib.suppress(TypeError, ValueError):
            x = x.item()
    if hasattr(x, "tolist"):
        return _jsonable(x.tolist())
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def sweep_specs(spec: JobSpec, widths: Sequence[float],
                ratios: Sequence[int] | None = None) -> list[JobSpec]:
    """One spec per filter width, otherwise equal to ``spec``.

    ``widths`` are in the base spec's ``filter.width_units`` (fine-grid spacings by default).
    ``ratios``: one value for every width, one per width, or None: then each ratio is D / 2
    in grid spacings (the usual D = 2 coarse spacings, rounded down, at least 1). With block
    averaging the widths are the ratios and ``ratios`` must be omitted.
    """
    widths = [float(w) for w in widths]
    if not widths:
        raise OptionError("give at least one filter width (--widths 4,8,16)")
    if any(not math.isfinite(w) or w <= 0 for w in widths):
        raise OptionError(f"filter widths must be positive numbers, got {widths}")
    if len(set(widths)) != len(widths):
        raise OptionError(f"filter widths repeat: {widths}")
    kind = spec.filter.kind
    if kind == "block":
        if ratios:
            raise OptionError("block averaging has width = ratio: give --widths only")
        if any(w != int(w) for w in widths):
            raise OptionError("with block averaging the widths are ratios: whole numbers")
        ratios = [int(w) for w in widths]
    elif ratios:
        ratios = [int(r) for r in ratios]
        if len(ratios) == 1:
            ratios = ratios * len(widths)
        if len(ratios) != len(widths):
            raise OptionError(f"{len(ratios)} ratios for {len(widths)} widths: give one ratio, "
                              "or one per width")
    else:
        if spec.filter.width_units != "grid":
            raise OptionError("widths in coordinate units need --ratios (the coarse grid "
                              "cannot be derived from a width in coordinate units)")
        ratios = [max(1, int(w // 2)) for w in widths]
    base = spec.model_dump(mode="json")
    out = []
    for w, r in zip(widths, ratios, strict=True):
        d = json.loads(json.dumps(base))
        d["filter"]["ratio"] = r
        d["filter"]["width"] = None if kind == "block" else w
        if kind == "block":
            d["filter"]["width_units"] = "grid"
        out.append(parse_spec(d))
    return out


def _entry(model, ratio: int) -> SweepEntry:
    md = model.to_dict()
    filt = dict(getattr(model, "filter", None) or md.get("filter") or {})
    delta = filt.get("width")
    if delta is None:
        raise ValueError("the model's filter has no width")
    terms = {}
    for t in md.get("terms") or []:
        row = {k: t.get(k) for k in ("coefficient", "coefficient_scaled", "std_error",
                                      "std_error_scaled", "selection_frequency",
                                      "delta_power", "active")}
        if row["active"] is None:
            row["active"] = bool(row["coefficient_scaled"])
        if row["std_error_scaled"] is None and row["std_error"] is not None:
            row["std_error_scaled"] = float(row["std_error"]) / float(delta) ** (
                row["delta_power"] or 0)
        terms[str(t["name"])] = row
    scores = getattr(model, "scores", None) or md.get("scores") or {}
    test = scores.get("test", {}) if isinstance(scores.get("test"), Mapping) else {}
    train = scores.get("train", {}) if isinstance(scores.get("train"), Mapping) else {}
    warnings = [str(w) for w in (getattr(model, "warnings", None) or md.get("warnings") or [])]
    return SweepEntry(float(delta), _cells(filt), ratio, filt,
                      terms, _numbers(test), _numbers(train), warnings, md)


def _cells(filt: Mapping) -> float | None:
    """D in fine spacings (geometric mean over directions), None when the filter omits it."""
    c = filt.get("width_cells")
    if c is None:
        return None
    if isinstance(c, Mapping):
        values = [float(v) for v in c.values()]
        return float(math.prod(values) ** (1 / len(values)))
    return float(c)


def _numbers(d: Mapping) -> dict:
    return {k: float(v) for k, v in d.items()
            if isinstance(v, int | float) and not isinstance(v, bool)}


def _get(obj, name):
    if isinstance(obj, Mapping):
        return obj.get(name)
    return getattr(obj, name, None)


def run_sweep(spec: JobSpec | Mapping | str, widths: Sequence[float],
              ratios: Sequence[int] | None = None, progress: Progress | None = None,
              discover: Callable | None = None) -> SweepResult:
    """Fit the closure of ``spec`` at each filter width; see :func:`sweep_specs` for
    ``widths`` and ``ratios``.

    Every width is planned first (so a width that does not fit the grid fails before any
    fitting), then fitted with :func:`closure.pipeline.discover` (or ``discover``, same
    signature). ``progress(phase, done, total)`` receives ``"sweep"`` per width finished and
    the inner phases prefixed with ``"D=<width>: "``.
    """
    from closure import pipeline

    if not isinstance(spec, JobSpec):
        spec = parse_spec(spec)
    specs = sweep_specs(spec, widths, ratios)
    for s in specs:
        try:
            pipeline.plan(s)
        except UserError as exc:
            raise type(exc)(f"filter width {s.filter.width or s.filter.ratio:g} (ratio "
                            f"{s.filter.ratio}): {exc}") from None
    run = discover or pipeline.discover
    entries = []
    total = len(specs)
    for i, s in enumerate(specs):
        label = f"D={s.filter.width if s.filter.width is not None else s.filter.ratio:g}"
        inner = None
        if progress is not None:
            def inner(phase, done, n, _label=label):
                progress(f"{_label}: {phase}", done, n)
        model = run(s, progress=inner)
        entries.append(_entry(model, s.filter.ratio))
        if progress is not None:
            progress("sweep", i + 1, total)
    return SweepResult(spec.model_dump(mode="json"), entries)
