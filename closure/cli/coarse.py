"""CLI commands: coarse-grain a fine-grid file into filtered fields and exact subgrid terms."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import typer

from closure.cli.discover import GAMMA, GAS_CONSTANT, PRANDTL
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
    land: str = typer.Option("zero", "--land",
                             help="land points (mask, NaN or fill values): zero (land as zero "
                                  "velocity, Aluie, Hecht & Vallis 2018) or fluid (filter "
                                  "normalised over fluid points); land is NaN in the output, "
                                  "and so are the subgrid terms wherever the filter footprint "
                                  "touches land"),
    memory_limit: str | None = typer.Option(
        None, "--memory-limit", help="memory one snapshot may use, e.g. 8G or 0.25 (of the "
        "machine's); larger snapshots are processed by slabs, spilling to files under "
        "TMPDIR (default: half the machine's memory)", show_default=False),
    float32: bool = typer.Option(False, "--float32",
                                 help="fine-grid pass in float32 (relative error ~1e-6)"),
    compressible: bool = typer.Option(
        False, "--compressible", help="compressible data: read rho, u, v[, w], p and T (one "
        "of p and T suffices with the gas constant) and write Favre-filtered fields and the "
        "exact Favre subgrid terms (stress, force, heat flux, pressure-dilatation, transfer); "
        "land is always filtered over the fluid only (weight rho times the mask), whatever "
        "--land says"),
    gamma: float | None = GAMMA,
    gas_constant: float | None = GAS_CONSTANT,
    prandtl: float | None = PRANDTL,
) -> None:
    """Filter and coarsen every snapshot; write filtered fields and exact subgrid terms."""
    from closure.cli.discover import check_output, gas_options, level_output
    from closure.filters import LAND_CONVENTIONS, make_coarse_graining
    from closure.io import CoarseWriter
    from closure.outofcore import (
        SourceSlabs,
        coarse_grain_out_of_core,
        needs_out_of_core,
        parse_memory,
    )
    from closure.residuals import coarse_grain_snapshot

    if land not in LAND_CONVENTIONS:
        raise OptionError(f"--land must be one of {', '.join(LAND_CONVENTIONS)}, got {land!r}")

    limit = parse_memory(memory_limit)
    check_output(output, inputs)
    gas = gas_options(gamma, gas_constant, prandtl)
    if compressible:
        return _coarse_grain_compressible(
            inputs, output, filter=filter, width=width, width_units=width_units, ratio=ratio,
            var=var, scalar=scalar, group=group, mask=mask, levels=levels, spacing=spacing,
            snapshots=snapshots, non_periodic=non_periodic, float32=float32, gas=gas)
    if gas:
        raise OptionError("--gamma, --gas-constant and --prandtl are gas constants of "
                          "compressible data: add --compressible, or drop them")
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
        # by slabs when a snapshot would not fit (every target: the force included); level
        # stacks and land stay in memory
        slabs = src.levels is None and mask is None and (float32 or needs_out_of_core(
            src.grid, len(src.velocity) + len(src.scalars), limit))
        n = len(indices)
        for level in stack:
            target = output if level is None else level_output(output, level)
            pi_sum, back, count, excluded = 0.0, 0, 0, 0
            source = src.describe()
            if level is not None:
                source["level"] = level
            with CoarseWriter(target, source) as writer, _progress(n) as advance:
                for i in indices:
                    if slabs:
                        cs = coarse_grain_out_of_core(
                            SourceSlabs(src, i), cg, src.scalars, memory_limit=limit,
                            dtype=np.float32 if float32 else np.float64)
                    else:
                        cs = coarse_grain_snapshot(src.snapshot(i, level), cg, src.scalars,
                                                   land=land)
                    writer.append(cs)
                    pi = cs.targets["pi"]
                    if cs.valid is not None:  # land: only points whose footprint avoids it
                        excluded += int(cs.valid.size - np.count_nonzero(cs.valid))
                        pi = pi[cs.valid]
                    pi_sum += float(pi.sum())
                    back += int(np.count_nonzero(pi < 0))  # backscatter: pi < 0
                    count += pi.size
                    advance()
            shape = " x ".join(map(str, cg.coarse.shape))
            stats = (f"mean pi {pi_sum / count:.4g}, backscatter fraction {back / count:.3f}"
                     if count else "no coarse point clear of land")
            land_note = (f"; {excluded} coarse point(s) touched by land (NaN subgrid terms, "
                         f"convention {land!r})" if excluded else "")
            typer.echo(f"wrote {target}: {n} snapshot(s), coarse grid {shape} "
                       f"({', '.join(cg.coarse.dims)}), {cg.kind} filter, ratio {cg.ratio}, "
                       f"{stats}{land_note}")


def _coarse_grain_compressible(inputs, output: Path, *, filter, width, width_units, ratio, var,
                               scalar, group, mask, levels, spacing, snapshots, non_periodic,
                               float32, gas) -> None:
    """``coarse-grain --compressible``: Favre filtering (closure.favre) of every snapshot, in
    memory; the gas constants (file attributes, overridden by the options) go into the file."""
    from closure.cli.discover import level_output
    from closure.cli.inputs import input_dict
    from closure.favre import favre_coarse_grain, gas_constants, open_compressible
    from closure.filters import make_coarse_graining
    from closure.io import CoarseWriter, open_input
    from closure.spec import InputSpec

    if scalar:
        raise OptionError("--scalar with --compressible: the Favre coarse-graining carries "
                          "rho, the velocity, p and T only; drop --scalar")
    if float32:
        raise OptionError("--float32 with --compressible: the Favre pass runs in float64 in "
                          "memory; drop --float32")
    inp = InputSpec.model_validate(input_dict(
        inputs, var=var, group=group, mask=mask, levels=levels, spacing=spacing,
        snapshots=snapshots, non_periodic=non_periodic))
    with open_compressible(lambda scalars: open_input(inp, scalars), gas,
                           variables=inp.variables) as src:
        for p in src.paths:
            if output.exists() and output.resolve() == p.resolve():
                raise OptionError(f"the output {output} is the input file: choose another -o "
                                  "(input files are never written)")
        echo_notes(src.notes, src.warnings)
        constants = gas_constants(src, gas)
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
        for level in stack:
            target = output if level is None else level_output(output, level)
            source = src.describe()
            if level is not None:
                source["level"] = level
            pi_sum, back, count, excluded = 0.0, 0, 0, 0
            with CoarseWriter(target, source, gas=constants) as writer, \
                    _progress(len(indices)) as advance:
                for i in indices:
                    cs = favre_coarse_grain(src.snapshot(i, level), cg,
                                            gas_constant=constants.get("gas_constant"))
                    writer.append(cs)
                    pi = cs.targets["pi"]
                    if cs.valid is not None:  # land: only points whose footprint avoids it
                        excluded += int(cs.valid.size - np.count_nonzero(cs.valid))
                        pi = pi[cs.valid]
                    pi_sum += float(pi.sum())
                    back += int(np.count_nonzero(pi < 0))
                    count += pi.size
                    advance()
            shape = " x ".join(map(str, cg.coarse.shape))
            recorded = ", ".join(f"{k} {v:g}" for k, v in constants.items()) or "none recorded"
            stats = (f"mean pi {pi_sum / count:.4g}, backscatter fraction {back / count:.3f}"
                     if count else "no coarse point clear of land")
            land_note = (f"; {excluded} coarse point(s) touched by land (NaN subgrid terms, "
                         "filters normalised over the fluid)" if excluded else "")
            typer.echo(f"wrote {target}: {len(indices)} snapshot(s), coarse grid {shape} "
                       f"({', '.join(cg.coarse.dims)}), Favre ({cg.kind} filter, ratio "
                       f"{cg.ratio}), {stats}{land_note}; gas constants: {recorded}")


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

