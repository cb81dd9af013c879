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


def provenance_input(model) -> dict:
    """What the model says about its input: ``path``, ``sha256``, ``variables``, ``scalars``,
    ``periodic``, ``test`` (held-out snapshot indices); None where not recorded."""
    prov = dict(getattr(model, "provenance", None) or {})
    spec = prov.get("spec") if isinstance(prov.get("spec"), Mapping) else {}
    spec_in = spec.get("input") if isinstance(spec.get("input"), Mapping) else {}
    inp = prov.get("input")
    inp = dict(inp) if isinstance(inp, Mapping) else {"path": inp}
    snaps = prov.get("snapshots") if isinstance(prov.get("snapshots"), Mapping) else {}
    test = snaps.get("test", inp.get("test"))
    scalars = list(getattr(model, "scalars", ()) or spec_in.get("scalars") or [])
    target = getattr(model, "target", "")
    if target.startswith("flux:") and target[5:] not in scalars:
        scalars.append(target[5:])
    return {
        "path": inp.get("path") or spec_in.get("path"),
        "sha256": inp.get("sha256") or prov.get("sha256") or spec_in.get("sha256"),
        "variables": dict(prov.get("variables") or spec_in.get("variables") or {}),
        "scalars": scalars,
        "periodic": spec_in.get("periodic", model.grid.periodic if hasattr(model, "grid")
                                else True),
        "test": None if test is None else [int(i) for i in test],
    }


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


def held_out_snapshots(model, input_path, indices=None, progress: Progress | None = None
                       ) -> tuple[Iterator, list[str]]:
    """Coarse snapshots of ``indices`` (default: the model's held-out ones) of the input,
    coarse-grained with the model's filter; returns ``(iterator, notes)``.

    The file is opened and checked now (UserError naming the problem); snapshots are read
    one at a time as the iterator is consumed.
    """
    from closure.io import open_fields
    from closure.residuals import coarse_grain_snapshot

    info = provenance_input(model)
    notes: list[str] = []
    src = open_fields(input_path, info["variables"] or None, info["scalars"],
                      bool(info["periodic"]))
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

    def iterate():
        try:
            for done, i in enumerate(indices):
                if progress is not None:
                    progress("snapshots", done, len(indices))
                yield coarse_grain_snapshot(src.snapshot(i), cg, info["scalars"])
            if progress is not None:
                progress("snapshots", len(indices), len(indices))
        finally:
            src.close()

    return iterate(), notes


def build_report(model, out_dir: str | os.PathLike, input_path: str | os.PathLike | None = None,
                 *, les=None, sweep=None, snapshots=None,
                 progress: Progress | None = None) -> Path:
    """Build the report folder of a model from files and return its path.

    ``model``: a ClosureModel, its dict, or a model file path. ``input_path``: the fine-grid
    netCDF the model was fitted on (default: the path in the model's provenance, when that file
    exists); its held-out snapshots (or ``snapshots``) are re-read, coarse-grained with the
    model's filter and compared with the model. Without an input the a priori figures are left
    out. ``les``: a posteriori result (object, dict or JSON path from ``closure les``);
    ``sweep``: sweep result (SweepResult, dict or JSON path from ``closure sweep``).
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
        recorded = provenance_input(model)["path"]
        candidates = [Path(recorded)] if recorded else []
        if recorded and model_file is not None and not Path(recorded).is_absolute():
            candidates.append(model_file.parent / recorded)  # a folder moved as a whole
        found = next((c for c in candidates if c.is_file()), None)
        if found is not None:
            input_path = found
        elif recorded:
            notes.append(f"the model's input file {recorded} is not available here: give it "
                         "with --input to include the a priori comparison")
    apriori = None
    if input_path is not None:
        snaps, more = held_out_snapshots(model, input_path, snapshots, progress)
        notes += more
        apriori = apriori_data(model, snaps, network=reference_network_of(model, notes))
    if progress is not None:
        progress("write", 0, 1)
    out = write_report(model, out_dir, les_result=les, sweep=sweep, apriori=apriori,
                       notes=notes)
    if progress is not None:
        progress("write", 1, 1)
    return out
