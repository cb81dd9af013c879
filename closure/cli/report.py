"""CLI commands: ``closure report`` (a model's HTML report folder) and ``closure sweep``
(the same discovery at several filter widths)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import typer

from closure.cli.inputs import (
    GROUP,
    INPUTS,
    LEVELS,
    MASK,
    NON_PERIODIC,
    SCALAR,
    SNAPSHOTS,
    SPACING,
    VAR,
    parse_indices,
)
from closure.errors import OptionError


def parse_number_list(text: str | None, what: str, kind=float) -> list | None:
    """``"4,8,16"`` -> ``[4.0, 8.0, 16.0]`` (``kind`` int for whole numbers); None stays None."""
    if text is None:
        return None
    out = []
    for item in text.split(","):
        item = item.strip()
        if not item:
            continue
        try:
            value = kind(item)
        except ValueError:
            raise OptionError(f"{what} expects comma-separated "
                              f"{'whole numbers' if kind is int else 'numbers'}, got "
                              f"{item!r} in {text!r}") from None
        out.append(value)
    if not out:
        raise OptionError(f"{what} is empty: give e.g. {what} 4,8,16")
    return out


def _echo_progress():
    """A progress callback printing one line per finished phase to stderr."""
    def progress(phase: str, done: int, total: int) -> None:
        if done == total and total:
            typer.echo(f"{phase}: {done}/{total}", err=True)
    return progress


def report(
    model: Path = typer.Argument(..., help="model file (.json) written by closure discover, "
                                 "or the id of a model stored by the service (m-...)",
                                 show_default=False),
    output: Path = typer.Option(..., "-o", "--output", help="report folder to write "
                                "(index.html + PNGs; an earlier report there is replaced)",
                                show_default=False),
    input: list[str] | None = typer.Option(
        None, "--input", help="the fine-grid input(s) the model was fitted on, repeatable "
        "(default: the paths recorded in the model, if they exist; read with the model's "
        "recorded --group, --mask, --levels and --spacing); its held-out snapshots are "
        "compared with the model", show_default=False),
    les: Path | None = typer.Option(None, "--les", help="a posteriori result JSON written by "
                                    "closure les", show_default=False),
    sweep: Path | None = typer.Option(None, "--sweep", help="filter-width sweep JSON written "
                                      "by closure sweep", show_default=False),
    snapshots: str | None = typer.Option(
        None, "--snapshots", help="snapshot indices to compare against, e.g. 6,7 or 6-9 (default: "
        "the model's held-out snapshots)", show_default=False),
    var: list[str] | None = VAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = LEVELS,
    spacing: str | None = SPACING,
    quiet: bool = typer.Option(False, "--quiet", "-q", help="print only the folder"),
    server: str | None = typer.Option(None, "--server", help="service URL, for a stored model "
                                      "id (default: $CLOSURE_SERVER, the running local "
                                      "stack, or http://127.0.0.1:8000)", show_default=False),
    token: str | None = typer.Option(None, "--token", help="bearer token, for a stored model "
                                     "id (default: $CLOSURE_TOKEN)", show_default=False),
) -> None:
    """Write a self-contained HTML report of a model: summary, terms, a priori scores and
    figures, warnings, and the a posteriori and sweep figures when given.

    Given a stored model's id (not a file), the service builds the report (with the model's
    latest a posteriori result) and it is downloaded into the folder."""
    from closure.cli.inputs import input_dict
    from closure.report import build_report

    if not model.exists() and re.fullmatch(r"m-[0-9a-f]{6,64}", str(model)):
        given = [name for name, v in (("--input", input), ("--les", les), ("--sweep", sweep),
                                      ("--snapshots", snapshots), ("--var", var),
                                      ("--group", group), ("--mask", mask),
                                      ("--levels", levels), ("--spacing", spacing))
                 if v is not None]
        if given:
            raise OptionError(f"{', '.join(given)} apply to model files; the service builds "
                              f"the report of stored model {model} from its own files")
        from closure.cli.service import fetch_report

        out = fetch_report(str(model), output, server, token)
        typer.echo(str(out / "index.html"))
        return
    indices = parse_indices(snapshots)
    given = None if not input else (input[0] if len(input) == 1 else list(input))
    options = input_dict(None, var=var, group=group, mask=mask, levels=levels,
                         spacing=spacing)  # the model's recorded options, unless given here
    out = build_report(model, output, given, les=les, sweep=sweep, snapshots=indices,
                       input_options=options,
                       progress=None if quiet else _echo_progress())
    typer.echo(str(out / "index.html"))


def sweep(
    inputs: list[str] = INPUTS,
    widths: str = typer.Option(..., "--widths", help="filter widths D, comma-separated, in "
                               "--width-units (fine-grid spacings by default), e.g. 4,8,16",
                               show_default=False),
    output: Path = typer.Option(..., "-o", "--output", help="sweep result JSON to write",
                                show_default=False),
    ratios: str | None = typer.Option(
        None, "--ratios", help="coarsening ratio per width, or one for all (default: D/2 "
        "spacings, rounded down)", show_default=False),
    spec: Path | None = typer.Option(
        None, "--spec", help="a job-spec JSON to start from (its filter width and ratio are "
        "replaced; options given here override its other fields)", show_default=False),
    filter: str | None = typer.Option(None, "--filter", help="filter kind: box, gaussian "
                                      "(default), spectral or block", show_default=False),
    width_units: str | None = typer.Option(None, "--width-units", help="units of --widths: "
                                           "grid (default) or coordinate", show_default=False),
    target: str | None = typer.Option(None, "--target", help="stress (default), force, "
                                      "vorticity or flux:NAME", show_default=False),
    library: str | None = typer.Option(None, "--library", help="preset (default, classic, "
                                       "minimal) or terms file", show_default=False),
    scheme: str | None = typer.Option(None, "--scheme", help="derivative scheme: spectral "
                                      "(default), fd2 or fd4", show_default=False),
    method: str | None = typer.Option(None, "--method", help="threshold (default), lasso or "
                                      "ard", show_default=False),
    test_fraction: float | None = typer.Option(None, "--test-fraction", help="share of "
                                               "snapshots held out (default 0.25)",
                                               show_default=False),
    resamples: int | None = typer.Option(None, "--resamples", help="resampled fits for "
                                         "selection frequencies (default 20)",
                                         show_default=False),
    transfer_weight: float | None = typer.Option(None, "--transfer-weight",
                                                 help="weight of the energy-transfer rows",
                                                 show_default=False),
    seed: int | None = typer.Option(None, "--seed", help="random seed of the resamples",
                                    show_default=False),
    var: list[str] | None = VAR,
    scalar: list[str] | None = SCALAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = LEVELS,
    spacing: str | None = SPACING,
    snapshots: str | None = SNAPSHOTS,
    non_periodic: bool = NON_PERIODIC,
    report_dir: Path | None = typer.Option(
        None, "--report", help="also write the HTML report of the first width's model, with "
        "the sweep figures, to this folder", show_default=False),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="print only the output path"),
) -> None:
    """Fit the same closure at several filter widths and record the scaled coefficients and
    held-out scores per width (a scale-invariant closure has flat scaled coefficients)."""
    from closure.cli.discover import check_output
    from closure.cli.inputs import input_dict
    from closure.spec import parse_spec
    from closure.sweep import run_sweep

    base: dict = {}
    if spec is not None:
        try:
            base = json.loads(spec.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise OptionError(f"no spec file {spec}") from None
        except json.JSONDecodeError as exc:
            raise OptionError(f"{spec} is not JSON ({exc})") from None
        if not isinstance(base, dict):
            raise OptionError(f"{spec} must hold a JSON object (a job spec)")
    base["input"] = input_dict(inputs, var=var, scalar=scalar, group=group, mask=mask,
                               levels=levels, spacing=spacing, snapshots=snapshots,
                               non_periodic=non_periodic, defaults=base.get("input") or {})
    filt = dict(base.get("filter") or {})
    for key, value in (("kind", filter), ("width_units", width_units)):
        if value is not None:
            filt[key] = value
    base["filter"] = filt
    for key, value in (("target", target), ("library", library), ("scheme", scheme)):
        if value is not None:
            base[key] = value
    fit = dict(base.get("fit") or {})
    for key, value in (("method", method), ("test_fraction", test_fraction),
                       ("resamples", resamples), ("transfer_weight", transfer_weight),
                       ("seed", seed)):
        if value is not None:
            fit[key] = value
    base["fit"] = fit
    job = parse_spec(base)
    check_output(output, inputs)
    result = run_sweep(job, parse_number_list(widths, "--widths"),
                       parse_number_list(ratios, "--ratios", int),
                       progress=None if quiet else _sweep_progress())
    result.save(output)
    if not quiet:
        for name, values in result.coefficients().items():
            text = ", ".join("-" if v != v else f"{v:.4g}" for v in values)
            typer.echo(f"{name}: {text}", err=True)
    typer.echo(str(output))
    if report_dir is not None:
        from closure.report import build_report

        first = result.entries[0].model
        out = build_report(first, report_dir, inputs[0] if len(inputs) == 1 else list(inputs),
                           sweep=result)
        typer.echo(str(out / "index.html"))


def _sweep_progress():
    def progress(phase: str, done: int, total: int) -> None:
        if phase == "sweep":
            typer.echo(f"filter widths fitted: {done}/{total}", err=True)
    return progress


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("report")(report)
    app.command("sweep")(sweep)
