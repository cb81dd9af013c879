"""The one job-spec schema, used by the CLI, the HTTP API, the worker and the client.

A spec is plain JSON. Validation errors name the field path and the allowed values
(see :func:`parse_spec`). Bump ``SPEC_VERSION`` when a field changes meaning.
"""

from __future__ import annotations

import json
import re
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)

from closure.errors import OptionError

SPEC_VERSION = 1
#: longest library name or terms-file path, and largest inline library (characters of JSON)
MAX_LIBRARY_NAME = 1024
MAX_INLINE_LIBRARY = 65536
#: the most slab tasks per phase one snapshot may be split into (closure.slabtasks)
MAX_SLAB_TASKS = 4096
#: the most snapshots an in-process run maps side by side
MAX_JOBS = 256
INLINE_LIBRARY = "inline terms"

FilterKind = Literal["box", "gaussian", "spectral", "block"]
Scheme = Literal["spectral", "fd2", "fd4"]
Method = Literal["threshold", "lasso", "ard"]
_TARGET = re.compile(r"^(stress|force|vorticity|heat_flux|pressure_dilatation|"
                     r"flux:[A-Za-z_][A-Za-z0-9_]*)$")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class InputSpec(_Strict):
    """Where the fine-grid fields are and how to read them (the one set of input options of
    every command and of the service; closure.io.open_input opens it).

    ``path`` is one string (a netCDF file, a glob such as ``run/snap_*.nc``, a folder of
    netCDF files, or a Zarr store) or a list of such strings; the inputs are ordered by their
    time coordinate. A plain string keeps specs written before lists were accepted valid.
    """

    path: str | list[str] | None = Field(
        None, description="netCDF file, glob, folder or Zarr store, or a list of them "
        "(under a data root for the service)")
    dataset_id: str | list[str] | None = Field(
        None, description="id of an uploaded dataset, or a list of them read as one input in "
        "time order (service only)")
    variables: dict[str, str] = Field(
        default_factory=dict,
        description="our name -> the file's name, e.g. {'u': 'U', 'v': 'V'}; scalars by name")
    scalars: list[str] = Field(default_factory=list, description="passive scalars to carry")
    periodic: bool = True
    snapshots: list[Annotated[int, Field(ge=0)]] | None = Field(
        None, description="time indices to use (default: all)")
    group: str | None = Field(None, description="netCDF-4 (or Zarr) group path, e.g. 'ocean'")
    mask: str | None = Field(None, description="variable whose nonzero values mark fluid points "
                             "(NaN and fill values are land too)")
    levels: Literal["all"] | list[Annotated[int, Field(ge=0)]] | None = Field(
        None, description="analyse these z levels (indices, or 'all') as 2-D fields")
    per_level: bool = Field(False, description="one model per level instead of one pooled "
                            "model (needs levels)")
    spacing: list[Annotated[float, Field(gt=0)]] | None = Field(
        None, min_length=1, max_length=3,
        description="grid spacing DX[,DY[,DZ]] for inputs without coordinate variables")
    sha256: str | None = Field(None, description="filled in by the pipeline; ignored on input")

    @field_validator("path")
    @classmethod
    def _paths(cls, v):
        if isinstance(v, list):
            if not v:
                raise ValueError("input.path is an empty list: give at least one file")
            if any(not p for p in v):
                raise ValueError("input.path lists an empty string")
        elif v is not None and not v:
            raise ValueError("input.path is empty")
        return v

    @field_validator("dataset_id")
    @classmethod
    def _dataset_ids(cls, v):
        if isinstance(v, list):
            if not v:
                raise ValueError("input.dataset_id is an empty list: give at least one id")
            if len(set(v)) != len(v):
                raise ValueError("input.dataset_id lists a dataset more than once")
        return v

    @field_validator("group", "mask")
    @classmethod
    def _names(cls, v):
        if v is not None and not v.strip():
            raise ValueError("must be a non-empty name")
        return v

    @field_validator("levels")
    @classmethod
    def _levels(cls, v):
        if isinstance(v, list):
            if not v:
                raise ValueError("levels is empty: give level indices or 'all'")
            if len(set(v)) != len(v):
                raise ValueError("levels lists a level more than once")
        return v

    @model_validator(mode="after")
    def _one_source(self):
        if (self.path is None) == (self.dataset_id is None):
            raise ValueError("give exactly one of input.path or input.dataset_id")
        if self.per_level and self.levels is None:
            raise ValueError("input.per_level needs input.levels ('all' or level indices)")
        return self

    @property
    def paths(self) -> list[str]:
        """``path`` as a list (empty for a dataset id)."""
        if self.path is None:
            return []
        return [self.path] if isinstance(self.path, str) else list(self.path)


