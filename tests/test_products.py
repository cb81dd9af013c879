"""closure.products and the coarse-graining spec: the product file equals what
``closure coarse-grain`` writes, bit for bit in float64 (periodic and bounded data, one and
several filter settings); targets, dtype and user errors; the store's products block."""

from __future__ import annotations

import json

import netCDF4
import numpy as np
import pytest
import xarray as xr
from pydantic import TypeAdapter

from closure import products
from closure.cli import main
from closure.errors import OptionError, UserError
from closure.spec import AnyJobSpec, CoarseGrainSpec, JobSpec, parse_coarse_grain_spec


@pytest.fixture(scope="module")
def fine(tmp_path_factory):
    from closure.synth import turb2d, write

    folder = tmp_path_factory.mktemp("fine")
    return write(turb2d(n=32, snapshots=4, spinup=0.5, interval=0.1), folder / "turb2d.nc")


def cli_coarse(fine, out, *args) -> None:
    assert main(["coarse-grain", str(fine), "-o", str(out), *args]) == 0


def attrs(obj) -> dict:
    return {k: obj.getncattr(k) for k in obj.ncattrs()}


def assert_same_file(reference, product, group=None, dtype="float64") -> None:
    """Every variable of the reference file in the product (root or ``group``): same bits
    (float64) or the float32 rounding of them, same attributes, compression and chunks;
    global attributes equal except history."""
    with netCDF4.Dataset(reference) as ref, netCDF4.Dataset(product) as prod:
        got = prod if group is None else prod[group]
        assert list(ref.variables) == list(got.variables)
        for name, var in ref.variables.items():
            a, b = var[...], got[name][...]
            if dtype == "float32" and "closure_role" in var.ncattrs():
                assert b.dtype == np.float32
                np.testing.assert_array_equal(b, np.asarray(a).astype(np.float32))
            else:
                assert a.dtype == b.dtype, name
                assert np.asarray(a).tobytes() == np.asarray(b).tobytes(), name
            assert attrs(var) == attrs(got[name]), name
            assert var.filters() == got[name].filters() and \
                var.chunking() == got[name].chunking(), name
        g_ref, g_got = attrs(ref), attrs(got)
        for key, value in g_ref.items():
            if key != "history":
                assert np.array_equal(value, g_got[key]), key


# --------------------------------------------------------------------------- equals the CLI

@pytest.mark.parametrize("periodic", [True, False], ids=["periodic", "bounded"])
def test_product_equals_coarse_grain_one_and_several_widths(fine, tmp_path, periodic):
    extra = [] if periodic else ["--non-periodic"]
    cli_coarse(fine, tmp_path / "w6.nc", "--ratio", "4", "--width", "6", *extra)
    cli_coarse(fine, tmp_path / "box2.nc", "--ratio", "2", "--filter", "box", *extra)
    base = {"input": {"path": str(fine), "periodic": periodic}}
    one = parse_coarse_grain_spec({**base, "filters": [{"ratio": 4, "width": 6}]})
    products.coarse_grain_product(one, tmp_path / "one.nc")
    assert_same_file(tmp_path / "w6.nc", tmp_path / "one.nc")
    with netCDF4.Dataset(tmp_path / "one.nc") as nc:
        assert not nc.groups  # one setting: the layout of `closure coarse-grain`
    several = parse_coarse_grain_spec(
        {**base, "filters": [{"ratio": 4, "width": 6}, {"ratio": 2, "kind": "box"}]})
    products.coarse_grain_product(several, tmp_path / "several.nc",
                                  attrs={"closure_product_id": "pr-test"})
    assert_same_file(tmp_path / "w6.nc", tmp_path / "several.nc")
    assert_same_file(tmp_path / "w6.nc", tmp_path / "several.nc", "setting_0")
    assert_same_file(tmp_path / "box2.nc", tmp_path / "several.nc", "setting_1")
    # xarray (the reference reader) opens the root and each group directly
    with xr.open_dataset(tmp_path / "several.nc") as root, \
            xr.open_dataset(tmp_path / "several.nc", group="setting_1") as box:
        assert root.sizes["x"] == 8 and box.sizes["x"] == 16
        assert root.attrs["closure_product_id"] == "pr-test"
        listed = json.loads(root.attrs["closure_settings"])
        assert [s["group"] for s in listed] == ["setting_0", "setting_1"]
        assert box.attrs["filter_kind"] == "box" and box["tau_xy"].dims == ("time", "y", "x")


