"""CLI command: ``closure discover``, fit a closure to one file in this process."""

from __future__ import annotations

from pathlib import Path

import typer

from closure.cli.inputs import (
    GROUP,
    INPUTS,
    LEVELS,
    MASK,
    NON_PERIODIC,
    PER_LEVEL,
    SCALAR,
    SNAPSHOTS,
    SPACING,
    VAR,
    echo_notes,
)
from closure.cli.progress import progress_bar
from closure.errors import OptionError


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("discover")(discover)


#: ``--land`` of discover and coarse-grain (closure.spec.FilterSpec.land)
LAND_OPTION_DEFAULT = "zero"
LAND_OPTION_HELP = ("land points (mask, NaN or fill values): zero (land as zero velocity, "
                    "Aluie, Hecht & Vallis 2018) or fluid (filter normalised over fluid points); "
                    "points whose footprint or stencil touches land are left out either way")

#: gas constants of compressible data (discover and coarse-grain --compressible); each one
#: overrides the input file's global attribute of the same name (closure.spec.GasSpec)
GAMMA = typer.Option(None, "--gamma", help="compressible data: ratio of specific heats "
                     "(default: the file's 'gamma' attribute)", show_default=False)
GAS_CONSTANT = typer.Option(
    None, "--gas-constant", help="compressible data: gas constant R in p = rho R T, in the "
    "data's units (default: the file's 'gas_constant' attribute); with it, one of p and T "
    "suffices", show_default=False)
PRANDTL = typer.Option(None, "--prandtl", help="compressible data: Prandtl number (default: "
                       "the file's 'prandtl' attribute)", show_default=False)


def gas_options(gamma: float | None, gas_constant: float | None, prandtl: float | None,
                library: str | None = None) -> dict | None:
    """The ``gas`` of a JobSpec from --gamma / --gas-constant / --prandtl (None: none given).
    Refused (OptionError) with a library that is not compressible."""
    given = {k: v for k, v in (("gamma", gamma), ("gas_constant", gas_constant),
                               ("prandtl", prandtl)) if v is not None}
    if not given:
        return None
    if library is not None:
        from closure.library_compressible import PRESETS

        if library not in PRESETS:
            raise OptionError(f"--{next(iter(given)).replace('_', '-')} sets a gas constant of "
                              f"compressible data: choose a compressible library "
                              f"({', '.join(PRESETS)}), or drop it")
    from pydantic import ValidationError

    from closure.spec import GasSpec

    try:
        GasSpec(**given)
    except ValidationError as exc:
        err = exc.errors()[0]
        raise OptionError(f"--{str(err['loc'][0]).replace('_', '-')}: {err['msg']} (got "
                          f"{given[err['loc'][0]]!r})") from None
    return given


_LABELS = {"plan": "planning", "map": "snapshots", "fit": "fitting",
           "network": "training the reference network (epochs)",
           "score": "scoring held-out snapshots"}


def build_spec(input, *, filter: str, width: float | None, width_units: str, ratio: int,
               target: str, library: str, method: str, scheme: str, test_fraction: float,
               var: list[str] | None, scalar: list[str] | None, non_periodic: bool,
               transfer_weight: float, seed: int, resamples: int, snapshots: str | None,
               group: str | None = None, mask: str | None = None, levels: str | None = None,
               per_level: bool = False, spacing: str | None = None, land: str = "zero",
               reference_net: bool = False, net_epochs: int | None = None,
               net_seconds: float | None = None, memory_limit: str | None = None,
               fine_float32: bool = False, device: str = "numpy", jobs: int | None = None,
               gas: dict | None = None, select: str = "apriori",
               duration: float | None = None, spinup: float | None = None,
               tolerance: float | None = None, transfer_weights: str | None = None):
    """The JobSpec of a ``closure discover`` command line (OptionError naming a bad option).

    ``input``: one path or a list of them (files, globs, a folder, a Zarr store)."""
    from closure.cli.inputs import input_dict
    from closure.outofcore import parse_memory
    from closure.spec import parse_spec

    if not reference_net and (net_epochs is not None or net_seconds is not None):
        raise OptionError("--net-epochs and --net-seconds set the budget of --reference-net: "
                          "add --reference-net, or leave them out")
    net = {"enabled": reference_net, "seed": seed}
    if net_epochs is not None:
        net["epochs"] = net_epochs
    if net_seconds is not None:
        net["seconds"] = net_seconds
    inputs = [str(input)] if isinstance(input, str | Path) else [str(p) for p in input]
    fit = {"method": method, "test_fraction": test_fraction, "resamples": resamples,
           "transfer_weight": transfer_weight, "seed": seed, "select": select}
    if select != "aposteriori":
        given = [name for name, v in (("--duration", duration), ("--spinup", spinup),
                                      ("--selection-tolerance", tolerance),
                                      ("--selection-weights", transfer_weights))
                 if v is not None]
        if given:
            raise OptionError(f"{', '.join(given)} set the selection by coarse runs: add "
                              "--select aposteriori, or leave them out")
    else:
        if duration is None:
            raise OptionError("--select aposteriori runs every candidate in the coarse solver: "
                              "give the run length with --duration T (s)")
        fit["duration"] = duration
        if spinup is not None:
            fit["spinup"] = spinup
        if tolerance is not None:
            fit["tolerance"] = tolerance
        if transfer_weights is not None:
            fit["transfer_weights"] = _weights(transfer_weights)
    return parse_spec({
        "input": input_dict(inputs, var=var, scalar=scalar, group=group, mask=mask,
                            levels=levels, per_level=per_level, spacing=spacing,
                            snapshots=snapshots, non_periodic=non_periodic),
        "filter": {"kind": filter, "width": width, "width_units": width_units, "ratio": ratio,
                   "land": land},
        "target": target,
        "library": library,
        "scheme": scheme,
        "fit": fit,
        "reference_net": net,
        "memory_limit": parse_memory(memory_limit),
        "fine_float32": bool(fine_float32),
        "device": device,
        "jobs": jobs,
        **({"gas": gas} if gas else {}),
    })


