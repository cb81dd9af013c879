"""Real model output in: several files, Zarr, groups, float32 and missing coordinates, CF
standard names, level stacks, curvilinear grids; xarray is the independent reader throughout."""

import hashlib
import json

import netCDF4
import numpy as np
import pytest
import xarray as xr

from closure import pipeline
from closure.cli import main
from closure.errors import InputFileError, OptionError, UserError
from closure.io import input_files, input_sha256, open_fields, sha256_file
from closure.spec import parse_spec
from closure.synth import turb2d, write


@pytest.fixture(scope="module")
def dns(tmp_path_factory):
    """A small 2-D turbulence file of our own solver (6 snapshots, 32^2) and its dataset."""
    folder = tmp_path_factory.mktemp("dns")
    ds = turb2d(n=32, snapshots=6, interval=0.3, spinup=1.0, seed=4).drop_vars("vorticity")
    return write(ds, folder / "one.nc"), ds


def spec(path, **inp):
    return parse_spec({"input": {"path": path, **inp},
                       "filter": {"kind": "gaussian", "ratio": 2},
                       "library": "classic",
                       "fit": {"resamples": 2, "test_fraction": 0.34}})


def split(ds, folder, pattern="snap_{:02d}.nc"):
    """One file per snapshot, written by xarray (the layout of most DNS codes)."""
    folder.mkdir(exist_ok=True)
    paths = []
    for i in range(ds.sizes["time"]):
        p = folder / pattern.format(i)
        ds.isel(time=slice(i, i + 1)).to_netcdf(p)
        paths.append(p)
    return paths


# --- several files and Zarr ---------------------------------------------------------------------

def test_split_files_glob_folder_and_zarr_give_the_one_file_model(dns, tmp_path):
    one, ds = dns
    reference = pipeline.discover(spec(str(one)))
    paths = split(ds, tmp_path / "run")
    # two snapshots per file for the list, so files need not hold one snapshot each
    pairs = [tmp_path / f"pair_{k}.nc" for k in range(3)]
    for k, p in enumerate(pairs):
        ds.isel(time=slice(2 * k, 2 * k + 2)).to_netcdf(p)
    store = tmp_path / "copy.zarr"
    ds.to_zarr(store, consolidated=False)
    for given in (str(tmp_path / "run" / "snap_*.nc"), str(tmp_path / "run"),
                  [str(p) for p in reversed(pairs)], str(store)):
        model = pipeline.discover(spec(given))
        np.testing.assert_allclose(model.coefficients_scaled, reference.coefficients_scaled,
                                   rtol=1e-12, atol=1e-14)
        assert model.scores["test"]["r2"] == pytest.approx(reference.scores["test"]["r2"],
                                                           rel=1e-12)
        assert model.provenance["snapshots"] == reference.provenance["snapshots"]
    # the checksum policy: one file hashes as itself; several as the sorted per-file hashes
    assert reference.provenance["sha256"] == hashlib.sha256(one.read_bytes()).hexdigest()
    lines = sorted(hashlib.sha256(p.read_bytes()).hexdigest() for p in paths)
    expected = hashlib.sha256("\n".join(lines).encode()).hexdigest()
    assert pipeline.plan(spec(str(tmp_path / "run")))["sha256"] == expected
    assert input_sha256(list(reversed(paths))) == expected  # order does not matter
    assert len(pipeline.plan(spec(str(store)))["sha256"]) == 64


def test_several_files_are_read_lazily_in_time_order(dns, tmp_path):
    _, ds = dns
    paths = split(ds, tmp_path / "run", "part_{:02d}.nc")
    shuffled = [str(paths[k]) for k in (3, 0, 5, 1, 4, 2)]
    with open_fields(shuffled) as src:
        assert src.n_snapshots == 6 and len(src.paths) == 6
        np.testing.assert_allclose(src.times, ds["time"].values)
        for i in (0, 4):
            np.testing.assert_array_equal(src.snapshot(i).fields["u"], ds["u"].values[i])
        assert src.file_of(4) == (paths[4], 0)
        assert src.sha256 == input_sha256(paths)
        assert sum(p._ds is not None for p in src._parts) == 1  # one open file at a time


