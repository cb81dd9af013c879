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
