"""The one job-spec schema, used by the CLI, the HTTP API, the worker and the client.

A spec is plain JSON. Validation errors name the field path and the allowed values
(see :func:`parse_spec`). Bump ``SPEC_VERSION`` when a field changes meaning.
"""

from __future__ import annotations

import re
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from closure.errors import OptionError

SPEC_VERSION = 1

FilterKind = Literal["box", "gaussian", "spectral", "block"]
Scheme = Literal["spectral", "fd2", "fd4"]
Method = Literal["threshold", "lasso", "ard"]
_TARGET = re.compile(r"^(stress|force|vorticity|flux:[A-Za-z_][A-Za-z0-9_]*)$")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class InputSpec(_Strict):
    """Where the fine-grid fields are and how to read them."""

    path: str | None = Field(None, description="netCDF file (under a data root for the service)")
    dataset_id: str | None = Field(None, description="id of an uploaded dataset (service only)")
    variables: dict[str, str] = Field(
        default_factory=dict,
        description="our name -> the file's name, e.g. {'u': 'U', 'v': 'V'}; scalars by name")
    scalars: list[str] = Field(default_factory=list, description="passive scalars to carry")
    periodic: bool = True
    snapshots: list[Annotated[int, Field(ge=0)]] | None = Field(
        None, description="time indices to use (default: all)")
    sha256: str | None = Field(None, description="filled in by the pipeline; ignored on input")

    @model_validator(mode="after")
    def _one_source(self):
        if (self.path is None) == (self.dataset_id is None):
            raise ValueError("give exactly one of input.path or input.dataset_id")
        return self


class FilterSpec(_Strict):
    """Filter kind, width and coarsening ratio."""

    kind: FilterKind = "gaussian"
    width: Annotated[float, Field(gt=0)] | None = Field(
        None, description="filter width D (default 2*ratio grid spacings; block: = ratio)")
    width_units: Literal["grid", "coordinate"] = "grid"
    ratio: Annotated[int, Field(ge=1, le=1024)] = 4


class FitSpec(_Strict):
    """Sparse regression and model selection settings."""

    method: Method = "threshold"
    test_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.25
    resamples: Annotated[int, Field(ge=0, le=1000)] = 20
    transfer_weight: Annotated[float, Field(ge=0)] = 0.0
    seed: int = 0
    folds: Annotated[int, Field(ge=2, le=50)] = Field(
        5, description="contiguous blocks of training snapshots for held-out selection")
    selection: Literal["one_se", "min"] = Field(
        "one_se", description="sparsest path point within one standard error of the best "
        "held-out error, or the best")


class JobSpec(_Strict):
    """A closure-discovery job: read, coarse-grain, fit, score, store."""

    version: Literal[1] = SPEC_VERSION
    kind: Literal["discover"] = "discover"
    input: InputSpec
    filter: FilterSpec = FilterSpec()
    target: str = "stress"
    library: str = Field("default", description="a preset name or a path to a terms file")
    scheme: Scheme = "spectral"
    fit: FitSpec = FitSpec()
    memory_limit: Annotated[int, Field(gt=0)] | None = Field(
        None, description="bytes one snapshot's pass may use; a snapshot that needs more is "
        "processed by slabs with intermediates in files (default: half the machine's memory)")
    fine_float32: bool = Field(
        False, description="run the fine-grid pass in float32 by slabs (half the memory; "
        "relative error about 1e-6 against float64)")

    @field_validator("target")
    @classmethod
    def _target(cls, v: str) -> str:
        if not _TARGET.match(v):
            raise ValueError("target must be stress, force, vorticity or flux:NAME")
        return v

    def fingerprint(self) -> dict:
        """The fields that determine the result (for identical-resubmission detection)."""
        d = self.model_dump(mode="json")
        d["input"] = {k: v for k, v in d["input"].items() if k not in ("path", "dataset_id")}
        return d



# --------------------------------------------------------------------------- a posteriori runs

#: the baselines the coarse solver knows (closure.les.BASELINES; listed here so the schema
#: needs no numerics)
Baseline = Literal["none", "smagorinsky", "dynamic", "gradient", "gradient-clipped"]
_NUMBER = r"[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?"
_FORCING = re.compile(rf"^(file|none|shell:{_NUMBER}:{_NUMBER}(:\d+)?"
                      rf"|kolmogorov:{_NUMBER}:{_NUMBER})$")


