"""The neural reference closure (closure/neural.py) and its place in discover, the model file,
the summary and the CLI. Tests that train need torch and are skipped without it; the error
without torch is tested by hiding the module."""

import builtins
import json
import sys

import numpy as np
import pytest
from test_pipeline import smooth_fields

from closure import pipeline
from closure.cli import main
from closure.cli.discover import build_spec
from closure.errors import OptionError, UserError
from closure.grid import Grid
from closure.model import MODEL_SCHEMA, ClosureModel, validate_schema
from closure.spec import ReferenceNetSpec, parse_spec

NEEDS_TORCH = "torch is optional (pip install torch==2.13.0); the neural tests need it"


def _spec(path, net=None, **fit):
    d = {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
         "fit": {"resamples": 0, **fit}}
    if net is not None:
        d["reference_net"] = {"enabled": True, "width": 16, "depth": 3, **net}
    return parse_spec(d)


@pytest.fixture(scope="module")
def smooth_file(tmp_path_factory):
    return smooth_fields(tmp_path_factory.mktemp("neural") / "smooth.nc", n=64, snapshots=8)


@pytest.fixture(scope="module")
def turb_file(tmp_path_factory):
    from closure.synth import turb2d, write

    return write(turb2d(n=64, snapshots=12, spinup=3.0),
                 tmp_path_factory.mktemp("neural") / "turb2d.nc")


