"""The array backend seam (closure/backend.py): the periodic fine-grid pass and the Gram
accumulation on numpy and on torch agree with closure.residuals / closure.stats."""

import builtins
import sys

import numpy as np
import pytest

from closure.backend import (
    NumpyBackend,
    coarse_grain_periodic,
    get_backend,
    gram_statistics,
    periodic_target_names,
)
from closure.errors import UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import open_fields
from closure.residuals import coarse_grain_snapshot, target_names
from closure.stats import SufficientStats

NEEDS_TORCH = "torch is optional (pip install torch==2.13.0); the torch backend needs it"


@pytest.fixture(scope="module")
def snapshots(tmp_path_factory):
    """A 2-D snapshot with a scalar and a 3-D one, from the project's own solvers."""
    from closure.synth import turb2d, turb3d, write

    folder = tmp_path_factory.mktemp("backend")
    p2 = write(turb2d(n=64, snapshots=1, spinup=1.0, scalar=True), folder / "t2.nc")
    p3 = write(turb3d(n=32, snapshots=1, spinup=0.25), folder / "t3.nc")
    with open_fields(p2, None, ("c",), True) as src:
        s2 = src.snapshot(0)
    with open_fields(p3, None, (), True) as src:
        s3 = src.snapshot(0)
    return {"2d": (s2, ("c",)), "3d": (s3, ())}


def _max_relative(a: dict, b: dict) -> float:
    assert sorted(a) == sorted(b)
    return max(float(np.abs(a[k] - b[k]).max() / np.abs(b[k]).max()) for k in a)


@pytest.mark.parametrize("case", ["2d", "3d"])
@pytest.mark.parametrize("kind", ["gaussian", "box", "spectral"])
def test_numpy_pass_equals_coarse_grain_snapshot(snapshots, case, kind):
    snap, scalars = snapshots[case]
    cg = make_coarse_graining(kind, snap.grid, 4, None, "grid")
    ref = coarse_grain_snapshot(snap, cg, scalars)
    assert periodic_target_names(snap.grid.dims, scalars) == target_names(snap.grid.dims,
                                                                          scalars)
    fields, targets = coarse_grain_periodic(snap.fields, cg, scalars)
    assert _max_relative(targets, ref.targets) < 1e-10
    assert _max_relative(fields, ref.fields) < 1e-10
    # a subset of targets gives the same values
    _, one = coarse_grain_periodic(snap.fields, cg, scalars, targets=["pi"])
    assert list(one) == ["pi"] and np.allclose(one["pi"], ref.targets["pi"], rtol=0,
                                               atol=1e-10 * np.abs(ref.targets["pi"]).max())


@pytest.mark.parametrize("case", ["2d", "3d"])
def test_torch_pass_equals_numpy_in_float64(snapshots, case):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    snap, scalars = snapshots[case]
    cg = make_coarse_graining("gaussian", snap.grid, 4, None, "grid")
    fields_np, targets_np = coarse_grain_periodic(snap.fields, cg, scalars,
                                                  backend=NumpyBackend())
    fields_t, targets_t = coarse_grain_periodic(snap.fields, cg, scalars,
                                                backend=get_backend("cpu"))
    assert _max_relative(targets_t, targets_np) < 1e-10
    assert _max_relative(fields_t, fields_np) < 1e-10
    # float32: a few float32 epsilons (1.2e-7) times the cancellation in the stress
    _, targets_32 = coarse_grain_periodic(snap.fields, cg, scalars,
                                          backend=get_backend("cpu", "float32"))
    error = _max_relative(targets_32, targets_np)
    assert 1e-8 < error < 1e-4


def test_single_mode_stress_has_the_closed_form():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    # u = sin(k y), v = 0, Gaussian filter of width D: G(k) = exp(-k^2 D^2 / 24) (Pope 2000,
    # Table 13.2), so bar(u) = G(k) sin(k y), bar(u^2) = 1/2 - G(2k) cos(2 k y) / 2 and
    # tau_xx = bar(u^2) - bar(u)^2; tau_xy = tau_yy = 0.
    n, k, ratio = 64, 3, 4
    grid = Grid.regular((n, n), 2 * np.pi)
    y, _ = grid.mesh()
    cg = make_coarse_graining("gaussian", grid, ratio, 6.0, "grid")
    D = cg.delta
    G = lambda q: np.exp(-(q * D) ** 2 / 24)  # noqa: E731
    fields = {"u": np.sin(k * y), "v": np.zeros_like(y)}
    yc = y[::ratio, ::ratio]
    expected = 0.5 - G(2 * k) * np.cos(2 * k * yc) / 2 - (G(k) * np.sin(k * yc)) ** 2
    for device in ("numpy", "cpu"):
        _, t = coarse_grain_periodic(fields, cg, targets=["tau_xx", "tau_xy", "tau_yy"],
                                     backend=get_backend(device))
        np.testing.assert_allclose(t["tau_xx"], expected, atol=1e-12)
        assert np.abs(t["tau_xy"]).max() < 1e-12 and np.abs(t["tau_yy"]).max() < 1e-12


