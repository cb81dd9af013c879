"""CLI commands: apply a model to coarse fields, show a model, export a model as code.

``show`` and ``export`` take a model file or a stored model id (fetched from the service).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
from pathlib import Path

import numpy as np
import typer

from closure.atomic import write_text
from closure.cli.inputs import GROUP, LEVELS, MASK, SPACING, VAR
from closure.errors import InputFileError, OptionError

_LONG = {"tau": "modelled subgrid stress", "force": "modelled subgrid force",
         "flux": "modelled subgrid flux", "vorticity_forcing": "modelled subgrid vorticity forcing",
         "heat_flux": "modelled subgrid (Favre) heat flux",
         "pressure_dilatation": "modelled subgrid pressure-dilatation"}


def apply_model(
    model_path: Path = typer.Argument(..., metavar="MODEL", help="model file (.json)",
                                      show_default=False),
    inputs: list[str] = typer.Argument(
        ..., metavar="COARSE", show_default=False,
        help="filtered fields on a coarse grid, read only: a file as `closure coarse-grain` "
             "writes it, or any netCDF file(s), quoted glob, folder or Zarr store of them"),
    output: Path = typer.Option(..., "-o", "--output", help="netCDF file to write",
                                show_default=False),
    var: list[str] | None = VAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = LEVELS,
    spacing: str | None = SPACING,
) -> None:
    """Evaluate a model on every snapshot of a coarse file; write its predicted subgrid terms."""
    from closure.cli.discover import check_output
    from closure.cli.inputs import input_dict
    from closure.model import ClosureModel

    check_output(output, inputs)
    options = input_dict(inputs, var=var, group=group, mask=mask, levels=levels,
                         spacing=spacing)
    model = ClosureModel.load(model_path)
    with _open_coarse_fields(options, model) as src:
        grid = src.grid
        for w in model.grid_warnings(grid):
            typer.echo(f"warning: {w}", err=True)
        n = src.n_snapshots
        names = model.components
        stack = [None] if getattr(src, "levels", None) is None else list(src.levels)
        shape = grid.shape if stack == [None] else (len(stack), *grid.shape)
        pred = {c: np.empty((n, *shape)) for c in names}
        split = _TrainingSplit(model, src)
        skill = {part: _Skill(model) for part in ("train", "test", "new")}
        times = []
        for i in range(n):
            for k, level in enumerate(stack):
                snap = src.snapshot(i) if level is None else src.snapshot(i, level)
                out = model.evaluate(snap.fields, grid)
                invalid = _invalid_points(model, snap, grid)
                if invalid is not None:  # land: no prediction where its stencils reach land
                    out = {c: np.where(invalid, np.nan, v) for c, v in out.items()}
                for c in names:
                    if level is None:
                        pred[c][i] = out[c]
                    else:
                        pred[c][i, k] = out[c]
                targets = getattr(snap, "targets", None) or {}
                skill[split.part(snap.index)].add(targets, out)
            times.append(float(snap.time) if snap.time is not None else float(snap.index))
        ds = _dataset(model, model_path, src, pred, times, stack)
    from closure.io import write_netcdf

    write_netcdf(ds, output)
    typer.echo(f"wrote {output}: {n} snapshot(s) of {', '.join(names)} from {model.target} "
               f"model ({int(model.active.sum())} active term(s), {model.scheme} derivatives, "
               f"Delta = {model.delta:g})")
    for line in split.text(skill):
        typer.echo(line)
    typer.echo("note: a priori skill does not guarantee a stable or accurate coarse simulation; "
               "validate the model a posteriori before relying on it")


@contextlib.contextmanager
def _open_coarse_fields(options: dict, model):
    """A coarse file written by closure (CoarseSource), or any input of filtered fields on a
    coarse grid (FieldSource) opened with the shared input options."""
    from closure.io import open_coarse, open_fields

    needed = model.library.subset([t.name for t in model.active_terms]).fields
    scalars = tuple(f for f in needed if f in model.scalars)
    path = options["path"]
    plain = isinstance(path, str) and not any(options.get(k) for k in (
        "variables", "group", "mask", "levels", "spacing"))
    try:
        src = open_coarse(Path(path)) if plain else None
    except InputFileError:
        src = None
    if src is None:
        src = open_fields(path, options.get("variables"), scalars,
                          periodic=model.grid.periodic, group=options.get("group"),
                          mask=options.get("mask"), levels=options.get("levels"),
                          spacing=options.get("spacing"))
    try:
        if tuple(src.grid.dims) != model.dims:
            raise InputFileError(f"the model is for a grid with dims {model.dims}; {path} has "
                                 f"{tuple(src.grid.dims)}: apply a model fitted on such data")
        missing = [f for f in needed if f not in (*src.velocity, *src.scalars)]
        if missing:
            raise InputFileError(f"{path} has no field {missing[0]!r}, which the model's terms "
                                 "need: give a file with it (or map it with --var)")
        yield src
    finally:
        src.close()


def _invalid_points(model, snap, grid):
    """Coarse points where a prediction would see land (None: none do): excluded points of a
    coarse file with land, or land of a plain input widened by the model's derivative
    stencils (closure.residuals.stencil_dilation, as the fit excluded them)."""
    from closure.pipeline import derivative_passes
    from closure.residuals import stencil_dilation

    valid = getattr(snap, "valid", None)
    if valid is not None:
        return ~np.asarray(valid, dtype=bool)
    mask = getattr(snap, "mask", None)
    if mask is None or np.all(mask):
        return None
    if model.scheme == "spectral":
        raise OptionError("the model uses spectral derivatives, which reach across land: apply "
                          "a model fitted with --scheme fd2 or fd4 to data with land")
    return stencil_dilation(~np.asarray(mask, dtype=bool), grid, model.scheme,
                            max(1, derivative_passes(model.library)))


class _TrainingSplit:
    """Which snapshots of a coarse file the model was fitted on: the file's source checksum
    equals the model's input checksum, and the file records each snapshot's source index."""

    def __init__(self, model, src):
        prov = model.provenance or {}
        snaps = prov.get("snapshots") or {}
        source = str(getattr(src, "attrs", {}).get("source_sha256", ""))
        self.same_data = bool(source) and source == prov.get("sha256")
        self.train = {int(i) for i in snaps.get("train") or ()} if self.same_data else set()
        self.test = {int(i) for i in snaps.get("test") or ()} if self.same_data else set()
        self.counts = {"train": 0, "test": 0, "new": 0}

    def part(self, index: int) -> str:
        part = ("train" if index in self.train else "test" if index in self.test else "new")
        self.counts[part] += 1
        return part

    def text(self, skill: dict) -> list[str]:
        """Lines saying which snapshots the figures cover, with their a priori skill."""
        lines = []
        if self.same_data:
            lines.append(f"this file is coarse-grained from the model's own input: "
                         f"{self.counts['train']} snapshot(s) were used to fit it, "
                         f"{self.counts['test']} were held out"
                         + (f", {self.counts['new']} were not used" if self.counts["new"]
                            else ""))
        labels = {"test": "held-out snapshots", "new": "snapshots new to the model",
                  "train": "training snapshots (optimistic: the model was fitted on them)"}
        for part in ("test", "new", "train"):
            text = skill[part].text()
            if text:
                lines.append(f"a priori on the {labels[part]} ({self.counts[part]}): {text}")
        return lines


class _Skill:
    """Weighted a priori r2 and correlation against exact targets, where the file has them."""

    def __init__(self, model):
        from closure.library import component_weights

        self.names = model.components
        self.w = dict(zip(self.names, component_weights(model.target, model.dims), strict=True))
        self.s = np.zeros(6)  # sum w, sum w y, sum w p, sum w y^2, sum w p^2, sum w y p
        self.ok = True

    def add(self, targets, pred) -> None:
        if not all(c in targets for c in self.names):
            self.ok = False
            return
        for c in self.names:
            y, p, w = np.asarray(targets[c]).ravel(), pred[c].ravel(), self.w[c]
            keep = np.isfinite(p)  # NaN: points land excludes
            y, p = y[keep], p[keep]
            self.s += w * np.array([y.size, y.sum(), p.sum(), y @ y, p @ p, y @ p])

    def text(self) -> str:
        if not self.ok or self.s[0] == 0:
            return ""
        n, sy, sp, syy, spp, syp = self.s
        vy, vp, cyp = syy - sy * sy / n, spp - sp * sp / n, syp - sy * sp / n
        sse = syy - 2 * syp + spp
        r2 = 1 - sse / vy if vy > 0 else float("nan")
        corr = cyp / np.sqrt(vy * vp) if vy > 0 and vp > 0 else float("nan")
        return (f"r2 {r2:.4f}, correlation {corr:.4f} (all components, off-diagonal stress "
                "weighted 2)")


def _units(component: str, units: dict, length: str | None) -> str | None:
    """Units of a predicted component from the input's, simplified (closure.units)."""
    from closure.io import _units_of

    return _units_of(component, units, length)


