"""The array backend seam (closure/backend.py): the one periodic fine-grid pass
(closure.residuals.coarse_grain_snapshot) and the Gram accumulation (closure.stats) give the
same values on numpy and on torch."""

import builtins
import sys

import numpy as np
import pytest

from closure.backend import NumpyBackend, get_backend, gram_statistics
from closure.errors import UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot, open_fields
from closure.residuals import coarse_grain_snapshot, stress_names, target_names
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
    assert list(a) == list(b)
    return max(float(np.abs(a[k] - b[k]).max() / np.abs(b[k]).max()) for k in a)


@pytest.mark.parametrize("case", ["2d", "3d"])
@pytest.mark.parametrize("kind", ["gaussian", "box", "spectral"])
def test_torch_and_numpy_agree_on_every_target(snapshots, case, kind):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    snap, scalars = snapshots[case]
    cg = make_coarse_graining(kind, snap.grid, 4, None, "grid")
    ref = coarse_grain_snapshot(snap, cg, scalars)
    assert list(ref.targets) == target_names(snap.grid.dims, scalars)
    got = coarse_grain_snapshot(snap, cg, scalars, backend="cpu")
    assert _max_relative(got.targets, ref.targets) < 1e-10
    assert _max_relative(got.fields, ref.fields) < 1e-10
    assert all(a.dtype == np.float64 for a in (*got.fields.values(), *got.targets.values()))
    # a subset of targets, alone, gives the same values
    for want in (["pi"], [f"force_{snap.grid.dims[0]}"], stress_names(snap.grid.dims)):
        one = coarse_grain_snapshot(snap, cg, scalars, targets=want, backend="cpu")
        assert list(one.targets) == want
        assert _max_relative(one.targets, {k: ref.targets[k] for k in want}) < 1e-10


@pytest.mark.parametrize("case", ["2d", "3d"])
def test_float32_error_is_within_the_documented_bound(snapshots, case):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    snap, scalars = snapshots[case]
    cg = make_coarse_graining("gaussian", snap.grid, 4, None, "grid")
    ref = coarse_grain_snapshot(snap, cg, scalars)
    # closure.backend: a few float32 epsilons (1.2e-7) times the cancellation in the stress;
    # measured 5e-6 (2-D) and 1.5e-6 (3-D); the bound is 1e-4, and it is not float64's error
    for backend in (get_backend("cpu", "float32"), NumpyBackend("float32")):
        got = coarse_grain_snapshot(snap, cg, scalars, backend=backend)
        assert 1e-8 < _max_relative(got.targets, ref.targets) < 1e-4
        assert all(a.dtype == np.float64 for a in got.targets.values())


def _direct_fft_reference(fields, grid, widths, ratio):
    """Gaussian-filtered velocity, stress and force on the fine grid with numpy.fft, sampled
    every ``ratio``-th point: G(k) = exp(-k^2 D^2 / 24) per direction (Pope 2000, Table 13.2),
    d_j by i k_j with the Nyquist mode of even lengths dropped (common practice)."""
    ks = np.meshgrid(*[2 * np.pi * np.fft.fftfreq(n, h) for n, h in
                       zip(grid.shape, grid.spacing, strict=True)], indexing="ij")
    G = np.prod([np.exp(-(k**2) * D**2 / 24) for k, D in zip(ks, widths, strict=True)], axis=0)
    ik = {}
    for a, d in enumerate(grid.dims):
        k = ks[a].copy()
        if grid.shape[a] % 2 == 0:
            k[np.isclose(np.abs(k), np.abs(k).max())] = 0.0
        ik[d] = 1j * k

    def bar(f):
        return np.fft.ifftn(np.fft.fftn(f) * G).real

    def dd(f, d):
        return np.fft.ifftn(np.fft.fftn(f) * ik[d]).real

    dirs = [d for d in ("x", "y", "z") if d in grid.dims]
    u = {d: fields[{"x": "u", "y": "v", "z": "w"}[d]] for d in dirs}
    ub = {d: bar(u[d]) for d in dirs}
    tau = {}
    for i in dirs:
        for j in dirs:
            tau[i, j] = bar(u[i] * u[j]) - ub[i] * ub[j]
    out = {f"tau_{i}{j}": tau[i, j] for i, j in
           [(i, j) for i in dirs for j in dirs if "xyz".index(i) <= "xyz".index(j)]}
    out.update({f"force_{i}": sum(dd(tau[i, j], j) for j in dirs) for i in dirs})
    index = (slice(None, None, ratio),) * grid.ndim
    return {k: a[index] for k, a in out.items()}


