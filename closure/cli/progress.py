"""The progress bar that long commands show on a terminal."""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable, Iterator, Mapping

Progress = Callable[[str, int, int], None]


@contextlib.contextmanager
def progress_bar(enabled: bool, first: str = "starting",
                 labels: Mapping[str, str] | None = None) -> Iterator[Progress | None]:
    """A rich progress bar on stderr when it is a terminal, as a ``progress(phase, done,
    total)`` callback (phases shown through ``labels``); None otherwise, so output that goes to
    a file or a pipe stays clean."""
    if not (enabled and sys.stderr.isatty()):
        yield None
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, TimeElapsedColumn
    from rich.progress import Progress as Bar

    labels = labels or {}
    with Bar("[progress.description]{task.description}", BarColumn(), MofNCompleteColumn(),
             TimeElapsedColumn(), console=Console(stderr=True), transient=True) as bar:
        task = bar.add_task(first, total=None)

        def update(phase: str, done: int, total: int) -> None:
            bar.update(task, description=labels.get(phase, phase), completed=done, total=total)

        yield update