def _compressible_units(component: str, units: dict) -> str | None:
    """Units of a Favre target from the input's: rho u u, rho u T (None where unknown)."""
    vel = {units.get(c) for c in ("u", "v", "w") if units.get(c)}
    U = vel.pop() if len(vel) == 1 else None
    rho, T = units.get("rho"), units.get("T")
    text = None
    if component.startswith("tau_") and rho and U:
        text = f"({rho}) ({U})^2"
    elif component.startswith("heat_flux_") and rho and U and T:
        text = f"({rho}) ({U}) ({T})"
    if text is None:
        return None
    from closure.units import simplify

    try:
        return simplify(text)  # e.g. kg m-1 s-2 for the stress, as coarse-grain writes it
    except (ValueError, KeyError):
        return text


def _long_name(component: str) -> str:
    if component.startswith("tau_"):
        return f"{_LONG['tau']} {component} (closure model, a priori prediction)"
    if component.startswith("force_"):
        return f"{_LONG['force']} {component}, d_j tau_ij (closure model, a priori prediction)"
    if component.startswith("flux_"):
        return f"{_LONG['flux']} {component} (closure model, a priori prediction)"
    if component.startswith("heat_flux") or component == "pressure_dilatation":
        key = "heat_flux" if component.startswith("heat_flux") else component
        return f"{_LONG[key]} {component} (closure model, a priori prediction)"
    return f"{_LONG['vorticity_forcing']} (closure model, a priori prediction)"


