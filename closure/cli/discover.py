"""CLI command: ``closure discover``, fit a closure to one file in this process."""

from __future__ import annotations

from pathlib import Path

import typer

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

_LABELS = {"plan": "planning", "map": "snapshots", "fit": "fitting",
           "network": "training the reference network (epochs)",
           "score": "scoring held-out snapshots"}


def build_spec(input: Path, *, filter: str, width: float | None, width_units: str, ratio: int,
               target: str, library: str, method: str, scheme: str, test_fraction: float,
               var: list[str] | None, scalar: list[str] | None, non_periodic: bool,
               transfer_weight: float, seed: int, resamples: int, snapshots: str | None,
               land: str = "zero", reference_net: bool = False, net_epochs: int | None = None,
               net_seconds: float | None = None):
    """The JobSpec of a ``closure discover`` command line (OptionError naming a bad option)."""
    from closure.cli.coarse import parse_var_options
    from closure.spec import parse_spec

    chosen = None
    if snapshots:
        try:
            chosen = _index_list(snapshots)
        except ValueError:
            raise OptionError(f"--snapshots expects indices like 0,2,5-9, got {snapshots!r}") \
                from None
    if not reference_net and (net_epochs is not None or net_seconds is not None):
        raise OptionError("--net-epochs and --net-seconds set the budget of --reference-net: "
                          "add --reference-net, or leave them out")
    net = {"enabled": reference_net, "seed": seed}
    if net_epochs is not None:
        net["epochs"] = net_epochs
    if net_seconds is not None:
        net["seconds"] = net_seconds
    return parse_spec({
        "input": {"path": str(input), "variables": parse_var_options(var),
                  "scalars": list(scalar or []), "periodic": not non_periodic,
                  "snapshots": chosen},
        "filter": {"kind": filter, "width": width, "width_units": width_units, "ratio": ratio,
                   "land": land},
        "target": target,
        "library": library,
        "scheme": scheme,
        "fit": {"method": method, "test_fraction": test_fraction, "resamples": resamples,
                "transfer_weight": transfer_weight, "seed": seed},
        "reference_net": net,
    })


def _index_list(text: str) -> list[int]:
    out: list[int] = []
    for part in text.split(","):
        part = part.strip()
        if "-" in part:
            a, b = part.split("-", 1)
            out += list(range(int(a), int(b) + 1))
        elif part:
            out.append(int(part))
    return out


def discover(
    input: Path = typer.Argument(..., help="fine-grid netCDF file (read only)",
                                 show_default=False),
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
    var: list[str] | None = typer.Option(
        None, "--var", help="map our name to the file's, e.g. --var u=U (also x=lon)",
        show_default=False),
    scalar: list[str] | None = typer.Option(
        None, "--scalar", help="passive scalar to read (repeatable; flux:NAME adds its own)",
        show_default=False),
    non_periodic: bool = typer.Option(False, "--non-periodic",
                                      help="the data are not periodic (finite differences)"),
    transfer_weight: float = typer.Option(
        0.0, "--transfer-weight", help="also fit the energy (and 2-D enstrophy) transfer, "
                                       "with this weight relative to the target"),
    seed: int = typer.Option(0, "--seed", help="seed of the snapshot resampling"),
    resamples: int = typer.Option(20, "--resamples",
                                  help="fits on random halves of the training snapshots for "
                                       "the selection frequencies (0: none)"),
    snapshots: str | None = typer.Option(None, "--snapshots",
                                         help="time indices to use, e.g. 0-9,12 (default all)",
                                         show_default=False),
    reference_net: bool = typer.Option(
        False, "--reference-net", help="also train a small convolutional network (needs "
        "torch==2.13.0) on the same snapshots and score it beside the model"),
    net_epochs: int | None = typer.Option(
        None, "--net-epochs", help="training budget of --reference-net in epochs (default 300)",
        show_default=False),
    net_seconds: float | None = typer.Option(
        None, "--net-seconds", help="training time limit of --reference-net, s (default 120)",
        show_default=False),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="print only the output path"),
    land: str = typer.Option(LAND_OPTION_DEFAULT, "--land", help=LAND_OPTION_HELP),
) -> None:
    """Fit a sparse closure from candidate terms, score it on held-out snapshots, write it."""
    from closure import pipeline

    if output.exists() and output.is_dir():
        raise OptionError(f"-o {output} is a folder: give a file name such as "
                          f"{output / 'model.json'}")
    if output.exists() and input.exists() and output.resolve() == input.resolve():
        raise OptionError(f"the output {output} is the input file: choose another -o "
                          "(input files are never written)")
    spec = build_spec(input, filter=filter, width=width, width_units=width_units, ratio=ratio,
                      target=target, library=library, method=method, scheme=scheme,
                      test_fraction=test_fraction, var=var, scalar=scalar,
                      non_periodic=non_periodic, transfer_weight=transfer_weight, seed=seed,
                      resamples=resamples, snapshots=snapshots, land=land,
                      reference_net=reference_net, net_epochs=net_epochs,
                      net_seconds=net_seconds)
    with progress_bar(not quiet, "planning", _LABELS) as progress:
        model = pipeline.discover(spec, progress=progress)
    path = model.save(output)
    if not quiet:
        typer.echo(model.summary())
    typer.echo(f"written: {path}")
