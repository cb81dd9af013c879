import io

from closure.cli import progress


def test_progress_bar_only_on_a_terminal(monkeypatch):
    with progress.progress_bar(False) as update:  # disabled (--quiet): nothing at all
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


def test_progress_lines_without_a_terminal():
    out = io.StringIO()
    now = [0.0]
    update = progress.progress_lines({"map": "snapshots"}, interval=10.0, stream=out,
                                     clock=lambda: now[0])
    update("map", 0, 8)          # nothing done yet: no line
    update("map", 1, 8)          # the first step: one line
    now[0] = 1.0
    update("map", 2, 8)          # within the interval: nothing
    now[0] = 12.0
    update("map", 5, 8)          # interval passed: one line
    update("map", 8, 8)          # complete: one line, once
    update("map", 8, 8)
    update("reduce", 1, 1)       # another phase, complete at once
    lines = out.getvalue().splitlines()
    assert lines == ["progress: snapshots 1/8 (0.0 s)", "progress: snapshots 5/8 (12.0 s)",
                     "progress: snapshots 8/8 (12.0 s)", "progress: reduce 1/1 (12.0 s)"]


def test_progress_bar_gives_lines_in_a_batch_log(capsys):
    with progress.progress_bar(True, labels={"map": "snapshots"}) as update:
        update("map", 2, 2)
    assert "progress: snapshots 2/2" in capsys.readouterr().err


def test_long_commands_report_progress_without_a_terminal(tmp_path, capsys):
    from closure.cli import main

    fine, coarse = tmp_path / "b.nc", tmp_path / "c.nc"
    assert main(["synth", "burgers", "-o", str(fine), "--n", "64", "--snapshots", "3"]) == 0
    assert "progress: " in capsys.readouterr().err
    assert main(["coarse-grain", str(fine), "--ratio", "2", "-o", str(coarse)]) == 0
    err = capsys.readouterr().err
    assert "progress: coarse-graining snapshots 3/3" in err


def test_version_option(capsys):
    from closure import __version__
    from closure.cli import main

    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == __version__