def test_many_files_hold_one_file_handle(dns, tmp_path):
    import os

    _, ds = dns
    one = ds.isel(time=slice(0, 1))
    paths = []
    for i in range(40):
        p = tmp_path / f"s{i:03d}.nc"
        one.assign_coords(time=[float(i)]).to_netcdf(p)
        paths.append(p)
    before = len(os.listdir("/proc/self/fd"))
    with open_fields(str(tmp_path / "s*.nc")) as src:
        for i in (0, 39, 7):
            src.snapshot(i)
        assert len(os.listdir("/proc/self/fd")) - before <= 2
        assert src.n_snapshots == 40 and src.time_of(39) == 39.0


def test_overlapping_times_mixed_grids_and_names_are_refused_naming_the_files(dns, tmp_path):
    _, ds = dns
    a, b = tmp_path / "a.nc", tmp_path / "b.nc"
    ds.isel(time=slice(0, 3)).to_netcdf(a)
    ds.isel(time=slice(2, 5)).to_netcdf(b)
    with pytest.raises(InputFileError, match=r"a.nc and .*b.nc overlap in time .*drop one"):
        open_fields([a, b])
    c = tmp_path / "c.nc"
    ds.isel(time=slice(3, 6), x=slice(0, 16)).to_netcdf(c)
    with pytest.raises(InputFileError, match=r"a.nc and .*c.nc are on different grids \(32 x 32 "
                                             r".* vs 32 x 16 .*\): give files of one grid"):
        open_fields([a, c])
    d = tmp_path / "d.nc"
    ds.isel(time=slice(3, 6)).rename({"u": "U"}).to_netcdf(d)
    with pytest.raises(InputFileError, match="variable 'u' .* not found in .*d.nc"):
        open_fields([a, d])
    e = tmp_path / "e.nc"
    renamed = ds.isel(time=slice(3, 6)).rename({"u": "U"})
    renamed["U"].attrs["standard_name"] = "sea_water_x_velocity"
    renamed.to_netcdf(e)
    with pytest.raises(InputFileError, match=r"a.nc and .*e.nc name the fields differently"):
        open_fields([a, e])


def test_input_files_expands_globs_folders_and_keeps_zarr_stores(dns, tmp_path):
    _, ds = dns
    paths = split(ds, tmp_path / "run")
    (tmp_path / "run" / "notes.txt").write_text("not data")
    store = tmp_path / "s.zarr"
    ds.to_zarr(store, consolidated=False)
    assert input_files(str(tmp_path / "run")) == paths
    assert input_files(str(tmp_path / "run" / "snap_0[12].nc")) == paths[1:3]
    assert input_files([str(store), str(paths[0]), str(paths[0])]) == [store, paths[0]]
    assert input_files("run/snap_00.nc", base=tmp_path) == [paths[0]]
    with pytest.raises(InputFileError, match="no such file: .*nothere.nc"):
        input_files([str(paths[0]), str(tmp_path / "nothere.nc")])


# --- groups --------------------------------------------------------------------------------------

def test_netcdf4_group_read_and_clear_messages(dns, tmp_path):
    one, ds = dns
    path = tmp_path / "grouped.nc"
    ds.to_netcdf(path, group="ocean/surface")
    with pytest.raises(InputFileError, match=r"keeps its variables in groups: /ocean/surface; "
                                             r"choose one with --group PATH"):
        open_fields(path)
    with pytest.raises(InputFileError, match=r"has no group 'atm'; its groups with variables "
                                             r"are: /ocean/surface. Fix --group"):
        open_fields(path, group="atm")
    with open_fields(path, group="ocean/surface") as src, open_fields(one) as plain:
        assert src.grid == plain.grid and src.group == "ocean/surface"
        np.testing.assert_array_equal(src.snapshot(2).fields["v"], ds["v"].values[2])
    assert pipeline.discover(spec(str(path), group="ocean/surface")).coefficients_scaled == \
        pytest.approx(pipeline.discover(spec(str(one))).coefficients_scaled, rel=1e-12)


def test_group_uses_coordinates_defined_in_the_parent_group(tmp_path):
    path = tmp_path / "inherit.nc"
    n = 8
    with netCDF4.Dataset(path, "w") as nc:
        for d in ("y", "x"):
            nc.createDimension(d, n)
            c = nc.createVariable(d, "f8", (d,))
            c[:] = 0.25 * np.arange(n)
            c.units = "km"
        g = nc.createGroup("model")
        for name in ("u", "v"):
            g.createVariable(name, "f8", ("y", "x"))[:] = np.ones((n, n))
    with open_fields(path, group="model") as src:
        assert src.grid.spacing == (0.25, 0.25) and src.grid.units == "km"