def test_periodic_gaussian_stress_matches_scipy(fine, tmp_path):
    """An independent check of one product variable: on periodic data the Gaussian filter of
    width D is the convolution with a Gaussian of standard deviation D / sqrt(12)
    (Pope 2000, Turbulent Flows, Table 13.2), which scipy.ndimage.gaussian_filter computes in
    real space with wrap-around edges; tau_xx = bar(u u) - bar(u) bar(u), sampled every
    ratio-th point. Agreement to 1e-7 (the two differ in how the Nyquist mode of the
    sampled field and the kernel's truncation are treated, about 1e-8 here)."""
    from scipy import ndimage

    spec = parse_coarse_grain_spec({"input": {"path": str(fine)},
                                    "filters": [{"ratio": 2, "width": 6}],
                                    "targets": ["stress"], "transfers": []})
    products.coarse_grain_product(spec, tmp_path / "p.nc")
    sigma = 6 / np.sqrt(12)

    def bar(f):
        return ndimage.gaussian_filter(f, sigma, mode="wrap", truncate=10.0)

    with xr.open_dataset(fine) as ds, xr.open_dataset(tmp_path / "p.nc") as prod:
        assert list(prod.data_vars) == ["snapshot", "u", "v", "vorticity", "tau_xx",
                                        "tau_xy", "tau_yy"]
        for t in range(ds.sizes["time"]):
            u = ds["u"].isel(time=t).transpose("y", "x").values
            tau = (bar(u * u) - bar(u) * bar(u))[::2, ::2]
            got = prod["tau_xx"].isel(time=t).values
            assert np.max(np.abs(got - tau)) <= 1e-7 * np.max(np.abs(tau))


def test_target_subset_and_float32(fine, tmp_path):
    base = {"input": {"path": str(fine)}, "filters": [{"ratio": 4}]}
    products.coarse_grain_product(parse_coarse_grain_spec(base), tmp_path / "all.nc")
    sub = parse_coarse_grain_spec({**base, "targets": ["force"], "transfers": ["pi"],
                                   "dtype": "float32"})
    products.coarse_grain_product(sub, tmp_path / "sub.nc")
    with netCDF4.Dataset(tmp_path / "all.nc") as full, netCDF4.Dataset(tmp_path / "sub.nc") as s:
        assert [v for v in s.variables if "closure_role" in s[v].ncattrs()
                and s[v].closure_role == "target"] == ["force_x", "force_y", "pi"]
        for name in ("u", "force_x", "pi"):
            assert s[name].dtype == np.float32
            np.testing.assert_array_equal(s[name][...],
                                          np.asarray(full[name][...]).astype(np.float32))
        assert s["x"].dtype == np.float64 and s.closure_dtype == "float32"


# --------------------------------------------------------------------------- user errors

def test_spec_errors_name_the_field():
    with pytest.raises(OptionError, match=r"targets: .*stress, force, vorticity or flux:NAME"):
        parse_coarse_grain_spec({"input": {"path": "a.nc"}, "targets": ["energy"]})
    with pytest.raises(OptionError, match=r"filters: .*repeats an earlier one"):
        parse_coarse_grain_spec({"input": {"path": "a.nc"},
                                 "filters": [{"ratio": 2}, {"ratio": 2}]})
    with pytest.raises(OptionError, match=r"dtype: must be one of 'float64' or 'float32'"):
        parse_coarse_grain_spec({"input": {"path": "a.nc"}, "dtype": "float16"})
    with pytest.raises(OptionError, match=r"format: must be 'netcdf'"):
        parse_coarse_grain_spec({"input": {"path": "a.nc"}, "format": "zarr"})
    with pytest.raises(OptionError, match=r"filters: .*at least 1"):
        parse_coarse_grain_spec({"input": {"path": "a.nc"}, "filters": []})


def test_job_kind_selects_the_schema():
    adapter = TypeAdapter(AnyJobSpec)
    assert isinstance(adapter.validate_python({"input": {"path": "a"}}), JobSpec)
    assert isinstance(adapter.validate_python({"kind": "coarse-grain", "input": {"path": "a"}}),
                      CoarseGrainSpec)
    with pytest.raises(Exception, match="kind must be 'discover'"):
        adapter.validate_python({"kind": "tune", "input": {"path": "a"}})


def test_wanted_variables_and_their_errors():
    dims2, dims3 = ("y", "x"), ("z", "y", "x")
    assert products.wanted_variables(["stress"], [], dims2, ()) == [
        "tau_xx", "tau_xy", "tau_yy"]
    assert products.wanted_variables(None, None, dims2, ("c",))[-3:] == [
        "pi", "vorticity_forcing", "enstrophy_transfer"]
    assert products.wanted_variables(["flux:c"], ["pi"], dims3, ("c",)) == [
        "flux_c_x", "flux_c_y", "flux_c_z", "pi"]
    with pytest.raises(UserError, match="vorticity needs 2-D"):
        products.wanted_variables(["vorticity"], None, dims3, ())
    with pytest.raises(UserError, match="enstrophy_transfer needs 2-D"):
        products.wanted_variables(None, ["enstrophy_transfer"], dims3, ())
    with pytest.raises(UserError, match=r"needs the scalar 'c' in input.scalars"):
        products.wanted_variables(["flux:c"], None, dims2, ())
    with pytest.raises(UserError, match="nothing to compute"):
        products.wanted_variables([], [], dims2, ())


