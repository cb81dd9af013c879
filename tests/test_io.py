import hashlib
import os

import numpy as np
import pytest
import xarray as xr

from closure.errors import InputFileError, UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import (
    CoarseWriter,
    open_coarse,
    open_fields,
    sha256_file,
    write_coarse,
    write_netcdf,
)
from closure.residuals import coarse_grain_snapshot


def rand(*shape, seed=0):
    return np.random.default_rng(seed).standard_normal(shape)


# --- reading ------------------------------------------------------------------------------------

def test_2d_file_reads_one_snapshot_at_a_time(make_netcdf):
    u, v = rand(3, 8, 16), rand(3, 8, 16, seed=1)
    path = make_netcdf({"u": u, "v": v, "T": (rand(3, 8, 16, seed=2), {"units": "K"})},
                       attrs={"title": "test"})
    with open_fields(path, scalars=["T"]) as src:
        assert src.velocity == ("u", "v") and src.scalars == ("T",)
        assert len(src) == src.n_snapshots == 3
        np.testing.assert_allclose(src.times, [0.0, 1.0, 2.0])
        g = src.grid
        assert g.dims == ("y", "x") and g.shape == (8, 16) and g.periodic
        assert g.spacing == pytest.approx((2 * np.pi / 8, 2 * np.pi / 16))
        assert g.lengths == pytest.approx((2 * np.pi, 2 * np.pi))  # period n dx
        assert g.units == "m"
        assert src.units == {"u": "m s-1", "v": "m s-1", "T": "K", "time": "s", "y": "m",
                             "x": "m"}
        assert src.attrs["title"] == "test"
        s = src.snapshot(2)
        assert s.index == 2 and s.time == 2.0 and s.grid == g
        assert s.fields["u"].dtype == np.float64
        np.testing.assert_array_equal(s.fields["v"], v[2])
        assert [t.index for t in src] == [0, 1, 2]
        with pytest.raises(UserError, match=r"snapshot index 3 is out of range.*indices 0\.\.2"):
            src.snapshot(3)


def test_1d_and_3d_and_no_time_dimension(make_netcdf, tmp_path):
    p1 = make_netcdf({"u": rand(2, 12)}, dims=("time", "x"), name="one.nc")
    with open_fields(p1) as src:
        assert src.velocity == ("u",) and src.grid.dims == ("x",)
    p3 = make_netcdf({"u": rand(4, 6, 8), "v": rand(4, 6, 8), "w": rand(4, 6, 8)},
                     dims=("z", "y", "x"), name="three.nc")
    with open_fields(p3) as src:
        assert src.velocity == ("u", "v", "w") and src.n_snapshots == 1 and src.times is None
        s = src.snapshot(0)
        assert s.fields["w"].shape == (4, 6, 8) and s.time is None


def test_variable_and_dimension_mapping_and_transposed_dims(make_netcdf):
    U = rand(2, 16, 8)  # stored (time, lon, lat) = (time, x, y)
    path = make_netcdf({"U": U, "V": rand(2, 16, 8, seed=3)}, dims=("time", "lon", "lat"))
    with open_fields(path, {"u": "U", "v": "V", "x": "lon", "y": "lat"}) as src:
        assert src.grid.dims == ("y", "x") and src.grid.shape == (8, 16)
        assert src.names == {"u": "U", "v": "V"}
        np.testing.assert_array_equal(src.snapshot(1).fields["u"], U[1].T)


def test_spacing_and_origin_from_coordinates(make_netcdf):
    x = 10.0 + 0.5 * np.arange(12)
    path = make_netcdf({"u": rand(12)}, dims=("x",), coords={"x": (x, {"units": "km"})})
    with open_fields(path, periodic=False) as src:
        g = src.grid
        assert g.spacing == (0.5,) and g.origin == (10.0,) and not g.periodic
        assert g.units == "km"
        np.testing.assert_allclose(g.coords("x"), x)


def test_no_coordinates_means_unit_spacing(make_netcdf):
    path = make_netcdf({"u": rand(6, 4), "v": rand(6, 4)}, dims=("y", "x"), coords={})
    with open_fields(path) as src:
        assert src.grid.spacing == (1.0, 1.0) and src.grid.units is None


def test_input_file_is_opened_read_only(make_netcdf):
    path = make_netcdf({"u": rand(2, 8), "v": rand(2, 8)}, dims=("time", "x"))
    before = sha256_file(path)
    os.chmod(path, 0o444)
    try:
        with open_fields(path) as src:
            for s in src:
                s.fields["u"][:] = 0.0  # our copy, not the file
    finally:
        os.chmod(path, 0o644)
    assert sha256_file(path) == before