# --- coordinates ---------------------------------------------------------------------------------

def test_float32_coordinates_pass_and_non_uniform_ones_still_fail(dns, tmp_path):
    _, ds = dns
    n = 256  # the usual float32 coordinate: i * 2 pi / n rounded to float32
    x32 = (np.arange(n) * (2 * np.pi / n)).astype(np.float32)
    f = xr.Dataset({"u": (("x",), np.ones(n))}, coords={"x": ("x", x32, {"units": "m"})})
    f.to_netcdf(tmp_path / "f32.nc")
    # xarray as the independent reader: the stored steps vary at float32 precision, by more
    # than the 1e-6 relative tolerance that float64 coordinates get
    steps = np.diff(xr.open_dataset(tmp_path / "f32.nc")["x"].values.astype(float))
    assert np.ptp(steps) > 1e-6 * steps.mean()
    with open_fields(tmp_path / "f32.nc", periodic=False) as src:
        assert src.grid.spacing[0] == pytest.approx(2 * np.pi / n, rel=1e-6)
    bad = x32.copy()
    bad[100:] += np.float32(0.01 * 2 * np.pi / n)  # one step 1 % longer: not round-off
    f.assign_coords(x=("x", bad)).to_netcdf(tmp_path / "bad32.nc")
    with pytest.raises(InputFileError, match=r"not uniformly spaced .*tolerance .* for float32 "
                                             r"values.*--spacing"):
        open_fields(tmp_path / "bad32.nc")


def test_missing_coordinates_need_spacing_or_give_a_stored_warning(dns, tmp_path):
    _, ds = dns
    bare = tmp_path / "bare.nc"
    ds.drop_vars(["x", "y"]).to_netcdf(bare)
    with open_fields(bare) as src:
        assert src.grid.spacing == (1.0, 1.0) and src.spacing_from == "grid index"
        assert any("no coordinate variables for y, x" in w for w in src.warnings)
    model = pipeline.discover(spec(str(bare)))
    assert any("grid spacing is 1 (grid-index units)" in w and "--spacing" in w
               for w in model.warnings)
    h = float(ds["x"][1] - ds["x"][0])
    given = pipeline.discover(spec(str(bare), spacing=[h]))
    assert not any("grid-index" in w for w in given.warnings)
    assert given.provenance["input_options"]["spacing"] == [h]
    # the same physical grid as the file with coordinates: Delta in metres, not in cells
    with_coords = pipeline.discover(spec(str(dns[0])))
    assert given.delta == pytest.approx(with_coords.delta, rel=1e-12)
    assert model.delta == pytest.approx(with_coords.delta / h, rel=1e-12)
    np.testing.assert_allclose(given.coefficients, with_coords.coefficients, rtol=1e-9,
                               atol=1e-12)
    with pytest.raises(InputFileError, match=r"--spacing gives 3 value\(s\) but the grid has 2 "
                                             r"direction\(s\) \(x, y\)"):
        open_fields(bare, spacing=[1, 2, 3])


def test_velocity_units_and_cf_time_are_recorded_in_model_and_export(dns, tmp_path):
    _, ds = dns
    cf = ds.copy()
    cf["time"] = ("time", np.arange(6.0), {"units": "days since 2000-01-01",
                                           "calendar": "noleap"})
    cf["u"].attrs["units"] = cf["v"].attrs["units"] = "cm s-1"
    path = tmp_path / "cf.nc"
    cf.to_netcdf(path)
    model = pipeline.discover(spec(str(path)))
    read = model.provenance["input_read"]
    assert read["velocity_units"] == {"u": "cm s-1", "v": "cm s-1"}
    assert model.provenance["units"]["u"] == "cm s-1"
    # decoded by xarray/cftime independently (CF conventions 1.8, sec. 4.4)
    coder = xr.coders.CFDatetimeCoder(use_cftime=True)
    decoded = xr.open_dataset(path, decode_times=coder)["time"].values
    assert read["time"]["first"] == decoded[0].isoformat()
    assert read["time"]["last"] == decoded[-1].isoformat()
    assert read["time"]["calendar"] == "noleap"
    from closure.export import export_model

    assert "velocity: cm s-1" in export_model(model, "python")


