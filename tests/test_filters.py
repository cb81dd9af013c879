import numpy as np
import pytest
import scipy.integrate
import scipy.ndimage
import xarray as xr

from closure.errors import UserError
from closure.filters import (
    CoarseGraining,
    box_weights,
    make_coarse_graining,
    transfer_function,
)
from closure.grid import Grid


# Transfer functions written out from Pope (2000), Turbulent Flows, Table 13.2
def pope_box(k, D):
    return np.where(k == 0, 1.0, np.sin(k * D / 2) / np.where(k == 0, 1.0, k * D / 2))


def pope_gaussian(k, D):
    return np.exp(-(k**2) * D**2 / 24)


def pope_sharp(k, D):
    return (np.abs(k) < np.pi / D).astype(float)


POPE = {"box": pope_box, "gaussian": pope_gaussian, "spectral": pope_sharp}


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
def test_transfer_function_is_pope_table_13_2(kind):
    k = np.linspace(-20, 20, 401)
    np.testing.assert_allclose(transfer_function(kind, k, 0.7), POPE[kind](k, 0.7), atol=1e-15)


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
@pytest.mark.parametrize("k", [0, 1, 3, 5, 7, 8])
def test_single_mode_is_scaled_by_g_of_k(kind, k):
    # filtering cos(k x) gives G(k) cos(k x) (Pope 2000, Table 13.2, and eq. 13.23)
    g = Grid.regular((64,), 2 * np.pi)
    x = g.coords("x")
    D = 8 * g.spacing[0]  # cutoff pi/D = 4 for the sharp filter
    cg = CoarseGraining(kind, 4, (D,), g)
    f = np.cos(k * x + 0.3)
    np.testing.assert_allclose(cg.filter(f), POPE[kind](k, D) * f, atol=1e-14)


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
def test_2d_filter_is_the_tensor_product(kind):
    # G(k) = G1(k_x) G1(k_y) for the tensor-product filters (Pope 2000, sec. 13.2)
    g = Grid.regular((32, 48), (2 * np.pi, 3 * np.pi))
    y, x = g.mesh()
    Dy, Dx = 3 * g.spacing[0], 5 * g.spacing[1]
    cg = CoarseGraining(kind, 1, (Dy, Dx), g)
    ky, kx = 3.0, 4 * 2 / 3  # 3 and 4 periods over the y and x lengths
    f = np.cos(kx * x) * np.sin(ky * y) + 2.0
    expected = POPE[kind](kx, Dx) * POPE[kind](ky, Dy) * np.cos(kx * x) * np.sin(ky * y) + 2.0
    np.testing.assert_allclose(cg.filter(f), expected, atol=1e-13)


def test_stacks_filter_in_one_pass_like_single_fields():
    g = Grid.regular((16, 16), 1.0)
    cg = CoarseGraining("gaussian", 2, (0.25, 0.25), g)
    rng = np.random.default_rng(1)
    stack = rng.standard_normal((3, 16, 16))
    out = cg.filter(stack)
    for i in range(3):
        np.testing.assert_allclose(out[i], cg.filter(stack[i]), atol=1e-14)


# --- second moments ---------------------------------------------------------------------------

def test_second_moments_box_and_gaussian_are_d2_over_12():
    # Pope (2000), Table 13.2 / eq. 13.30: both kernels have variance D^2 / 12
    g = Grid.regular((32, 32), 1.0)
    for kind in ("box", "gaussian"):
        cg = make_coarse_graining(kind, g, 4, 6.0)
        D = 6.0 / 32
        assert cg.second_moment("x") == pytest.approx(D**2 / 12, rel=1e-14)


@pytest.mark.parametrize("cells, want", [(4, (16 + 2) / 12), (5, (25 - 1) / 12),
                                         (8, (64 + 2) / 12)])
