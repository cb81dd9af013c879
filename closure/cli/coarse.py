"""CLI commands: coarse-grain a fine-grid file into filtered fields and exact subgrid terms."""

from __future__ import annotations

import sys
from contextlib import nullcontext
from pathlib import Path

import numpy as np
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
    echo_notes,
    open_options,
    parse_indices,
    parse_var_options,
)
from closure.errors import OptionError

__all__ = ["coarse_grain", "parse_var_options", "register"]


def coarse_grain(
    inputs: list[str] = INPUTS,
    output: Path = typer.Option(..., "-o", "--output", help="coarse netCDF file to write (with "
                                "--levels: one file per level, NAME_levelK.nc)",
                                show_default=False),
    filter: str = typer.Option("gaussian", "--filter",
                               help="filter kind: box, gaussian, spectral or block"),
    width: float | None = typer.Option(
        None, "--width", help="filter width D (default 2*ratio grid spacings; block: the ratio)",
        show_default=False),
    width_units: str = typer.Option("grid", "--width-units",
                                    help="units of --width: grid (spacings) or coordinate"),
    ratio: int = typer.Option(4, "--ratio", help="coarsening ratio (keep every ratio-th point)"),
    var: list[str] | None = VAR,
    scalar: list[str] | None = SCALAR,
    group: str | None = GROUP,
    mask: str | None = MASK,
    levels: str | None = LEVELS,
    spacing: str | None = SPACING,
    snapshots: str | None = SNAPSHOTS,
    non_periodic: bool = NON_PERIODIC,
) -> None:
    """Filter and coarsen every snapshot; write filtered fields and exact subgrid terms."""
    from closure.cli.discover import check_output, level_output
    from closure.filters import make_coarse_graining
    from closure.io import CoarseWriter
    from closure.pipeline import refuse_land_mask
    from closure.residuals import coarse_grain_snapshot

    check_output(output, inputs)
    with open_options(inputs, var=var, scalar=scalar, group=group, mask=mask, levels=levels,
                      spacing=spacing, snapshots=snapshots, non_periodic=non_periodic) as src:
        for p in src.paths:
            if output.exists() and output.resolve() == p.resolve():
                raise OptionError(f"the output {output} is the input file: choose another -o "
                                  "(input files are never written)")
        echo_notes(src.notes, src.warnings)
        cg = make_coarse_graining(filter, src.grid, ratio, width, width_units)
        for w in cg.warnings():
            typer.echo(f"warning: {w}", err=True)
        chosen = parse_indices(snapshots)
        indices = list(range(src.n_snapshots)) if chosen is None else chosen
        bad = [i for i in indices if not 0 <= i < src.n_snapshots]
        if bad:
            raise OptionError(f"--snapshots {bad} out of range: the input has "
                              f"{src.n_snapshots} snapshot(s), indices 0..{src.n_snapshots - 1}")
        stack = [None] if src.levels is None else list(src.levels)
        n = len(indices)
        for level in stack:
            target = output if level is None else level_output(output, level)
            pi_sum, back, count = 0.0, 0, 0
            source = src.describe()
            if level is not None:
                source["level"] = level
            with CoarseWriter(target, source) as writer, _progress(n) as advance:
                for i in indices:
                    snap = src.snapshot(i, level)
                    refuse_land_mask(snap)
                    cs = coarse_grain_snapshot(snap, cg, src.scalars)
                    writer.append(cs)
                    pi = cs.targets["pi"]
                    pi_sum += float(pi.sum())
                    back += int(np.count_nonzero(pi < 0))  # backscatter: pi < 0
                    count += pi.size
                    advance()
            shape = " x ".join(map(str, cg.coarse.shape))
            typer.echo(f"wrote {target}: {n} snapshot(s), coarse grid {shape} "
                       f"({', '.join(cg.coarse.dims)}), {cg.kind} filter, ratio {cg.ratio}, "
                       f"mean pi {pi_sum / count:.4g}, backscatter fraction {back / count:.3f}")


def _progress(total: int):
    """A rich progress bar on a terminal; nothing otherwise. Yields an ``advance()``."""
    if not sys.stdout.isatty():
        return nullcontext(lambda: None)
    from contextlib import contextmanager

    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

    @contextmanager
    def bar():
        with Progress("coarse-graining", BarColumn(), MofNCompleteColumn(),
                      TimeRemainingColumn(), transient=True) as p:
            task = p.add_task("snapshots", total=total)
            yield lambda: p.advance(task)

    return bar()


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
    app.command("coarse-grain")(coarse_grain)