class FileSpec(_Strict):
    """A fine-grid file for an a posteriori run: a path (under a data root for the service)
    or an uploaded dataset id."""

    path: str | None = None
    dataset_id: str | None = None

    @model_validator(mode="after")
    def _one_source(self):
        if (self.path is None) == (self.dataset_id is None):
            raise ValueError("give exactly one of path or dataset_id")
        return self


class AposterioriSpec(_Strict):
    """An a posteriori run of a stored model in the 2-D coarse solver (closure.les.simulate),
    against the baselines, from filtered-DNS initial fields. Every field has a default: an
    empty spec runs the model from the first snapshot of its own input file."""

    version: Literal[1] = SPEC_VERSION
    kind: Literal["aposteriori"] = "aposteriori"
    model_id: str | None = Field(None, description="the stored model (the URL's; service)")
    input: FileSpec | None = Field(None, description="initial (and reference) fields; "
                                   "default: the model's own input file")
    reference: FileSpec | None = Field(
        None, description="filtered DNS to compare with (default: the input, when it has "
        "snapshots after the initial one)")
    initial_index: Annotated[int, Field(ge=0)] = 0
    viscosity: Annotated[float, Field(ge=0)] | None = Field(
        None, description="nu, m2 s-1 (default: the file's)")
    drag: Annotated[float, Field(ge=0)] | None = Field(
        None, description="linear drag, s-1 (default: the file's, else 0)")
    hyperviscosity_order: Annotated[int, Field(ge=1, le=8)] | None = None
    forcing: str = Field("file", description="file, none, shell:K:A[:SEED] or kolmogorov:K:A")
    time: Annotated[float, Field(gt=0)] | None = Field(
        None, description="run length, s (default: to the reference's last snapshot)")
    interval: Annotated[float, Field(gt=0)] | None = Field(
        None, description="output interval, s, without a reference")
    baselines: list[Baseline] = Field(
        default_factory=lambda: ["none", "smagorinsky", "dynamic", "gradient",
                                 "gradient-clipped"])
    smagorinsky_constant: Annotated[float, Field(ge=0)] = 0.17
    dealias: bool | None = Field(None, description="2/3-rule dealiasing (default: the file's)")
    cfl: Annotated[float, Field(gt=0, le=2)] = 0.5
    energy_bound: Annotated[float, Field(gt=1)] = Field(
        10.0, description="a run stops as blown up past this multiple of its initial energy")

    @field_validator("forcing")
    @classmethod
    def _forcing(cls, v: str) -> str:
        if not _FORCING.match(v.strip()):
            raise ValueError("forcing must be file, none, shell:K:A[:SEED] or kolmogorov:K:A")
        return v.strip()

    def fingerprint(self) -> dict:
        """The fields that determine the result, without the files' locations."""
        d = self.model_dump(mode="json")
        for key in ("input", "reference"):
            d[key] = None if d[key] is None else "file"
        return d


def parse_aposteriori_spec(data: dict | str | None) -> AposterioriSpec:
    """Validate an a posteriori spec (None: all defaults); OptionError naming each bad field."""
    try:
        if data is None:
            return AposterioriSpec()
        if isinstance(data, str):
            return AposterioriSpec.model_validate_json(data)
        return AposterioriSpec.model_validate(data)
    except ValidationError as exc:
        raise OptionError(format_validation_error(exc).replace("job spec", "a posteriori spec",
                                                               1)) from None

def parse_spec(data: dict | str) -> JobSpec:
    """Validate a spec from a dict or JSON text; raise OptionError naming each bad field."""
    try:
        if isinstance(data, str):
            return JobSpec.model_validate_json(data)
        return JobSpec.model_validate(data)
    except ValidationError as exc:
        raise OptionError(format_validation_error(exc)) from None


def format_validation_error(exc: ValidationError) -> str:
    lines = []
    for err in exc.errors():
        path = ".".join(str(p) for p in err["loc"]) or "spec"
        msg = err["msg"]
        if err["type"] == "literal_error" and "expected" in err.get("ctx", {}):
            msg = f"must be one of {err['ctx']['expected']}"
        lines.append(f"{path}: {msg} (got {err.get('input')!r})")
    return "invalid job spec: " + "; ".join(lines)