def test_bounded_box_reports_its_discrete_kernels_moment(cells, want):
    # On bounded grids the box is the discrete kernel box_weights: even widths put half weights
    # at the ends, so sum w j^2 = (D^2 + 2)/12; odd widths are D uniform weights, whose
    # variance is (D^2 - 1)/12 (the discrete uniform distribution; common practice).
    h = 0.25
    g = Grid(dims=("x",), shape=(64,), spacing=(h,), periodic=False)
    cg = make_coarse_graining("box", g, 4, cells * h, "coordinate")
    w = box_weights(cells)
    j = np.arange(w.size) - (w.size - 1) / 2
    assert np.sum(w * j**2) == pytest.approx(want, rel=1e-14)
    assert cg.second_moment("x") == pytest.approx(want * h**2, rel=1e-14)
    # the same box on periodic data is applied through its continuous transfer function
    periodic = make_coarse_graining("box", Grid.regular((64,), 64 * h), 4, cells * h,
                                    "coordinate")
    assert periodic.second_moment("x") == pytest.approx((cells * h) ** 2 / 12, rel=1e-14)


def test_second_moments_from_the_kernels():
    # kernels of Pope (2000), Table 13.2: box 1/D on |r| < D/2; Gaussian
    # sqrt(6 / (pi D^2)) exp(-6 r^2 / D^2). Their variances, integrated numerically, are D^2/12,
    # and their Fourier transforms are the transfer functions.
    D = 0.8
    gauss = lambda r: np.sqrt(6 / (np.pi * D**2)) * np.exp(-6 * r**2 / D**2)  # noqa: E731
    norm = scipy.integrate.quad(gauss, -np.inf, np.inf)[0]
    var = scipy.integrate.quad(lambda r: r**2 * gauss(r), -np.inf, np.inf)[0]
    assert norm == pytest.approx(1.0, rel=1e-10)
    assert var == pytest.approx(D**2 / 12, rel=1e-10)
    box_var = scipy.integrate.quad(lambda r: r**2 / D, -D / 2, D / 2)[0]
    assert box_var == pytest.approx(D**2 / 12, rel=1e-12)
    cg = CoarseGraining("gaussian", 1, (D,), Grid.regular((8,), 8.0))
    assert cg.second_moment("x") == pytest.approx(var, rel=1e-9)
    for k in (0.5, 3.0, 7.0):
        ft = scipy.integrate.quad(lambda r, k=k: gauss(r) * np.cos(k * r), -np.inf, np.inf)[0]
        assert transfer_function("gaussian", k, D) == pytest.approx(ft, abs=1e-10)
        ft_box = scipy.integrate.quad(lambda r, k=k: np.cos(k * r) / D, -D / 2, D / 2)[0]
        assert transfer_function("box", k, D) == pytest.approx(ft_box, abs=1e-12)


@pytest.mark.parametrize("r", [2, 3, 4, 8])
def test_block_second_moment_is_variance_of_r_points(r):
    # mean of r points spaced h: the variance of the positions 0, h, ..., (r-1) h is
    # (r^2 - 1) h^2 / 12 (common practice: variance of a discrete uniform distribution)
    h = 0.1
    g = Grid.regular((8 * r,), 8 * r * h)
    cg = make_coarse_graining("block", g, r)
    assert cg.second_moment("x") == pytest.approx(np.var(np.arange(r) * h), rel=1e-12)
    assert cg.second_moment("x") == pytest.approx((r**2 - 1) * h**2 / 12, rel=1e-12)


def test_sharp_filter_second_moment_is_none_with_a_note():
    cg = make_coarse_graining("spectral", Grid.regular((16,), 1.0), 2)
    assert cg.second_moment("x") is None
    d = cg.describe()
    assert d["second_moment"] == {"x": None}
    assert "no finite second moment" in d["second_moment_note"]


# --- against scipy.ndimage and xarray ---------------------------------------------------------

def test_periodic_gaussian_matches_scipy_gaussian_filter_wrap():
    # scipy.ndimage.gaussian_filter(mode="wrap") with sigma = D / sqrt(12) in grid units: a sampled
    # Gaussian kernel. Its DFT differs from exp(-k^2 D^2/24) only by aliases of size
    # exp(-2 pi^2 sigma^2) (~1e-46 here), so the two agree to round-off.
    g = Grid.regular((48, 64), (1.5, 2.0))
    rng = np.random.default_rng(2)
    f = rng.standard_normal(g.shape)
    cells = 8.0
    cg = make_coarse_graining("gaussian", g, 4, cells)
    ref = scipy.ndimage.gaussian_filter(f, sigma=cells / np.sqrt(12), mode="wrap", truncate=12.0)
    np.testing.assert_allclose(cg.filter(f), ref, atol=1e-13)


