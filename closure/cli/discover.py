"""CLI command: ``closure discover``, fit a closure to one file in this process."""

from __future__ import annotations

from pathlib import Path

import typer

from closure.cli.progress import progress_bar
from closure.errors import OptionError


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("discover")(discover)


_LABELS = {"plan": "planning", "map": "snapshots", "fit": "fitting",
           "score": "scoring held-out snapshots"}


def build_spec(input: Path, *, filter: str, width: float | None, width_units: str, ratio: int,
               target: str, library: str, method: str, scheme: str, test_fraction: float,
               var: list[str] | None, scalar: list[str] | None, non_periodic: bool,
               transfer_weight: float, seed: int, resamples: int, snapshots: str | None,
               memory_limit: str | None = None, fine_float32: bool = False):
    """The JobSpec of a ``closure discover`` command line (OptionError naming a bad option)."""
    from closure.cli.coarse import parse_var_options
    from closure.outofcore import parse_memory
    from closure.spec import parse_spec

    chosen = None
    if snapshots:
        try:
            chosen = _index_list(snapshots)
        except ValueError:
            raise OptionError(f"--snapshots expects indices like 0,2,5-9, got {snapshots!r}") \
                from None
    return parse_spec({
        "input": {"path": str(input), "variables": parse_var_options(var),
                  "scalars": list(scalar or []), "periodic": not non_periodic,
                  "snapshots": chosen},
        "filter": {"kind": filter, "width": width, "width_units": width_units, "ratio": ratio},
        "target": target,
        "library": library,
        "scheme": scheme,
        "fit": {"method": method, "test_fraction": test_fraction, "resamples": resamples,
                "transfer_weight": transfer_weight, "seed": seed},
        "memory_limit": parse_memory(memory_limit),
        "fine_float32": bool(fine_float32),
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
                               help="what to model: stress, force, vorticity or flux:NAME"),
    library: str = typer.Option("default", "--library",
                                help="candidate terms: default, classic, minimal, or a terms "
                                     "file (.yaml/.json)"),
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
    memory_limit: str | None = typer.Option(
        None, "--memory-limit", help="memory one snapshot may use, e.g. 8G or 0.25 (of the "
        "machine's); larger snapshots are processed by slabs, spilling to files under "
        "TMPDIR (default: half the machine's memory)", show_default=False),
    float32: bool = typer.Option(False, "--float32",
                                 help="fine-grid pass in float32 (relative error ~1e-6)"),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="print only the output path"),
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
                      resamples=resamples, snapshots=snapshots, memory_limit=memory_limit,
                      fine_float32=float32)
    with progress_bar(not quiet, "planning", _LABELS) as progress:
        model = pipeline.discover(spec, progress=progress)
    path = model.save(output)
    if not quiet:
        typer.echo(model.summary())
    typer.echo(f"written: {path}")