def test_curvilinear_and_degree_coordinates_say_only_rectilinear_grids(tmp_path):
    n = 8
    lat, lon = np.meshgrid(np.linspace(40, 41, n), np.linspace(0, 1, n), indexing="ij")
    curvy = xr.Dataset({"u": (("time", "nj", "ni"), np.ones((1, n, n))),
                        "v": (("time", "nj", "ni"), np.ones((1, n, n)))},
                       coords={"lat": (("nj", "ni"), lat, {"units": "degrees_north"}),
                               "lon": (("nj", "ni"), lon + 0.01 * lat,
                                       {"units": "degrees_east"})})
    curvy.to_netcdf(tmp_path / "curvy.nc")
    with pytest.raises(InputFileError, match=r"2-D coordinates lat\(nj, ni\), lon\(nj, ni\): a "
                                             r"curvilinear grid. closure supports rectilinear "
                                             r"grids .*--var x=NAME --var y=NAME and give "
                                             r"--spacing DX,DY"):
        open_fields(tmp_path / "curvy.nc")
    with open_fields(tmp_path / "curvy.nc", {"x": "ni", "y": "nj"}, spacing=[1000.0]) as src:
        assert src.grid.spacing == (1000.0, 1000.0)
    deg = xr.Dataset({"u": (("y", "x"), np.ones((n, n))), "v": (("y", "x"), np.ones((n, n)))},
                     coords={"y": ("y", np.linspace(40, 41, n), {"units": "degrees_north"}),
                             "x": ("x", np.linspace(0, 1, n), {"units": "degrees_east"})})
    deg.to_netcdf(tmp_path / "deg.nc")
    with pytest.raises(InputFileError, match=r"coordinate 'y' .* is in degrees_north: .*"
                                             r"latitude/longitude metrics are not supported yet"
                                             r".*--spacing DX,DY in metres"):
        open_fields(tmp_path / "deg.nc")
    with open_fields(tmp_path / "deg.nc", spacing=[500.0, 400.0]) as src:
        assert src.grid.spacing == (400.0, 500.0)  # (y, x) order of the grid, given x first
        assert any("replaces the coordinates of y, x" in w for w in src.warnings)


def test_dimensions_found_by_their_cf_axis(dns, tmp_path):
    _, ds = dns
    renamed = ds.rename({"x": "xc", "y": "yc", "time": "t"})
    for d, axis in (("xc", "X"), ("yc", "Y"), ("t", "T")):
        renamed[d].attrs["axis"] = axis
    renamed.to_netcdf(tmp_path / "axes.nc")
    with open_fields(tmp_path / "axes.nc") as src, open_fields(dns[0]) as plain:
        assert src.grid == plain.grid and src.n_snapshots == 6
        assert "dimension 'xc' read as x (axis X); --var x=NAME overrides" in src.notes


# --- CF standard names ---------------------------------------------------------------------------

def test_standard_name_discovery_equals_the_var_mapping(dns, tmp_path):
    _, ds = dns
    cf = ds.rename({"u": "uo", "v": "vo"})
    # CF standard name table: eastward_sea_water_velocity / northward_sea_water_velocity
    cf["uo"].attrs["standard_name"] = "eastward_sea_water_velocity"
    cf["vo"].attrs["standard_name"] = "northward_sea_water_velocity"
    cf["decoy"] = cf["uo"] * 2
    cf["decoy"].attrs = {"standard_name": "sea_surface_height"}
    path = tmp_path / "cf.nc"
    cf.to_netcdf(path)
    found = pipeline.discover(spec(str(path)))
    mapped = pipeline.discover(spec(str(path), variables={"u": "uo", "v": "vo"}))
    np.testing.assert_array_equal(found.coefficients_scaled, mapped.coefficients_scaled)
    assert found.provenance["input_read"]["standard_names"] == {
        "u": "eastward_sea_water_velocity", "v": "northward_sea_water_velocity"}
    assert "u read from 'uo' (standard_name eastward_sea_water_velocity); --var u=NAME " \
           "overrides" in found.provenance["notes"]
    assert mapped.provenance["input_read"]["standard_names"] == {}
    # --var always wins over the standard name
    with open_fields(path, {"u": "decoy"}) as src:
        assert src.names == {"u": "decoy", "v": "vo"}
    twice = cf.copy()
    twice["u2"] = cf["uo"]
    twice.to_netcdf(tmp_path / "twice.nc")
    with pytest.raises(InputFileError, match=r"several variables with standard_name "
                                             r"'eastward_sea_water_velocity' \(uo, u2\): choose "
                                             r"one with --var u=NAME"):
        open_fields(tmp_path / "twice.nc")