class FilterSpec(_Strict):
    """Filter kind, width and coarsening ratio."""

    kind: FilterKind = "gaussian"
    width: Annotated[float, Field(gt=0)] | None = Field(
        None, description="filter width D (default 2*ratio grid spacings; block: = ratio)")
    width_units: Literal["grid", "coordinate"] = "grid"
    ratio: Annotated[int, Field(ge=1, le=1024)] = 4
    land: Literal["zero", "fluid"] = Field(
        "zero", description="land points (a mask, NaN or fill values): 'zero' filters land as "
        "zero velocity (Aluie, Hecht & Vallis 2018), 'fluid' normalises the filter over fluid "
        "points only; coarse points whose filter footprint or derivative stencil touches land "
        "are left out of the fit and scores either way")


class FitSpec(_Strict):
    """Sparse regression and model selection settings."""

    method: Method = "threshold"
    test_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.25
    resamples: Annotated[int, Field(ge=0, le=1000)] = 20
    transfer_weight: Annotated[float, Field(ge=0)] = 0.0
    seed: Annotated[int, Field(ge=0, le=2**32 - 1)] = Field(
        0, description="random seed of the resampling (0 to 2^32-1)")
    folds: Annotated[int, Field(ge=2, le=50)] = Field(
        5, description="contiguous blocks of training snapshots for held-out selection")
    selection: Literal["one_se", "min"] = Field(
        "one_se", description="sparsest path point within one standard error of the best "
        "held-out error, or the best")
    select: Literal["apriori", "aposteriori"] = Field(
        "apriori", description="apriori: the path point chosen by held-out error (above); "
        "aposteriori: candidates along the sparse paths at transfer_weights each run long in "
        "the coarse solver, the sparsest stable one within tolerance of the best long-run "
        "statistics is stored (closure.selection)")
    duration: Annotated[float, Field(gt=0)] | None = Field(
        None, description="length of each candidate's coarse run, s (select aposteriori)")
    spinup: Annotated[float, Field(ge=0)] = Field(
        0.0, description="time left out before the long-run statistics, s")
    tolerance: Annotated[float, Field(ge=0)] = Field(
        0.1, description="relative tolerance on the best stable long-run score")
    transfer_weights: list[Annotated[float, Field(ge=0)]] = Field(
        default_factory=lambda: [0.0, 1.0], min_length=1, max_length=8,
        description="transfer weights whose sparse paths give the candidates")
    max_candidates: Annotated[int, Field(ge=1, le=32)] = Field(
        4, description="sparsest candidates taken from each path")

    @model_validator(mode="after")
    def _aposteriori(self):
        if self.select == "aposteriori":
            if self.duration is None:
                raise ValueError("fit.select aposteriori needs fit.duration (the length of "
                                 "each candidate's coarse run, s)")
            if self.spinup >= self.duration:
                raise ValueError(f"fit.spinup ({self.spinup:g}) must be shorter than "
                                 f"fit.duration ({self.duration:g})")
        return self

    @property
    def selection_fields(self) -> tuple[str, ...]:
        """The fields that only matter when select is aposteriori."""
        return ("select", "duration", "spinup", "tolerance", "transfer_weights",
                "max_candidates")


class ReferenceNetSpec(_Strict):
    """The optional neural reference closure (closure.neural): a small convolutional network
    trained on the same coarse training snapshots and scored on the same held-out ones.

    Training stops at ``epochs`` or after ``seconds``, whichever comes first; only a run
    stopped by ``epochs`` is reproducible (same seed and threads, same weights on CPU)."""

    enabled: bool = False
    epochs: Annotated[int, Field(ge=1, le=100_000)] = 300
    seconds: Annotated[float, Field(gt=0)] = 120.0
    width: Annotated[int, Field(ge=1, le=512)] = Field(32, description="channels per layer")
    depth: Annotated[int, Field(ge=2, le=16)] = Field(4, description="convolution layers")
    kernel: Annotated[int, Field(ge=1, le=9)] = Field(3, description="odd kernel size")
    learning_rate: Annotated[float, Field(gt=0, le=1)] = 2e-3
    batch: Annotated[int, Field(ge=1, le=4096)] = Field(4, description="snapshots per step")
    seed: int = 0
    threads: Annotated[int, Field(ge=1, le=256)] = Field(
        1, description="torch CPU threads (fixed, so the weights do not depend on the machine)")

    @field_validator("kernel")
    @classmethod
    def _odd(cls, v: int) -> int:
        if v % 2 == 0:
            raise ValueError("kernel must be odd (3, 5, ...) so the output keeps the grid")
        return v


