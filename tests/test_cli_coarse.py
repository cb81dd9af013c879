import numpy as np
import pytest
import xarray as xr

from closure.cli import main
from closure.cli.coarse import parse_var_options
from closure.errors import OptionError
from closure.io import sha256_file

L = 2 * np.pi


# Transfer functions of Pope (2000), Turbulent Flows, Table 13.2
def pope_G(kind, k, D):
    if kind == "box":
        return np.sinc(k * D / (2 * np.pi))  # sin(kD/2)/(kD/2)
    if kind == "gaussian":
        return np.exp(-(k**2) * D**2 / 24)
    return float(abs(k) < np.pi / D)


# a few modes (a, k_x, k_y, phase) per field
MODES = {
    "U": [(1.0, 1, 0, 0.0), (0.4, 3, 2, 0.5), (0.2, 5, -1, 1.0)],
    "V": [(0.7, 0, 1, 0.2), (0.3, 2, -3, 0.0)],
    "theta": [(2.0, 1, 1, 0.0), (0.5, 4, 0, 0.3)],
}


def modes_field(modes, X, Y):
    return sum(a * np.cos(kx * X + ky * Y + ph) for a, kx, ky, ph in modes)


def filtered_modes(modes, X, Y, kind, Dx, Dy):
    return sum(a * pope_G(kind, kx, Dx) * pope_G(kind, ky, Dy) * np.cos(kx * X + ky * Y + ph)
               for a, kx, ky, ph in modes)


@pytest.fixture
def few_modes(make_netcdf):
    n = (24, 32)
    y = np.arange(n[0]) * L / n[0]
    x = np.arange(n[1]) * L / n[1]
    Y, X = np.meshgrid(y, x, indexing="ij")
    fields = {k: np.stack([modes_field(m, X, Y) * (1 + 0.5 * t) for t in range(2)])
              for k, m in MODES.items()}
    fields["theta"] = (fields["theta"], {"units": "K"})
    return make_netcdf(fields, name="fine.nc")


def run(capsys, *args):
    code = main(list(map(str, args)))
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
def test_output_is_the_table_13_2_filter_of_each_mode(few_modes, tmp_path, capsys, kind):
    out = tmp_path / "coarse.nc"
    code, stdout, err = run(capsys, "coarse-grain", few_modes, "--filter", kind, "--width", 6,
                            "--ratio", 4, "--var", "u=U", "--var", "v=V", "--scalar", "theta",
                            "-o", out)
    assert code == 0, err
    ds = xr.open_dataset(out)
    Yc, Xc = np.meshgrid(ds.y.values, ds.x.values, indexing="ij")
    Dy, Dx = 6 * L / 24, 6 * L / 32
    for name, modes in MODES.items():
        for t in range(2):
            expected = filtered_modes(modes, Xc, Yc, kind, Dx, Dy) * (1 + 0.5 * t)
            np.testing.assert_allclose(ds[name].values[t], expected, atol=1e-13, err_msg=name)
    assert "wrote" in stdout and "2 snapshot(s)" in stdout and "coarse grid 6 x 8" in stdout
    assert "mean pi" in stdout and "backscatter fraction" in stdout
    ds.close()


def test_block_output_matches_xarray_coarsen(few_modes, tmp_path, capsys):
    out = tmp_path / "block.nc"
    code, _, err = run(capsys, "coarse-grain", few_modes, "--filter", "block", "--ratio", 4,
                       "--var", "u=U", "--var", "v=V", "-o", out)
    assert code == 0, err
    fine = xr.open_dataset(few_modes)
    ref = fine.coarsen(x=4, y=4).mean()  # reference: xarray
    ds = xr.open_dataset(out)
    np.testing.assert_allclose(ds["U"].values, ref["U"].values, atol=1e-14)
    np.testing.assert_allclose(ds["x"].values, ref["x"].values, atol=1e-14)
    uu = (fine["U"] ** 2).coarsen(x=4, y=4).mean()
    np.testing.assert_allclose(ds["tau_xx"].values, uu.values - ref["U"].values ** 2, atol=1e-13)
    assert ds.attrs["filter_kind"] == "block"
    assert ds.attrs["filter_second_moment_x"] == pytest.approx(15 * (L / 32) ** 2 / 12)
    fine.close()
    ds.close()


