"""CLI commands: coarse-grain a fine-grid file into filtered fields and exact subgrid terms."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import typer

from closure.errors import OptionError


def parse_var_options(items: list[str] | None) -> dict[str, str]:
    """``["u=U", "v=V"]`` -> ``{"u": "U", "v": "V"}``; OptionError on a malformed item."""
    out = {}
    for item in items or []:
        ours, sep, theirs = item.partition("=")
        ours, theirs = ours.strip(), theirs.strip()
        if not sep or not ours or not theirs:
            raise OptionError(f"--var expects OURS=FILE_NAME (e.g. --var u=U), got {item!r}")
        if ours in out and out[ours] != theirs:
            raise OptionError(f"--var gives {ours!r} twice ({out[ours]!r} and {theirs!r})")
        out[ours] = theirs
    return out


def coarse_grain(
    input: Path = typer.Argument(..., help="fine-grid netCDF file (read only)",
                                 show_default=False),
    output: Path = typer.Option(..., "-o", "--output", help="coarse netCDF file to write",
                                show_default=False),
    filter: str = typer.Option("gaussian", "--filter",
                               help="filter kind: box, gaussian, spectral or block"),
    width: float | None = typer.Option(
        None, "--width", help="filter width D (default 2*ratio grid spacings; block: the ratio)",
        show_default=False),
    width_units: str = typer.Option("grid", "--width-units",
                                    help="units of --width: grid (spacings) or coordinate"),
    ratio: int = typer.Option(4, "--ratio", help="coarsening ratio (keep every ratio-th point)"),
    var: list[str] | None = typer.Option(
        None, "--var", help="map our name to the file's, e.g. --var u=U (also x=lon)",
        show_default=False),
    scalar: list[str] | None = typer.Option(
        None, "--scalar", help="passive scalar to carry and compute fluxes of (repeatable)",
        show_default=False),
    non_periodic: bool = typer.Option(False, "--non-periodic",
                                      help="the data are not periodic (finite differences, "
                                           "reflecting filter edges)"),
    memory_limit: str | None = typer.Option(
        None, "--memory-limit", help="memory one snapshot may use, e.g. 8G or 0.25 (of the "
        "machine's); larger snapshots are processed by slabs, spilling to files under "
        "TMPDIR (default: half the machine's memory)", show_default=False),
    float32: bool = typer.Option(False, "--float32",
                                 help="fine-grid pass in float32 (relative error ~1e-6)"),
) -> None:
    """Filter and coarsen every snapshot; write filtered fields and exact subgrid terms."""
    from closure.filters import make_coarse_graining
    from closure.io import CoarseWriter, open_fields
    from closure.outofcore import (
        SourceSlabs,
        coarse_grain_out_of_core,
        needs_out_of_core,
        parse_memory,
    )
    from closure.residuals import coarse_grain_snapshot

    variables = parse_var_options(var)
    limit = parse_memory(memory_limit)
    with open_fields(input, variables, tuple(scalar or ()), periodic=not non_periodic) as src:
        if output.exists() and output.resolve() == src.path.resolve():
            raise OptionError(f"the output {output} is the input file: choose another -o "
                              "(input files are never written)")
        cg = make_coarse_graining(filter, src.grid, ratio, width, width_units)
        for w in cg.warnings():
            typer.echo(f"warning: {w}", err=True)
        n = src.n_snapshots
        slabs = float32 or needs_out_of_core(src.grid, len(src.velocity) + len(src.scalars),
                                             limit)  # every target: the force included
        pi_sum, back, count = 0.0, 0, 0
        with CoarseWriter(output, src.describe()) as writer, _progress(n) as advance:
            for i in range(n):
                if slabs:
                    cs = coarse_grain_out_of_core(SourceSlabs(src, i), cg, src.scalars,
                                                  memory_limit=limit,
                                                  dtype=np.float32 if float32 else np.float64)
                else:
                    cs = coarse_grain_snapshot(src.snapshot(i), cg, src.scalars)
                writer.append(cs)
                pi = cs.targets["pi"]
                pi_sum += float(pi.sum())
                back += int(np.count_nonzero(pi < 0))  # backscatter: pi < 0
                count += pi.size
                advance()
        shape = " x ".join(map(str, cg.coarse.shape))
        typer.echo(f"wrote {output}: {n} snapshot(s), coarse grid {shape} "
                   f"({', '.join(cg.coarse.dims)}), {cg.kind} filter, ratio {cg.ratio}, "
                   f"mean pi {pi_sum / count:.4g}, backscatter fraction {back / count:.3f}")


def _progress(total: int):
    """Progress of the snapshots: a bar on a terminal, plain lines in a batch log. Yields an
    ``advance()``."""
    from contextlib import contextmanager

    from closure.cli.progress import progress_bar

    @contextmanager
    def counter():
        with progress_bar(True, "coarse-graining") as update:
            done = [0]
            update("coarse-graining snapshots", 0, total)

            def advance() -> None:
                done[0] += 1
                update("coarse-graining snapshots", done[0], total)

            yield advance

    return counter()


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("coarse-grain")(coarse_grain)

