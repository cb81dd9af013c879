"""CLI command: closure terms (list a candidate library, show the terms-file syntax)."""

from __future__ import annotations

import typer

from closure.errors import OptionError

_DIMS = {"1": ("x",), "2": ("y", "x"), "3": ("z", "y", "x")}


def terms(
    target: str = typer.Option("stress", help="stress, force, vorticity or flux:NAME; with a "
                               "compressible library also heat_flux or pressure_dilatation"),
    dims: str = typer.Option("2", help="number of space dimensions: 1, 2 or 3"),
    library: str = typer.Option("default", help="a preset (default, classic, minimal; "
                                "compressible, compressible_classic, compressible_minimal) "
                                "or a terms file"),
    scalar: list[str] = typer.Option([], help="scalar fields the terms may use (repeatable)"),
    latex: bool = typer.Option(False, help="print each component as LaTeX"),
    syntax: bool = typer.Option(False, help="print the terms-file syntax and exit"),
) -> None:
    """List the candidate terms of a library: names, powers of Delta, expressions, and the
    preset terms left out as exact combinations of others."""
    import closure.library as lib

    if syntax:
        doc = lib.__doc__ or ""
        start = doc.index("Terms files (user-defined terms)")
        typer.echo(doc[start:].rstrip())
        return
    if dims not in _DIMS:
        raise OptionError(f"--dims must be 1, 2 or 3, got {dims!r}")
    chosen = lib.make_library(library, target, _DIMS[dims], scalars=tuple(scalar))
    typer.echo(f"library {chosen.name} for {chosen.target} in {dims}-D "
               f"({', '.join(chosen.components)}): {len(chosen.terms)} term(s)")
    for term in chosen.terms:
        typer.echo(f"\n{term.name}  (Delta^{term.delta_power})  {term.description}")
        shown = term.latex if latex else {k: str(v) for k, v in term.components.items()}
        for key, text in shown.items():
            typer.echo(f"  {key or 'value'}: {text}")
    for note in chosen.dropped:
        typer.echo(f"\nleft out: {note}")
    for note in chosen.warnings:
        typer.echo(f"\nwarning: {note}")


def register(app: typer.Typer) -> None:
    """Add the terms command."""
    app.command("terms")(terms)