def test_sha256_file_matches_hashlib(tmp_path):
    p = tmp_path / "blob.bin"
    data = os.urandom(3 * 1024 * 1024 + 17)
    p.write_bytes(data)
    # reference: hashlib over the whole content at once
    assert sha256_file(p, chunk_size=1 << 16) == hashlib.sha256(data).hexdigest()
    with pytest.raises(InputFileError, match="no such file"):
        sha256_file(tmp_path / "missing.bin")
    import threading

    stop = threading.Event()
    assert sha256_file(p, cancel=stop) == hashlib.sha256(data).hexdigest()
    stop.set()
    with pytest.raises(InterruptedError, match="cancelled"):
        sha256_file(p, cancel=stop)


# --- bad inputs give clear messages ------------------------------------------------------------

def test_missing_and_non_netcdf_files(tmp_path):
    with pytest.raises(InputFileError, match="no such file: .*nothere.nc: check the path"):
        open_fields(tmp_path / "nothere.nc")
    text = tmp_path / "notes.nc"
    text.write_text("not a netCDF file\n")
    with pytest.raises(InputFileError, match="could not be read as netCDF.*give a netCDF"):
        open_fields(text)
    with pytest.raises(InputFileError, match="could not be read as netCDF"):
        open_fields(tmp_path)  # a folder: its *.nc files are the input
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputFileError, match="holds no netCDF files .* and is not a Zarr store"):
        open_fields(empty)
    with pytest.raises(InputFileError, match=r"no file matches '.*snap_\*.nc'.*quote it"):
        open_fields(str(tmp_path / "snap_*.nc"))


def test_missing_variable_lists_the_file_variables(make_netcdf):
    path = make_netcdf({"U": rand(2, 8, 8), "V": rand(2, 8, 8)})
    with pytest.raises(InputFileError, match=r"variable 'u' \(x velocity\) not found in .*; the "
                                             r"file's variables are: U, V\. Map it with --var u="):
        open_fields(path)
    with pytest.raises(InputFileError, match=r"'v' \(y velocity\) not found"):
        open_fields(path, {"u": "U"})
    with pytest.raises(InputFileError, match=r"'T' \(scalar\) not found"):
        open_fields(path, {"u": "U", "v": "V"}, scalars=["T"])


def test_wrong_or_unused_mappings(make_netcdf):
    path = make_netcdf({"U": rand(2, 8, 8), "V": rand(2, 8, 8)})
    with pytest.raises(InputFileError, match=r"variable 'UU' \(given for u, x velocity\) not "
                                             r"found .*variables are: U, V\. Fix --var u="):
        open_fields(path, {"u": "UU", "v": "V"})
    with pytest.raises(UserError, match="--var theta=U maps a name that is neither.*add "
                                        "--scalar theta"):
        open_fields(path, {"u": "U", "v": "V", "theta": "U"})
    with open_fields(path, {"u": "U", "v": "V", "theta": "U"}, scalars=["theta"]) as src:
        assert src.names["theta"] == "U"


def test_mismatched_and_unknown_dims(make_netcdf, tmp_path):
    path = make_netcdf({"u": rand(2, 8, 8), "v": rand(2, 8)},
                       var_dims={"v": ("time", "x")})
    with pytest.raises(InputFileError, match=r"'v' \(v\) .* has dims \(time, x\) but 'u' \(u\) "
                                             r"has \(time, y, x\)"):
        open_fields(path)
    odd = make_netcdf({"u": rand(2, 8, 8), "v": rand(2, 8, 8)}, dims=("time", "lat", "lon"),
                      name="odd.nc")
    with pytest.raises(InputFileError, match=r"dimension\(s\) 'lat', 'lon' are not "
                                             r"understood.*--var x=NAME"):
        open_fields(odd)
    with pytest.raises(InputFileError, match="dimension 'longitude' \\(given for x\\)"):
        open_fields(odd, {"x": "longitude"})