class GasSpec(_Strict):
    """Gas constants of compressible data (a compressible library): each one given here
    overrides the input file's global attribute of the same name; all are recorded in the
    model. With ``gas_constant`` known, the input needs only one of pressure and temperature
    (the other from p = rho R T)."""

    gamma: Annotated[float, Field(gt=1, le=10)] | None = Field(
        None, description="ratio of specific heats c_p / c_v")
    gas_constant: Annotated[float, Field(gt=0, allow_inf_nan=False)] | None = Field(
        None, description="specific gas constant R in p = rho R T, in the input's units "
        "(J kg-1 K-1 for SI data)")
    prandtl: Annotated[float, Field(gt=0, allow_inf_nan=False)] | None = Field(
        None, description="Prandtl number")

    def given(self) -> dict[str, float]:
        """The constants set here (name -> value)."""
        return {k: float(v) for k, v in self.model_dump().items() if v is not None}


class JobSpec(_Strict):
    """A closure-discovery job: read, coarse-grain, fit, score, store."""

    version: Literal[1] = SPEC_VERSION
    kind: Literal["discover"] = "discover"
    input: InputSpec
    filter: FilterSpec = FilterSpec()
    target: str = "stress"
    library: str | list[dict[str, Any]] | dict[str, Any] = Field(
        "default", description="a preset name (default, classic, minimal), a terms file (for "
        "the service: a path under its data roots), or term definitions inline: the terms "
        "file's content as JSON (its mapping, or just its list of terms)")
    scheme: Scheme = "spectral"
    fit: FitSpec = FitSpec()
    reference_net: ReferenceNetSpec = ReferenceNetSpec()
    memory_limit: Annotated[int, Field(gt=0)] | None = Field(
        None, description="bytes one snapshot's pass may use; a snapshot that needs more is "
        "processed by slabs with intermediates in files (default: half the machine's memory)")
    fine_float32: bool = Field(
        False, description="run the fine-grid pass in float32 by slabs (half the memory; "
        "relative error about 1e-6 against float64)")
    device: Literal["numpy", "cpu", "cuda", "auto"] = Field(
        "numpy", description="array backend of the fine-grid pass of periodic data without "
        "land and of the Gram statistics: numpy, or torch on cpu, cuda, or auto (cuda when "
        "available); results agree to 1e-10")
    slab_tasks: Annotated[int, Field(ge=1, le=MAX_SLAB_TASKS)] | None = Field(
        None, description="on the queue, split each snapshot's fine-grid pass into this many "
        "tasks per phase, each over a range of slabs (periodic box, gaussian or spectral "
        "filters; 1: one task per snapshot). Default: snapshots past memory_limit are split "
        "into about two tasks per live worker in all; in process it has no effect")
    jobs: Annotated[int, Field(ge=1, le=MAX_JOBS)] | None = Field(
        None, description="in-process runs: snapshots mapped side by side, each on one core "
        "(default: as many as there are cores and snapshots, within half the machine's "
        "memory; 1 for snapshots processed by slabs or on torch). The queue spreads "
        "snapshots over its workers instead; results do not depend on it")
    gas: GasSpec | None = Field(
        None, description="gas constants of compressible data, overriding the input file's "
        "attributes (compressible libraries only)")

    @field_validator("target")
    @classmethod
    def _target(cls, v: str) -> str:
        if not _TARGET.match(v):
            raise ValueError("target must be stress, force, vorticity, flux:NAME, or with a "
                             "compressible library heat_flux or pressure_dilatation")
        return v

    @field_validator("library")
    @classmethod
    def _library(cls, v):
        if isinstance(v, str):
            if not v or "\x00" in v or len(v) > MAX_LIBRARY_NAME:
                raise ValueError(f"library must be a preset name or a file path of 1 to "
                                 f"{MAX_LIBRARY_NAME} characters without NUL bytes")
            return v
        if isinstance(v, list) and not v:
            raise ValueError("inline library: give at least one term definition")
        if len(json.dumps(v)) > MAX_INLINE_LIBRARY:
            raise ValueError(f"inline library: the definitions take more than "
                             f"{MAX_INLINE_LIBRARY} characters as JSON; use fewer terms")
        return v

    @model_validator(mode="after")
    def _selection_needs_one_model(self):
        if self.fit.select == "aposteriori" and self.input.per_level:
            raise ValueError("fit.select aposteriori runs one coarse simulation per candidate: "
                             "it does not combine with input.per_level; select one level")
        return self

    @property
    def library_label(self) -> str:
        """The library's name for messages and provenance ("inline terms" when inline)."""
        return self.library if isinstance(self.library, str) else INLINE_LIBRARY

    def fingerprint(self) -> dict:
        """The fields that determine the result (for identical-resubmission detection)."""
        d = self.model_dump(mode="json")
        d["input"] = {k: v for k, v in d["input"].items() if k not in ("path", "dataset_id")}
        if not d["reference_net"]["enabled"]:
            del d["reference_net"]  # jobs without a network keep their earlier fingerprint
        # where and within what memory the pass runs changes results at round-off only
        for key in ("memory_limit", "device", "slab_tasks", "jobs"):
            d.pop(key, None)
        if not d.get("fine_float32"):
            d.pop("fine_float32", None)
        if d.get("gas") is None or not any(v is not None for v in d["gas"].values()):
            d.pop("gas", None)  # nor do jobs without gas constants
        if self.fit.select == "apriori":  # jobs without coarse runs keep theirs too
            for key in self.fit.selection_fields:
                del d["fit"][key]
        return d



