"""CLI commands: report (module filled in by its owner)."""

import typer


def register(app: typer.Typer) -> None:
    """Add this module's commands to the app."""
