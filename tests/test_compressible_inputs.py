"""Compressible files through `closure coarse-grain --compressible`, the gas-constant options,
and inputs with only one of pressure and temperature."""

import json

import netCDF4
import numpy as np
import pytest
import xarray as xr

from closure.cli import main
from closure.errors import UserError
from closure.favre import favre_coarse_grain, favre_field_names, favre_target_names
from closure.filters import make_coarse_graining
from closure.io import open_coarse, open_fields
from closure.model import ClosureModel
from closure.pipeline import discover
from closure.spec import JobSpec
from closure.synth import compressible, write

# the demo's gas: closure.synth.compressible.IdealGas defaults (dry air, SI)
R_AIR, GAMMA_AIR, PRANDTL_AIR = 287.05, 1.4, 0.72


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    path = tmp_path_factory.mktemp("compressible_inputs") / "c2.nc"
    write(compressible(n=32, dims=2, snapshots=3, mach=0.4, seed=1), path)
    return path


def _without(src, dst, variable, attributes=()):
    """A copy of ``src`` without ``variable`` and the global ``attributes``."""
    with xr.open_dataset(src) as ds:
        out = ds.drop_vars(variable).load()
    for a in attributes:
        out.attrs.pop(a, None)
    out.to_netcdf(dst)
    return dst


def _spec(path, library="compressible_classic", gas=None, **extra):
    return JobSpec.model_validate({"input": {"path": str(path)},
                                   "filter": {"kind": "gaussian", "ratio": 2},
                                   "library": library, **({"gas": gas} if gas else {}),
                                   **extra})


# ------------------------------------------------------------------ coarse-grain --compressible

@pytest.mark.parametrize("kind", ["gaussian", "block"])
def test_coarse_grain_compressible_writes_favre_coarse_grain_bit_for_bit(demo, tmp_path, kind):
    out = tmp_path / "coarse.nc"
    assert main(["coarse-grain", str(demo), "-o", str(out), "--compressible", "--filter", kind,
                 "--ratio", "2"]) == 0
    src = open_fields(demo, scalars=("rho", "p", "T"))
    cg = make_coarse_graining(kind, src.grid, 2)
    coarse = open_coarse(out)
    try:
        assert set(coarse.field_names) == set(favre_field_names(src.grid.dims))
        assert list(coarse.target_names) == favre_target_names(src.grid.dims)
        for i in range(src.n_snapshots):
            want = favre_coarse_grain(src.snapshot(i), cg)
            got = coarse.snapshot(i)
            for name in want.fields:
                np.testing.assert_array_equal(got.fields[name], want.fields[name])
            for name in want.targets:
                np.testing.assert_array_equal(got.targets[name], want.targets[name])
    finally:
        coarse.close()
        src.close()
    with netCDF4.Dataset(out) as nc:
        # the gas constants of the input, recorded as global attributes
        assert nc.getncattr("gamma") == GAMMA_AIR
        assert nc.getncattr("gas_constant") == R_AIR
        assert nc.getncattr("prandtl") == PRANDTL_AIR
        assert nc.getncattr("closure_compressible") == 1
        # units from the input's (kg m-3, m s-1, Pa, K, m, s): stress rho u u, heat flux
        # rho u T, pressure-dilatation p / time, transfer rho u^3 / length (dimensional
        # analysis of the definitions in closure.favre)
        units = {k: getattr(v, "units", None) for k, v in nc.variables.items()}
    assert units["tau_xy"] == "kg m-1 s-2"
    assert units["force_x"] == "kg m-2 s-2"
    assert units["heat_flux_x"] == "kg K m-2 s-1"
    assert units["pressure_dilatation"] == "Pa s-1"
    assert units["pi"] == "kg m-1 s-3"
    assert units["rho"] == "kg m-3" and units["T"] == "K" and units["u"] == "m s-1"


def test_coarse_file_reads_back_for_apply_and_discover(demo, tmp_path):
    coarse = tmp_path / "coarse.nc"
    assert main(["coarse-grain", str(demo), "-o", str(coarse), "--compressible",
                 "--ratio", "2"]) == 0
    local = discover(_spec(demo))
    # discover on the coarse file reads the Favre targets instead of computing them again
    again = discover(_spec(coarse))
    np.testing.assert_allclose(again.coefficients_scaled, local.coefficients_scaled,
                               rtol=1e-12, atol=1e-300)
    assert again.provenance["gas"]["gas_constant"] == R_AIR
    model_path = local.save(tmp_path / "m.json")
    pred = tmp_path / "pred.nc"
    assert main(["apply", str(model_path), str(coarse), "-o", str(pred)]) == 0
    with xr.open_dataset(pred) as ds:
        assert set(ds.data_vars) >= {"tau_xx", "tau_xy", "tau_yy"}
        assert np.isfinite(ds["tau_xy"].values).all()


