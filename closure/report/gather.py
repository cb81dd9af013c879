"""Gather a report's data from files: the model file, its input netCDF, optional a posteriori
and sweep results; then write the report folder (:func:`build_report`)."""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path

from closure.errors import UserError
from closure.filters import CoarseGraining, make_coarse_graining
from closure.grid import Grid
from closure.report.provenance import provenance_input  # re-exported: page.py uses it too

Progress = Callable[[str, int, int], None]


def load_model(model):
    """A ClosureModel from a ClosureModel, its dict, or the path of its file."""
    from closure.model import ClosureModel

    if isinstance(model, ClosureModel):
        return model
    if isinstance(model, Mapping):
        return ClosureModel.from_dict(model)
    if isinstance(model, str | os.PathLike):
        return ClosureModel.load(model)
    raise TypeError(f"expected a ClosureModel, its dict or a path, got {type(model).__name__}")


def _json_file(path, what: str, command: str) -> dict:
    p = Path(path)
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"no {what} file {p}: give the JSON written by `{command}`") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{p} is not a {what} file ({exc}): give the JSON written by "
                        f"`{command}`") from None


def coarse_graining_of(model, fine: Grid) -> CoarseGraining:
    """The model's training coarse-graining rebuilt on the fine grid ``fine``.

    Uses the per-direction widths recorded in the model's filter (coordinate units) when
    present, else its single width; checks the result's coarse grid against the model's.
    """
    f = dict(model.filter)
    kind, ratio = f["kind"], int(f["ratio"])
    widths = f.get("widths")
    if kind == "block":
        cg = make_coarse_graining("block", fine, ratio)
    elif isinstance(widths, Mapping) and set(widths) == set(fine.dims):
        cg = CoarseGraining(kind, ratio, tuple(float(widths[d]) for d in fine.dims), fine)
        cg.coarse  # noqa: B018  (checks the ratio against this grid, with a clear message)
    else:
        cg = make_coarse_graining(kind, fine, ratio, float(f["width"]), "coordinate")
    trained = getattr(model, "grid", None)
    if trained is not None and (tuple(trained.shape) != tuple(cg.coarse.shape)
                                or tuple(trained.dims) != tuple(cg.coarse.dims)):
        raise UserError(f"the input's coarse grid {cg.coarse.shape} ({', '.join(cg.coarse.dims)})"
                        f" differs from the model's training grid {trained.shape}: give the "
                        "input file the model was fitted on (--input)")
    return cg


def held_out_snapshots(model, input_path, indices=None, progress: Progress | None = None,
                       input_options: Mapping | None = None) -> tuple[Iterator, list[str]]:
    """Coarse snapshots of ``indices`` (default: the model's held-out ones) of the input,
    coarse-grained with the model's filter; returns ``(iterator, notes)``. The input is read
    with the model's recorded input options (variables, group, mask, levels, spacing), each
    replaced by ``input_options``' where given.

    The file is opened and checked now (UserError naming the problem); snapshots are read
    one at a time as the iterator is consumed.
    """
    from closure.io import open_fields
    from closure.pipeline import derivative_passes
    from closure.residuals import coarse_grain_snapshot

    info = provenance_input(model)
    notes: list[str] = []
    opts = dict(info["options"])
    overrides = {k: v for k, v in dict(input_options or {}).items() if v is not None}
    if "variables" in overrides:
        info["variables"] = dict(overrides.pop("variables"))
    opts.update(overrides)
    def opener(scalars):
        return open_fields(input_path, info["variables"] or None, scalars,
                           bool(info["periodic"]), group=opts["group"], mask=opts["mask"],
                           levels=opts["levels"], spacing=opts["spacing"])

    from closure.library_compressible import PRESETS

    if model.library.name in PRESETS:  # one of p and T suffices with the gas constant
        from closure.favre import open_compressible

        src = open_compressible(opener, (model.provenance or {}).get("gas"),
                                variables=info["variables"])
    else:
        src = opener(info["scalars"])
    try:
        cg = coarse_graining_of(model, src.grid)
        if indices is None:
            indices = info["test"]
            if not indices:
                raise UserError("the model does not list its held-out snapshots: give "
                                "--snapshots to choose the ones to compare against")
        indices = [int(i) for i in indices]
        bad = [i for i in indices if not 0 <= i < src.n_snapshots]
        if bad:
            raise UserError(f"snapshots {bad} are out of range: {src.path} has "
                            f"{src.n_snapshots} snapshot(s); give the file the model was "
                            "fitted on, or other --snapshots")
        if info["sha256"] and src.sha256 != info["sha256"]:
            notes.append(f"the input file {src.path} is not the one the model was fitted on "
                         "(its sha256 differs): the a priori comparison uses its snapshots "
                         f"{indices}, which need not be held out")
    except BaseException:
        src.close()
        raise

    from closure.library_compressible import PRESETS

    passes = derivative_passes(model.library)
    if model.library.name in PRESETS:  # compressible models: Favre targets
        from closure.favre import favre_coarse_grain

        gas = (getattr(model, "provenance", None) or {}).get("gas") or {}

        def coarse(snap):
            return favre_coarse_grain(snap, cg, targets=model.components,
                                      gas_constant=gas.get("gas_constant"),
                                      scheme=model.scheme, derivative_passes=passes)
    else:
        land = str((getattr(model, "settings", None) or {}).get("land", {}).get("convention")
                   or "zero")

        def coarse(snap):
            return coarse_grain_snapshot(snap, cg, info["scalars"], land=land,
                                         scheme=model.scheme, derivative_passes=passes)

    def iterate():
        try:
            for done, i in enumerate(indices):
                if progress is not None:
                    progress("snapshots", done, len(indices))
                for level in ([None] if src.levels is None else src.levels):
                    yield coarse(src.snapshot(i, level))
            if progress is not None:
                progress("snapshots", len(indices), len(indices))
        finally:
            src.close()

    return iterate(), notes


