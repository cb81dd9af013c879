"""The progress that long commands show: a bar on a terminal, plain lines in batch logs."""

from __future__ import annotations

import contextlib
import sys
import time
from collections.abc import Callable, Iterator, Mapping

Progress = Callable[[str, int, int], None]

#: seconds between two progress lines of the same phase when stderr is not a terminal
LINE_INTERVAL = 10.0


def progress_lines(labels: Mapping[str, str] | None = None, interval: float = LINE_INTERVAL,
                   stream=None, clock: Callable[[], float] = time.monotonic) -> Progress:
    """A ``progress(phase, done, total)`` callback writing plain lines for batch logs:
    ``progress: <phase> <done>/<total> (<elapsed> s)``: one at a phase's first step, one when
    it completes, and at most one per ``interval`` seconds in between (nothing before the first
    step, so an error at once is the only line)."""
    labels = labels or {}
    start = clock()
    state = {"phase": None, "last": -float("inf"), "finished": set()}

    def update(phase: str, done: int, total: int) -> None:
        if done <= 0:
            return
        now = clock()
        complete = bool(total) and done >= total
        if phase == state["phase"] and not complete and now - state["last"] < interval:
            return
        if complete and phase in state["finished"]:
            return
        if complete:
            state["finished"].add(phase)
        state["phase"], state["last"] = phase, now
        count = f"{done}/{total}" if total else f"{done}"
        out = stream if stream is not None else sys.stderr
        print(f"progress: {labels.get(phase, phase)} {count} ({now - start:.1f} s)", file=out,
              flush=True)

    return update


@contextlib.contextmanager
def progress_bar(enabled: bool, first: str = "starting",
                 labels: Mapping[str, str] | None = None) -> Iterator[Progress | None]:
    """Progress on stderr as a ``progress(phase, done, total)`` callback (phases shown
    through ``labels``): a rich bar on a terminal, plain throttled lines otherwise (batch logs
    see what a long command is doing); None when disabled. Standard output stays clean."""
    if not enabled:
        yield None
        return
    if not sys.stderr.isatty():
        yield progress_lines(labels)
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