def non_periodic(shape):
    return Grid(("y", "x")[-len(shape):], shape, (0.1,) * len(shape), periodic=False)


def test_non_periodic_gaussian_matches_scipy_reflect():
    g = non_periodic((30, 41))
    f = np.random.default_rng(3).standard_normal(g.shape)
    cg = make_coarse_graining("gaussian", g, 3, 6.0)
    ref = scipy.ndimage.gaussian_filter(f, sigma=6.0 / np.sqrt(12), mode="reflect", truncate=6.0)
    np.testing.assert_allclose(cg.filter(f), ref, atol=1e-13)


def test_non_periodic_box_matches_scipy_uniform_filter_reflect():
    g = non_periodic((30, 41))
    f = np.random.default_rng(4).standard_normal(g.shape)
    # odd width: the mean of 5 points
    cg = make_coarse_graining("box", g, 3, 5.0)
    ref = scipy.ndimage.uniform_filter(f, size=5, mode="reflect")
    np.testing.assert_allclose(cg.filter(f), ref, atol=1e-13)
    # even width 4: weights (1/2, 1, 1, 1, 1/2)/4 = (3 * mean of 3 + 5 * mean of 5) / 8 per axis
    cg4 = make_coarse_graining("box", g, 2, 4.0)
    ref4 = f
    for axis in (0, 1):
        ref4 = (3 * scipy.ndimage.uniform_filter1d(ref4, 3, axis=axis, mode="reflect")
                + 5 * scipy.ndimage.uniform_filter1d(ref4, 5, axis=axis, mode="reflect")) / 8
    np.testing.assert_allclose(cg4.filter(f), ref4, atol=1e-13)


def test_box_weights_integrate_the_top_hat():
    np.testing.assert_allclose(box_weights(4.0), np.array([0.5, 1, 1, 1, 0.5]) / 4)
    np.testing.assert_allclose(box_weights(3.0), np.ones(3) / 3)
    w = box_weights(2.5)
    assert w.sum() == pytest.approx(1.0)
    # second moment of the discrete weights of an odd integer width D: (D^2 - 1)/12 cells^2
    j = np.arange(5) - 2
    assert np.sum(box_weights(5.0) * j**2) == pytest.approx((25 - 1) / 12)


def test_block_mean_matches_xarray_coarsen():
    # reference: xarray Dataset.coarsen(...).mean(), data and coordinates
    g = Grid(("y", "x"), (12, 16), (0.5, 0.25), (1.0, -2.0))
    rng = np.random.default_rng(5)
    f = rng.standard_normal((2, *g.shape))
    ds = xr.Dataset({"f": (("time", "y", "x"), f)},
                    coords={"y": g.coords("y"), "x": g.coords("x")})
    ref = ds.coarsen(x=4, y=4).mean()
    cg = make_coarse_graining("block", g, 4)
    np.testing.assert_allclose(cg(f), ref["f"].values, atol=1e-15)
    np.testing.assert_allclose(cg.coarse.coords("x"), ref["x"].values, atol=1e-14)
    np.testing.assert_allclose(cg.coarse.coords("y"), ref["y"].values, atol=1e-14)


def test_call_filters_then_samples():
    g = Grid.regular((32,), 2 * np.pi)
    f = np.sin(g.coords("x"))
    cg = make_coarse_graining("gaussian", g, 4)
    np.testing.assert_allclose(cg(f), cg.filter(f)[::4], rtol=1e-13, atol=1e-14)  # O(1) field
    assert cg.coarse.shape == (8,)
    with pytest.raises(UserError, match="use coarse_grain"):
        make_coarse_graining("block", g, 4).filter(f)


# --- filtering and coarsening in one spectral step ----------------------------------------------