def _dataset(model, model_path, src, pred, times, stack=(None,)):
    import xarray as xr

    from closure import __version__
    from closure.io import sha256_file

    grid = src.grid
    levels = list(stack) != [None]
    dims = ("time", *(("z",) if levels else ()), *grid.dims)
    coords = {d: (d, grid.coords(d), {"long_name": f"{d} coordinate", "axis": d.upper(),
                                      **({"units": grid.units} if grid.units else {})})
              for d in grid.dims}
    if levels:
        values = getattr(src, "level_values", None)
        coords["z"] = ("z", np.asarray(values if values is not None else stack, dtype=float),
                       {"long_name": "level" if values is not None else "level index",
                        "axis": "Z"})
    coords["time"] = ("time", np.asarray(times, dtype=float), {"long_name": "time" if getattr(
        src, "times", None) is not None else "snapshot index", "axis": "T"})
    from closure.library_compressible import PRESETS as COMPRESSIBLE_PRESETS

    units = dict(getattr(src, "units", {}) or {})
    data = {}
    for c, a in pred.items():
        attrs = {"long_name": _long_name(c), "closure_name": c, "closure_role": "prediction"}
        un = (_compressible_units(c, units) if model.library.name in COMPRESSIBLE_PRESETS
              else _units(c, units, grid.units))
        if un:
            attrs["units"] = un
        data[c] = (dims, a, attrs)
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    attrs = {
        "Conventions": "CF-1.8",
        "title": f"closure model prediction of the subgrid {model.target} terms",
        "history": f"{now} closure {__version__} apply",
        "source": f"closure {__version__}",
        "model_file": str(model_path),
        "model_sha256": sha256_file(model_path),
        "model_target": model.target,
        "model_scheme": model.scheme,
        "model_delta": float(model.delta),
        "model_terms": " ".join(t.name for t in model.active_terms),
        "input_file": " ".join(str(p) for p in getattr(src, "paths", [src.path])),
        "caution": model.caution,
    }
    return xr.Dataset(data, coords=coords, attrs=attrs)