def test_output_variables_and_attributes(few_modes, tmp_path, capsys):
    out = tmp_path / "o.nc"
    code, stdout, err = run(capsys, "coarse-grain", few_modes, "--filter", "gaussian",
                            "--width", 0.9, "--width-units", "coordinate", "--ratio", 2,
                            "--var", "u=U", "--var", "v=V", "--scalar", "theta", "-o", out)
    assert code == 0, err
    # nothing but progress lines on stderr (no warnings)
    assert [line for line in err.splitlines() if not line.startswith("progress: ")] == []
    ds = xr.open_dataset(out)
    expected = {"U", "V", "theta", "vorticity", "tau_xx", "tau_xy", "tau_yy", "force_x",
                "force_y", "flux_theta_x", "flux_theta_y", "pi", "vorticity_forcing",
                "enstrophy_transfer", "snapshot"}
    assert set(ds.data_vars) == expected
    for name in expected - {"snapshot"}:
        assert ds[name].attrs["long_name"], name
        assert ds[name].dims == ("time", "y", "x")
        assert "units" in ds[name].attrs, name
    for d in ("x", "y"):
        assert ds[d].attrs["units"] == "m"
    a = ds.attrs
    assert a["Conventions"] == "CF-1.8"
    assert a["filter_kind"] == "gaussian" and a["coarsening_ratio"] == 2
    assert a["filter_width_x"] == pytest.approx(0.9)
    assert a["filter_width_cells_x"] == pytest.approx(0.9 / (L / 32))
    assert a["filter_second_moment_y"] == pytest.approx(0.9**2 / 12)  # Pope (2000) Table 13.2
    assert a["source_file"] == str(few_modes)
    assert a["source_sha256"] == sha256_file(few_modes)
    assert a["periodic"] == 1
    assert "exp(-k^2 D^2 / 24)" in a["filter_transfer_function"]
    ds.close()


def test_sharp_filter_notes_the_undefined_second_moment(few_modes, tmp_path, capsys):
    out = tmp_path / "s.nc"
    code, _, err = run(capsys, "coarse-grain", few_modes, "--filter", "spectral", "--ratio", 2,
                       "--var", "u=U", "--var", "v=V", "-o", out)
    assert code == 0, err
    with xr.open_dataset(out) as ds:
        assert "no finite second moment" in ds.attrs["filter_second_moment_note"]
        assert "filter_second_moment_x" not in ds.attrs


def test_3d_and_1d_names(make_netcdf, tmp_path, capsys):
    rng = np.random.default_rng(0)
    p3 = make_netcdf({c: rng.standard_normal((1, 4, 8, 8)) for c in "uvw"},
                     dims=("time", "z", "y", "x"), name="f3.nc")
    code, _, err = run(capsys, "coarse-grain", p3, "--ratio", 2, "-o", tmp_path / "c3.nc")
    assert code == 0, err
    with xr.open_dataset(tmp_path / "c3.nc") as ds:
        assert {"tau_xz", "tau_yz", "tau_zz", "force_z", "w"} <= set(ds.data_vars)
        assert "vorticity" not in ds.data_vars
    p1 = make_netcdf({"u": rng.standard_normal((3, 32))}, dims=("time", "x"), name="f1.nc")
    code, _, err = run(capsys, "coarse-grain", p1, "--filter", "box", "--ratio", 4,
                       "--non-periodic", "-o", tmp_path / "c1.nc")
    assert code == 0, err
    with xr.open_dataset(tmp_path / "c1.nc") as ds:
        assert set(ds.data_vars) == {"u", "tau_xx", "force_x", "pi", "snapshot"}
        assert ds.attrs["periodic"] == 0 and "fd4" in ds.attrs["subgrid_derivatives"]


def test_progress_bar_on_a_terminal_lines_in_a_log(few_modes, tmp_path, capsys, monkeypatch):
    import sys

    args = ("coarse-grain", few_modes, "--var", "u=U", "--var", "v=V", "--ratio", 2)
    code, stdout, err = run(capsys, *args, "-o", tmp_path / "log.nc")
    assert code == 0 and stdout.count("\n") == 1 and stdout.startswith("wrote ")
    assert "progress: coarse-graining snapshots 2/2" in err  # plain lines for a batch log
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    monkeypatch.setenv("FORCE_COLOR", "1")  # rich decides from the stream; make it a terminal
    code, stdout, err = run(capsys, *args, "-o", tmp_path / "bar.nc")
    assert code == 0 and stdout.count("\n") == 1
    assert "coarse-graining" in err and "2/2" in err and "progress: " not in err


def test_narrow_filter_warns_on_stderr(few_modes, tmp_path, capsys):
    code, _, err = run(capsys, "coarse-grain", few_modes, "--width", 2, "--ratio", 4,
                       "--var", "u=U", "--var", "v=V", "-o", tmp_path / "n.nc")
    assert code == 0
    assert err.startswith("warning: filter width") and "narrower than the coarse spacing" in err


# --- every bad input: exit 2, one clear line, no traceback, input untouched ------------------

def _write(path, text):
    path.write_text(text)
    return path