# fine shapes and ratios: odd and even fine and coarse lengths, 1-, 2- and 3-D
FOLD_CASES = [((12,), 4), ((15,), 3), ((18,), 3), ((21,), 7), ((12, 15), 3), ((16, 8), 4),
              ((10, 14), 2), ((9, 12, 6), 3), ((8, 8, 8), 2), ((6, 10, 14), 2)]


@pytest.mark.parametrize("shape,r", FOLD_CASES)
def test_polyphase_fold_gives_the_spectrum_of_every_rth_point(shape, r):
    # sampling f[r j] aliases the DFT: F_c(k) = (1/r) sum_m F(k + m n) along the folded axis
    # (common practice: the DFT of a downsampled sequence), here with the multiplier of a real
    # operator first: d/dx (Nyquist dropped), and the Gaussian filter G(k) = exp(-k^2 D^2 / 24)
    # times d/dx (Pope 2000, Table 13.2). Reference: numpy.fft.rfft along x of every r-th point
    # of the operated field, every coefficient including the Nyquist bins.
    from closure.backend import NumpyBackend

    g = Grid.regular(shape, 2 * np.pi)
    cg = make_coarse_graining("gaussian", g, r, 2.0 * r)
    f = np.random.default_rng(len(shape) + r).standard_normal((2, *shape))
    N = shape[-1]
    k = np.fft.rfftfreq(N, 1.0 / N)
    ik = 1j * k
    if N % 2 == 0:
        ik[-1] = 0
    G = np.exp(-(k**2) * cg.widths[-1] ** 2 / 24)
    got = cg._folded_rows(f, ["d", "fd"], NumpyBackend())
    for code, m in (("d", ik), ("fd", G * ik)):
        operated = np.fft.irfft(np.fft.rfft(f, axis=-1) * m, n=N, axis=-1)
        ref = np.fft.rfft(operated[..., ::r], axis=-1)
        assert got[code].shape == ref.shape
        np.testing.assert_allclose(got[code], ref, atol=1e-12 * np.abs(ref).max(), err_msg=code)


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
@pytest.mark.parametrize("shape,r", FOLD_CASES)
def test_one_step_coarse_graining_equals_filter_then_sample(shape, r, kind):
    from closure.derivatives import derivative

    g = Grid.regular(shape, 2 * np.pi)
    cg = make_coarse_graining(kind, g, r, min(2.0 * r, min(shape)))
    f = np.random.default_rng(7).standard_normal((3, *shape))
    ref = cg.sample(cg.filter(f))
    got = cg(f)
    assert got.shape == (3, *cg.coarse.shape)
    np.testing.assert_allclose(got, ref, atol=1e-13)
    # per-direction derivatives, with and without the filter, sampled or not. Reference:
    # closure.derivatives (spectral) of the fine-grid filtered field, then every r-th point
    ops, refs = [], []
    for a, d in enumerate(g.dims):
        filtered = tuple("fd" if b == a else "f" for b in range(g.ndim))
        bare = tuple("d" if b == a else "" for b in range(g.ndim))
        ops += [filtered, bare]
        refs += [derivative(cg.filter(f), g, d), derivative(f, g, d)]
    for sample in (True, False):
        got = cg.separable(f, [("f",) * g.ndim, *ops], sample=sample)
        for out, r_ in zip(got, [cg.filter(f), *refs], strict=True):
            np.testing.assert_allclose(out, cg.sample(r_) if sample else r_, atol=1e-12)


def test_non_periodic_coarse_graining_filters_in_real_space_then_samples():
    g = non_periodic((30, 21))
    cg = make_coarse_graining("gaussian", g, 3, 4.0)
    f = np.random.default_rng(8).standard_normal(g.shape)
    np.testing.assert_array_equal(cg(f), cg.filter(f)[::3, ::3])
    with pytest.raises(ValueError, match="periodic grid"):
        cg.separable(f, [("f", "f")])
    periodic = make_coarse_graining("gaussian", Grid.regular((12, 9), 1.0), 3)
    with pytest.raises(ValueError, match="one of '', 'f', 'd', 'fd' per direction"):
        periodic.separable(np.zeros((12, 9)), [("f",)])
    with pytest.raises(ValueError, match="does not end with the grid shape"):
        periodic.separable(np.zeros((9, 12)), [("f", "f")])