@pytest.fixture
def no_torch(monkeypatch):
    """Make ``import torch`` fail as it does where torch is not installed (the module is
    taken out of sys.modules, not set to None, which other libraries' checks trip over)."""
    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "torch" or name.startswith("torch."):
            raise ModuleNotFoundError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    for name in [m for m in sys.modules if m == "torch" or m.startswith("torch.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setattr(builtins, "__import__", fake_import)


# ---------------------------------------------------------------------- without torch
def test_without_torch_the_reference_net_says_how_to_install_it(smooth_file, no_torch,
                                                                tmp_path, capsys):
    seen = []
    with pytest.raises(UserError, match=r"pip install torch==2\.13\.0"):
        pipeline.discover(_spec(smooth_file, net={}),
                          progress=lambda *a: seen.append(a))
    assert not [s for s in seen if s[0] == "map"]  # refused before the long pass
    out = tmp_path / "m.json"
    rc = main(["discover", str(smooth_file), "--ratio", "4", "--width", "4", "--resamples",
               "0", "--reference-net", "-o", str(out)])
    assert rc == 2
    assert "install the neural extra: pip install torch==2.13.0" in capsys.readouterr().err
    assert not out.exists()
    # everything else works without torch, and the model has no network section
    model = pipeline.discover(_spec(smooth_file))
    assert model.reference_net is None and "reference_net" not in model.to_dict()
    with pytest.raises(UserError, match="--reference-net"):
        model.reference_network()


def test_the_network_is_off_by_default_and_keeps_the_fingerprint(smooth_file):
    spec = _spec(smooth_file)
    assert spec.reference_net.enabled is False
    assert "reference_net" not in spec.fingerprint()
    on = _spec(smooth_file, net={"epochs": 5})
    assert on.fingerprint()["reference_net"]["epochs"] == 5


def test_spec_and_cli_refuse_bad_network_settings(smooth_file):
    with pytest.raises(OptionError, match="reference_net.kernel"):
        parse_spec({"input": {"path": "x.nc"}, "reference_net": {"kernel": 4}})
    with pytest.raises(OptionError, match="reference_net.epochs"):
        parse_spec({"input": {"path": "x.nc"}, "reference_net": {"epochs": 0}})
    kw = dict(filter="gaussian", width=None, width_units="grid", ratio=4, target="stress",
              library="default", method="threshold", scheme="spectral", test_fraction=0.25,
              var=None, scalar=None, non_periodic=False, transfer_weight=0.0, seed=3,
              resamples=0, snapshots=None)
    with pytest.raises(OptionError, match="add --reference-net"):
        build_spec(smooth_file, **kw, net_epochs=10)
    spec = build_spec(smooth_file, **kw, reference_net=True, net_epochs=10, net_seconds=5)
    assert (spec.reference_net.enabled, spec.reference_net.epochs, spec.reference_net.seconds,
            spec.reference_net.seed) == (True, 10, 5.0, 3)


# ---------------------------------------------------------------------- with torch
@pytest.fixture(scope="module")
def turb_model(turb_file):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    seen = []
    model = pipeline.discover(_spec(turb_file, net={"epochs": 150}),
                              progress=lambda *a: seen.append(a))
    return model, seen


def test_turb2d_network_beats_smagorinsky_held_out(turb_model):
    model, seen = turb_model
    net, smag = model.scores["reference_net_test"], model.scores["smagorinsky_only_test"]
    # The Smagorinsky form correlates poorly with the exact stress a priori (Clark, Ferziger
    # & Reynolds 1979, J. Fluid Mech. 91:1; Liu, Meneveau & Katz 1994, J. Fluid Mech. 275:83,
    # from memory: correlations about 0.2-0.4), while convolutional networks trained on
    # coarse-grained data reach much higher a priori correlations (from memory: Zanna &
    # Bolton 2020, Geophys. Res. Lett. 47; Guan et al. 2022, J. Comput. Phys. 458).
    assert net["correlation"] > smag["correlation"] + 0.3
    assert net["correlation"] > 0.8
    assert net["energy_transfer_correlation"] > smag["energy_transfer_correlation"]
    # same held-out points, and the exact transfer statistics are shared
    assert net["points"] == smag["points"] == model.scores["test"]["points"]
    assert net["energy_transfer_backscatter_fraction_exact"] == \
        smag["energy_transfer_backscatter_fraction_exact"]
    assert 0 <= net["energy_transfer_backscatter_fraction_model"] <= 1
    assert ("network", 150, 150) in seen
    assert model.reference_net["training"]["stopped_by"] == "epochs"
    text = model.summary()
    assert "reference_net_test" in text and "Reference network:" in text
    assert "does not guarantee a stable" in text


def test_the_coarse_solver_runs_the_network_a_posteriori(turb_model, turb_file):
    # the hook of closure.les: anything with target and evaluate(fields, grid) is a closure
    from closure import les
    from closure.io import open_fields
    from closure.residuals import coarse_grain_snapshot

    model, _ = turb_model
    net = model.reference_network()
    spec = _spec(turb_file)
    with open_fields(turb_file) as src:
        cs = coarse_grain_snapshot(src.snapshot(9), pipeline._coarse_graining(spec, src.grid),
                                   (), targets=[])
    term = les.subgrid_term(net, cs.grid)
    # the solver's subgrid tendency is -curl(div tau) of the network's stress (DEVELOPERS.md
    # conventions), computed here independently with closure.report.spectra
    from closure.report.spectra import curl_2d, stress_divergence

    tau = net.predict(cs.fields, cs.grid)
    expected = -curl_2d(stress_divergence(tau, cs.grid), cs.grid)
    got = np.fft.irfftn(term(cs.fields), s=cs.grid.shape, axes=(0, 1))
    np.testing.assert_allclose(got, expected, atol=1e-10 * np.abs(expected).max())
    traj = les.run(cs.fields, cs.grid, [0.0, 0.2], closure=net, viscosity=1e-3, drag=0.1)
    assert traj.status in ("completed", "blew up") and len(traj.times) >= 1


def test_simulate_runs_the_stored_network_beside_the_model(turb_model, turb_file):
    # closure les --reference-net: the network is one more run of the same comparison
    from closure import les

    model, _ = turb_model
    comparison = les.simulate(model, turb_file, initial_index=6, baselines=["none"],
                              reference_net=True)
    assert "reference network" in comparison.runs
    run = comparison.runs["reference network"]
    assert run.status in ("completed", "blew up") and len(run.times) >= 1
    with pytest.raises(OptionError, match="--reference-net runs a model's stored network"):
        les.simulate(None, turb_file, initial_index=6, baselines=["none"], reference_net=True)


def test_on_smooth_fields_the_network_does_not_beat_the_gradient_model(smooth_file):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    # Smooth fields and a Gaussian filter: tau_ij = (D^2/12) d_k u_i d_k u_j + O(D^4)
    # (Leonard 1974, Adv. Geophys. 18A:237; Clark, Ferziger & Reynolds 1979), and the sparse
    # fit finds that form with its D^4 correction (tests/test_pipeline.py), so it is nearly
    # exact on held-out snapshots. A fair comparison cannot let the network do better than
    # that by more than its own noise. Criterion: the network's best held-out relative L2
    # error over three seeds is not below the sparse model's by more than twice the spread
    # (standard deviation) of the network's error over those seeds.
    errors, corrs = [], []
    for seed in range(3):
        model = pipeline.discover(_spec(smooth_file, net={"epochs": 150, "seed": seed}))
        errors.append(model.scores["reference_net_test"]["relative_error"])
        corrs.append(model.scores["reference_net_test"]["correlation"])
    sparse = model.scores["test"]["relative_error"]
    assert sparse < 1e-2
    noise = float(np.std(errors))
    assert min(errors) >= sparse - 2 * noise
    assert min(corrs) > 0.95  # and the network did learn the closure
    assert len(set(errors)) == 3  # the seeds do give different networks


def _tiny_data(seed=0, shape=(12, 12), n=3):
    rng = np.random.default_rng(seed)
    grid = Grid.regular(shape, 2 * np.pi)
    pairs = []
    for _ in range(n):
        u, v = rng.normal(size=shape), rng.normal(size=shape)
        pairs.append(({"u": u, "v": v}, {"tau_xx": u * u, "tau_xy": u * v, "tau_yy": v * v}))
    return grid, pairs


def test_same_seed_same_weights_on_cpu():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from closure.neural import train_reference_net

    grid, pairs = _tiny_data()
    settings = ReferenceNetSpec(enabled=True, epochs=15, width=8, depth=3, batch=2, seed=5)

    def train(s):
        return train_reference_net(pairs, grid, "stress", "spectral",
                                   ["tau_xx", "tau_xy", "tau_yy"], [1, 2, 1], s)

    a, b = train(settings), train(settings)
    assert a.weights_sha256() == b.weights_sha256()
    for (na, ta), (nb, tb) in zip(a.module.state_dict().items(), b.module.state_dict().items(),
                                  strict=True):
        assert na == nb and np.array_equal(ta.numpy(), tb.numpy())
    other = train(settings.model_copy(update={"seed": 6}))
    assert other.weights_sha256() != a.weights_sha256()


def test_the_seconds_budget_stops_training():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from closure.neural import train_reference_net

    grid, pairs = _tiny_data()
    net = train_reference_net(pairs, grid, "stress", "spectral", ["tau_xx", "tau_xy", "tau_yy"],
                              [1, 2, 1], ReferenceNetSpec(epochs=1000, seconds=1e-6, width=4))
    assert net.training["stopped_by"] == "seconds" and net.training["epochs_run"] == 1


def test_three_dimensional_and_non_periodic_grids():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from closure.neural import input_names, train_reference_net

    rng = np.random.default_rng(1)
    grid = Grid.regular((6, 6, 6), 1.0)
    comps = ["tau_xx", "tau_xy", "tau_xz", "tau_yy", "tau_yz", "tau_zz"]
    pairs = [({c: rng.normal(size=grid.shape) for c in "uvw"},
              {c: rng.normal(size=grid.shape) for c in comps}) for _ in range(2)]
    net = train_reference_net(pairs, grid, "stress", "spectral", comps, [1, 2, 2, 1, 2, 1],
                              ReferenceNetSpec(epochs=2, width=4))
    assert net.arch["ndim"] == 3 and net.arch["in_channels"] == 9
    assert net.predict(pairs[0][0], grid)["tau_yz"].shape == grid.shape
    flat = Grid.regular((10, 10), 1.0, periodic=False)
    pairs = [({"u": rng.normal(size=(10, 10)), "v": rng.normal(size=(10, 10)),
               "c": rng.normal(size=(10, 10))},
              {"flux_c_y": rng.normal(size=(10, 10)), "flux_c_x": rng.normal(size=(10, 10))})]
    net = train_reference_net(pairs, flat, "flux:c", "fd2", ["flux_c_y", "flux_c_x"], [1, 1],
                              ReferenceNetSpec(epochs=2, width=4))
    assert net.arch["padding"] == "replicate"
    assert net.inputs == input_names("flux:c", ("y", "x"))
    assert net.inputs == ["d_y v", "d_x v", "d_y u", "d_x u", "d_y c", "d_x c"]


def test_model_file_keeps_the_network_and_queued_run_trains_the_same(smooth_file, tmp_path):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from closure.io import open_fields
    from closure.residuals import coarse_grain_snapshot

    spec = _spec(smooth_file, net={"epochs": 20})
    model = pipeline.discover(spec)
    path = model.save(tmp_path / "m.json")
    d = json.loads(path.read_text())
    assert validate_schema(d, MODEL_SCHEMA) == []
    state = d["reference_net"]["state"]
    assert state["dtype"] == "float32" and "0.weight" in state["tensors"]
    assert d["reference_net"]["training"]["seed"] == 0
    back = ClosureModel.load(path)
    net, again = model.reference_network(), back.reference_network()
    assert again.weights_sha256() == net.weights_sha256()
    with open_fields(smooth_file) as src:
        cg = pipeline._coarse_graining(spec, src.grid)
        cs = coarse_grain_snapshot(src.snapshot(7), cg, (), targets=model.components)
    a, b = net.predict(cs.fields, cs.grid), again.predict(cs.fields, cs.grid)
    for c in model.components:
        np.testing.assert_array_equal(a[c], b[c])
    # a damaged state is a clear error
    d["reference_net"]["state"]["tensors"]["0.weight"]["shape"] = [1]
    with pytest.raises(UserError, match="damaged"):
        ClosureModel.from_dict(d).reference_network()
    # the queued path (maps, then a reduce that coarse-grains the training snapshots again)
    # trains the same network and scores it the same
    p = pipeline.plan(spec)
    stats = {i: pipeline.map_snapshot(spec, p, i) for i in p["snapshots"]}
    queued = pipeline.reduce(spec, p, stats)
    assert queued.reference_network().weights_sha256() == net.weights_sha256()
    for k, v in model.scores["reference_net_test"].items():
        assert queued.scores["reference_net_test"][k] == pytest.approx(v, rel=1e-9)


def test_cli_prints_the_model_and_the_network_side_by_side(smooth_file, tmp_path, capsys):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    out = tmp_path / "m.json"
    rc = main(["discover", str(smooth_file), "--ratio", "4", "--width", "4", "--resamples",
               "0", "--reference-net", "--net-epochs", "10", "-o", str(out)])
    text = capsys.readouterr().out
    assert rc == 0
    header = next(line for line in text.splitlines() if line.startswith("A priori scores"))
    assert "test" in header and "smagorinsky_only_test" in header \
        and "reference_net_test" in header
    assert "trained 10 of 10 epochs" in text
    assert ClosureModel.load(out).reference_net["training"]["epochs_run"] == 10


# ---------------------------------------------------------------------- the report
@pytest.fixture(scope="module")
def net_model(smooth_file):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    return pipeline.discover(_spec(smooth_file, net={"epochs": 30}, transfer_weight=0.0))


def test_report_shows_the_network_beside_the_model(net_model, smooth_file, tmp_path):
    from closure.report.gather import build_report

    out = build_report(net_model, tmp_path / "report", smooth_file)
    page = (out / "index.html").read_text()
    assert "reference_net_test" in page and "network correlation" in page
    assert (out / "apriori_hexbin_network.png").stat().st_size > 0
    numbers = json.loads((out / "report.json").read_text())
    details = net_model.settings["a_priori_details"]
    # pooled moments (the report) and sufficient statistics (the pipeline) agree
    for c, s in numbers["apriori"]["network_agreement"].items():
        assert s["correlation"] == pytest.approx(
            details["reference_net_components"][c]["correlation"], rel=1e-8)
    # the shell sums of the transfer spectrum add up to the domain mean of the pointwise
    # energy transfer (Parseval; DEVELOPERS.md "Transfer spectra")
    energy = next(t for t in numbers["apriori"]["transfers"] if t["name"] == "energy")
    assert energy["network_total"] == pytest.approx(
        details["reference_net_transfers"]["energy_transfer"]["mean_model"], rel=1e-6)


def test_report_without_torch_leaves_the_network_figures_out(net_model, smooth_file, tmp_path,
                                                            no_torch):
    from closure.report.gather import build_report

    out = build_report(net_model.to_dict(), tmp_path / "report", smooth_file)
    page = (out / "index.html").read_text()
    assert "reference_net_test" in page  # the stored scores need no torch
    assert "left out of the figures" in page and "pip install torch==2.13.0" in page
    assert not (out / "apriori_hexbin_network.png").exists()


def test_land_points_do_not_enter_the_loss_or_the_normalisation():
    # The loss is taken over the valid points only, like the sparse fit's statistics: the
    # target's values where the fit has no point cannot change a single weight, while the same
    # values at valid points do (so this test can fail).
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from closure.neural import train_reference_net

    grid, pairs = _tiny_data(shape=(12, 12), n=3)
    valid = np.ones(grid.shape, dtype=bool)
    valid[:, :4] = False  # a coast: the first four columns
    settings = ReferenceNetSpec(enabled=True, epochs=10, width=8, depth=3, batch=2, seed=3)
    comps = ["tau_xx", "tau_xy", "tau_yy"]

    def train(data):
        return train_reference_net(data, grid, "stress", "fd4", comps, [1, 2, 1], settings)

    def spoil(where):
        out = []
        for fields, targets in pairs:
            bad = {c: np.where(where, 1e6, t) for c, t in targets.items()}
            out.append((fields, bad, valid))
        return out

    a = train([(f, t, valid) for f, t in pairs])
    b = train(spoil(~valid))
    assert a.weights_sha256() == b.weights_sha256()
    assert a.training["masked"] and a.training["points"] == 3 * int(valid.sum())
    assert a.output_mean == pytest.approx(b.output_mean, rel=0, abs=0)
    changed = train(spoil(valid & (np.arange(12)[None, :] == 8)))
    assert changed.weights_sha256() != a.weights_sha256()
    # no valid point at all: said plainly
    with pytest.raises(UserError, match="no training point of the reference network is valid"):
        train([(f, t, np.zeros(grid.shape, bool)) for f, t in pairs])


def test_discover_with_land_trains_and_scores_the_network_on_valid_points(tmp_path):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    from test_masks import basin, smooth_flow, with_land

    from closure.io import write_netcdf

    n, snapshots = 128, 5
    g = Grid(("y", "x"), (n, n), (2 * np.pi / n,) * 2, periodic=False)
    fluid = basin(g, frame=8, island=False)
    frames = [with_land(smooth_flow(g, seed=s), fluid) for s in range(snapshots)]
    import xarray as xr

    c = g.coords("x")
    ds = xr.Dataset({k: (("time", "y", "x"), np.array([f[k] for f in frames]))
                     for k in ("u", "v")},
                    coords={"time": np.arange(snapshots, dtype=float), "y": c, "x": c})
    path = write_netcdf(ds, tmp_path / "basin.nc")
    spec = parse_spec({"input": {"path": str(path), "periodic": False},
                       "filter": {"kind": "gaussian", "ratio": 4, "width": 4},
                       "scheme": "fd4", "fit": {"resamples": 0},
                       "reference_net": {"enabled": True, "width": 8, "depth": 2,
                                         "epochs": 20}})
    model = pipeline.discover(spec)
    net = model.reference_net
    assert net["training"]["masked"] is True
    excluded = model.settings["land"]["excluded_points"]
    assert excluded > 0
    total = net["training"]["snapshots"] * 32 * 32
    assert net["training"]["points"] < total
    test = model.scores["reference_net_test"]
    # scored on the same valid held-out points as the sparse model
    assert np.isfinite(test["r2"]) and test["points"] == model.scores["test"]["points"]
    everywhere = len(model.provenance["snapshots"]["test"]) * 32 * 32
    assert 0 < test["points"] < everywhere