@pytest.mark.parametrize("shape", [(18, 12, 24), (15, 21, 9)])
@pytest.mark.parametrize("device", ["numpy", "cpu"])
def test_the_pass_equals_direct_fft_filtering_then_sampling(shape, device):
    # the periodic pass (fold onto the coarse grid, one direction at a time) against the
    # definition computed independently with full numpy.fft transforms; even and odd sizes
    if device != "numpy":
        pytest.importorskip("torch", reason=NEEDS_TORCH)
    grid = Grid.regular(shape, 2 * np.pi)
    rng = np.random.default_rng(len(shape))
    fields = {c: rng.standard_normal(shape) for c in ("u", "v", "w")}
    cg = make_coarse_graining("gaussian", grid, 3, None, "grid")
    want = [*stress_names(grid.dims), "force_x", "force_y", "force_z"]
    got = coarse_grain_snapshot(Snapshot(fields, grid, 0, 0.0), cg, targets=want,
                                backend=device)
    ref = _direct_fft_reference(fields, grid, cg.widths, 3)
    for name in want:
        scale = np.abs(ref[name]).max()
        np.testing.assert_allclose(got.targets[name], ref[name], rtol=0, atol=1e-12 * scale,
                                   err_msg=name)


@pytest.mark.parametrize("device", ["numpy", "cpu"])
def test_single_mode_stress_has_the_closed_form(device):
    if device != "numpy":
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
    snap = Snapshot({"u": np.sin(k * y), "v": np.zeros_like(y)}, grid, 0, 0.0)
    yc = y[::ratio, ::ratio]
    expected = 0.5 - G(2 * k) * np.cos(2 * k * yc) / 2 - (G(k) * np.sin(k * yc)) ** 2
    t = coarse_grain_snapshot(snap, cg, targets=stress_names(grid.dims), backend=device).targets
    np.testing.assert_allclose(t["tau_xx"], expected, atol=1e-12)
    assert np.abs(t["tau_xy"]).max() < 1e-12 and np.abs(t["tau_yy"]).max() < 1e-12


@pytest.mark.parametrize("device", ["numpy", "cpu"])
@pytest.mark.parametrize("points", [None, "weights", "mask"])
def test_gram_statistics_equal_a_direct_computation(device, points):
    if device != "numpy":
        pytest.importorskip("torch", reason=NEEDS_TORCH)
    rng = np.random.default_rng(3)
    X, y = rng.normal(size=(3, 500, 7)), rng.normal(size=(3, 500))
    w = np.array([1.0, 2.0, 1.0])
    P = {None: np.ones(500), "weights": rng.uniform(0.5, 2.0, 500),
         "mask": rng.uniform(size=500) > 0.3}[points]
    got = SufficientStats.from_design(X, y, w, point_weights=None if points is None else P,
                                      backend=get_backend(device))
    # the definitions of closure.stats, written out with einsum (common practice)
    Pw = P.astype(float)
    expect = {"gram": np.einsum("c,n,cnp,cnq->cpq", w, Pw, X, X),
              "xy": np.einsum("c,n,cn,cnp->cp", w, Pw, y, X),
              "yy": np.einsum("c,n,cn,cn->c", w, Pw, y, y),
              "x_sum": np.einsum("c,n,cnp->cp", w, Pw, X),
              "y_sum": np.einsum("c,n,cn->c", w, Pw, y)}
    for name, value in expect.items():
        np.testing.assert_allclose(getattr(got, name), value, rtol=1e-10, atol=1e-10,
                                   err_msg=name)
    assert list(got.count) == [int(np.count_nonzero(P))] * 3


def test_gram_statistics_on_torch_equal_numpy():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    rng = np.random.default_rng(4)
    X, y = rng.normal(size=(2, 4000, 5)), rng.normal(size=(2, 4000))
    a = gram_statistics(X, y, [1.0, 2.0], None, NumpyBackend())
    # float32 asked: the sums are still accumulated in float64
    for backend in (get_backend("cpu"), get_backend("cpu", "float32")):
        b = gram_statistics(X, y, [1.0, 2.0], None, backend)
        for name in a:
            assert b[name].dtype == np.float64
            np.testing.assert_allclose(b[name], a[name], rtol=1e-10, atol=1e-10, err_msg=name)


def test_device_choices_and_their_errors(monkeypatch):
    assert get_backend(None).name == "numpy" and get_backend("numpy").name == "numpy"
    be = NumpyBackend()
    assert get_backend(be) is be
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


@pytest.mark.parametrize("kind", ["block", "bounded"])
def test_passes_outside_the_periodic_one_run_on_numpy_whatever_the_device(kind):
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    grid = Grid.regular((16, 16), 1.0, periodic=kind != "bounded")
    rng = np.random.default_rng(5)
    snap = Snapshot({"u": rng.standard_normal((16, 16)), "v": rng.standard_normal((16, 16))},
                    grid, 0, 0.0)
    cg = make_coarse_graining("block" if kind == "block" else "box", grid, 2, None, "grid")
    a = coarse_grain_snapshot(snap, cg)
    b = coarse_grain_snapshot(snap, cg, backend="cpu")
    for name in a.targets:
        np.testing.assert_array_equal(a.targets[name], b.targets[name])