def build_report(model, out_dir: str | os.PathLike, input_path: str | os.PathLike | None = None,
                 *, les=None, sweep=None, snapshots=None,
                 progress: Progress | None = None, input_options: Mapping | None = None
                 ) -> Path:
    """Build the report folder of a model from files and return its path.

    ``model``: a ClosureModel, its dict, or a model file path. ``input_path``: the fine-grid
    netCDF the model was fitted on (default: the path in the model's provenance, when that file
    exists); its held-out snapshots (or ``snapshots``) are re-read, coarse-grained with the
    model's filter and compared with the model. Without an input the a priori figures are left
    out. ``les``: a posteriori result (object, dict or JSON path from ``closure les``);
    ``sweep``: sweep result (SweepResult, dict or JSON path from ``closure sweep``).
    ``input_options``: see :func:`held_out_snapshots`.
    """
    from closure.report.aposteriori import as_runs
    from closure.report.apriori import apriori_data, reference_network_of
    from closure.report.page import _sweep_dict, write_report

    model_file = Path(model) if isinstance(model, str | os.PathLike) else None
    model = load_model(model)
    if isinstance(les, str | os.PathLike):
        les = _json_file(les, "a posteriori result", "closure les")
    if isinstance(sweep, str | os.PathLike):
        sweep = _json_file(sweep, "sweep", "closure sweep")
    # malformed a posteriori or sweep data fail here, before the a priori pass
    if les is not None:
        as_runs(les)  # the report reads the result itself, diagnostics and settings included
    if sweep is not None:
        _sweep_dict(sweep)
    notes: list[str] = []
    if input_path is None:
        paths = provenance_input(model)["paths"]
        recorded = " ".join(map(str, paths)) if paths else None
        found = []
        for r in paths:
            candidates = [Path(r)]
            if model_file is not None and not Path(r).is_absolute():
                candidates.append(model_file.parent / r)  # a folder moved as a whole
            hit = next((c for c in candidates if c.is_file() or c.is_dir()), None)
            if hit is None:
                found = []
                break
            found.append(hit)
        if found:
            input_path = found if len(found) > 1 else found[0]
        elif recorded:
            notes.append(f"the model's input file {recorded} is not available here: give it "
                         "with --input to include the a priori comparison")
    apriori = None
    if input_path is not None:
        snaps, more = held_out_snapshots(model, input_path, snapshots, progress,
                                         input_options)
        notes += more
        apriori = apriori_data(model, snaps, network=reference_network_of(model, notes))
    if progress is not None:
        progress("write", 0, 1)
    out = write_report(model, out_dir, les_result=les, sweep=sweep, apriori=apriori,
                       notes=notes)
    if progress is not None:
        progress("write", 1, 1)
    return out