# --------------------------------------------------------------------------- a posteriori runs

#: the baselines the coarse solver knows (closure.les.BASELINES; listed here so the schema
#: needs no numerics)
Baseline = Literal["none", "smagorinsky", "dynamic", "gradient", "gradient-clipped"]
_NUMBER = r"[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?"
_FORCING = re.compile(rf"^(file|none|shell:{_NUMBER}:{_NUMBER}(:\d+)?"
                      rf"|kolmogorov:{_NUMBER}:{_NUMBER}"
                      rf"|steady:{_NUMBER}:{_NUMBER}(:\d+)?|power:{_NUMBER}:{_NUMBER}"
                      r"|modes:[^\x00]{1,4096})$")
FORCING_HELP = ("file, none, modes:PATH (a table of Fourier modes; for the service a path "
                "under its data roots); 2-D: shell:K:A[:SEED] or kolmogorov:K:A; 3-D: "
                "steady:K:A[:SEED] or power:K:P")


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
    """An a posteriori run of a stored model in the 2-D or 3-D coarse solver
    (closure.les.simulate), against the baselines, from filtered-DNS initial fields; with
    ``long_duration`` every run also continues that long and its time-averaged statistics
    after ``spinup`` are compared with those of every reference snapshot. Every field has a
    default: an empty spec runs the model from the first snapshot of its own input file."""

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
    hypoviscosity: Annotated[float, Field(ge=0)] | None = Field(
        None, description="large-scale damping nu_h |k|^(-2q) (default: the file's, else 0)")
    hypoviscosity_order: Annotated[int, Field(ge=1, le=8)] | None = Field(
        None, description="q of the hypoviscosity (default: the file's, else 1)")
    forcing: str = Field("file", description=FORCING_HELP)
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
    long_duration: Annotated[float, Field(gt=0)] | None = Field(
        None, description="long run: run this long (s) and compare time-averaged statistics "
        "with every reference snapshot")
    spinup: Annotated[float, Field(ge=0)] | None = Field(
        None, description="long run: statistics start after this time (s; default 0)")
    sample_interval: Annotated[float, Field(gt=0)] | None = Field(
        None, description="long run: sampling interval of the statistics (s; default: 200 "
        "samples)")

    @field_validator("forcing")
    @classmethod
    def _forcing(cls, v: str) -> str:
        if not _FORCING.match(v.strip()):
            raise ValueError(f"forcing must be {FORCING_HELP}")
        return v.strip()

    @model_validator(mode="after")
    def _long_run(self):
        if self.long_duration is None and (self.spinup is not None
                                           or self.sample_interval is not None):
            raise ValueError("spinup and sample_interval belong to a long run: give "
                             "long_duration too")
        if self.long_duration is not None and self.spinup is not None \
                and self.spinup >= self.long_duration:
            raise ValueError(f"spinup ({self.spinup:g}) must be shorter than long_duration "
                             f"({self.long_duration:g})")
        return self

    @property
    def modes_path(self) -> str | None:
        """The forcing's table of Fourier modes (``modes:PATH``), else None."""
        return self.forcing[len("modes:"):] if self.forcing.startswith("modes:") else None

    def fingerprint(self) -> dict:
        """The fields that determine the result, without the files' locations (a modes
        table by its content: the caller adds its SHA-256). Options left unset are left out,
        so runs stored before they existed keep their fingerprints."""
        d = self.model_dump(mode="json")
        for key in ("input", "reference"):
            d[key] = None if d[key] is None else "file"
        if self.modes_path is not None:
            d["forcing"] = "modes:file"
        for key in ("hypoviscosity", "hypoviscosity_order", "long_duration", "spinup",
                    "sample_interval"):
            if d[key] is None:
                del d[key]
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


