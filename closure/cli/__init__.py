"""The ``closure`` command line: one typer app; each command group lives in its own module."""

from __future__ import annotations

import sys

import typer

from closure.errors import UserError

app = typer.Typer(
    name="closure",
    help="Discover subgrid-scale closures from high-resolution simulation data.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)



def _print_version(value: bool) -> None:
    if value:
        from closure import __version__

        typer.echo(__version__)
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", callback=_print_version, is_eager=True,
                                 help="Print the closure version and exit."),
) -> None:
    """Discover subgrid-scale closures from high-resolution simulation data."""


@app.command()
def version() -> None:
    """Print the closure version."""
    from closure import __version__

    typer.echo(__version__)


# Each module defines ``register(app)``; the order here is the order in --help.
from closure.cli import synth, coarse, discover, terms, apply, service, les, report  # noqa: E402,I001

for _module in (synth, coarse, discover, terms, apply, service, les, report):
    _module.register(app)
__import__("closure.cli.products", fromlist=["register"]).register(app)  # coarse-grain jobs


def main(argv: list[str] | None = None) -> int:
    """Console entry point: user errors print one line and exit 2, no traceback."""
    try:
        # without standalone mode click returns (not raises) the code of a typer.Exit
        code = app(args=argv, standalone_mode=False)
        if isinstance(code, int) and code:
            return code
    except UserError as exc:
        typer.echo(f"error: {exc}", err=True)
        return 2
    except typer.Exit as exc:
        return exc.exit_code
    except typer.Abort:
        typer.echo("aborted", err=True)
        return 130
    except Exception as exc:  # usage errors carry their own exit code and message
        if hasattr(exc, "show") and hasattr(exc, "exit_code"):
            exc.show()
            return exc.exit_code
        raise
    return 0


if __name__ == "__main__":
    sys.exit(main())