def _weights(text: str) -> list[float]:
    try:
        out = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        out = []
    if not out:
        raise OptionError(f"--selection-weights takes comma-separated transfer weights such "
                          f"as 0,1; got {text!r}")
    return out


def check_output(output: Path, inputs, what: str = "-o") -> None:
    """Refuse an output that is one of the input files (input files are never written)."""
    if not output.exists():
        return
    for p in inputs:
        p = Path(p)
        if p.exists() and output.resolve() == p.resolve():
            which = "the input file" if len(inputs) == 1 else "one of the input files"
            raise OptionError(f"the output {output} is {which}: choose another {what} "
                              "(input files are never written)")


def level_output(output: Path, level: int) -> Path:
    """``model.json`` -> ``model_level5.json`` (the file of one level's model)."""
    return output.with_name(f"{output.stem}_level{level}{output.suffix}")


def discover(
    inputs: list[str] = INPUTS,
    output: Path = typer.Option(..., "-o", "--output", help="model file to write (.json)",
                                show_default=False),
    filter: str = typer.Option("gaussian", "--filter",
                               help="filter kind: box, gaussian, spectral or block"),
    width: float | None = typer.Option(
        None, "--width", help="filter width D (default 2*ratio grid spacings; block: the ratio)",
        show_default=False),
    width_units: str = typer.Option("grid", "--width-units",
                                    help="units of --width: grid (spacings) or coordinate"),
    ratio: int = typer.Option(4, "--ratio", help="coarsening ratio (keep every ratio-th point)"),
    target: str = typer.Option("stress", "--target",
                               help="what to model: stress, force, vorticity or flux:NAME; "
                                    "with a compressible library also heat_flux or "
                                    "pressure_dilatation"),
    library: str = typer.Option("default", "--library",
                                help="candidate terms: default, classic, minimal, or a terms "
                                     "file (.yaml/.json); for compressible data (rho, u, v[, "
                                     "w], p, T; Favre filtering) compressible, "
                                     "compressible_classic or compressible_minimal"),
    method: str = typer.Option("threshold", "--method",
                               help="sparse fit: threshold, lasso or ard"),
    scheme: str = typer.Option("spectral", "--scheme",
                               help="derivatives of the coarse solver: spectral, fd2 or fd4"),
    test_fraction: float = typer.Option(0.25, "--test-fraction",
                                        help="last fraction of the snapshots in time held out "
                                             "for scoring"),
    var: list[str] | None = VAR,
    scalar: list[str] | None = SCALAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = LEVELS,
    per_level: bool = PER_LEVEL,
    spacing: str | None = SPACING,
    non_periodic: bool = NON_PERIODIC,
    transfer_weight: float = typer.Option(
        0.0, "--transfer-weight", help="also fit the energy (and 2-D enstrophy) transfer, "
                                       "with this weight relative to the target"),
    seed: int = typer.Option(0, "--seed", help="seed of the snapshot resampling"),
    resamples: int = typer.Option(20, "--resamples",
                                  help="fits on random halves of the training snapshots for "
                                       "the selection frequencies (0: none)"),
    snapshots: str | None = SNAPSHOTS,
    reference_net: bool = typer.Option(
        False, "--reference-net", help="also train a small convolutional network (needs "
        "torch==2.13.0) on the same snapshots and score it beside the model"),
    net_epochs: int | None = typer.Option(
        None, "--net-epochs", help="training budget of --reference-net in epochs (default 300)",
        show_default=False),
    net_seconds: float | None = typer.Option(
        None, "--net-seconds", help="training time limit of --reference-net, s (default 120)",
        show_default=False),
    memory_limit: str | None = typer.Option(
        None, "--memory-limit", help="memory one snapshot may use, e.g. 8G or 0.25 (of the "
        "machine's); larger snapshots are processed by slabs, spilling to files under "
        "TMPDIR (default: half the machine's memory)", show_default=False),
    float32: bool = typer.Option(False, "--float32",
                                 help="fine-grid pass in float32 (relative error ~1e-6)"),
    device: str = typer.Option(
        "numpy", "--device", help="array backend of the fine-grid pass of periodic data and "
        "of the Gram statistics: numpy, or torch on cpu, cuda or auto (needs torch==2.13.0; "
        "agrees to 1e-10)"),
    jobs: int | None = typer.Option(
        None, "--jobs", "-j", help="snapshots mapped side by side, each on one core (default: "
        "one per core, within half the machine's memory; the same results whatever it is)",
        show_default=False),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="print only the output path"),
    land: str = typer.Option(LAND_OPTION_DEFAULT, "--land", help=LAND_OPTION_HELP),
    gamma: float | None = GAMMA,
    gas_constant: float | None = GAS_CONSTANT,
    prandtl: float | None = PRANDTL,
    select: str = typer.Option(
        "apriori", "--select", help="apriori (held-out error picks the path point) or "
        "aposteriori (candidates along the sparse paths run long in the coarse solver; the "
        "sparsest stable one within the tolerance of the best long-run statistics is kept)"),
    duration: float | None = typer.Option(
        None, "--duration", help="--select aposteriori: each candidate's run length (s)",
        show_default=False),
    spinup: float | None = typer.Option(
        None, "--spinup", help="--select aposteriori: statistics start after this time "
        "(s; default 0)", show_default=False),
    selection_tolerance: float | None = typer.Option(
        None, "--selection-tolerance", help="--select aposteriori: relative tolerance on the "
        "best stable long-run score (default 0.1)", show_default=False),
    selection_weights: str | None = typer.Option(
        None, "--selection-weights", help="--select aposteriori: transfer weights of the "
        "candidate paths, comma-separated (default 0,1)", show_default=False),
) -> None:
    """Fit a sparse closure from candidate terms, score it on held-out snapshots, write it."""
    from closure import pipeline

    if output.exists() and output.is_dir():
        raise OptionError(f"-o {output} is a folder: give a file name such as "
                          f"{output / 'model.json'}")
    check_output(output, inputs)
    spec = build_spec(inputs, filter=filter, width=width, width_units=width_units, ratio=ratio,
                      target=target, library=library, method=method, scheme=scheme,
                      test_fraction=test_fraction, var=var, scalar=scalar,
                      non_periodic=non_periodic, transfer_weight=transfer_weight, seed=seed,
                      resamples=resamples, snapshots=snapshots, group=group, mask=mask,
                      levels=levels, per_level=per_level, spacing=spacing, land=land,
                      reference_net=reference_net, net_epochs=net_epochs,
                      net_seconds=net_seconds, memory_limit=memory_limit, fine_float32=float32,
                      device=device, jobs=jobs,
                      gas=gas_options(gamma, gas_constant, prandtl, library),
                      select=select, duration=duration, spinup=spinup,
                      tolerance=selection_tolerance, transfer_weights=selection_weights)
    if spec.fit.select == "aposteriori":
        _discover_and_select(spec, output, quiet)
        return
    with progress_bar(not quiet, "planning", _LABELS) as progress:
        if spec.input.per_level:
            results = pipeline.discover_levels(spec, progress=progress)
        else:
            results = [(None, pipeline.discover(spec, progress=progress))]
    for level, model in results:
        echo_notes(model.provenance.get("notes") or [])
        path = model.save(output if level is None else level_output(output, level))
        if not quiet:
            if level is not None:
                typer.echo(f"--- level {level}")
            typer.echo(model.summary())
        typer.echo(f"written: {path}")


def _discover_and_select(spec, output: Path, quiet: bool) -> None:
    """``--select aposteriori``: closure.selection.discover_and_select, in this process."""
    from closure.selection import PHASE, discover_and_select, unselected_model

    labels = {**_LABELS, PHASE: "coarse runs (candidates)"}
    with progress_bar(not quiet, "planning", labels) as progress:
        apriori, selection, chosen = discover_and_select(spec, progress=progress)
    echo_notes(apriori.provenance.get("notes") or [])
    model = chosen if chosen is not None else unselected_model(apriori, selection)
    path = model.save(output)
    if not quiet:
        typer.echo(model.summary())
        typer.echo(selection.table())
        typer.echo("A priori skill does not guarantee a stable or accurate coarse simulation; "
                   "the chosen model was stable on this flow for this run length only.")
    if chosen is None:
        typer.echo(f"warning: {model.provenance['notes'][-1]}", err=True)
    typer.echo(f"written: {path}")