def test_check_refuses_what_the_data_cannot_take(fine):
    spec = parse_coarse_grain_spec({"input": {"path": str(fine)},
                                    "filters": [{"ratio": 2}, {"ratio": 64}]})
    with pytest.raises(UserError, match=r"^filters\[1\]: "):
        products.check(spec)
    spec = parse_coarse_grain_spec({"input": {"path": str(fine), "snapshots": [0, 9]}})
    with pytest.raises(UserError, match=r"input.snapshots: \[9\] out of range"):
        products.check(spec)


def test_missing_pieces_are_named(fine, tmp_path):
    spec = parse_coarse_grain_spec({"input": {"path": str(fine)}})
    plan = products.plan(spec)
    products.write_pieces(plan, 0, tmp_path / "pieces")
    assert products.missing_pieces(plan, tmp_path / "pieces") == [1, 2, 3]
    with pytest.raises(UserError, match=r"pieces missing for snapshots \[1, 2, 3\]"):
        products.assemble(plan, tmp_path / "pieces", tmp_path / "p.nc")
    assert not (tmp_path / "p.nc").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["pieces"]  # no temporary file left


# --------------------------------------------------------------------------- the store

def test_store_products_block(fine, tmp_path):
    from closure.store import NotFoundError, Store, fingerprint_hash

    st = Store(tmp_path / "store")
    spec = parse_coarse_grain_spec({"input": {"path": str(fine)}, "filters": [{"ratio": 4}]})
    plan = products.plan(spec)
    fp = fingerprint_hash(spec, plan["sha256"])
    out = products.coarse_grain_product(spec, tmp_path / "p.nc")
    size = out.stat().st_size
    row = st.add_product(file=out, fingerprint=fp, dataset_sha256=plan["sha256"],
                         spec=spec.model_dump(mode="json"), plan=plan, job_id="j-1")
    assert row["id"].startswith("pr-") and row["size"] == size and not out.exists()
    from closure.io import sha256_file

    stored = st.product_dir(row["id"]) / "product.nc"
    assert row["sha256"] == sha256_file(stored) and row["n_snapshots"] == 4
    assert row["settings"][0]["coarse_shape"] == [8, 8]
    # idempotent: the same fingerprint keeps the stored product
    again = products.coarse_grain_product(spec, tmp_path / "p2.nc")
    assert st.add_product(file=again, fingerprint=fp, dataset_sha256=plan["sha256"],
                          spec={}, plan=plan, job_id="j-2")["job_id"] == "j-1"
    assert [r["id"] for r in st.list_products()] == [row["id"]]
    assert st.list_products(dataset_sha256="0" * 64) == []
    assert st.product_by_fingerprint(fp)["id"] == row["id"]
    st.delete_product(row["id"])
    assert st.get_product(row["id"], missing_ok=True) is None
    assert not st.product_dir(row["id"]).exists()
    with pytest.raises(NotFoundError, match="list them with GET /products"):
        st.get_product(row["id"])


# ------------------------------------------------------------------- products feed discovery

@pytest.mark.parametrize("periodic", [True, False], ids=["periodic", "bounded"])
def test_discovery_from_a_product_equals_discovery_from_the_fine_data(fine, tmp_path,
                                                                      periodic):
    from closure import pipeline
    from closure.spec import parse_spec

    cg = parse_coarse_grain_spec({"input": {"path": str(fine), "periodic": periodic},
                                  "filters": [{"ratio": 4}, {"ratio": 2}]})
    products.coarse_grain_product(cg, tmp_path / "p.nc", attrs={"closure_product_id": "pr-1"})
    common = {"filter": {"ratio": 4}, "fit": {"resamples": 4}, "target": "vorticity",
              "scheme": "spectral" if periodic else "fd4"}
    direct = pipeline.discover(parse_spec(
        {"input": {"path": str(fine), "periodic": periodic}, **common}))
    from_product = pipeline.discover(parse_spec(
        {"input": {"path": str(tmp_path / "p.nc"), "periodic": periodic}, **common}))
    assert from_product.names == direct.names
    assert np.array_equal(from_product.coefficients, direct.coefficients)
    assert from_product.scores == direct.scores
    assert from_product.provenance["product_id"] == "pr-1"
    assert "product_id" not in direct.provenance


def test_discovery_from_a_product_needs_its_filter_and_target(fine, tmp_path):
    from closure import pipeline
    from closure.spec import parse_spec

    cg = parse_coarse_grain_spec({"input": {"path": str(fine)}, "filters": [{"ratio": 4}],
                                  "targets": ["stress"], "transfers": []})
    products.coarse_grain_product(cg, tmp_path / "p.nc")
    with pytest.raises(UserError, match=r"coarse-grained with the gaussian filter, ratio 4, "
                                        r"width 8, 8 grid spacings .* not the job's gaussian "
                                        r"filter, ratio 2"):
        pipeline.check(parse_spec({"input": {"path": str(tmp_path / "p.nc")},
                                   "filter": {"ratio": 2}}))
    with pytest.raises(UserError, match=r"has no vorticity_forcing .* make a product with "
                                        r"this target"):
        pipeline.discover(parse_spec({"input": {"path": str(tmp_path / "p.nc")},
                                      "target": "vorticity", "fit": {"resamples": 2}}))