def test_wind_standard_names(dns, tmp_path):
    _, ds = dns
    cf = ds.rename({"u": "ua", "v": "va"})
    cf["ua"].attrs["standard_name"] = "eastward_wind"
    cf["va"].attrs["standard_name"] = "northward_wind"
    cf.to_netcdf(tmp_path / "wind.nc")
    with open_fields(tmp_path / "wind.nc") as src:
        assert src.names == {"u": "ua", "v": "va"}


# --- level stacks --------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def stack(dns, tmp_path_factory):
    """(time, z, y, x) horizontal velocity only, on three unevenly spaced levels."""
    _, ds = dns
    folder = tmp_path_factory.mktemp("stack")
    levels = [ds[["u", "v"]].roll(x=4 * k, roll_coords=False) * (1 + 0.5 * k) for k in range(3)]
    st = xr.concat(levels, dim="z").transpose("time", "z", "y", "x")
    st = st.assign_coords(z=("z", [0.0, 5.0, 25.0], {"units": "m", "positive": "down"}))
    st.attrs = {}
    path = folder / "stack.nc"
    st.to_netcdf(path)
    return path, st, folder


def test_level_stack_without_w_points_to_levels(stack):
    path, _, _ = stack
    with pytest.raises(InputFileError, match=r"variable 'w' \(z velocity\) not found.*"
                                             r"--levels all \(or --levels 0,5,10\)"):
        open_fields(path)
    with open_fields(path, levels="all") as src:
        assert src.grid.dims == ("y", "x") and src.levels == (0, 1, 2)
        assert src.level_values == [0.0, 5.0, 25.0] and src.velocity == ("u", "v")
    with pytest.raises(UserError, match=r"--levels \[7\] out of range: the input has 3 level"):
        open_fields(path, levels=[7])
    flat = stack[2] / "flat.nc"
    stack[1].isel(z=0).to_netcdf(flat)
    with pytest.raises(InputFileError, match="--levels needs a z dimension.*drop --levels"):
        open_fields(flat, levels="all")


def test_pooled_level_statistics_equal_the_sum_of_per_level_statistics(stack):
    path, st, folder = stack
    per_level = []
    for k in range(3):  # each level written as its own 2-D file by xarray
        p = folder / f"level{k}.nc"
        st.isel(z=k).drop_vars("z").to_netcdf(p)
        s = spec(str(p))
        per_level.append(pipeline.map_snapshot(s, pipeline.plan(s), 3))
    pooled_spec = spec(str(path), levels=[0, 2])
    pooled = pipeline.map_snapshot(pooled_spec, pipeline.plan(pooled_spec), 3)
    assert pooled.snapshots == (3,)
    for name in ("gram", "xy", "yy", "x_sum", "y_sum", "weight_sum", "count"):
        np.testing.assert_allclose(getattr(pooled, name),
                                   getattr(per_level[0], name) + getattr(per_level[2], name),
                                   rtol=1e-13, atol=1e-13)
    # one level of the stack is exactly that level's 2-D file
    one_spec = spec(str(path), levels=[1])
    one = pipeline.map_snapshot(one_spec, pipeline.plan(one_spec), 3)
    assert one.equals(per_level[1], rtol=1e-13)
    model = pipeline.discover(spec(str(path), levels="all"))
    assert model.provenance["input_options"]["levels"] == [0, 1, 2]
    assert any("3 z levels pooled" in w for w in model.warnings)


def test_per_level_gives_one_model_per_level(stack):
    path, st, folder = stack
    s = spec(str(path), levels=[0, 2], per_level=True)
    with pytest.raises(UserError, match="gives one model per level: run `closure discover "
                                        "--per-level`"):
        pipeline.discover(s)
    models = pipeline.discover_levels(s)
    assert [k for k, _ in models] == [0, 2]
    p = folder / "level2_alone.nc"
    st.isel(z=2).drop_vars("z").to_netcdf(p)
    alone = pipeline.discover(spec(str(p)))
    np.testing.assert_allclose(models[1][1].coefficients_scaled, alone.coefficients_scaled,
                               rtol=1e-12, atol=1e-14)


# --- land ----------------------------------------------------------------------------------------

