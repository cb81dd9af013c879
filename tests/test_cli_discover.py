import json
import subprocess
import sys

import numpy as np
import pytest
from test_pipeline import smooth_fields

from closure.cli import main
from closure.cli.discover import build_spec
from closure.errors import OptionError
from closure.model import ClosureModel


@pytest.fixture(scope="module")
def small_file(tmp_path_factory):
    return smooth_fields(tmp_path_factory.mktemp("cli") / "in.nc", n=64, snapshots=5)


def test_discover_prints_a_summary_and_writes_a_loadable_model(small_file, tmp_path, capsys):
    out = tmp_path / "model.json"
    rc = main(["discover", str(small_file), "--filter", "gaussian", "--width", "4", "--ratio",
               "4", "--target", "stress", "--method", "lasso", "--resamples", "3",
               "--seed", "2", "-o", str(out)])
    text = capsys.readouterr().out
    assert rc == 0
    assert "Closure model for stress" in text and "gradient_model" in text
    assert "a posteriori" in text  # the caution is part of the summary
    assert f"written: {out}" in text
    model = ClosureModel.load(out)
    assert model.method == "lasso" and model.settings["seed"] == 2
    assert "gradient_model" in [t.name for t in model.active_terms]
    assert json.loads(out.read_text())["format"] == "closure-model"


def test_options_become_the_job_spec(small_file):
    spec = build_spec(small_file, filter="box", width=3.0, width_units="grid", ratio=2,
                      target="flux:c", library="classic", method="ard", scheme="fd4",
                      test_fraction=0.5, var=["u=U", "v=V"], scalar=["c"], non_periodic=True,
                      transfer_weight=0.5, seed=7, resamples=0, snapshots="0-2,4", jobs=3)
    assert spec.filter.kind == "box" and spec.filter.width == 3.0 and spec.filter.ratio == 2
    assert spec.input.variables == {"u": "U", "v": "V"} and spec.input.periodic is False
    assert spec.input.snapshots == [0, 1, 2, 4]
    assert (spec.fit.method, spec.fit.test_fraction, spec.fit.transfer_weight, spec.fit.seed) \
        == ("ard", 0.5, 0.5, 7)
    assert spec.target == "flux:c" and spec.scheme == "fd4"
    assert spec.jobs == 3 and "jobs" not in spec.fingerprint()  # results do not depend on it


def test_bad_options_exit_2_with_a_message(small_file, tmp_path, capsys):
    rc = main(["discover", str(small_file), "--target", "pressure", "-o",
               str(tmp_path / "m.json")])
    assert rc == 2
    assert "error: invalid job spec: target" in capsys.readouterr().err
    rc = main(["discover", str(small_file), "-o", str(tmp_path)])
    assert rc == 2 and "is a folder" in capsys.readouterr().err
    rc = main(["discover", str(small_file), "--snapshots", "a-b", "-o", str(tmp_path / "m")])
    assert rc == 2 and "--snapshots expects" in capsys.readouterr().err
    rc = main(["discover", str(small_file), "--snapshots", "0", "-o", str(tmp_path / "m")])
    assert rc == 2 and "at least 2" in capsys.readouterr().err
    rc = main(["discover", str(small_file), "--jobs", "0", "-o", str(tmp_path / "m")])
    assert rc == 2 and "jobs: must be at least 1 (got 0)" in capsys.readouterr().err
    with pytest.raises(OptionError, match="--var expects"):
        build_spec(small_file, filter="box", width=None, width_units="grid", ratio=2,
                   target="stress", library="default", method="threshold", scheme="spectral",
                   test_fraction=0.25, var=["u"], scalar=None, non_periodic=False,
                   transfer_weight=0.0, seed=0, resamples=0, snapshots=None)
    assert not (tmp_path / "m.json").exists()


@pytest.mark.slow
def test_console_command_end_to_end(small_file, tmp_path):
    out = tmp_path / "m.json"
    proc = subprocess.run([sys.executable, "-c", "import sys; from closure.cli import main; "
                           "sys.exit(main())", "discover", str(small_file), "--ratio", "4",
                           "--width", "4", "-q", "-o", str(out)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == f"written: {out}"
    model = ClosureModel.load(out)
    assert np.isfinite(model.coefficients_scaled).all()