def test_non_uniform_and_decreasing_coordinates(make_netcdf):
    x = np.arange(8.0)
    x[5] += 1e-3
    path = make_netcdf({"u": rand(8)}, dims=("x",), coords={"x": x})
    with pytest.raises(InputFileError, match="coordinate 'x' .* is not uniformly spaced.*"
                                             "index 4.*interpolate"):
        open_fields(path)
    # within the tolerance (relative 1e-6 of the spacing) is uniform
    x_ok = np.arange(8.0)
    x_ok[3] += 1e-8
    ok = make_netcdf({"u": rand(8)}, dims=("x",), coords={"x": x_ok}, name="ok.nc")
    open_fields(ok).close()
    down = make_netcdf({"u": rand(8)}, dims=("x",), coords={"x": -np.arange(8.0)},
                       name="down.nc")
    with pytest.raises(InputFileError, match="not increasing: reverse"):
        open_fields(down)


def test_coordinate_units_must_agree(make_netcdf):
    path = make_netcdf({"u": rand(4, 6), "v": rand(4, 6)}, dims=("y", "x"),
                       coords={"y": (np.arange(4.0), {"units": "km"}),
                               "x": (np.arange(6.0), {"units": "m"})})
    with pytest.raises(InputFileError, match="different units .*y: km, x: m"):
        open_fields(path)


def test_inf_is_refused_naming_variable_snapshot_and_point(make_netcdf):
    V = rand(3, 8, 8)
    V[1, 2, 5] = np.inf
    path = make_netcdf({"u": rand(3, 8, 8), "V": V})
    with open_fields(path, {"v": "V"}) as src:
        src.snapshot(0)
        with pytest.raises(InputFileError, match=r"variable 'V \(v\)' has 1 Inf value\(s\) "
                                                 r"at snapshot 1 of .* \(first at y=2, x=5\): "
                                                 r"Inf is not a missing value.*--snapshots"):
            src.snapshot(1)


def test_nan_marks_land_filled_with_zero_in_every_field(make_netcdf):
    u, V = rand(3, 8, 8), rand(3, 8, 8, seed=1)
    V[1, 2, 5] = np.nan
    u[1, 0, 0] = np.nan
    path = make_netcdf({"u": u, "V": V})
    with open_fields(path, {"v": "V"}) as src:
        assert src.snapshot(0).mask is None  # every point fluid
        s = src.snapshot(1)
        expected = np.ones((8, 8), dtype=bool)
        expected[2, 5] = expected[0, 0] = False
        np.testing.assert_array_equal(s.mask, expected)
        for f in s.fields.values():
            assert np.all(np.isfinite(f)) and f[2, 5] == 0.0 and f[0, 0] == 0.0
        np.testing.assert_array_equal(s.fields["u"][expected], u[1][expected])


def test_fill_values_count_as_land(make_netcdf, tmp_path):
    u = rand(2, 8)
    ds = xr.Dataset({"u": (("time", "x"), u)}, coords={"x": np.arange(8) * np.pi / 4})
    ds["u"].encoding["_FillValue"] = -999.0
    ds["u"][0, 3] = np.nan
    path = tmp_path / "fill.nc"
    ds.to_netcdf(path)
    # xarray is the independent reader: it maps _FillValue to NaN (CF conventions, sec. 2.5.1)
    raw = xr.open_dataset(path, mask_and_scale=False)["u"].values
    assert raw[0, 3] == -999.0
    with open_fields(path) as src:
        s = src.snapshot(0)
        assert s.mask.tolist() == [True, True, True, False, True, True, True, True]
        assert s.fields["u"][3] == 0.0


def test_mask_variable_nonzero_is_fluid(make_netcdf):
    sea = np.ones((8, 8))
    sea[:, :2] = 0  # a coast along x = 0, 1
    path = make_netcdf({"u": rand(2, 8, 8), "v": rand(2, 8, 8), "sea": sea},
                       var_dims={"sea": ("y", "x")})
    with open_fields(path, mask="sea") as src:
        s = src.snapshot(1)
        np.testing.assert_array_equal(s.mask, sea != 0)
        assert np.all(s.fields["u"][:, :2] == 0)
        assert src.info()["mask"] == "sea"
    with pytest.raises(InputFileError, match=r"mask variable 'land' \(--mask\) not found .*"
                                             r"variables are: u, v, sea. Fix --mask NAME"):
        open_fields(path, mask="land")
    allland = make_netcdf({"u": rand(2, 8, 8), "v": rand(2, 8, 8), "sea": 0 * sea},
                          var_dims={"sea": ("y", "x")}, name="land.nc")
    with open_fields(allland, mask="sea") as src, \
            pytest.raises(InputFileError, match="has no fluid point.*check --mask"):
        src.snapshot(0)


