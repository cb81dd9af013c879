"""Sufficient statistics of a linear fit: additive Gram matrices per snapshot.

A closure fit ``y_c ~ X_c @ coef`` (one coefficient per library term, shared by all target
components ``c``) and most of its scores need only, per component::

    gram[c]       = w_c X_c^T P X_c      (p, p)
    xy[c]         = w_c X_c^T P y_c      (p,)
    yy[c]         = w_c y_c^T P y_c
    x_sum[c]      = w_c sum_i P_i X_c[i] (p,)     (for centred correlations and R^2)
    y_sum[c]      = w_c sum_i P_i y_c[i]
    weight_sum[c] = w_c sum_i P_i ;  count[c] = number of points with P_i > 0

where ``w_c`` is the component weight (an off-diagonal tensor component stands for two
entries and weighs 2) and ``P = diag(P_i)`` the nonnegative point weights (default 1; 0 for a
coarse point a land mask excludes, whose values are then never read). These add up exactly
across snapshots, chunks and workers, so a snapshot reduces to O(p^2) numbers and the fit
never sees a point again.

Optional ``extra`` blocks hold the same statistics for other linear rows of the same
coefficients, e.g. the energy transfer ``pi = sum_k coef_k (-T_k : Sbar)``, for fits that
also match transfers. Each block is itself a one-component :class:`SufficientStats`.
"""

from __future__ import annotations

import io as _io
import json
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from closure.atomic import write_bytes
from closure.backend import gram_statistics
from closure.errors import InputFileError, UserError

FORMAT = "closure.stats"
FORMAT_VERSION = 1
_ARRAYS = ("gram", "xy", "yy", "x_sum", "y_sum", "weight_sum", "count")