def test_land_from_a_mask_variable_equals_land_from_nan(dns, tmp_path):
    # the same coast given two ways (a mask variable, NaN in the velocity) is the same land:
    # identical models, and the excluded coarse points are counted in the model
    _, ds = dns
    sea = np.where(np.arange(32)[None, :] < 3, 0, 1) * np.ones((32, 1))
    wet = ds.copy()
    wet["sea"] = (("y", "x"), sea)
    wet.to_netcdf(tmp_path / "coast_mask.nc")
    nan = ds.copy()
    for c in ("u", "v"):
        nan[c] = nan[c].where(sea[None] == 1)
    nan.to_netcdf(tmp_path / "coast_nan.nc")

    def fd4(path, **inp):
        return spec(path, **inp).model_copy(update={"scheme": "fd4"})

    by_mask = pipeline.discover(fd4(str(tmp_path / "coast_mask.nc"), mask="sea"))
    by_nan = pipeline.discover(fd4(str(tmp_path / "coast_nan.nc")))
    np.testing.assert_array_equal(by_mask.coefficients_scaled, by_nan.coefficients_scaled)
    land = by_mask.settings["land"]
    assert land["excluded_points"] > 0 and land["convention"] == "zero"
    assert any("land:" in w for w in by_mask.warnings)
    with pytest.raises(UserError, match="spectral derivatives .* use --scheme fd2 or fd4"):
        pipeline.discover(spec(str(tmp_path / "coast_mask.nc"), mask="sea"))


# --- the spec and the command line ---------------------------------------------------------------

def test_input_spec_validation_messages():
    base = {"filter": {"ratio": 2}}
    with pytest.raises(OptionError, match="input: .*per_level needs input.levels"):
        parse_spec({**base, "input": {"path": "a.nc", "per_level": True}})
    with pytest.raises(OptionError, match=r"input.levels: must be 'all' or a list \(got 'some'\)"):
        parse_spec({**base, "input": {"path": "a.nc", "levels": "some"}})
    with pytest.raises(OptionError, match="input.spacing.0: must be greater than 0"):
        parse_spec({**base, "input": {"path": "a.nc", "spacing": [0]}})
    with pytest.raises(OptionError, match="input.path: input.path is an empty list"):
        parse_spec({**base, "input": {"path": []}})
    old = parse_spec({**base, "input": {"path": "a.nc"}})  # a spec from before lists
    assert old.input.paths == ["a.nc"] and old.input.levels is None


def run(capsys, *args):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_discover_takes_several_inputs_and_per_level_outputs(dns, stack, tmp_path, capsys):
    _, ds = dns
    split(ds, tmp_path / "run")
    code, out, err = run(capsys, "discover", tmp_path / "run" / "snap_00.nc",
                         tmp_path / "run" / "snap_0[1-5].nc", "--ratio", "2", "--library",
                         "classic", "--resamples", "0", "--test-fraction", "0.34", "-q",
                         "-o", tmp_path / "m.json")
    assert code == 0, err
    prov = json.loads((tmp_path / "m.json").read_text())["provenance"]
    assert len(prov["inputs"]) == 6
    code, out, err = run(capsys, "discover", stack[0], "--levels", "0,2", "--per-level",
                         "--ratio", "2", "--library", "classic", "--resamples", "0", "-q",
                         "-o", tmp_path / "lv.json")
    assert code == 0, err
    assert (tmp_path / "lv_level0.json").exists() and (tmp_path / "lv_level2.json").exists()


@pytest.mark.parametrize("extra, message", [
    (["--levels", "a,b"], "--levels expects indices like 0,2,5-9, got 'a,b'"),
    (["--per-level"], "--per-level needs --levels"),
    (["--spacing", "1,x"], r"--spacing expects DX\[,DY\[,DZ\]\] numbers"),
    (["--spacing", "-1"], "--spacing expects one to three positive numbers"),
    (["--group", "nothere"], "has no group 'nothere'.*Fix --group"),
    (["--mask", "land"], r"mask variable 'land' \(--mask\) not found"),
])
def test_cli_input_option_errors(dns, tmp_path, capsys, extra, message):
    import re

    code, _, err = run(capsys, "discover", dns[0], *extra, "-o", tmp_path / "m.json")
    assert code == 2 and err.startswith("error: ") and re.search(message, err), err
    assert sha256_file(dns[0]) == hashlib.sha256(dns[0].read_bytes()).hexdigest()