def test_velocity_is_not_a_scalar(make_netcdf):
    path = make_netcdf({"u": rand(2, 8)}, dims=("time", "x"))
    with pytest.raises(UserError, match="'u' is a velocity component"):
        open_fields(path, scalars=["u"])


# --- coarse files -------------------------------------------------------------------------------

def coarse_snapshots(path, kind="gaussian", ratio=4, scalars=("T",), **kw):
    src = open_fields(path, scalars=scalars, **kw)
    cg = make_coarse_graining(kind, src.grid, ratio)
    return src, [coarse_grain_snapshot(s, cg, src.scalars) for s in src]


def test_write_and_read_back_a_coarse_file(make_netcdf, tmp_path):
    path = make_netcdf({"U": rand(2, 16, 16), "V": rand(2, 16, 16, seed=1),
                        "T": (rand(2, 16, 16, seed=2), {"units": "K"})})
    src, snaps = coarse_snapshots(path, variables={"u": "U", "v": "V"})
    out = write_coarse(tmp_path / "coarse.nc", snaps, src.describe())
    src.close()
    ds = xr.open_dataset(out)
    assert ds.attrs["Conventions"] == "CF-1.8"
    assert ds.attrs["source_sha256"] == sha256_file(path)
    assert {"U", "V", "T", "vorticity", "tau_xx", "flux_T_y", "pi"} <= set(ds.data_vars)
    assert ds["U"].attrs["closure_name"] == "u"
    # (m s-1)^2, (m s-1)^2/(m) and (m s-1) K, simplified (closure.units)
    assert ds["tau_xy"].attrs["units"] == "m2 s-2"
    assert ds["force_x"].attrs["units"] == "m s-2"
    assert ds["flux_T_x"].attrs["units"] == "m K s-1"
    assert ds["T"].attrs["units"] == "K"
    assert ds["x"].attrs["units"] == "m" and ds["time"].attrs["units"] == "s"
    np.testing.assert_array_equal(ds["time"].values, [0.0, 1.0])
    ds.close()
    with open_coarse(out) as c:
        assert c.grid == snaps[0].grid and c.coarse_graining == snaps[0].coarse_graining
        assert c.velocity == ("u", "v") and c.scalars == ("T",)
        assert c.field_names == tuple(snaps[0].fields)
        assert c.target_names == tuple(snaps[0].targets)
        for a, b in zip(c, snaps, strict=True):
            assert a.index == b.index and a.time == b.time
            for name in b.targets:
                np.testing.assert_array_equal(a.targets[name], b.targets[name])
            for name in b.fields:
                np.testing.assert_array_equal(a.fields[name], b.fields[name])
    # the plain reader works on coarse files too (names from the closure_name attributes)
    with open_fields(out, scalars=["T"]) as f:
        assert f.grid.shape == (4, 4) and f.names == {"u": "U", "v": "V", "T": "T"}
        np.testing.assert_array_equal(f.snapshot(1).fields["u"], snaps[1].fields["u"])


def test_cf_time_units_and_calendar_carry_over(make_netcdf, tmp_path):
    path = make_netcdf({"u": rand(3, 8), "v": rand(3, 8)}, dims=("time", "x"),
                       coords={"time": (np.array([0.5, 1.0, 1.5]),
                                        {"units": "days since 2000-01-01", "calendar": "noleap"}),
                               "x": np.arange(8.0)})
    src, snaps = coarse_snapshots(path, "box", 2, scalars=())
    assert src.times.tolist() == [0.5, 1.0, 1.5]  # raw values in the file's units
    out = write_coarse(tmp_path / "t.nc", snaps, src.describe())
    with xr.open_dataset(out) as ds:  # decodes the CF time as the source would
        assert ds["time"].values[1] == np.datetime64("2000-01-02") or \
            str(ds["time"].values[1]).startswith("2000-01-02")
    with open_coarse(out) as c:
        assert [c.snapshot(i).time for i in range(3)] == [0.5, 1.0, 1.5]


def test_block_coarse_file_keeps_block_centres(make_netcdf, tmp_path):
    path = make_netcdf({"u": rand(1, 8, 8), "v": rand(1, 8, 8)}, dims=("time", "y", "x"))
    src, snaps = coarse_snapshots(path, "block", 2, scalars=())
    out = write_coarse(tmp_path / "b.nc", snaps, src.describe())
    with open_coarse(out) as c:
        assert c.grid == snaps[0].grid
        np.testing.assert_allclose(c.grid.coords("x")[0], np.pi / 8)  # between points 0 and 1