@pytest.mark.parametrize("device", ["numpy", "cpu"])
def test_gram_statistics_equal_the_sufficient_statistics(device):
    if device != "numpy":
        pytest.importorskip("torch", reason=NEEDS_TORCH)
    rng = np.random.default_rng(3)
    X, y = rng.normal(size=(3, 500, 7)), rng.normal(size=(3, 500))
    w = [1.0, 2.0, 1.0]
    ref = SufficientStats.from_design(X, y, w)
    got = gram_statistics(X, y, w, get_backend(device))
    for name in ("gram", "xy", "yy", "x_sum", "y_sum"):
        np.testing.assert_allclose(got[name], getattr(ref, name), rtol=1e-10, atol=1e-10)


def test_device_choices_and_their_errors(monkeypatch):
    assert get_backend(None).name == "numpy" and get_backend("numpy").name == "numpy"
    with pytest.raises(UserError, match="choose numpy, cpu, cuda or auto"):
        get_backend("tpu")
    with pytest.raises(UserError, match="float64 or float32"):
        get_backend("numpy", "float16")
    try:
        import torch
    except ImportError:
        torch = None
    if torch is not None and not torch.cuda.is_available():
        with pytest.raises(UserError, match="sees no GPU"):
            get_backend("cuda")
    # without torch: the torch devices say how to install it, auto falls back to numpy
    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "torch" or name.startswith("torch."):
            raise ModuleNotFoundError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    for name in [m for m in sys.modules if m == "torch" or m.startswith("torch.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setattr(builtins, "__import__", fake_import)
    with pytest.raises(UserError, match=r"pip install torch==2\.13\.0"):
        get_backend("cpu")
    assert get_backend("auto").name == "numpy"


def test_only_periodic_spectral_filters_take_the_backend_pass():
    grid = Grid.regular((16, 16), 1.0, periodic=False)
    fields = {"u": np.zeros((16, 16)), "v": np.zeros((16, 16))}
    with pytest.raises(UserError, match="periodic data"):
        coarse_grain_periodic(fields, make_coarse_graining("box", grid, 2, None, "grid"))
    periodic = Grid.regular((16, 16), 1.0)
    with pytest.raises(UserError, match="periodic data"):
        coarse_grain_periodic(fields, make_coarse_graining("block", periodic, 2, None, "grid"))
    with pytest.raises(UserError, match="unknown target"):
        coarse_grain_periodic(fields, make_coarse_graining("box", periodic, 2, None, "grid"),
                              targets=["flux_c_x"])


def test_discover_on_the_torch_backend_equals_numpy(tmp_path, monkeypatch):
    # the whole job with --device cpu: the fine-grid pass on torch, the same model to 1e-10
    pytest.importorskip("torch", reason="torch is optional (pip install torch==2.13.0)")
    from closure import pipeline
    from closure.spec import parse_spec
    from closure.synth import turb2d, write

    path = write(turb2d(n=48, snapshots=4, spinup=0.5, interval=0.2), tmp_path / "f.nc")
    base = {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 0}}
    import closure.backend as backend

    calls = []
    real = backend.coarse_grain_periodic

    def spy(*args, **kwargs):
        calls.append(type(kwargs.get("backend", args[-1] if len(args) > 4 else None)).__name__)
        return real(*args, **kwargs)

    monkeypatch.setattr(backend, "coarse_grain_periodic", spy)
    a = pipeline.discover(parse_spec(base))
    assert calls == []
    b = pipeline.discover(parse_spec({**base, "device": "cpu"}))
    assert calls and set(calls) == {"TorchBackend"}
    assert a.names == b.names
    np.testing.assert_allclose(b.coefficients, a.coefficients, rtol=1e-10, atol=1e-14)
    assert parse_spec({**base, "device": "cpu"}).fingerprint() == parse_spec(base).fingerprint()