BAD = {
    "missing variable": (lambda mk, tmp: mk({"U": np.zeros((1, 8, 8)), "V": np.zeros((1, 8, 8))}),
                         [], r"variable 'u' \(x velocity\) not found .*variables are: U, V\. "
                             r"Map it with --var u=NAME"),
    "not netcdf": (lambda mk, tmp: _write(tmp / "x.nc", "plain text"), [],
                   "could not be read as netCDF"),
    "mismatched dims": (lambda mk, tmp: mk({"u": np.zeros((1, 8, 8)), "v": np.zeros((1, 8))},
                                          var_dims={"v": ("time", "x")}), [],
                        r"'v' \(v\) .* has dims \(time, x\) but 'u' \(u\) has \(time, y, x\)"),
    "non-uniform": (lambda mk, tmp: mk({"u": np.zeros((1, 8)), "v": np.zeros((1, 8))},
                                       dims=("time", "x"),
                                       coords={"x": np.r_[0.0, 1, 2, 3.5, 4, 5, 6, 7]}),
                    [], "coordinate 'x' .* is not uniformly spaced"),
    "Inf": (lambda mk, tmp: mk({"u": np.where(np.arange(24).reshape(3, 8) == 17, np.inf, 0.0)},
                               dims=("time", "x")), ["--ratio", "2"],
            r"variable 'u' has 1 Inf value\(s\) at snapshot 2 of .*replace it with NaN"),
    "snapshot out of range": (lambda mk, tmp: mk({"u": np.zeros((2, 8))}, dims=("time", "x")),
                              ["--ratio", "2", "--snapshots", "0,5"],
                              r"--snapshots \[5\] out of range: the input has 2 snapshot"),
    "too few points": (lambda mk, tmp: mk({"u": np.zeros((1, 8))}, dims=("time", "x")),
                       ["--ratio", "16"], "8 points in x, fewer than the ratio 16: use a "
                                          "smaller --ratio"),
    "width beyond domain": (lambda mk, tmp: mk({"u": np.zeros((1, 8))}, dims=("time", "x")),
                            ["--ratio", "2", "--width", "9"],
                            r"filter width .* \(9 grid spacings\) is larger than the domain in "
                            r"x .*8 points\): use a smaller --width"),
    "ratio not dividing": (lambda mk, tmp: mk({"u": np.zeros((1, 10))}, dims=("time", "x")),
                           ["--ratio", "4"], "10 points in x is not a multiple of the ratio 4"),
    "unknown filter": (lambda mk, tmp: mk({"u": np.zeros((1, 8))}, dims=("time", "x")),
                       ["--filter", "tophat"], "unknown filter 'tophat': choose one of"),
    "bad --var": (lambda mk, tmp: mk({"u": np.zeros((1, 8))}, dims=("time", "x")),
                  ["--var", "u:U"], "--var expects OURS=FILE_NAME"),
    "sharp non-periodic": (lambda mk, tmp: mk({"u": np.zeros((1, 8))}, dims=("time", "x")),
                           ["--filter", "spectral", "--ratio", "2", "--non-periodic"],
                           "sharp spectral filter needs periodic data"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_gives_a_clear_error_and_leaves_the_input_alone(case, make_netcdf, tmp_path,
                                                                  capsys):
    import re

    make, extra, pattern = BAD[case]
    path = make(make_netcdf, tmp_path)
    before = sha256_file(path)
    out = tmp_path / "out.nc"
    code, _, err = run(capsys, "coarse-grain", path, *extra, "-o", out)
    assert code == 2
    err = "".join(line for line in err.splitlines(keepends=True)
                  if not line.startswith("progress: "))
    assert err.startswith("error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err
    assert re.search(pattern, err), err
    assert sha256_file(path) == before
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temp files left


def test_missing_input_file(tmp_path, capsys):
    code, _, err = run(capsys, "coarse-grain", tmp_path / "none.nc", "-o", tmp_path / "o.nc")
    assert code == 2 and "error: no such file" in err


def test_output_may_not_be_the_input(few_modes, capsys):
    before = sha256_file(few_modes)
    code, _, err = run(capsys, "coarse-grain", few_modes, "--var", "u=U", "--var", "v=V",
                       "-o", few_modes)
    assert code == 2 and "is the input file" in err
    assert sha256_file(few_modes) == before


def test_parse_var_options():
    assert parse_var_options(["u=U", " v = V "]) == {"u": "U", "v": "V"}
    assert parse_var_options(None) == {}
    with pytest.raises(OptionError, match="twice"):
        parse_var_options(["u=A", "u=B"])
    with pytest.raises(OptionError, match="expects"):
        parse_var_options(["u="])


def test_output_files_honour_the_umask(few_modes, tmp_path, capsys):
    import os
    import stat

    from closure.io import write_netcdf

    old = os.umask(0o022)
    try:
        code, _, err = run(capsys, "coarse-grain", few_modes, "--var", "u=U", "--var", "v=V",
                           "--ratio", 2, "-o", tmp_path / "c.nc")
        assert code == 0, err
        written = write_netcdf(xr.Dataset({"a": ("x", np.zeros(4))}), tmp_path / "w.nc")
    finally:
        os.umask(old)
    for path in (tmp_path / "c.nc", written):
        assert stat.S_IMODE(path.stat().st_mode) == 0o644  # as open() gives under umask 022