def test_cli_les_reads_a_file_with_its_own_names(tmp_path, capsys):
    ds = turb2d(n=32, snapshots=3, interval=0.2, spinup=0.4, forcing_wavenumber=3, seed=1)
    own = ds.rename({"u": "UVEL", "v": "VVEL"})
    path = write(own, tmp_path / "own.nc")
    code, _, err = run(capsys, "les", "none", "--initial", path, "-o", tmp_path / "r.nc",
                       "--ratio", "2", "--baselines", "smagorinsky")
    assert code == 2 and "variable 'u' (x velocity) not found" in err and "--var u=NAME" in err
    code, out, err = run(capsys, "les", "none", "--initial", path, "--var", "u=UVEL",
                         "--var", "v=VVEL", "-o", tmp_path / "r.nc", "--ratio", "2",
                         "--baselines", "smagorinsky", "-q")
    assert code == 0, err
    with xr.open_dataset(tmp_path / "r.nc") as run_ds:
        assert run_ds.sizes["time"] == 3


def test_cli_coarse_grain_writes_one_file_per_level(stack, tmp_path, capsys):
    code, out, err = run(capsys, "coarse-grain", stack[0], "--levels", "1,2", "--ratio", "2",
                         "-o", tmp_path / "c.nc")
    assert code == 0, err
    with xr.open_dataset(tmp_path / "c_level2.nc") as c:
        assert int(c.attrs["source_level"]) == 2 and c["tau_xy"].dims == ("time", "y", "x")
    assert not (tmp_path / "c_level0.nc").exists()


def test_service_resolves_several_inputs_under_the_roots_only(dns, tmp_path):
    # a list of files and a glob are each checked against the data roots, file by file (a
    # link inside a Zarr store too); the workers get the real paths and the combined checksum
    from api.errors import ForbiddenPathError
    from api.inputs import resolve_inputs_under_roots
    from closure.io import input_sha256

    _, ds = dns
    root = tmp_path / "root"
    root.mkdir()
    paths = split(ds, root / "run")
    got = resolve_inputs_under_roots([str(p) for p in paths[:2]], [root])
    assert got == [p.resolve() for p in paths[:2]]
    assert resolve_inputs_under_roots("run/snap_*.nc", [root]) == [p.resolve() for p in paths]
    assert resolve_inputs_under_roots("run", [root]) == [p.resolve() for p in paths]  # folder
    assert input_sha256(got) != input_sha256(paths[:3])
    outside = tmp_path / "elsewhere.nc"
    outside.write_bytes(paths[0].read_bytes())
    with pytest.raises(ForbiddenPathError, match="outside the data roots"):
        resolve_inputs_under_roots([str(paths[0]), str(outside)], [root])
    (root / "run" / "snap_99.nc").symlink_to(outside)
    with pytest.raises(ForbiddenPathError, match="outside the data roots"):
        resolve_inputs_under_roots("run/snap_*.nc", [root])
    store = root / "store.zarr"
    ds.to_zarr(store)
    assert resolve_inputs_under_roots("store.zarr", [root]) == [store.resolve()]
    (store / "stray").symlink_to(outside)
    with pytest.raises(ForbiddenPathError, match="outside the data roots"):
        resolve_inputs_under_roots("store.zarr", [root])
    with pytest.raises(InputFileError, match="no such file, folder or match"):
        resolve_inputs_under_roots("run/none_*.nc", [root])


def test_level_stack_through_the_queue_functions_equals_in_process(stack, tmp_path):
    # plan -> map per snapshot -> reduce, as the workers run it (held-out level stacks kept
    # in HeldOut's files, and without them), gives the in-process model
    s = spec(str(stack[0]), levels=[0, 2])
    in_process = pipeline.discover(s)
    p = pipeline.plan(s)
    held = pipeline.HeldOut(tmp_path, p["components"])
    stats = {}
    for i in p["snapshots"]:
        stats[i], coarse = pipeline._map(s, p, i)
        if i in p["test"]:
            held.put(coarse)
    for kept in (held, None):
        queued = pipeline.reduce(s, json.loads(json.dumps(p)), stats, held_out=kept)
        np.testing.assert_allclose(queued.coefficients_scaled, in_process.coefficients_scaled,
                                   rtol=1e-12, atol=1e-14)
        assert queued.scores == in_process.scores