def _choices(values) -> str:
    if isinstance(values, str):  # pydantic's ctx text: "'a', 'b' or 'c'"
        return values
    return ", ".join(repr(v) for v in values)


#: pydantic error types in our own words; ``{name}`` fields come from the error's ctx
_MESSAGES = {
    "missing": "is required",
    "extra_forbidden": "is not a field of this spec: remove it (or check its spelling)",
    "int_type": "must be a whole number",
    "int_parsing": "must be a whole number",
    "int_from_float": "must be a whole number",
    "float_type": "must be a number",
    "float_parsing": "must be a number",
    "finite_number": "must be a finite number",
    "bool_type": "must be true or false",
    "bool_parsing": "must be true or false",
    "string_type": "must be text",
    "list_type": "must be a list",
    "tuple_type": "must be a list",
    "set_type": "must be a list",
    "dict_type": "must be an object (a JSON mapping of names to values)",
    "model_type": "must be an object (a JSON mapping of names to values)",
    "model_attributes_type": "must be an object (a JSON mapping of names to values)",
    "none_required": "must be null",
    "greater_than": "must be greater than {gt}",
    "greater_than_equal": "must be at least {ge}",
    "less_than": "must be less than {lt}",
    "less_than_equal": "must be at most {le}",
    "multiple_of": "must be a multiple of {multiple_of}",
    "too_short": "must have at least {min_length} item(s)",
    "too_long": "must have at most {max_length} item(s)",
    "string_too_short": "must have at least {min_length} character(s)",
    "string_too_long": "must have at most {max_length} character(s)",
    "string_pattern_mismatch": "must match the pattern {pattern}",
    "union_tag_not_found": "needs the field {discriminator}",
    "frozen_instance": "cannot be changed",
    "url_parsing": "must be a URL",
    "json_invalid": "is not valid JSON",
    "json_type": "must be JSON text",
}
#: the validation library's own openings, reworded when an unknown type keeps its text
_PREFIXES = (("Value error, ", ""), ("Assertion failed, ", ""), ("Input should be ", "must be "),
             ("Field required", "is required"))


def validation_message(err: dict) -> str:
    """One pydantic error (an entry of ``ValidationError.errors()``) in closure's words: what
    the value must be, with the allowed values of a choice; the field path is the caller's."""
    kind = err.get("type", "")
    ctx = err.get("ctx") or {}
    if kind in ("value_error", "assertion_error") and ctx.get("error") is not None:
        return str(ctx["error"])  # our validators' own text
    if kind in ("literal_error", "enum") and "expected" in ctx:
        choices = _choices(ctx["expected"])
        single = isinstance(ctx["expected"], str) and " or " not in choices
        return f"must be {choices}" if single else f"must be one of {choices}"
    if kind == "union_tag_invalid":
        return (f"{ctx.get('discriminator', 'kind')} must be one of "
                f"{_choices(ctx.get('expected_tags', ''))} (got {ctx.get('tag')!r})")
    template = _MESSAGES.get(kind)
    if template is not None:
        try:
            return template.format(**ctx)
        except (KeyError, IndexError):
            pass
    message = str(err.get("msg", "invalid"))
    for prefix, ours in _PREFIXES:
        if message.startswith(prefix):
            message = ours + message[len(prefix):]
    return message or "invalid"