def test_coarse_file_without_source_time_and_non_periodic(make_netcdf, tmp_path):
    path = make_netcdf({"u": rand(20, 24), "v": rand(20, 24)}, dims=("y", "x"))
    src, snaps = coarse_snapshots(path, "box", 4, scalars=(), periodic=False)
    out = write_coarse(tmp_path / "np.nc", snaps, src.describe())
    with open_coarse(out) as c:
        assert not c.grid.periodic and c.snapshot(0).time is None
        assert c.grid.shape == (5, 6)
    assert xr.open_dataset(out).attrs["periodic"] == 0


def test_writer_is_atomic_and_never_overwrites_the_input(make_netcdf, tmp_path):
    path = make_netcdf({"u": rand(2, 8), "v": rand(2, 8)}, dims=("time", "x"))
    src, snaps = coarse_snapshots(path, "box", 2, scalars=())
    target = tmp_path / "out.nc"
    target.write_text("old")
    with pytest.raises(RuntimeError, match="boom"), CoarseWriter(target, src.describe()) as w:
        w.append(snaps[0])
        raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
    with pytest.raises(UserError, match="is the input file"):
        write_coarse(path, snaps, src.describe())
    with pytest.raises(UserError, match="no snapshots"):
        write_coarse(tmp_path / "empty.nc", [], src.describe())
    assert not (tmp_path / "empty.nc").exists()


def test_open_coarse_refuses_other_files(make_netcdf):
    path = make_netcdf({"u": rand(2, 8)}, dims=("time", "x"))
    with pytest.raises(InputFileError, match="not a coarse file written by closure coarse-grain"):
        open_coarse(path)


def test_write_netcdf_is_atomic_and_chunks_by_snapshot(tmp_path):
    ds = xr.Dataset({"a": (("time", "x"), rand(3, 5))})
    out = write_netcdf(ds, tmp_path / "sub" / "a.nc")
    with xr.open_dataset(out) as back:
        np.testing.assert_array_equal(back["a"].values, ds["a"].values)
        assert back["a"].encoding["chunksizes"] == (1, 5)
    assert sorted(p.name for p in (tmp_path / "sub").iterdir()) == ["a.nc"]


def test_grid_of_a_coarse_snapshot_is_the_coarse_grid(make_netcdf):
    path = make_netcdf({"u": rand(1, 8, 8), "v": rand(1, 8, 8)})
    src, snaps = coarse_snapshots(path, "spectral", 2, scalars=())
    assert snaps[0].grid == Grid(("y", "x"), (4, 4), (np.pi / 2, np.pi / 2), (0.0, 0.0), True,
                                 "m")


def test_files_open_with_a_small_chunk_cache_per_variable(make_netcdf, tmp_path, monkeypatch):
    # each snapshot is read once: netCDF's default cache (64 MiB per variable) would keep the
    # last few snapshots of every field in memory, so memory would grow with the snapshot count
    import netCDF4

    import closure.io as io_module

    handles = []
    real = io_module._open_netcdf

    def spy(path):
        handles.append(real(path))
        return handles[-1]

    monkeypatch.setattr(io_module, "_open_netcdf", spy)
    path = write_netcdf(xr.Dataset({"u": (("time", "y", "x"), rand(3, 8, 16)),
                                    "v": (("time", "y", "x"), rand(3, 8, 16, seed=1))}),
                        tmp_path / "chunked.nc")
    before = netCDF4.get_chunk_cache()
    with open_fields(path) as src:
        (nc,) = handles
        for name in ("u", "v"):
            assert nc[name].chunking() == [1, 8, 16]
            assert nc[name].get_var_chunk_cache()[0] == io_module.CHUNK_CACHE_BYTES
        np.testing.assert_array_equal(src.snapshot(1).fields["v"], rand(3, 8, 16, seed=1)[1])
    assert not nc.isopen()  # closed with the source
    assert netCDF4.get_chunk_cache() == before  # the library-wide default is left alone
    # netCDF-3 files have no chunk cache and still open
    classic = tmp_path / "classic.nc"
    xr.Dataset({"u": (("time", "x"), rand(2, 8))}).to_netcdf(classic, format="NETCDF3_64BIT")
    with open_fields(classic) as src:
        np.testing.assert_array_equal(src.snapshot(1).fields["u"], rand(2, 8)[1])