@dataclass(eq=False)
class SufficientStats:
    """Weighted Gram statistics of one or more snapshots (see the module docstring).

    Shapes: ``gram`` (C, p, p), ``xy`` (C, p), ``yy`` (C,), ``x_sum`` (C, p), ``y_sum`` (C,),
    ``weight_sum`` (C,), ``count`` (C,) int; C = ``len(components)``, p = ``len(terms)``.
    ``snapshots`` lists the snapshot indices summed in (sorted; may be empty).
    """

    terms: tuple[str, ...]
    components: tuple[str, ...]
    gram: np.ndarray
    xy: np.ndarray
    yy: np.ndarray
    x_sum: np.ndarray
    y_sum: np.ndarray
    weight_sum: np.ndarray
    count: np.ndarray
    snapshots: tuple[int, ...] = ()
    extra: dict[str, SufficientStats] = field(default_factory=dict)

    def __post_init__(self):
        self.terms = tuple(str(t) for t in self.terms)
        self.components = tuple(str(c) for c in self.components)
        self.snapshots = tuple(sorted(int(s) for s in self.snapshots))
        C, p = len(self.components), len(self.terms)
        shapes = {"gram": (C, p, p), "xy": (C, p), "yy": (C,), "x_sum": (C, p), "y_sum": (C,),
                  "weight_sum": (C,), "count": (C,)}
        for name, shape in shapes.items():
            dtype = np.int64 if name == "count" else np.float64
            a = np.asarray(getattr(self, name), dtype=dtype)
            if a.shape != shape:
                raise ValueError(f"SufficientStats.{name} has shape {a.shape}, expected {shape}")
            setattr(self, name, a)
        if len(set(self.terms)) != p:
            raise ValueError(f"duplicate term names in {self.terms}")
        for name, block in self.extra.items():
            if block.terms != self.terms:
                raise ValueError(f"extra block {name!r} has other terms than the main block")
        self.extra = dict(sorted(self.extra.items()))

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_design(cls, X: np.ndarray, y: np.ndarray, weights: Sequence[float] | None = None,
                    terms: Sequence[str] | None = None,
                    components: Sequence[str] | None = None,
                    snapshot: int | None = None,
                    extra: Mapping[str, SufficientStats] | None = None,
                    point_weights: np.ndarray | None = None,
                    backend=None) -> SufficientStats:
        """Statistics of a design ``X`` (C, n, p) and target ``y`` (C, n).

        ``weights`` (C,) are the component weights (default 1). ``point_weights`` (n,) are
        nonnegative weights of the points (default 1; booleans allowed: False drops a point);
        points of weight 0 are left out before anything is computed, so their values may be
        anything. The sums are closure.backend.gram_statistics on ``backend`` (a
        closure.backend backend; default numpy): one matrix product per statistic and
        component, in float64. Non-finite values raise a UserError naming the terms.
        """
        X = np.asarray(X)
        y = np.asarray(y)
        if X.ndim == 2:
            X = X[None]
        if y.ndim == 1:
            y = y[None]
        if X.ndim != 3 or y.shape != X.shape[:2]:
            raise ValueError(f"design (C, n, p) and target (C, n) do not match: {X.shape}, "
                             f"{y.shape}")
        C, n, p = X.shape
        terms = tuple(terms) if terms is not None else tuple(f"term{k}" for k in range(p))
        components = (tuple(components) if components is not None
                      else tuple(f"component{c}" for c in range(C)))
        if len(terms) != p or len(components) != C:
            raise ValueError(f"{len(terms)} term names and {len(components)} component names "
                             f"for a design of shape {X.shape}")
        w = np.ones(C) if weights is None else np.asarray(weights, dtype=np.float64)
        if w.shape != (C,):
            raise ValueError(f"component weights must have shape ({C},), got {w.shape}")
        pw = None
        if point_weights is not None:
            pw = np.asarray(point_weights, dtype=np.float64).reshape(-1)
            if pw.shape != (n,) or not (np.isfinite(pw).all() and (pw >= 0).all()):
                raise ValueError(f"point weights must be {n} finite nonnegative numbers")
            keep = pw > 0
            if not keep.all():
                X, y, pw = X[:, keep], y[:, keep], pw[keep]
                n = int(keep.sum())
            if (pw == 1.0).all():
                pw = None
        sums = gram_statistics(X, y, w, pw, backend)
        gram, xy, yy, x_sum, y_sum = (sums[k] for k in ("gram", "xy", "yy", "x_sum", "y_sum"))
        total = float(n) if pw is None else float(pw.sum())
        out = cls(terms, components, gram, xy, yy, x_sum, y_sum, w * total,
                  np.full(C, n, dtype=np.int64),
                  () if snapshot is None else (int(snapshot),), dict(extra or {}))
        out.check_finite()
        return out

    @classmethod
    def zeros(cls, terms: Sequence[str], components: Sequence[str]) -> SufficientStats:
        """Statistics of no points (the identity of ``+``)."""
        C, p = len(components), len(terms)
        return cls(tuple(terms), tuple(components), np.zeros((C, p, p)), np.zeros((C, p)),
                   np.zeros(C), np.zeros((C, p)), np.zeros(C), np.zeros(C),
                   np.zeros(C, dtype=np.int64))

    def check_finite(self) -> None:
        """Raise a UserError naming the terms (or the target) with non-finite values."""
        diag = np.diagonal(self.gram, axis1=1, axis2=2)  # (C, p): only term k's own values
        ok = np.isfinite(diag).all(axis=0) & np.isfinite(self.x_sum).all(axis=0)
        bad = [t for t, good in zip(self.terms, ok, strict=True) if not good]
        if bad or not np.isfinite(self.gram).all():
            bad = bad or list(self.terms)
            raise UserError(f"library terms {', '.join(bad)} give non-finite values on this "
                            "data (division by zero or overflow): remove them from the library")
        if not (np.isfinite(self.yy).all() and np.isfinite(self.xy).all()):
            raise UserError("the target has non-finite values on this data: check the input "
                            "fields for NaN or infinite values")
        for block in self.extra.values():
            block.check_finite()

    # ------------------------------------------------------------------ algebra
    @property
    def n_terms(self) -> int:
        return len(self.terms)

    @property
    def n_components(self) -> int:
        return len(self.components)

    def __add__(self, other: SufficientStats) -> SufficientStats:
        if isinstance(other, int) and other == 0:
            return self
        if not isinstance(other, SufficientStats):
            return NotImplemented
        if other.terms != self.terms or other.components != self.components:
            raise ValueError("cannot add statistics of different terms or components: "
                             f"{self.terms}/{self.components} vs {other.terms}/{other.components}")
        if set(self.extra) != set(other.extra):
            raise ValueError(f"cannot add statistics with different extra blocks: "
                             f"{sorted(self.extra)} vs {sorted(other.extra)}")
        overlap = set(self.snapshots) & set(other.snapshots)
        if overlap:
            raise ValueError(f"snapshots {sorted(overlap)} would be counted twice")
        arrays = {name: getattr(self, name) + getattr(other, name) for name in _ARRAYS}
        extra = {name: self.extra[name] + other.extra[name] for name in self.extra}
        return SufficientStats(self.terms, self.components, snapshots=self.snapshots +
                               other.snapshots, extra=extra, **arrays)

    def __radd__(self, other):
        if isinstance(other, int) and other == 0:  # sum() starts from 0
            return self
        return NotImplemented

    @staticmethod
    def merge(parts: Mapping[int, SufficientStats] | Iterable[SufficientStats]
              ) -> SufficientStats:
        """Sum statistics in a fixed order (sorted by snapshot index), so the same parts give
        bit-identical sums however they were produced."""
        items = list(parts.values() if isinstance(parts, Mapping) else parts)
        if not items:
            raise ValueError("no statistics to merge")
        items.sort(key=lambda s: (s.snapshots or (np.iinfo(np.int64).max,)))
        total = items[0]
        for s in items[1:]:
            total = total + s
        return total

    def combined(self, name: str = "all") -> SufficientStats:
        """One-component statistics summed over the components (the shared-coefficient fit)."""
        arrays = {a: getattr(self, a).sum(axis=0, keepdims=True) for a in _ARRAYS}
        return SufficientStats(self.terms, (name,), snapshots=self.snapshots,
                               extra={k: b for k, b in self.extra.items()}, **arrays)

    def component(self, name: str) -> SufficientStats:
        """The statistics of one component (extra blocks dropped)."""
        c = self.components.index(name)
        arrays = {a: getattr(self, a)[c:c + 1] for a in _ARRAYS}
        return SufficientStats(self.terms, (name,), snapshots=self.snapshots, **arrays)

    def select(self, terms: Sequence[str]) -> SufficientStats:
        """The statistics of a subset of the terms, in the order given."""
        missing = [t for t in terms if t not in self.terms]
        if missing:
            raise UserError(f"terms {missing} are not in these statistics; have {self.terms}")
        idx = np.array([self.terms.index(t) for t in terms], dtype=int)
        return SufficientStats(
            tuple(terms), self.components, self.gram[:, idx][:, :, idx], self.xy[:, idx],
            self.yy, self.x_sum[:, idx], self.y_sum, self.weight_sum, self.count,
            self.snapshots, {k: b.select(terms) for k, b in self.extra.items()})

    def equals(self, other: SufficientStats, rtol: float = 0.0, atol: float = 0.0) -> bool:
        """Same names, snapshots and arrays (to the given tolerances; exact by default)."""
        if (self.terms, self.components, self.snapshots) != \
                (other.terms, other.components, other.snapshots):
            return False
        if set(self.extra) != set(other.extra):
            return False
        for name in _ARRAYS:
            if not np.allclose(getattr(self, name), getattr(other, name), rtol=rtol, atol=atol):
                return False
        return all(self.extra[k].equals(other.extra[k], rtol, atol) for k in self.extra)

    # ------------------------------------------------------------------ plain types / files
    def to_dict(self) -> dict:
        """Plain JSON-able types; floats survive a JSON round trip exactly."""
        out = {"format": FORMAT, "version": FORMAT_VERSION, "terms": list(self.terms),
               "components": list(self.components), "snapshots": list(self.snapshots)}
        for name in _ARRAYS:
            out[name] = getattr(self, name).tolist()
        out["extra"] = {k: b.to_dict() for k, b in self.extra.items()}
        return out

    @classmethod
    def from_dict(cls, d: Mapping) -> SufficientStats:
        if d.get("format") != FORMAT:
            raise InputFileError(f"not a {FORMAT} document (format={d.get('format')!r})")
        if d.get("version") != FORMAT_VERSION:
            raise InputFileError(f"{FORMAT} version {d.get('version')!r} is not supported; "
                                 f"this program reads version {FORMAT_VERSION}")
        C, p = len(d["components"]), len(d["terms"])
        arrays = {}
        for name in _ARRAYS:
            a = np.array(d[name], dtype=np.int64 if name == "count" else np.float64)
            shape = {"gram": (C, p, p), "xy": (C, p), "x_sum": (C, p)}.get(name, (C,))
            arrays[name] = a.reshape(shape)
        return cls(tuple(d["terms"]), tuple(d["components"]), snapshots=tuple(d["snapshots"]),
                   extra={k: cls.from_dict(b) for k, b in d.get("extra", {}).items()}, **arrays)

    def save(self, path: str | os.PathLike) -> Path:
        """Write a ``.npz`` file atomically: arrays as float64/int64, names in JSON metadata."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        arrays, meta = {}, {"format": FORMAT, "version": FORMAT_VERSION, "blocks": {}}
        for key, block in [("", self)] + [(f"extra/{k}", b) for k, b in self.extra.items()]:
            meta["blocks"][key] = {"terms": list(block.terms),
                                   "components": list(block.components),
                                   "snapshots": list(block.snapshots)}
            for name in _ARRAYS:
                arrays[f"{key}:{name}"] = getattr(block, name)
        arrays["meta"] = np.array(json.dumps(meta))
        buf = _io.BytesIO()
        np.savez(buf, **arrays)
        return write_bytes(path, buf.getvalue())

    @classmethod
    def load(cls, path: str | os.PathLike) -> SufficientStats:
        """Read a file written by :meth:`save` (no pickles)."""
        try:
            with np.load(path, allow_pickle=False) as z:
                meta = json.loads(str(z["meta"][()]))
                data = {k: z[k] for k in z.files if k != "meta"}
        except (OSError, ValueError, KeyError) as exc:
            raise InputFileError(f"cannot read statistics file {path}: {exc}") from None
        if meta.get("format") != FORMAT or meta.get("version") != FORMAT_VERSION:
            raise InputFileError(f"{path} is not a {FORMAT} version {FORMAT_VERSION} file")

        def block(key):
            m = meta["blocks"][key]
            return m, {name: data[f"{key}:{name}"] for name in _ARRAYS}

        extra = {}
        for key in meta["blocks"]:
            if key.startswith("extra/"):
                m, arrays = block(key)
                extra[key[len("extra/"):]] = cls(tuple(m["terms"]), tuple(m["components"]),
                                                 snapshots=tuple(m["snapshots"]), **arrays)
        m, arrays = block("")
        return cls(tuple(m["terms"]), tuple(m["components"]), snapshots=tuple(m["snapshots"]),
                   extra=extra, **arrays)
