import io

from closure.cli import progress


def test_progress_bar_only_on_a_terminal(monkeypatch):
    with progress.progress_bar(True) as update:  # pytest's stderr is not a terminal
        assert update is None

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    monkeypatch.setattr(progress.sys, "stderr", Terminal())
    with progress.progress_bar(False) as update:
        assert update is None
    with progress.progress_bar(True, "planning", {"map": "snapshots"}) as update:
        assert callable(update)
        update("map", 3, 8)  # drawn on the fake terminal, no exception