def test_gas_options_override_the_file_attributes_in_the_coarse_file(demo, tmp_path):
    out = tmp_path / "coarse.nc"
    assert main(["coarse-grain", str(demo), "-o", str(out), "--compressible", "--ratio", "2",
                 "--gamma", "1.3", "--prandtl", "0.7"]) == 0
    with netCDF4.Dataset(out) as nc:
        assert nc.getncattr("gamma") == 1.3
        assert nc.getncattr("prandtl") == 0.7
        assert nc.getncattr("gas_constant") == R_AIR


def _refused(capsys, args, message):
    """The command exits nonzero with ``message`` on stderr."""
    assert main(args) != 0
    assert message in capsys.readouterr().err


def test_coarse_grain_compressible_refusals_say_what_to_change(demo, tmp_path, capsys):
    out = tmp_path / "c.nc"
    _refused(capsys, ["coarse-grain", str(demo), "-o", str(out), "--gamma", "1.3"],
             "add --compressible")
    _refused(capsys, ["coarse-grain", str(demo), "-o", str(out), "--compressible", "--scalar",
                      "p"], "drop --scalar")
    _refused(capsys, ["coarse-grain", str(demo), "-o", str(out), "--compressible", "--gamma",
                      "0.5"], "--gamma: Input should be greater than 1")
    assert not out.exists()


def test_coarse_grain_with_pressure_only_derives_the_temperature(demo, tmp_path):
    # the demo's T is p / (rho R) (closure.synth.compressible), so the file without T and the
    # gas constant give the same coarse file up to round-off of that quotient
    no_t = _without(demo, tmp_path / "no_t.nc", "T")
    full, part = tmp_path / "full.nc", tmp_path / "part.nc"
    assert main(["coarse-grain", str(demo), "-o", str(full), "--compressible", "--ratio", "2"]) == 0
    assert main(["coarse-grain", str(no_t), "-o", str(part), "--compressible", "--ratio", "2"]) == 0
    with xr.open_dataset(full) as a, xr.open_dataset(part) as b:
        for name in ("T", "heat_flux_x", "tau_xy", "pressure_dilatation"):
            scale = float(np.abs(a[name]).max())
            np.testing.assert_allclose(b[name].values, a[name].values, rtol=0,
                                       atol=1e-12 * scale)


# ------------------------------------------------------------------ gas constants in discover

def test_discover_needs_only_one_of_p_and_t_with_the_gas_constant(demo, tmp_path):
    local = discover(_spec(demo, target="heat_flux"))
    for dropped in ("T", "p"):
        part = _without(demo, tmp_path / f"no_{dropped}.nc", dropped)
        model = discover(_spec(part, target="heat_flux"))
        # p = rho R T both ways round (the demo writes T = p / (rho R)): the same fit
        np.testing.assert_allclose(model.coefficients_scaled, local.coefficients_scaled,
                                   rtol=1e-9, atol=1e-12)
        assert dropped not in model.provenance["input_read"]["names"]


def test_without_the_gas_constant_one_of_p_and_t_is_refused_clearly(demo, tmp_path):
    part = _without(demo, tmp_path / "no_t.nc", "T", attributes=("gas_constant",))
    with pytest.raises(UserError, match="no temperature 'T': give the gas constant"):
        discover(_spec(part))
    # given as an option, it is used and recorded in the model
    model = discover(_spec(part, gas={"gas_constant": R_AIR}))
    assert model.provenance["gas"]["gas_constant"] == R_AIR
    assert model.provenance["gas"]["gamma"] == GAMMA_AIR  # still from the file


def test_spec_gas_overrides_the_file_and_is_recorded(demo):
    model = discover(_spec(demo, gas={"gamma": 1.3, "prandtl": 0.7}))
    gas = model.provenance["gas"]
    assert gas["gamma"] == 1.3 and gas["prandtl"] == 0.7 and gas["gas_constant"] == R_AIR
    again = ClosureModel.from_dict(json.loads(model.to_json()))
    assert again.provenance["gas"] == gas