# --- building and errors ----------------------------------------------------------------------

def test_width_units_and_defaults():
    g = Grid.regular((32, 64), (1.0, 4.0))
    cg = make_coarse_graining("box", g, 4)  # default: 2 * ratio spacings (common practice)
    assert cg.widths == pytest.approx((8 / 32, 8 * 4 / 64))
    cg = make_coarse_graining("box", g, 4, 0.5, "coordinate")
    assert cg.widths == (0.5, 0.5)
    assert cg.delta == pytest.approx(0.5)
    d = cg.describe()
    assert d["width_cells"] == pytest.approx({"y": 16.0, "x": 8.0})
    assert make_coarse_graining("block", g, 4).widths == pytest.approx((4 / 32, 16 / 64))


def test_warns_when_the_filter_is_narrower_than_the_coarse_spacing():
    g = Grid.regular((32,), 1.0)
    assert make_coarse_graining("gaussian", g, 4, 2.0).warnings()
    assert not make_coarse_graining("gaussian", g, 4, 4.0).warnings()


@pytest.mark.parametrize("args,message", [
    (("tophat", 4), "unknown filter 'tophat': choose one of box, gaussian, spectral, block"),
    (("box", 0), "ratio must be a whole number >= 1"),
    (("box", 2.5), "ratio must be a whole number >= 1"),
    (("box", 4, -1.0), "width must be a positive number"),
    (("box", 4, 40.0), r"filter width .* \(40 grid spacings\) is larger than the domain in x "
                       r"\(.*32 points\): use a smaller --width"),
    (("box", 64), "fewer than the ratio 64: use a smaller --ratio"),
    (("box", 5), "not a multiple of the ratio 5"),
    (("block", 4, 3.0), "block averaging has width equal to the ratio"),
    (("box", 4, 2.0, "cells"), "unknown width units 'cells'"),
])
def test_bad_options_raise_clear_user_errors(args, message):
    g = Grid.regular((32,), 1.0)
    with pytest.raises(UserError, match=message):
        make_coarse_graining(args[0], g, *args[1:])


def test_sharp_filter_needs_periodic_data():
    with pytest.raises(UserError, match="needs periodic data: use --filter box or gaussian"):
        make_coarse_graining("spectral", non_periodic((16,)), 2)
    cg = CoarseGraining("spectral", 2, (0.2,), non_periodic((16,)))
    with pytest.raises(UserError, match="needs periodic data"):
        cg.filter(np.zeros(16))


# --- real-space kernels and footprints (used with land masks) -----------------------------------

@pytest.mark.parametrize("kind", ["gaussian", "box"])
def test_real_space_filter_on_a_periodic_grid_wraps_around(kind):
    # reference: scipy.ndimage with wrap-around edges (Gaussian sigma = D / sqrt(12), Pope 2000
    # Table 13.2, cut at 6 sigma; a box of 5 cells is the uniform 5-point mean)
    g = Grid.regular((40, 48), 1.0)
    f = np.random.default_rng(7).standard_normal(g.shape)
    cg = make_coarse_graining(kind, g, 4, 5.0)
    if kind == "gaussian":
        ref = scipy.ndimage.gaussian_filter(f, 5.0 / np.sqrt(12), mode="wrap", truncate=6.0)
    else:
        ref = scipy.ndimage.uniform_filter(f, 5, mode="wrap")
    np.testing.assert_allclose(cg.filter(f, real_space=True), ref, atol=1e-14)


def test_block_footprint_is_the_block():
    g = Grid(("y", "x"), (8, 12), (1.0, 1.0), periodic=False)
    land = np.zeros(g.shape, bool)
    land[4, 3] = True  # a corner cell of block (1, 0)
    cg = make_coarse_graining("block", g, 4)
    touched = cg.footprint_touches(land)
    assert touched.shape == (2, 3) and touched.sum() == 1 and touched[1, 0]
    # widened by one cell the land reaches the three neighbouring blocks at that corner
    np.testing.assert_array_equal(np.argwhere(cg.footprint_touches(land, 1)),
                                  [[0, 0], [0, 1], [1, 0], [1, 1]])