DEFAULT_LANG = "python"
MODEL_REF_HELP = ("a model file (.json) or a stored model id (a path that exists is read as a "
                  "file; anything else is fetched from the service)")


def _load_model_ref(ref: str, server: str | None, token: str | None):
    """``(model, record, path)`` for a model file path or a stored model id.

    ``record`` is the service's catalog record (None for a file); ``path`` the file (None for
    an id)."""
    from closure.model import ClosureModel

    path = Path(ref)
    if path.exists():
        return ClosureModel.load(path), None, path
    from closure.cli.service import _client
    from closure.client import ServiceError

    try:
        with _client(server, token) as c:
            record = c.model(ref)
    except ServiceError as exc:
        if exc.status == 404 or (exc.status is None and _looks_like_path(ref)):
            raise OptionError(f"{ref!r} is neither a model file (no such file) nor a stored "
                              f"model id ({exc}): give an existing .json model file or an "
                              "id from `closure models`") from None
        raise
    return ClosureModel.from_dict(record["model"]), record, None


def _looks_like_path(ref: str) -> bool:
    return ref.endswith(".json") or "/" in ref or "\\" in ref


def show(
    model: str = typer.Argument(..., metavar="MODEL", help=MODEL_REF_HELP, show_default=False),
    as_json: bool = typer.Option(False, "--json", help="the model (and, for a stored model, "
                                 "its catalog record) as JSON"),
    server: str | None = typer.Option(None, "--server", help="service URL for a stored model "
                                      "id (default: $CLOSURE_SERVER, the running local stack, "
                                      "or http://127.0.0.1:8000)", show_default=False),
    token: str | None = typer.Option(None, "--token", help="bearer token (default: "
                                     "$CLOSURE_TOKEN)", show_default=False),
) -> None:
    """Print a model's terms, coefficients, scores, warnings and provenance."""
    import json

    m, record, _ = _load_model_ref(model, server, token)
    if as_json:
        typer.echo(json.dumps(record if record is not None else m.to_dict(), indent=1))
    else:
        typer.echo(record["summary"] if record is not None else m.summary())


def export(
    model: str = typer.Argument(..., metavar="MODEL", help=MODEL_REF_HELP, show_default=False),
    lang: str = typer.Option(DEFAULT_LANG, "--lang", help="json, python, c or fortran"),
    output: Path | None = typer.Option(None, "-o", "--output",
                                       help="file to write (default: print)",
                                       show_default=False),
    name: str = typer.Option("closure_model", "--name", help="function name in the code"),
    server: str | None = typer.Option(None, "--server", help="service URL for a stored model "
                                      "id (default: $CLOSURE_SERVER, the running local stack, "
                                      "or http://127.0.0.1:8000)", show_default=False),
    token: str | None = typer.Option(None, "--token", help="bearer token (default: "
                                     "$CLOSURE_TOKEN)", show_default=False),
) -> None:
    """Print (or write) a model as JSON coefficients or Python / C / Fortran source."""
    from closure.export import export_model

    m, _, path = _load_model_ref(model, server, token)
    text = export_model(m, lang, name)
    if output is None:
        typer.echo(text, nl=False)
        return
    if path is not None and output.exists() and output.resolve() == path.resolve():
        raise OptionError(f"the output {output} is the model file: choose another -o")
    write_text(output, text)
    typer.echo(f"wrote {output} ({lang})")


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("apply")(apply_model)
    app.command("show")(show)
    app.command("export")(export)
    # the old names stay one release, hidden, as aliases of the commands above
    app.command("show-model", hidden=True)(show)
    app.command("export-model", hidden=True)(export)