def test_gas_field_keeps_earlier_fingerprints_and_is_validated(demo):
    plain = _spec(demo)
    assert "gas" not in plain.fingerprint()
    assert "gas" not in JobSpec.model_validate({**plain.model_dump(), "gas": {}}).fingerprint()
    with_gas = _spec(demo, gas={"gamma": 1.3})
    assert with_gas.fingerprint()["gas"]["gamma"] == 1.3
    assert with_gas.fingerprint() != plain.fingerprint()
    for bad in ({"gamma": 0.9}, {"gas_constant": -1.0}, {"prandtl": 0.0}, {"cv": 1.0}):
        with pytest.raises(ValueError):
            _spec(demo, gas=bad)
    with pytest.raises(UserError, match="choose a compressible library"):
        discover(_spec(demo, library="default", gas={"gamma": 1.3}))


def test_cli_discover_gas_options(demo, tmp_path, capsys):
    out = tmp_path / "m.json"
    assert main(["discover", str(demo), "--library", "compressible_minimal", "--ratio", "2",
                 "--gamma", "1.25", "-o", str(out), "-q"]) == 0
    model = ClosureModel.load(out)
    assert model.provenance["gas"]["gamma"] == 1.25
    assert model.provenance["spec"]["gas"]["gamma"] == 1.25
    _refused(capsys, ["discover", str(demo), "--library", "compressible_minimal",
                      "--gas-constant", "-3", "-o", str(out), "-q"],
             "--gas-constant: Input should be greater than 0")
    _refused(capsys, ["discover", str(demo), "--prandtl", "0.7", "-o", str(out), "-q"],
             "choose a compressible library")


def test_report_of_a_model_fitted_on_pressure_only_data(demo, tmp_path):
    # the report coarse-grains the held-out snapshots again, deriving T from p = rho R T as
    # the fit did: its agreement is the model's own held-out score
    part = _without(demo, tmp_path / "no_t.nc", "T", attributes=("gas_constant",))
    model = discover(_spec(part, target="heat_flux", gas={"gas_constant": R_AIR}))
    path = model.save(tmp_path / "m.json")
    assert main(["report", str(path), "-o", str(tmp_path / "report"), "-q"]) == 0
    report = json.loads((tmp_path / "report" / "report.json").read_text())
    assert report["apriori"]["agreement"]["heat_flux_x"]["r2"] == pytest.approx(
        model.scores["test"]["r2_heat_flux_x"], rel=1e-9)


# ------------------------------------------------------------------ land

@pytest.fixture(scope="module")
def land_file(demo, tmp_path_factory):
    """The demo with an island: NaN in every variable there (NaN marks land, closure.io)."""
    with xr.open_dataset(demo) as ds:
        out = ds.load()
    for name in ("rho", "u", "v", "p", "T"):
        out[name][:, 10:16, 4:12] = np.nan
    path = tmp_path_factory.mktemp("land") / "island.nc"
    out.to_netcdf(path)
    return path


def test_coarse_grain_compressible_with_land(land_file, tmp_path, capsys):
    out = tmp_path / "coarse.nc"
    assert main(["coarse-grain", str(land_file), "-o", str(out), "--compressible", "--ratio",
                 "2", "--filter", "box"]) == 0
    assert "touched by land" in capsys.readouterr().out
    src = open_fields(land_file, scalars=("rho", "p", "T"))
    cg = make_coarse_graining("box", src.grid, 2)
    coarse = open_coarse(out)
    try:
        want = favre_coarse_grain(src.snapshot(1), cg)
        got = coarse.snapshot(1)
        assert want.valid is not None and not want.valid.all()
        np.testing.assert_array_equal(got.valid, want.valid)
        for name in want.targets:
            np.testing.assert_array_equal(got.targets[name][want.valid],
                                          want.targets[name][want.valid])
    finally:
        coarse.close()
        src.close()


def test_discover_compressible_with_land(land_file, capsys):
    spec = _spec(land_file, scheme="fd4")
    model = discover(spec)
    land = model.settings["land"]
    assert land["convention"] == "fluid" and land["excluded_points"] > 0
    assert any("land:" in w for w in model.warnings)
    assert np.isfinite(model.scores["test"]["r2"])
    with pytest.raises(UserError, match="use --scheme fd2 or fd4"):
        discover(_spec(land_file))