def test_discover_on_the_torch_backend_equals_numpy(tmp_path, monkeypatch):
    # the whole job with --device cpu: the fine-grid pass and the Gram statistics on torch,
    # the same model to 1e-10
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    import closure.backend as backend
    from closure import pipeline
    from closure.spec import parse_spec
    from closure.synth import turb2d, write

    path = write(turb2d(n=48, snapshots=4, spinup=0.5, interval=0.2), tmp_path / "f.nc")
    base = {"input": {"path": str(path)}, "filter": {"kind": "gaussian", "ratio": 4},
            "fit": {"resamples": 0}}
    calls = []
    for name in ("rfft", "phase_sum"):
        real = getattr(backend.TorchBackend, name)
        monkeypatch.setattr(backend.TorchBackend, name,
                            lambda self, *a, _real=real, _name=name, **k:
                            calls.append(_name) or _real(self, *a, **k))
    real_gram = backend.gram_statistics
    grams = []
    monkeypatch.setattr(backend, "gram_statistics", lambda *a, **k: grams.append(
        type(a[4] if len(a) > 4 else k.get("backend")).__name__) or real_gram(*a, **k))
    import closure.stats as stats

    monkeypatch.setattr(stats, "gram_statistics", backend.gram_statistics)
    a = pipeline.discover(parse_spec(base))
    assert calls == [] and grams and set(grams) == {"NumpyBackend"}
    grams.clear()
    b = pipeline.discover(parse_spec({**base, "device": "cpu"}))
    assert {"rfft", "phase_sum"} <= set(calls) and set(grams) == {"TorchBackend"}
    assert a.names == b.names
    np.testing.assert_allclose(b.coefficients, a.coefficients, rtol=1e-10, atol=1e-14)
    assert parse_spec({**base, "device": "cpu"}).fingerprint() == parse_spec(base).fingerprint()


@pytest.mark.parametrize(("shape", "r"), [((12, 16), 4), ((9, 6, 15), 3), ((30,), 5)])
def test_fold_on_torch_is_the_sampled_field(shape, r):
    # the polyphase fold on the torch backend: the coarse rfft coefficients along x of every
    # r-th point of the x-derivative (aliasing; common practice; Nyquist dropped), checked
    # against numpy.fft of the samples
    torch = pytest.importorskip("torch", reason=NEEDS_TORCH)

    grid = Grid.regular(shape, 2 * np.pi)
    cg = make_coarse_graining("gaussian", grid, r, None, "grid")
    f = np.random.default_rng(len(shape)).standard_normal((2, *shape))
    N = shape[-1]
    ik = 1j * np.fft.rfftfreq(N, 1.0 / N)
    if N % 2 == 0:
        ik[-1] = 0
    got = cg._folded_rows(torch.as_tensor(f), ["d"], get_backend("cpu"))["d"]
    deriv = np.fft.irfft(np.fft.rfft(f, axis=-1) * ik, n=N, axis=-1)
    expect = np.fft.rfft(deriv[..., ::r], axis=-1)
    np.testing.assert_allclose(got.numpy(), expect, rtol=0, atol=1e-12)


def test_separable_on_torch_equals_numpy():
    pytest.importorskip("torch", reason=NEEDS_TORCH)
    grid = Grid.regular((12, 8, 20), 2 * np.pi)
    cg = make_coarse_graining("box", grid, 4, None, "grid")
    f = np.random.default_rng(8).standard_normal((2, *grid.shape))
    ops = [("f", "f", "f"), ("f", "fd", "f"), ("d", "", ""), ("", "", "fd")]
    for sample in (True, False):
        a = cg.separable(f, ops, sample)
        b = cg.separable(f, ops, sample, backend=get_backend("cpu"))
        for x, y in zip(a, b, strict=True):
            np.testing.assert_allclose(y.numpy(), x, rtol=0, atol=1e-12 * np.abs(x).max())


def test_row_blocks_do_not_change_a_bit(monkeypatch):
    # numpy transforms and folds the rows by blocks: any blocking gives the very values of
    # one block (each row's transform and fold is its own arithmetic)
    import closure.backend as backend
    import closure.threads as threads

    grid = Grid.regular((64, 96), 2 * np.pi)
    cg = make_coarse_graining("gaussian", grid, 4, None, "grid")
    f = np.random.default_rng(9).standard_normal((3, *grid.shape))
    ops = [("f", "f"), ("fd", "f"), ("f", "fd")]
    monkeypatch.setattr(backend, "_BLOCK_NUMBERS", 1 << 30)
    whole = cg.separable(f, ops)
    monkeypatch.setattr(backend, "_BLOCK_NUMBERS", 500)  # 5 rows a block
    monkeypatch.setattr(threads, "_THREADED_SIZE", 1)  # every transform may be threaded
    for a, b in zip(whole, cg.separable(f, ops), strict=True):
        np.testing.assert_array_equal(a, b)