_TYPE_SEGMENT = re.compile(r"^(str|int|float|bool|bytes|list|dict|set|tuple|none|"
                           r"[a-z][a-z0-9_-]*\[.*\])$")


def merged_errors(errors: list[dict]) -> list[dict]:
    """pydantic's errors with our messages (``msg``) and without the names of union members
    in the path (``input.path.str``, ``input.path.list[str]``): the errors of one field's
    alternatives become one, "must be text or a list"."""
    out: list[dict] = []
    for err in errors:
        loc = tuple(p for p in err.get("loc", ()) if not (isinstance(p, str) and
                                                           _TYPE_SEGMENT.match(p)))
        message = validation_message(err)
        prev = out[-1] if out else None
        if prev is not None and prev["loc"] == loc and prev.get("input") == err.get("input") \
                and len(loc) < len(err.get("loc", ())):
            alt = message[len("must be "):] if message.startswith("must be ") else message
            prev["msg"] = f"{prev['msg']} or {alt}"
            continue
        out.append({**err, "loc": loc, "msg": message, "type": err.get("type")})
    return out


def format_validation_error(exc: ValidationError) -> str:
    """A pydantic ValidationError as one line: ``field.path: message (got value)`` per error."""
    lines = []
    for err in merged_errors(exc.errors()):
        path = ".".join(str(p) for p in err["loc"]) or "spec"
        got = "" if err.get("type") == "missing" else f" (got {err.get('input')!r})"
        lines.append(f"{path}: {err['msg']}{got}")
    return "invalid job spec: " + "; ".join(lines)


# --------------------------------------------------------------------------- coarse-graining jobs

_TRANSFERS = ("pi", "enstrophy_transfer")


class CoarseGrainSpec(_Strict):
    """A coarse-graining job: filtered fields and exact subgrid terms of every selected
    snapshot, for one or several filter settings, stored as a downloadable *product*.

    Each entry of ``filters`` is one setting (kind, width, ratio); the product holds one data
    set per setting (see :mod:`closure.products` for the layout). ``targets`` and
    ``transfers`` None (the default) keep every target and transfer, as
    ``closure coarse-grain`` does.
    """

    version: Literal[1] = SPEC_VERSION
    kind: Literal["coarse-grain"] = "coarse-grain"
    input: InputSpec
    filters: list[FilterSpec] = Field(
        default_factory=lambda: [FilterSpec()], min_length=1, max_length=32,
        description="one entry per filter setting (kind, width, ratio)")
    targets: list[str] | None = Field(
        None, description="subgrid terms to compute: stress, force, vorticity (2-D), "
        "flux:NAME (a scalar of input.scalars); default: every one")
    transfers: list[Literal["pi", "enstrophy_transfer"]] | None = Field(
        None, description="transfer maps: pi (energy), enstrophy_transfer (2-D); "
        "default: every one")
    dtype: Literal["float64", "float32"] = Field(
        "float64", description="type of the stored fields and terms (coordinates stay float64)")
    format: Literal["netcdf", "zarr"] = Field(
        "netcdf", description="product file format: netcdf (one CF netCDF-4 file), or zarr "
        "for big products (one zip of a Zarr v3 store, one group per setting, the same "
        "variables, attributes and values; open it with "
        "xarray.open_zarr(zarr.storage.ZipStore(path, mode='r'), group=...))")

    @field_validator("targets")
    @classmethod
    def _targets(cls, v: list[str] | None) -> list[str] | None:
        if v is None:
            return v
        for t in v:
            if not _TARGET.match(t):
                raise ValueError(f"each target must be stress, force, vorticity or flux:NAME, "
                                 f"got {t!r}")
        return list(dict.fromkeys(v))

    @field_validator("transfers")
    @classmethod
    def _transfers(cls, v):
        return None if v is None else list(dict.fromkeys(v))

    @field_validator("filters")
    @classmethod
    def _distinct(cls, v: list[FilterSpec]) -> list[FilterSpec]:
        seen = set()
        for k, f in enumerate(v):
            key = f.model_dump_json()
            if key in seen:
                raise ValueError(f"filter setting {k} repeats an earlier one; give each once")
            seen.add(key)
        return v

    def fingerprint(self) -> dict:
        """The fields that determine the product (for identical-resubmission detection)."""
        d = self.model_dump(mode="json")
        d["input"] = {k: v for k, v in d["input"].items() if k not in ("path", "dataset_id")}
        return d