def test_report_rereads_a_models_several_inputs_and_levels(dns, stack, tmp_path):
    from closure.report import build_report

    _, ds = dns
    split(ds, tmp_path / "run")
    for given, kw in ((str(tmp_path / "run" / "snap_*.nc"), {}), (str(stack[0]),
                                                                 {"levels": [0, 2]})):
        model = pipeline.discover(spec(given, **kw))
        out = build_report(model, tmp_path / f"rep{len(kw)}")
        page = (out / "index.html").read_text()
        assert "held-out snapshots" in page and "not available here" not in page
        assert (out / "apriori_hexbin.png").exists()


def test_cli_submit_carries_the_input_options_and_one_job_per_level(dns, tmp_path, capsys,
                                                                     monkeypatch):
    from closure.client import Client

    sent = []

    def fake_submit(self, spec, name=None, upload=None):
        sent.append(spec)
        return {"id": f"j-{len(sent)}", "state": "queued"}

    monkeypatch.setattr(Client, "submit", fake_submit)
    code, out, err = run(capsys, "submit", dns[0], "--group", "g", "--mask", "sea", "--levels",
                         "0,2", "--per-level", "--spacing", "100", "--var", "u=U",
                         "--server", "http://127.0.0.1:9")
    assert code == 0, err
    assert out.split() == ["j-1", "j-2"]
    assert [s["input"]["levels"] for s in sent] == [[0], [2]]
    for s in sent:
        parse_spec(s)
        assert s["input"]["path"] == str(dns[0].resolve())
        assert (s["input"]["group"], s["input"]["mask"], s["input"]["spacing"],
                s["input"]["variables"]) == ("g", "sea", [100.0], {"u": "U"})
    code, _, err = run(capsys, "submit", dns[0], "--levels", "all", "--per-level",
                       "--server", "http://127.0.0.1:9")
    assert code == 2 and "list the levels, e.g. --levels 0,5,10" in err
    # the memory options of a worker's pass travel in the spec
    sent.clear()
    code, _, err = run(capsys, "submit", dns[0], "--memory-limit", "2G", "--slab-tasks", "3",
                       "--server", "http://127.0.0.1:9")
    assert code == 0, err
    assert (sent[0]["memory_limit"], sent[0]["slab_tasks"]) == (2 * 1024**3, 3)
    assert parse_spec(sent[0]).slab_tasks == 3


def test_cli_report_takes_several_inputs_and_overrides_the_recorded_options(dns, stack,
                                                                             tmp_path, capsys):
    _, ds = dns
    paths = split(ds, tmp_path / "run")
    model = pipeline.discover(spec(str(tmp_path / "run")))
    model.save(tmp_path / "m.json")
    args = ["report", tmp_path / "m.json", "-o", tmp_path / "rep", "-q"]
    for p in paths:
        args += ["--input", p]
    code, out, err = run(capsys, *args)
    assert code == 0, err
    assert "not available here" not in (tmp_path / "rep" / "index.html").read_text()
    lv = pipeline.discover(spec(str(stack[0]), levels=[0]))
    lv.save(tmp_path / "lv.json")
    code, _, err = run(capsys, "report", tmp_path / "lv.json", "-o", tmp_path / "rl", "-q",
                       "--levels", "9")
    assert code == 2 and "--levels [9] out of range: the input has 3 level(s)" in err


def test_files_with_different_cf_time_units_are_converted(dns, tmp_path):
    _, ds = dns
    a = ds.isel(time=slice(0, 2)).assign_coords(
        time=("time", [0.0, 1.0], {"units": "days since 2000-01-01"}))
    b = ds.isel(time=slice(2, 4)).assign_coords(
        time=("time", [0.0, 24.0], {"units": "hours since 2000-01-03"}))
    a.to_netcdf(tmp_path / "a.nc")
    b.to_netcdf(tmp_path / "b.nc")
    with open_fields([tmp_path / "b.nc", tmp_path / "a.nc"]) as src:
        np.testing.assert_allclose(src.times, [0.0, 1.0, 2.0, 3.0])  # days since 2000-01-01
        np.testing.assert_array_equal(src.snapshot(2).fields["u"], ds["u"].values[2])
    c = ds.isel(time=slice(4, 6)).assign_coords(time=("time", [5.0, 6.0], {"units": "s"}))
    c.to_netcdf(tmp_path / "c.nc")
    with pytest.raises(InputFileError, match=r"c.nc has time units .*'s'.* give files with one "
                                             r"time unit"):
        open_fields([tmp_path / "a.nc", tmp_path / "c.nc"])
