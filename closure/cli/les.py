"""CLI command: ``closure les``, a posteriori runs of a closure in the 2-D or 3-D coarse
solver, with optional long runs compared by statistics (``--duration``)."""

from __future__ import annotations

from pathlib import Path

import typer

from closure.atomic import write_text
from closure.cli.inputs import GROUP, MASK, SPACING, VAR, input_dict
from closure.errors import OptionError


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command(name="les")(les)


def _load_model(spec: str):
    if spec.strip().lower() == "none":
        return None
    from closure.model import ClosureModel

    return ClosureModel.load(spec)


def les(
    model: str = typer.Argument(..., help="model file (.json) or 'none' for no closure"),
    initial: str = typer.Option(..., "--initial", help="fine (DNS) input to start from: a "
                                "netCDF file, a quoted glob, a folder or a Zarr store"),
    output: Path = typer.Option(..., "-o", "--output", help="netCDF file for the coarse run"),
    reference: str | None = typer.Option(
        None, "--reference", help="fine input to compare with (default: the initial "
                                  "input, when it has later snapshots)"),
    var: list[str] | None = VAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = typer.Option(None, "--levels", show_default=False,
                                      help="the z level to run, of a level stack (one index)"),
    spacing: str | None = SPACING,
    initial_index: int = typer.Option(0, "--initial-index", help="snapshot to start from"),
    filter_kind: str | None = typer.Option(
        None, "--filter", help="none, box, gaussian, spectral or block (default: the model's, "
                               "else gaussian)"),
    width: float | None = typer.Option(None, "--width", help="filter width (default 2 x ratio "
                                                             "grid spacings)"),
    width_units: str = typer.Option("grid", "--width-units", help="grid or coordinate"),
    ratio: int | None = typer.Option(None, "--ratio", help="coarsening ratio (default: the "
                                                           "model's, else 4)"),
    viscosity: float | None = typer.Option(None, "--viscosity", help="nu (m2 s-1; default: "
                                                                     "the file's)"),
    drag: float | None = typer.Option(None, "--drag", help="linear drag (s-1; default: the "
                                                           "file's, else 0)"),
    hyperviscosity_order: int | None = typer.Option(None, "--hyperviscosity-order"),
    hypoviscosity: float | None = typer.Option(
        None, "--hypoviscosity", help="large-scale damping nu_h |k|^(-2q) (default: the "
                                      "file's, else 0)"),
    hypoviscosity_order: int | None = typer.Option(None, "--hypoviscosity-order",
                                                   help="q (default: the file's, else 1)"),
    forcing: str = typer.Option("file", "--forcing", help="file, none or modes:FILE (a table of "
                                "Fourier modes); 2-D: shell:K:A[:SEED] or kolmogorov:K:A; "
                                "3-D: steady:K:A[:SEED] or power:K:P"),
    duration: float | None = typer.Option(None, "--time", help="run length (s; default: to "
                                                               "the reference's last time)"),
    interval: float | None = typer.Option(None, "--interval", help="output interval (s) "
                                                                   "without a reference"),
    long_duration: float | None = typer.Option(
        None, "--duration", help="long run: run this long (s) and compare time-averaged "
                                 "statistics with every reference snapshot"),
    spinup: float | None = typer.Option(None, "--spinup", help="long run: statistics start "
                                                               "after this time (s; default 0)"),
    sample_interval: float | None = typer.Option(
        None, "--sample-interval", help="long run: sampling interval of the statistics (s; "
                                        "default: 200 samples)"),
    baselines: str = typer.Option("none,smagorinsky,dynamic,gradient,gradient-clipped",
                                  "--baselines", help="comma-separated baselines ('' for none)"),
    smagorinsky_constant: float = typer.Option(0.17, "--smagorinsky-constant"),
    dealias: bool | None = typer.Option(None, "--dealias/--no-dealias",
                                        help="2/3-rule dealiasing (default: the file's)"),
    cfl: float = typer.Option(0.5, "--cfl", help="CFL number of the time step"),
    energy_bound: float = typer.Option(10.0, "--energy-bound",
                                       help="stop when energy exceeds this x the initial"),
    json_out: Path | None = typer.Option(None, "--json", help="write runs and metrics here"),
    reference_net: bool = typer.Option(
        False, "--reference-net", help="also run the model's stored neural reference closure "
        "(needs torch==2.13.0)"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress bar or table"),
) -> None:
    """Run a closure (and baselines) in the 2-D or 3-D coarse solver from filtered-DNS initial
    fields and compare with the filtered DNS over time; with --duration, also run long and
    compare time-averaged statistics (spectrum, vorticity PDF, energy, enstrophy, transfer,
    stability) after --spinup."""
    from closure.cli.progress import progress_bar
    from closure.les import simulate, write_run

    if width_units not in ("grid", "coordinate"):
        raise OptionError(f"--width-units must be grid or coordinate, got {width_units!r}")
    if output.exists() and output.is_dir():
        raise OptionError(f"-o {output} is a folder: give a file name such as "
                          f"{output / 'run.nc'}")
    options = input_dict(initial, var=var, group=group, mask=mask, levels=levels,
                         spacing=spacing)
    options.pop("path", None)
    closure = _load_model(model)
    label = "model" if closure is not None else "none"
    with progress_bar(not quiet) as progress:
        comparison = simulate(
            closure, initial, reference, model_label=label, filter_kind=filter_kind,
            ratio=ratio, width=width, width_units=width_units, initial_index=initial_index,
            viscosity=viscosity, drag=drag, hyperviscosity_order=hyperviscosity_order,
            forcing=forcing, duration=duration, interval=interval, baselines=baselines,
            smagorinsky_constant=smagorinsky_constant, dealias=dealias, cfl=cfl,
            energy_bound=energy_bound, progress=progress, input_options=options,
            long_duration=long_duration, spinup=spinup, sample_interval=sample_interval,
            hypoviscosity=hypoviscosity, hypoviscosity_order=hypoviscosity_order,
            reference_net=reference_net)
    for w in comparison.settings["warnings"]:
        if w.startswith("ASSUMED"):  # said even with --quiet: the comparison is qualitative
            typer.echo(f"warning: {w}", err=True)
    path = write_run(comparison, output, label)
    if json_out is not None:
        write_text(json_out, comparison.to_json())
    if quiet:
        return
    s = comparison.settings
    g = s["grid"]
    typer.echo(f"coarse grid {' x '.join(str(n) for n in g['shape'])}, filter "
               f"{s['coarse_graining']['kind']} ratio {s['coarse_graining']['ratio']}, "
               f"width {s['delta']:.4g} m; nu {s['viscosity']:g}, drag {s['drag']:g}, "
               f"forcing {s['forcing']['forcing']}; t = {s['times'][0]:g} .. "
               f"{s['times'][-1]:g} s")
    for w in s["warnings"]:
        if not w.startswith("ASSUMED"):
            typer.echo(f"warning: {w}")
    typer.echo(comparison.table())
    for name, t in comparison.runs.items():
        if t.blew_up:
            typer.echo(f"{name}: {t.message}")
        elif name in comparison.long_runs:
            typer.echo(f"{name}: stable for {comparison.long_runs[name]['duration']:g} s")
        if "dynamic_constant" in t.diagnostics:
            c = t.diagnostics["dynamic_constant"]
            typer.echo(f"{name}: Germano-Lilly C = C_s^2 from {min(c):.3g} to {max(c):.3g} "
                       "(negative values clipped to 0)")
    typer.echo("A priori skill does not guarantee a stable or accurate coarse simulation; "
               "these runs test this flow only.")
    typer.echo(f"written: {path}" + (f", {json_out}" if json_out else ""))
