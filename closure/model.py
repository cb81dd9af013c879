"""ClosureModel: a fitted closure and its versioned model file.

Model file, schema version 2 (JSON, UTF-8; :data:`MODEL_SCHEMA` is its JSON Schema)
----------------------------------------------------------------------------------

``format``            ``"closure-model"``
``schema_version``    2 (bumped when a field changes meaning; older readers refuse newer files,
                      this reader converts version 1 files on load: their term ``expression``
                      and ``latex`` were keyed by library key, ``xx``, ``x``, ``""``)
``target``            ``stress``, ``force``, ``vorticity``, ``flux:NAME``, ``heat_flux`` or
                      ``pressure_dilatation`` (compressible)
``components``        the target variables modelled, e.g. ``["tau_xx", "tau_xy", "tau_yy"]``
``dims``              grid directions in array order, e.g. ``["y", "x"]``
``scalars``           scalar fields the terms may use
``filter``            ``{kind, width, ratio, second_moment, ...}`` of the training coarse-graining
                      (width in coordinate units; second_moment per direction, or null for the
                      sharp spectral filter)
``grid``              the coarse training grid (``Grid.to_dict()``: dims, shape, spacing, origin,
                      periodic, units)
``scheme``            derivative scheme of the terms: ``spectral``, ``fd2`` or ``fd4``
``delta``             the filter width Delta used in the terms (coordinate units)
``provenance``        ``{input, variables, snapshots: {train, test}, sha256, created,
                      closure_version, ...}``
``library``           ``{name, terms, dropped}``: the library (preset or terms file), its term
                      names, and the preset terms left out as exact combinations of them
``method``            the regression method; ``settings`` its and the selection's settings
``terms``             one record per library term: ``name, description, rank, delta_power,
                      dimensionless, scaled_units, expression`` (sympy string per target component,
                      keyed like ``components`` and the exports: ``tau_xx``, ``force_x``),
                      ``latex`` (per component, the same keys), ``coefficient`` (dimensional:
                      multiplies the expression with Delta = 1), ``coefficient_scaled``
                      (multiplies the expression as written, with Delta; dimensionless where
                      ``dimensionless``),
                      ``std_error``, ``std_error_scaled``, ``selection_frequency`` (fraction of
                      resamples that selected the term, or null), ``active`` (non-zero
                      coefficient; only active terms are evaluated)
``scores``            ``{train: {...}, test: {r2, corr, ...}}`` a priori scores
``warnings``          list of text
``caution``           a priori skill does not guarantee a stable or accurate coarse simulation
``reference_net``     optional: the neural reference closure trained and scored beside the
                      model (``closure.neural.ReferenceNet.to_dict``: architecture, inputs,
                      normalization, training settings and record, state dict as base64
                      float32); its held-out scores are ``scores.reference_net_test``

``coefficient = coefficient_scaled * delta ** delta_power``. The model evaluates
``sum_k coefficient_scaled_k * term_k`` with the model's own scheme and Delta on whatever grid it
is given: Delta is *not* rescaled to a new grid's spacing (a model trained at one filter width is
a model at that width; refit, or rebuild it with :meth:`ClosureModel.with_delta`, to change it).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from closure.atomic import write_text
from closure.derivatives import SCHEMES
from closure.errors import UserError
from closure.filters import FILTER_KINDS, CoarseGraining
from closure.grid import Grid
from closure.library import Library, Term, predict, target_components, terms_from_dicts

MODEL_FORMAT = "closure-model"
MODEL_SCHEMA_VERSION = 2
#: versions this reader loads (older ones are converted on load)
READABLE_SCHEMA_VERSIONS = (1, 2)

CAUTION = ("A priori skill (how well the model reproduces the exact subgrid terms of filtered "
           "data) does not guarantee a stable or accurate coarse simulation: validate the model "
           "a posteriori in the coarse solver, with the same derivative scheme and filter width, "
           "before relying on it.")

_NUMBER_OR_NULL = {"type": ["number", "null"]}
_STRINGS = {"type": "array", "items": {"type": "string"}}
_INDICES = {"type": "array", "items": {"type": "integer", "minimum": 0}}

TERM_SCHEMA = {
    "type": "object",
    "required": ["name", "delta_power", "expression", "latex", "coefficient",
                 "coefficient_scaled", "std_error", "std_error_scaled", "selection_frequency",
                 "active"],
    "additionalProperties": False,
    "properties": {
        "name": {"type": "string", "pattern": r"^[A-Za-z][A-Za-z0-9_]{0,39}$"},
        "description": {"type": "string"},
        "source": {"type": "string"},
        "rank": {"enum": [0, 1, 2]},
        "delta_power": {"type": "number"},
        "dimensionless": {"type": "boolean"},
        "scaled_units": {"type": ["object", "null"], "additionalProperties": {"type": "number"}},
        "expression": {"type": "object", "additionalProperties": {"type": "string"}},
        "latex": {"type": "object", "additionalProperties": {"type": "string"}},
        "coefficient": {"type": "number"},
        "coefficient_scaled": {"type": "number"},
        "std_error": _NUMBER_OR_NULL,
        "std_error_scaled": _NUMBER_OR_NULL,
        "selection_frequency": {"type": ["number", "null"], "minimum": 0, "maximum": 1},
        "active": {"type": "boolean"},
    },
}

#: JSON Schema (2020-12 vocabulary, the subset :func:`validate_schema` checks) of a model file.
MODEL_SCHEMA = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "title": f"closure model file, schema version {MODEL_SCHEMA_VERSION}",
    "type": "object",
    "required": ["format", "schema_version", "target", "components", "dims", "scalars",
                 "filter", "grid", "scheme", "delta", "provenance", "library", "method",
                 "settings", "terms", "scores", "warnings", "caution"],
    "additionalProperties": False,
    "properties": {
        "format": {"const": MODEL_FORMAT},
        "schema_version": {"const": MODEL_SCHEMA_VERSION},
        "target": {"type": "string",
                   "pattern": r"^(stress|force|vorticity|heat_flux|pressure_dilatation|"
                              r"flux:[A-Za-z][A-Za-z0-9_]*)$"},
        "components": {**_STRINGS, "minItems": 1},
        "dims": {"type": "array", "items": {"enum": ["z", "y", "x"]}, "minItems": 1},
        "scalars": _STRINGS,
        "filter": {
            "type": "object",
            "required": ["kind", "width", "ratio", "second_moment"],
            "properties": {
                "kind": {"enum": list(FILTER_KINDS)},
                "width": {"type": "number", "exclusiveMinimum": 0},
                "ratio": {"type": "integer", "minimum": 1},
                "second_moment": {"type": ["object", "number", "null"]},
            },
        },
        "grid": {
            "type": "object",
            "required": ["dims", "shape", "spacing", "periodic"],
            "properties": {
                "dims": {"type": "array", "items": {"enum": ["z", "y", "x"]}, "minItems": 1},
                "shape": {"type": "array", "items": {"type": "integer", "minimum": 1}},
                "spacing": {"type": "array", "items": {"type": "number",
                                                       "exclusiveMinimum": 0}},
                "origin": {"type": "array", "items": {"type": "number"}},
                "periodic": {"type": "boolean"},
                "units": {"type": ["string", "null"]},
            },
        },
        "scheme": {"enum": list(SCHEMES)},
        "delta": {"type": "number", "exclusiveMinimum": 0},
        "provenance": {
            "type": "object",
            "required": ["created", "closure_version"],
            "properties": {
                "input": {"type": ["string", "null"]},
                "variables": {"type": ["object", "null"]},
                "snapshots": {"type": "object",
                              "properties": {"train": _INDICES, "test": _INDICES}},
                "sha256": {"type": ["string", "null"]},
                "created": {"type": "string", "minLength": 1},
                "closure_version": {"type": "string", "minLength": 1},
            },
        },
        "library": {"type": "object", "required": ["name", "terms"],
                    "properties": {"name": {"type": "string"}, "terms": _STRINGS}},
        "method": {"type": ["string", "null"]},
        "settings": {"type": "object"},
        "terms": {"type": "array", "items": TERM_SCHEMA},
        "scores": {"type": "object", "additionalProperties": {"type": "object"}},
        "warnings": _STRINGS,
        "caution": {"type": "string", "minLength": 1},
        "reference_net": {
            "type": "object",
            "required": ["architecture", "target", "components", "dims", "scheme", "inputs",
                         "normalization", "training", "state"],
            "properties": {
                "architecture": {"type": "object", "required": ["kind", "ndim"]},
                "components": {**_STRINGS, "minItems": 1},
                "inputs": _STRINGS,
                "normalization": {"type": "object",
                                  "required": ["input_scale", "output_mean", "output_scale"]},
                "training": {"type": "object"},
                "state": {"type": "object", "required": ["dtype", "tensors", "sha256"]},
            },
        },
    },
}

_TYPES = {
    "object": lambda v: isinstance(v, dict),
    "array": lambda v: isinstance(v, list),
    "string": lambda v: isinstance(v, str),
    "boolean": lambda v: isinstance(v, bool),
    "null": lambda v: v is None,
    "integer": lambda v: (isinstance(v, int) and not isinstance(v, bool))
    or (isinstance(v, float) and v.is_integer()),
    "number": lambda v: isinstance(v, int | float) and not isinstance(v, bool)
    and math.isfinite(v),
}


def validate_schema(instance, schema: Mapping, path: str = "$") -> list[str]:
    """Errors of ``instance`` against a JSON Schema using the keywords type, enum, const,
    properties, required, additionalProperties, items, minItems, minimum, maximum,
    exclusiveMinimum, minLength and pattern (JSON Schema 2020-12 Validation, sections 6.1-6.5
    and Core 10.3). Returns ``["$.terms[0].name: ...", ...]``; empty when valid."""
    errors: list[str] = []
    if "type" in schema:
        types = schema["type"] if isinstance(schema["type"], list) else [schema["type"]]
        if not any(_TYPES[t](instance) for t in types):
            return [f"{path}: expected {' or '.join(types)}, got {_describe(instance)}"]
    if "const" in schema and not _same(instance, schema["const"]):
        errors.append(f"{path}: must be {schema['const']!r}, got {_describe(instance)}")
    if "enum" in schema and not any(_same(instance, e) for e in schema["enum"]):
        errors.append(f"{path}: must be one of {schema['enum']}, got {_describe(instance)}")
    if _TYPES["number"](instance):
        if "minimum" in schema and instance < schema["minimum"]:
            errors.append(f"{path}: must be >= {schema['minimum']}, got {instance}")
        if "maximum" in schema and instance > schema["maximum"]:
            errors.append(f"{path}: must be <= {schema['maximum']}, got {instance}")
        if "exclusiveMinimum" in schema and instance <= schema["exclusiveMinimum"]:
            errors.append(f"{path}: must be > {schema['exclusiveMinimum']}, got {instance}")
    if isinstance(instance, str):
        if "minLength" in schema and len(instance) < schema["minLength"]:
            errors.append(f"{path}: must have at least {schema['minLength']} character(s)")
        if "pattern" in schema and not re.search(schema["pattern"], instance):
            errors.append(f"{path}: {instance!r} does not match {schema['pattern']}")
    if isinstance(instance, list):
        if "minItems" in schema and len(instance) < schema["minItems"]:
            errors.append(f"{path}: must have at least {schema['minItems']} item(s)")
        if "items" in schema:
            for i, item in enumerate(instance):
                errors += validate_schema(item, schema["items"], f"{path}[{i}]")
    if isinstance(instance, dict):
        props = schema.get("properties", {})
        for key in schema.get("required", []):
            if key not in instance:
                errors.append(f"{path}: missing required field {key!r}")
        extra = schema.get("additionalProperties", True)
        for key, value in instance.items():
            sub = f"{path}.{key}"
            if key in props:
                errors += validate_schema(value, props[key], sub)
            elif extra is False:
                errors.append(f"{sub}: unknown field (allowed: {', '.join(props)})")
            elif isinstance(extra, dict):
                errors += validate_schema(value, extra, sub)
    return errors


def _same(a, b) -> bool:
    return type(a) is type(b) and a == b or (
        _TYPES["number"](a) and _TYPES["number"](b) and a == b)


def _describe(v) -> str:
    text = repr(v)
    return text if len(text) < 60 else text[:57] + "..."


def _plain(obj):
    """JSON-ready copy: numpy scalars/arrays to Python, NaN/Inf to None, tuples to lists."""
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple | np.ndarray):
        return [_plain(v) for v in (obj.tolist() if isinstance(obj, np.ndarray) else obj)]
    if isinstance(obj, np.bool_ | bool):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, float | np.floating):
        x = float(obj)
        return x if math.isfinite(x) else None
    return obj


def _closure_version() -> str:
    from closure import __version__

    return __version__


def _optional_array(values, n: int, name: str) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    a = np.array([np.nan if v is None else v for v in np.asarray(values, dtype=object).ravel()],
                 dtype=float)
    if a.size != n:
        raise ValueError(f"{name} has {a.size} values for {n} terms")
    return a


def _upgrade_v1(d: Mapping) -> dict:
    """A version 1 model dict as version 2: term expressions and LaTeX keyed by target
    component (``tau_xx``) instead of library key (``xx``). Keys that do not fit are left for
    the checks that follow to name."""
    from closure.library import component_keys

    d = dict(d)
    try:
        rename = dict(zip(component_keys(d["target"], d["dims"]),
                          target_components(d["target"], d["dims"]), strict=True))
    except (KeyError, TypeError, ValueError, UserError):
        rename = {}
    terms = []
    for t in d.get("terms") or []:
        if isinstance(t, Mapping):
            t = dict(t)
            for field_ in ("expression", "latex"):
                if isinstance(t.get(field_), Mapping):
                    t[field_] = {rename.get(k, k): v for k, v in t[field_].items()}
        terms.append(t)
    d["terms"] = terms
    d["schema_version"] = MODEL_SCHEMA_VERSION
    return d


def _terms_by_library_key(terms: Sequence[Mapping], target: str, dims, source: str
                          ) -> list[dict]:
    """Term records with ``expression`` keyed by library key, as the term parser reads them;
    UserError when a term's keys are not the model's components."""
    from closure.library import component_keys

    keys, comps = component_keys(target, dims), target_components(target, dims)
    out = []
    for n, t in enumerate(terms):
        exprs = t["expression"]
        if sorted(exprs) != sorted(comps):
            raise UserError(f"{source}: terms[{n}] ({t.get('name')!r}): expression must have "
                            f"the components {', '.join(comps)} (it has "
                            f"{', '.join(exprs) or 'none'})")
        out.append({**t, "expression": {k: exprs[c] for k, c in zip(keys, comps, strict=True)}})
    return out


@dataclass(frozen=True)
class ModelTerm:
    """One term of a model with its fitted numbers (std errors and frequency NaN if unknown).

    ``term`` is the library Term (sympy components); ``coefficient`` multiplies the term with
    Delta = 1, ``coefficient_scaled`` the term as written.
    """

    term: Term
    coefficient: float
    coefficient_scaled: float
    std_error: float
    std_error_scaled: float
    selection_frequency: float

    @property
    def name(self) -> str:
        return self.term.name

    @property
    def delta_power(self) -> float:
        return self.term.delta_power

    @property
    def active(self) -> bool:
        return self.coefficient_scaled != 0

    @property
    def components(self):
        return self.term.components

    @property
    def expression(self) -> dict[str, str]:
        return self.term.expressions()

    @property
    def latex(self) -> dict[str, str]:
        return self.term.latex

    @property
    def description(self) -> str:
        return self.term.description


class ClosureModel:
    """A fitted closure: library terms, coefficients, and where they came from.

    ``coefficients_scaled[k]`` multiplies term k as written (with Delta); the dimensional
    ``coefficients[k] = coefficients_scaled[k] * delta ** delta_power_k``. Terms with a zero
    coefficient are kept but inactive. See the module docstring for the file format.
    """

    def __init__(self, library: Library, coefficients_scaled: Sequence[float],
                 std_errors_scaled: Sequence[float | None] | None = None,
                 selection_frequency: Sequence[float | None] | None = None, *,
                 filter: Mapping | CoarseGraining, grid: Grid | Mapping, scheme: str,
                 delta: float, provenance: Mapping | None = None, method: str | None = None,
                 settings: Mapping | None = None, scores: Mapping | None = None,
                 warnings: Sequence[str] = (), caution: str = CAUTION,
                 reference_net: Mapping | None = None):
        n = len(library.terms)
        cs = np.asarray(coefficients_scaled, dtype=float).reshape(-1)
        if cs.size != n:
            raise ValueError(f"{cs.size} coefficients for {n} library terms")
        if not np.all(np.isfinite(cs)):
            raise UserError("the fit produced NaN or infinite coefficients: check the data and "
                            "the library (collinear terms?)")
        if scheme not in SCHEMES:
            raise UserError(f"unknown derivative scheme {scheme!r}: choose one of "
                            f"{', '.join(SCHEMES)}")
        if not (isinstance(delta, int | float | np.floating) and math.isfinite(delta)
                and delta > 0):
            raise UserError(f"the filter width delta must be a positive number, got {delta!r}")
        self.library = library
        self.grid = grid if isinstance(grid, Grid) else Grid.from_dict(dict(grid))
        if tuple(self.grid.dims) != tuple(library.dims):
            raise UserError(f"the grid's dims {self.grid.dims} differ from the library's "
                            f"{library.dims}")
        self.scheme = scheme
        self.delta = float(delta)
        self.coefficients_scaled = cs
        self.std_errors_scaled = _optional_array(std_errors_scaled, n, "std_errors")
        self.selection_frequency = _optional_array(selection_frequency, n, "selection_frequency")
        self.filter = _filter_dict(filter, self.delta)
        prov = dict(provenance or {})
        prov.setdefault("created", _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"))
        prov.setdefault("closure_version", _closure_version())
        self.provenance = _plain(prov)
        self.method = method
        self.settings = _plain(dict(settings or {}))
        self.scores = _plain(dict(scores or {}))
        given = [str(w) for w in warnings]
        # what the library says about its terms (a user term repeating others) comes first
        self.warnings = [w for w in library.warnings if w not in given] + given
        self.caution = caution or CAUTION
        #: the neural reference closure's stored form (closure.neural), or None
        self.reference_net = None if reference_net is None else _plain(dict(reference_net))

    # -- construction ------------------------------------------------------------------------

    @classmethod
    def from_fit(cls, library: Library, coefficients: Sequence[float],
                 std_errors: Sequence[float | None] | None = None,
                 selection_frequency: Sequence[float | None] | None = None, *,
                 target: str | None = None, filter: Mapping | CoarseGraining,
                 grid: Grid | Mapping, scheme: str, delta: float,
                 provenance: Mapping | None = None, method: str | None = None,
                 settings: Mapping | None = None, scores: Mapping | None = None,
                 warnings: Sequence[str] = (),
                 reference_net: Mapping | None = None) -> ClosureModel:
        """A model from a fit of ``design(library, ..., scheme, delta)`` columns.

        ``coefficients`` and ``std_errors`` are those of the design columns, one per library
        term (i.e. the Delta-scaled coefficients; zero for unselected terms); the dimensional
        ones are derived. ``selection_frequency`` in [0, 1] per term, or None.
        """
        if target is not None and target != library.target:
            raise ValueError(f"target {target!r} differs from the library's {library.target!r}")
        return cls(library, coefficients, std_errors, selection_frequency, filter=filter,
                   grid=grid, scheme=scheme, delta=delta, provenance=provenance, method=method,
                   settings=settings, scores=scores, warnings=warnings,
                   reference_net=reference_net)

    # -- properties --------------------------------------------------------------------------

    @property
    def target(self) -> str:
        return self.library.target

    @property
    def dims(self) -> tuple[str, ...]:
        return tuple(self.library.dims)

    @property
    def scalars(self) -> tuple[str, ...]:
        return tuple(self.library.scalars)

    @property
    def terms(self) -> tuple[ModelTerm, ...]:
        """Every library term (active and inactive) with its fitted numbers."""
        c, se = self.coefficients, self.std_errors
        return tuple(ModelTerm(t, float(c[k]), float(self.coefficients_scaled[k]), float(se[k]),
                               float(self.std_errors_scaled[k]),
                               float(self.selection_frequency[k]))
                     for k, t in enumerate(self.library.terms))

    @property
    def names(self) -> list[str]:
        return self.library.names

    @property
    def components(self) -> list[str]:
        """Target variable names the model predicts."""
        return self.library.components

    @property
    def delta_powers(self) -> np.ndarray:
        return np.array([float(t.delta_power) for t in self.library.terms])

    @property
    def coefficients(self) -> np.ndarray:
        """Dimensional coefficients (multiply the terms with Delta = 1)."""
        return self.coefficients_scaled * self.delta ** self.delta_powers

    @property
    def std_errors(self) -> np.ndarray:
        return self.std_errors_scaled * self.delta ** self.delta_powers

    @property
    def active(self) -> np.ndarray:
        return self.coefficients_scaled != 0

    @property
    def active_terms(self) -> list[ModelTerm]:
        return [t for t in self.terms if t.active]

    def with_delta(self, delta: float) -> ClosureModel:
        """The same dimensionless coefficients at another filter width (a new model)."""
        d = self.to_dict()
        d["delta"] = float(delta)
        for t in d["terms"]:
            t["coefficient"] = t["coefficient_scaled"] * float(delta) ** t["delta_power"]
            if t["std_error_scaled"] is not None:
                t["std_error"] = t["std_error_scaled"] * float(delta) ** t["delta_power"]
        d["warnings"] = [*d["warnings"], f"filter width changed from {self.delta:g} to "
                         f"{float(delta):g} after fitting"]
        return ClosureModel.from_dict(d)

    # -- evaluation --------------------------------------------------------------------------

    def evaluate(self, fields: Mapping[str, np.ndarray], grid: Grid) -> dict[str, np.ndarray]:
        """The modelled target variables on ``grid``: ``{"tau_xx": array of grid.shape, ...}``.

        ``fields`` maps ``u, v[, w]`` and scalars (filtered, on ``grid``) to arrays. Uses the
        model's derivative scheme and its Delta (not rescaled when ``grid`` differs from the
        training grid; see :meth:`grid_warnings`).
        """
        if tuple(grid.dims) != self.dims:
            raise UserError(f"the model is for a grid with dims {self.dims}; these fields have "
                            f"{tuple(grid.dims)}")
        return predict(self.library, self.coefficients_scaled, fields, grid, self.scheme,
                       self.delta)

    def reference_network(self):
        """The stored neural reference closure as a :class:`closure.neural.ReferenceNet`
        (needs torch; UserError when the model has none or torch is missing)."""
        if self.reference_net is None:
            raise UserError("this model has no reference network: rediscover it with "
                            "--reference-net")
        from closure.neural import ReferenceNet

        return ReferenceNet.from_dict(self.reference_net)

    def grid_warnings(self, grid: Grid) -> list[str]:
        """Differences between ``grid`` and the training grid worth telling the user."""
        out = []
        if tuple(grid.dims) != self.dims:
            return [f"grid dims {grid.dims} differ from the model's {self.dims}"]
        if not np.allclose(grid.spacing, self.grid.spacing, rtol=1e-6):
            out.append(f"grid spacing {tuple(grid.spacing)} differs from the training grid's "
                       f"{tuple(self.grid.spacing)}; the model keeps its filter width "
                       f"Delta = {self.delta:g}")
        if grid.periodic != self.grid.periodic:
            out.append("the grid's periodicity differs from the training grid's")
        return out

    # -- files -------------------------------------------------------------------------------

    def to_dict(self) -> dict:
        terms = []
        coef, se = self.coefficients, self.std_errors
        for k, t in enumerate(self.library.terms):
            rec = t.to_dict()
            # keyed by target component, as in ``components`` and the exports
            for field_ in ("expression", "latex"):
                rec[field_] = {c: rec[field_][key] for key, c in
                               zip(self.library.keys, self.components, strict=True)}
            rec.update({
                "coefficient": float(coef[k]),
                "coefficient_scaled": float(self.coefficients_scaled[k]),
                "std_error": _plain(float(se[k])),
                "std_error_scaled": _plain(float(self.std_errors_scaled[k])),
                "selection_frequency": _plain(float(self.selection_frequency[k])),
                "active": bool(self.active[k]),
            })
            terms.append(rec)
        out = _plain({
            "format": MODEL_FORMAT,
            "schema_version": MODEL_SCHEMA_VERSION,
            "target": self.target,
            "components": self.components,
            "dims": list(self.dims),
            "scalars": list(self.scalars),
            "filter": self.filter,
            "grid": self.grid.to_dict(),
            "scheme": self.scheme,
            "delta": self.delta,
            "provenance": self.provenance,
            "library": {"name": self.library.name, "terms": self.names,
                        "dropped": list(self.library.dropped)},
            "method": self.method,
            "settings": self.settings,
            "terms": terms,
            "scores": self.scores,
            "warnings": self.warnings,
            "caution": self.caution,
        })
        if self.reference_net is not None:
            out["reference_net"] = self.reference_net
        return out

    @classmethod
    def from_dict(cls, d: Mapping, source: str = "model") -> ClosureModel:
        """Rebuild a model from :meth:`to_dict` output; UserError naming what is wrong."""
        if not isinstance(d, Mapping):
            raise UserError(f"{source} is not a closure model (expected a JSON object)")
        if d.get("format") != MODEL_FORMAT:
            raise UserError(f"{source} is not a closure model file (format is "
                            f"{d.get('format')!r}, expected {MODEL_FORMAT!r})")
        version = d.get("schema_version")
        if version not in READABLE_SCHEMA_VERSIONS:
            raise UserError(f"{source} has model schema version {version!r}; this closure "
                            f"{_closure_version()} reads versions "
                            f"{', '.join(map(str, READABLE_SCHEMA_VERSIONS))}: "
                            "use the closure version that wrote it, or refit")
        if version == 1:
            d = _upgrade_v1(d)
        errors = validate_schema(d, MODEL_SCHEMA)
        if errors:
            more = f" (and {len(errors) - 5} more)" if len(errors) > 5 else ""
            raise UserError(f"{source} is not a valid model file: {'; '.join(errors[:5])}{more}")
        target, dims = d["target"], tuple(d["dims"])
        expected = target_components(target, dims)
        if list(d["components"]) != expected:
            raise UserError(f"{source}: components {d['components']} do not match target "
                            f"{target} on dims {dims} ({expected})")
        if tuple(d["grid"]["dims"]) != dims:
            raise UserError(f"{source}: grid.dims {d['grid']['dims']} differ from dims {dims}")
        lib = terms_from_dicts(_terms_by_library_key(d["terms"], target, dims, source),
                               target, dims, d["scalars"], name=source)
        lib = Library(d["library"]["name"], target, dims, lib.scalars, lib.terms,
                      tuple(d["library"].get("dropped", ())))
        delta = float(d["delta"])
        for n, t in enumerate(d["terms"]):
            want = t["coefficient_scaled"] * delta ** t["delta_power"]
            if not math.isclose(t["coefficient"], want, rel_tol=1e-9, abs_tol=1e-300):
                raise UserError(f"{source}: terms[{n}] ({t['name']}) has coefficient "
                                f"{t['coefficient']!r} but coefficient_scaled * delta ** "
                                f"delta_power = {want!r}: edit both (the scaled one is used)")
        return cls(lib, [t["coefficient_scaled"] for t in d["terms"]],
                   [t["std_error_scaled"] for t in d["terms"]],
                   [t["selection_frequency"] for t in d["terms"]],
                   filter=d["filter"], grid=d["grid"], scheme=d["scheme"], delta=delta,
                   provenance=d["provenance"], method=d["method"], settings=d["settings"],
                   scores=d["scores"], warnings=d["warnings"], caution=d["caution"],
                   reference_net=d.get("reference_net"))

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"

    def save(self, path: str | os.PathLike) -> Path:
        """Write the model file atomically (temporary file in the same folder, then rename)."""
        path = Path(path)
        text = self.to_json()
        errors = validate_schema(json.loads(text), MODEL_SCHEMA)
        if errors:  # a bug, not a user error: the writer must produce valid files
            raise RuntimeError(f"model does not match its schema: {errors[:3]}")
        return write_text(path, text)

    @classmethod
    def load(cls, path: str | os.PathLike) -> ClosureModel:
        """Read a model file; UserError for a missing, unreadable, invalid or newer file."""
        path = Path(path)
        if not path.is_file():
            raise UserError(f"no model file {path}: give the path of a model .json file")
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except UnicodeDecodeError:
            raise UserError(f"{path} is not a closure model file (not UTF-8 text)") from None
        except json.JSONDecodeError as exc:
            raise UserError(f"{path} is not a closure model file: invalid JSON at line "
                            f"{exc.lineno} column {exc.colno} ({exc.msg})") from None
        return cls.from_dict(data, source=str(path))

    # -- text --------------------------------------------------------------------------------

    def summary(self) -> str:
        """Readable text: target, filter, terms with coefficient +/- std error, scores,
        warnings and the a posteriori caution."""
        g = self.grid
        lines = [f"Closure model for {self.target} ({', '.join(self.components)})",
                 f"  grid      {' x '.join(map(str, g.shape))} ({', '.join(g.dims)}), spacing "
                 f"{', '.join(f'{h:g}' for h in g.spacing)}"
                 f"{' ' + g.units if g.units else ''}, "
                 f"{'periodic' if g.periodic else 'non-periodic'}",
                 f"  filter    {self.filter.get('kind')}, width Delta = {self.delta:g}, ratio "
                 f"{self.filter.get('ratio')}",
                 f"  scheme    {self.scheme} derivatives (use the same in the coarse solver)",
                 f"  library   {self.library.name} ({len(self.terms)} terms), method "
                 f"{self.method or 'not recorded'}"]
        prov = self.provenance
        if prov.get("input") or prov.get("sha256"):
            sha = prov.get("sha256") or ""
            lines.append(f"  input     {prov.get('input') or '?'}"
                         f"{' (sha256 ' + sha[:12] + '...)' if sha else ''}")
        snaps = prov.get("snapshots") or {}
        if snaps:
            lines.append("  snapshots " + ", ".join(f"{k} {_short_list(v)}"
                                                    for k, v in snaps.items()))
        lines.append(f"  created   {prov.get('created')} by closure {prov.get('closure_version')}")
        lines.append("")
        active = [k for k in range(len(self.terms)) if self.active[k]]
        lines.append(f"Active terms ({len(active)} of {len(self.terms)}): "
                     "coefficient +/- std error; Delta-scaled coefficient [its units]")
        width = max([len(t.name) for t in self.library.terms] + [4])
        for k in active:
            t = self.library.terms[k]
            se, ses = self.std_errors[k], self.std_errors_scaled[k]
            pm = f" +/- {se:.3g}" if math.isfinite(se) else ""
            pms = f" +/- {ses:.3g}" if math.isfinite(ses) else ""
            freq = self.selection_frequency[k]
            fr = f", selected {freq:.0%}" if math.isfinite(freq) else ""
            lines.append(f"  {t.name:<{width}}  {self.coefficients[k]: .6g}{pm};  "
                         f"{self.coefficients_scaled[k]: .6g}{pms} x Delta^"
                         f"{_fmt_power(t.delta_power)} [{t.units_text()}]{fr}")
        if not active:
            lines.append("  (none: the model predicts zero)")
        inactive = [t.name for t in self.terms if not t.active]
        if inactive:
            lines.append(f"Inactive terms: {', '.join(inactive)}")
        if self.library.dropped:
            lines.append("Left out of the library (exact linear combinations of its terms):")
            lines += [f"  {_dropped_note(d)}" for d in self.library.dropped]
        scores = _scores_lines(self.scores, self.components)
        if scores:
            lines += ["", *scores]
        if self.reference_net is not None:
            lines += ["", *_reference_net_lines(self.reference_net)]
        lines.append("")
        if self.warnings:
            lines.append("Warnings:")
            lines += [f"  - {w}" for w in self.warnings]
        lines.append("Caution: " + self.caution)
        return "\n".join(lines)


def _fmt(v) -> str:
    """A score as text: 4 significant digits, integers (point counts) in full, n/a for None."""
    if v is None:
        return "n/a"
    if isinstance(v, bool) or not isinstance(v, int | float):
        return str(v)
    if isinstance(v, int) or (float(v).is_integer() and abs(v) >= 1000):
        return str(int(v))
    text = f"{v:#.4g}"
    return text[:-1] if text.endswith(".") else text


_SPLIT_LEGEND = {"test": "held-out snapshots", "train": "fitted snapshots"}
_ONLY = re.compile(r"^(?P<term>[A-Za-z][A-Za-z0-9_]*)_only_(?P<split>test|train)$")
_DROPPED = re.compile(r"^(?P<term>\w+): (?P<kind>.*?) (?P<where>on [^(]*?)(?: \((?P<eq>.*)\))?$")


def _dropped_note(text: str) -> str:
    """``"rotation_squared = ... (on any field)"`` from a ``Library.dropped`` entry."""
    m = _DROPPED.match(text)
    if not m:
        return text
    if m["eq"]:
        return f"{m['eq']}  ({m['where']})"
    if m["kind"] == "vanishes identically":
        return f"{m['term']} = 0  ({m['where']})"
    return text


def _scores_lines(scores: Mapping, components: Sequence[str]) -> list[str]:
    """Scores as a table: rows are metrics, columns the splits (test, train, reference fits);
    per-component metrics of the test split in a second table."""
    splits = [s for s in ("test", "train") if isinstance(scores.get(s), Mapping) and scores[s]]
    splits += [s for s, v in scores.items()
               if s not in splits and isinstance(v, Mapping) and v]
    if not splits:
        return []
    suffixes = [f"_{c}" for c in components] if len(components) > 1 else []

    def split_metrics(sc):
        pooled, per = {}, {}
        for k, v in sc.items():
            if isinstance(v, Mapping | list):
                continue
            comp = next((c for c in suffixes if k.endswith(c) and len(k) > len(c)), None)
            if comp is None:
                pooled[k] = v
            else:
                per.setdefault(k[:-len(comp)], {})[comp[1:]] = v
        return pooled, per

    parsed = {s: split_metrics(scores[s]) for s in splits}
    if len(splits) == 1 and len(parsed[splits[0]][0]) <= 3 and not parsed[splits[0]][1]:
        s = splits[0]  # a line is easier to read than a one-column table of a few numbers
        return [f"Scores ({s}): " + ", ".join(f"{k} {_fmt(v)}" for k, v in scores[s].items()
                                             if not isinstance(v, Mapping | list))]
    rows = list(dict.fromkeys(k for s in splits for k in parsed[s][0]))
    table = [["A priori scores", *splits]]
    table += [[m, *(_fmt(parsed[s][0][m]) if m in parsed[s][0] else "-" for s in splits)]
              for m in rows]
    out = _aligned(table)
    plain = [f"{s} = {_SPLIT_LEGEND[s]}" for s in splits if s in _SPLIT_LEGEND]
    if plain:
        out.append("  " + ", ".join(plain))
    for s in splits:
        m = _ONLY.match(s)
        if m:
            out.append(f"  {s} = the {m['term']} term alone, least squares on train, scored "
                       f"on {m['split']}")
        elif s == "reference_net_test":
            out.append(f"  {s} = the neural reference network, trained on train, scored on "
                       "test")
    first = next((s for s in splits if parsed[s][1]), None)
    if first is not None:
        per = parsed[first][1]
        comps = [c for c in components if any(c in v for v in per.values())]
        table = [[f"Per component ({first})", *per]]
        table += [[c, *(_fmt(per[m][c]) if c in per[m] else "-" for m in per)] for c in comps]
        out += ["", *_aligned(table)]
    return out


def _reference_net_lines(net: Mapping) -> list[str]:
    """What the summary says of the stored reference network."""
    a, t = net.get("architecture", {}), net.get("training", {})
    lines = [f"Reference network: {a.get('depth')} convolutions of {a.get('width')} channels, "
             f"kernel {a.get('kernel')}, {a.get('padding')} padding, "
             f"{net.get('parameters', '?')} parameters; inputs {', '.join(net.get('inputs', []))}",
             f"  trained {t.get('epochs_run')} of {t.get('epochs')} epochs (stopped by "
             f"{t.get('stopped_by')}, {t.get('elapsed_seconds')} s), seed {t.get('seed')}, "
             f"final loss {_fmt(t.get('final_loss'))}",
             "  its scores (reference_net_test) show how much skill the closed form leaves on "
             "the table; a priori skill of either does not guarantee a stable coarse "
             "simulation"]
    return lines


def _aligned(table: list[list[str]]) -> list[str]:
    """Rows of text cells: the first column left-aligned (indented under its header), the
    others right-aligned."""
    widths = [max(len(r[i]) + (2 if i == 0 and n else 0) for n, r in enumerate(table))
              for i in range(len(table[0]))]
    out = []
    for n, row in enumerate(table):
        first = row[0] if n == 0 else "  " + row[0]
        cells = [first.ljust(widths[0])] + [c.rjust(w) for c, w in zip(row[1:], widths[1:],
                                                                     strict=True)]
        out.append("  ".join(cells).rstrip())
    return out


def _fmt_power(p) -> str:
    return str(int(p)) if float(p).is_integer() else f"{p:g}"


def _short_list(v) -> str:
    if not isinstance(v, list):
        return str(v)
    if len(v) <= 8:
        return str(v)
    return f"[{', '.join(map(str, v[:3]))}, ..., {', '.join(map(str, v[-2:]))}] ({len(v)})"


def _filter_dict(f: Mapping | CoarseGraining, delta: float) -> dict:
    if isinstance(f, CoarseGraining):
        d = f.describe()
    else:
        d = dict(f or {})
    if "kind" not in d:
        raise UserError("the model's filter must name its kind (box, gaussian, spectral, block)")
    d.setdefault("width", delta)
    d.setdefault("ratio", 1)
    d.setdefault("second_moment", None)
    return _plain(d)