def parse_coarse_grain_spec(data: dict | str) -> CoarseGrainSpec:
    """Validate a coarse-graining spec; OptionError naming each bad field."""
    try:
        if isinstance(data, str):
            return CoarseGrainSpec.model_validate_json(data)
        return CoarseGrainSpec.model_validate(data)
    except ValidationError as exc:
        raise OptionError(format_validation_error(exc).replace(
            "job spec", "coarse-graining spec", 1)) from None


class SweepSpec(_Strict):
    """A filter-width sweep on the queue: the discovery job ``discovery`` at each of
    ``widths`` (closure.sweep.sweep_specs: widths in its filter.width_units, ratios one for
    all, one per width, or derived as D / 2), one task per width, and the sweep result
    stored (closure.sweep.SweepResult) with each width's model."""

    version: Literal[1] = SPEC_VERSION
    kind: Literal["sweep"] = "sweep"
    discovery: JobSpec
    widths: list[Annotated[float, Field(gt=0)]] = Field(..., min_length=1, max_length=32)
    ratios: list[Annotated[int, Field(ge=1, le=1024)]] | None = None
    filters: list[FilterKind] | None = Field(
        None, min_length=1, max_length=4,
        description="filter kinds to sweep, each at every width (one task per kind and "
        "width); default: the discovery's filter.kind alone")

    @field_validator("filters")
    @classmethod
    def _kinds(cls, v: list[str] | None) -> list[str] | None:
        if v is not None and len(set(v)) != len(v):
            raise ValueError(f"filter kinds repeat: {v}; give each once")
        return v

    @property
    def input(self) -> InputSpec:
        return self.discovery.input

    @property
    def kinds(self) -> list[str]:
        """The filter kinds swept, in order (``filters``, or the discovery's kind)."""
        return list(self.filters) if self.filters else [self.discovery.filter.kind]

    def fingerprint(self) -> dict:
        """The fields that determine the result, without the file's location (``filters``
        only when given, so a one-kind sweep keeps the fingerprint it had before)."""
        d = self.model_dump(mode="json")
        if d.get("filters") is None:
            d.pop("filters", None)
        d["input"] = self.discovery.fingerprint()["input"]
        d["discovery"] = {k: v for k, v in d["discovery"].items() if k != "input"}
        for key in self.discovery.fit.selection_fields:  # sweeps select a priori
            del d["discovery"]["fit"][key]
        return d

    @model_validator(mode="after")
    def _apriori_only(self):
        if self.discovery.fit.select != "apriori":
            raise ValueError("a sweep selects each width's model a priori: leave "
                             "discovery.fit.select at 'apriori'")
        return self


def parse_sweep_spec(data: dict | str) -> SweepSpec:
    """Validate a sweep spec; OptionError naming each bad field."""
    try:
        if isinstance(data, str):
            return SweepSpec.model_validate_json(data)
        return SweepSpec.model_validate(data)
    except ValidationError as exc:
        raise OptionError(format_validation_error(exc).replace("job spec", "sweep spec",
                                                               1)) from None


def _spec_kind(value) -> str:
    """The ``kind`` of a spec (dict or model); a missing kind is a discovery job."""
    if isinstance(value, dict):
        return value.get("kind", "discover")
    return getattr(value, "kind", "discover")


#: the body of POST /jobs: a discovery job (``kind`` "discover", the default), a
#: coarse-graining job (``kind`` "coarse-grain") or a filter-width sweep (``kind`` "sweep")
AnyJobSpec = Annotated[
    Annotated[JobSpec, Tag("discover")] | Annotated[CoarseGrainSpec, Tag("coarse-grain")]
    | Annotated[SweepSpec, Tag("sweep")],
    Discriminator(_spec_kind, custom_error_type="invalid_kind",
                  custom_error_message="kind must be 'discover' (the default), 'coarse-grain' "
                                       "or 'sweep'")]
