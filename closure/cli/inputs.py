"""The input options every command shares (one set of typer options, validated in one place).

A command takes the fine-grid inputs as arguments (``INPUTS``: netCDF files, globs such as
``'run/snap_*.nc'``, a folder of netCDF files or a Zarr store) and the options below;
:func:`input_dict` turns them into the ``input`` section of a job spec (closure.spec.InputSpec),
which is what every command opens (closure.io.open_input) and what models record.
"""

from __future__ import annotations

from collections.abc import Sequence

import typer

from closure.errors import OptionError

INPUTS = typer.Argument(..., metavar="INPUTS", show_default=False,
                        help="fine-grid input(s), read only: netCDF files, a quoted glob "
                             "('run/snap_*.nc'), a folder of netCDF files or a Zarr store")
VAR = typer.Option(None, "--var", show_default=False,
                   help="map our name to the file's, e.g. --var u=U (dims too: --var x=lon); "
                        "wins over names found by CF standard_name")
SCALAR = typer.Option(None, "--scalar", show_default=False,
                      help="passive scalar to read (repeatable)")
GROUP = typer.Option(None, "--group", show_default=False,
                     help="netCDF-4 group holding the variables, e.g. ocean/surface")
MASK = typer.Option(None, "--mask", show_default=False,
                    help="variable whose nonzero values mark fluid points (NaN and fill values "
                         "are land too)")
LEVELS = typer.Option(None, "--levels", show_default=False,
                      help="analyse z levels as 2-D fields: all, or indices like 0,5,10")
PER_LEVEL = typer.Option(False, "--per-level",
                         help="one model per level (default: the levels pooled into one)")
SPACING = typer.Option(None, "--spacing", show_default=False,
                       help="grid spacing DX[,DY[,DZ]] in length units, for inputs without "
                            "coordinate variables (replaces coordinates that exist)")
SNAPSHOTS = typer.Option(None, "--snapshots", show_default=False,
                         help="time indices to use, e.g. 0-9,12 (default all)")
NON_PERIODIC = typer.Option(False, "--non-periodic",
                            help="the data are not periodic (finite differences, reflecting "
                                 "filter edges)")


def parse_var_options(items: Sequence[str] | None) -> dict[str, str]:
    """``["u=U", "v=V"]`` -> ``{"u": "U", "v": "V"}``; OptionError on a malformed item."""
    out: dict[str, str] = {}
    for item in items or []:
        ours, sep, theirs = item.partition("=")
        ours, theirs = ours.strip(), theirs.strip()
        if not sep or not ours or not theirs:
            raise OptionError(f"--var expects OURS=FILE_NAME (e.g. --var u=U), got {item!r}")
        if ours in out and out[ours] != theirs:
            raise OptionError(f"--var gives {ours!r} twice ({out[ours]!r} and {theirs!r})")
        out[ours] = theirs
    return out


def parse_indices(text: str | None, what: str = "--snapshots") -> list[int] | None:
    """``"0,2,5-7"`` -> ``[0, 2, 5, 6, 7]``; None stays None."""
    if text is None:
        return None
    out: list[int] = []
    try:
        for part in text.split(","):
            part = part.strip()
            if "-" in part.lstrip("-"):
                a, b = part.split("-", 1)
                out += list(range(int(a), int(b) + 1))
            elif part:
                out.append(int(part))
    except ValueError:
        raise OptionError(f"{what} expects indices like 0,2,5-9, got {text!r}") from None
    if not out:
        raise OptionError(f"{what} is empty: give indices like 0,2,5-9")
    return out


def parse_levels(text: str | None) -> str | list[int] | None:
    """``"all"`` or ``"0,5,10"`` (ranges too: ``"0-3"``) -> ``"all"`` / a list; None stays."""
    if text is None:
        return None
    if text.strip().lower() == "all":
        return "all"
    levels = parse_indices(text, "--levels")
    if any(k < 0 for k in levels):
        raise OptionError(f"--levels are indices from 0, got {text!r}")
    return levels


def parse_spacing(text: str | None) -> list[float] | None:
    """``"0.5"`` or ``"1000,1000"`` (DX[,DY[,DZ]]) -> a list of positive numbers."""
    if text is None:
        return None
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise OptionError(f"--spacing expects DX[,DY[,DZ]] numbers, e.g. --spacing 1000,1000, "
                          f"got {text!r}") from None
    if not 1 <= len(values) <= 3 or any(not v > 0 or v == float("inf") for v in values):
        raise OptionError(f"--spacing expects one to three positive numbers DX[,DY[,DZ]], got "
                          f"{text!r}")
    return values


def input_dict(inputs: Sequence[str] | str | None, *, var: Sequence[str] | None = None,
               scalar: Sequence[str] | None = None, group: str | None = None,
               mask: str | None = None, levels: str | None = None, per_level: bool = False,
               spacing: str | None = None, snapshots: str | None = None,
               non_periodic: bool = False, defaults: dict | None = None) -> dict:
    """The ``input`` section of a job spec from the shared options (OptionError naming a bad
    option). Options left unset keep ``defaults`` (e.g. a spec file's input section)."""
    from closure.spec import InputSpec

    out = {k: v for k, v in (defaults or {}).items() if k not in ("dataset_id", "sha256")}
    if inputs is not None:
        paths = [inputs] if isinstance(inputs, str) else [str(p) for p in inputs]
        if not paths:
            raise OptionError("give at least one input file")
        out["path"] = paths[0] if len(paths) == 1 else paths
    for key, value in (("variables", parse_var_options(var) if var else None),
                       ("scalars", list(scalar) if scalar else None),
                       ("group", group), ("mask", mask), ("levels", parse_levels(levels)),
                       ("spacing", parse_spacing(spacing)),
                       ("snapshots", parse_indices(snapshots))):
        if value is not None:
            out[key] = value
    if per_level:
        out["per_level"] = True
    if non_periodic:
        out["periodic"] = False
    if out.get("per_level") and out.get("levels") is None:
        raise OptionError("--per-level needs --levels (all, or indices like 0,5,10)")
    if "path" in out:
        from pydantic import ValidationError

        from closure.spec import format_validation_error

        try:
            InputSpec.model_validate(out)
        except ValidationError as exc:
            raise OptionError(format_validation_error(exc).replace("job spec", "input options",
                                                                   1)) from None
    return out


def open_options(inputs, **options):
    """Open the inputs named by the shared options (closure.io.open_input)."""
    from closure.io import open_input
    from closure.spec import InputSpec

    return open_input(InputSpec.model_validate(input_dict(inputs, **options)))


def echo_notes(notes: Sequence[str], warnings: Sequence[str] = ()) -> None:
    """Print how the input was read (names found by standard name, dims by axis) and its
    warnings to stderr."""
    for n in notes:
        typer.echo(f"note: {n}", err=True)
    for w in warnings:
        typer.echo(f"warning: {w}", err=True)
