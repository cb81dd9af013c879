"""Land masks: weighted filtering, the land conventions, valid coarse points, and their use in
statistics, scores, the pipeline and coarse files (closure.filters, closure.residuals,
closure.stats, closure.scores, closure.pipeline, closure.io.CoarseWriter)."""

import numpy as np
import pytest
import scipy.ndimage
import sympy
import xarray as xr

from closure import pipeline
from closure.derivatives import derivative
from closure.errors import UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot, open_fields, write_coarse, write_netcdf
from closure.library import DELTA, field_symbol, make_library
from closure.residuals import coarse_grain_snapshot, land_validity, stencil_dilation
from closure.scores import TransferSums
from closure.spec import parse_spec


def smooth_flow(grid, kmax=2, seed=0, scalar=False):
    """Divergence-free velocity from a streamfunction of the modes |k| <= kmax (random
    amplitudes and phases), evaluated on the grid's coordinates."""
    rng = np.random.default_rng(seed)
    y, x = grid.mesh()
    psi = np.zeros(grid.shape)
    dpsi_dx, dpsi_dy = np.zeros(grid.shape), np.zeros(grid.shape)
    for kx in range(-kmax, kmax + 1):
        for ky in range(0, kmax + 1):
            if (kx, ky) != (0, 0) and kx * kx + ky * ky <= kmax * kmax:
                a, ph = rng.normal(), rng.uniform(0, 2 * np.pi)
                psi += a * np.cos(kx * x + ky * y + ph)
                dpsi_dx += -a * kx * np.sin(kx * x + ky * y + ph)
                dpsi_dy += -a * ky * np.sin(kx * x + ky * y + ph)
    out = {"u": dpsi_dy, "v": -dpsi_dx}
    if scalar:
        out["c"] = np.sin(x + 0.3) * np.cos(2 * y) + 0.5
    return out


def basin(grid, frame=8, island=True):
    """Fluid mask of a closed basin: land in a frame of ``frame`` cells around the domain and,
    optionally, a disc-shaped island."""
    ny, nx = grid.shape
    j, i = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
    fluid = (j >= frame) & (j < ny - frame) & (i >= frame) & (i < nx - frame)
    if island:
        fluid &= (j - ny * 0.6) ** 2 + (i - nx * 0.4) ** 2 > 8.0**2
    return fluid


def disc_land(grid, radius=10.0):
    ny, nx = grid.shape
    j, i = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
    return (j - ny / 2) ** 2 + (i - nx / 2) ** 2 > radius**2  # fluid outside the disc


def with_land(fields, fluid, fill=np.nan):
    """The fields as a model writes them: ``fill`` (NaN) on land."""
    return {k: np.where(fluid, v, fill) for k, v in fields.items()}


NONPERIODIC = Grid(("y", "x"), (96, 128), (2 * np.pi / 128,) * 2, periodic=False)
PERIODIC = Grid.regular((96, 128), (1.5 * np.pi, 2 * np.pi))


# --- weighted filtering (closure.filters) ------------------------------------------------------

def test_weighted_gaussian_is_the_ratio_of_two_direct_convolutions():
    # bar_w(f) = bar(w f) / bar(w) (Favre-type weighted filter; e.g. Garnier, Adams & Sagaut
    # 2009, eq. 2.40, from memory); reference: scipy.ndimage.gaussian_filter with mirror edges
    g = NONPERIODIC
    rng = np.random.default_rng(1)
    f = rng.standard_normal(g.shape)
    w = 1.0 + rng.uniform(0, 2, g.shape)  # a density-like positive weight
    cg = make_coarse_graining("gaussian", g, 4, 6.0)
    sigma = 6.0 / np.sqrt(12)

    def gf(a):
        return scipy.ndimage.gaussian_filter(a, sigma, mode="reflect", truncate=6.0)

    np.testing.assert_allclose(cg.weighted_filter(f, w), gf(w * f) / gf(w), rtol=1e-12)


def test_weighted_box_on_a_periodic_grid_in_real_space_and_spectrally():
    # a top-hat of 5 cells is a uniform 5-point mean (Pope 2000, Table 13.2, box filter);
    # reference: scipy.ndimage.uniform_filter with wrap-around
    g = PERIODIC
    rng = np.random.default_rng(2)
    f = rng.standard_normal(g.shape)
    mask = disc_land(g)
    cg = make_coarse_graining("box", g, 4, 5.0)

    def uf(a):
        return scipy.ndimage.uniform_filter(a, 5, mode="wrap")

    # fluid points per 5 x 5 footprint, counted exactly in integers
    count = scipy.ndimage.convolve(mask.astype(int), np.ones((5, 5), int), mode="wrap")
    total = scipy.ndimage.convolve(mask * f, np.ones((5, 5)), mode="wrap")
    expected = np.where(count > 0, total / np.maximum(count, 1), 0.0)
    np.testing.assert_allclose(cg.weighted_filter(f, mask, real_space=True), expected,
                               atol=1e-13)
    # the spectral path: the box transfer function G(k) = sin(kD/2)/(kD/2) per direction
    # (Pope 2000, Table 13.2) applied with numpy's FFT to w f and to w
    w = 1.0 + mask
    ky = 2 * np.pi * np.fft.fftfreq(g.shape[0], g.spacing[0])[:, None]
    kx = 2 * np.pi * np.fft.rfftfreq(g.shape[1], g.spacing[1])[None, :]
    D = 5.0 * g.spacing[1]
    G = np.sinc(kx * D / (2 * np.pi)) * np.sinc(ky * 5.0 * g.spacing[0] / (2 * np.pi))

    def spectral(a):
        return np.fft.irfft2(np.fft.rfft2(a) * G, s=g.shape)

    np.testing.assert_allclose(cg.weighted_filter(f, w), spectral(w * f) / spectral(w),
                               atol=1e-12)


def test_weighted_block_mean_matches_xarray_coarsen():
    g = PERIODIC
    rng = np.random.default_rng(3)
    f = rng.standard_normal((2, *g.shape))
    w = rng.uniform(0, 1, g.shape) * disc_land(g)
    cg = make_coarse_graining("block", g, 4)
    da = xr.DataArray(w * f, dims=("k", "y", "x")).coarsen(y=4, x=4).sum()
    dw = xr.DataArray(w, dims=("y", "x")).coarsen(y=4, x=4).sum()  # reference: xarray
    expected = np.where(dw.values > 0, (da / dw).values, 0.0)  # blocks without weight: 0
    assert (dw.values == 0).any()
    np.testing.assert_allclose(cg.weighted_block_mean(f, w), expected, rtol=1e-12)


def test_weighted_filter_of_a_constant_is_the_constant_and_zero_without_weight():
    g = PERIODIC
    mask = np.zeros(g.shape, bool)
    mask[:, :40] = True  # half the domain has no weight at all
    cg = make_coarse_graining("gaussian", g, 4, 4.0)
    out = cg.weighted_filter(np.full(g.shape, 3.0), mask, real_space=True)
    reach = cg.kernel_radius()[1]
    assert np.allclose(out[:, :40 + reach], 3.0, rtol=1e-14)  # normalised: exact constant
    assert np.all(out[:, 40 + reach:128 - reach] == 0.0)  # no weight in the footprint: 0
    with pytest.raises(UserError, match="nonnegative"):
        cg.weighted_filter(np.ones(g.shape), -np.ones(g.shape))


def test_kernel_radius_is_scipys_truncation_and_the_box_support():
    # scipy.ndimage.gaussian_filter1d: radius = int(truncate * sigma + 0.5) (scipy docs)
    g = PERIODIC
    cg = make_coarse_graining("gaussian", g, 4, 8.0)
    assert cg.kernel_radius() == (int(6.0 * 8.0 / np.sqrt(12) + 0.5),) * 2
    ref = scipy.ndimage.gaussian_filter1d(np.eye(1, 61, 30)[0], 8.0 / np.sqrt(12), truncate=6.0)
    np.testing.assert_allclose(cg.kernel("x"), ref[ref > 0], rtol=1e-14)
    assert make_coarse_graining("box", g, 4, 5.0).kernel_radius() == (2, 2)
    assert make_coarse_graining("box", g, 4, 8.0).kernel_radius() == (4, 4)  # half-weight ends


# --- stencils ----------------------------------------------------------------------------------

@pytest.mark.parametrize("scheme", ["fd2", "fd4"])
@pytest.mark.parametrize("periodic", [True, False])
def test_stencil_dilation_is_the_union_of_the_derivative_stencils(scheme, periodic):
    # the points whose first or second derivative (closure.derivatives, Fornberg 1988 stencils)
    # changes when one value changes: found by differentiating unit impulses
    g = Grid(("x",), (14,), (0.1,), periodic=periodic)
    for j in range(14):
        e = np.zeros(14)
        e[j] = 1.0
        used = e != 0
        for order in (1, 2):
            used |= derivative(e, g, "x", order, scheme) != 0
        np.testing.assert_array_equal(stencil_dilation(e > 0, g, scheme), used)


# --- coarse_grain_snapshot with a mask ---------------------------------------------------------

@pytest.mark.parametrize("grid", [PERIODIC, NONPERIODIC], ids=["periodic", "non-periodic"])
@pytest.mark.parametrize("kind", ["gaussian", "box", "block", "spectral"])
def test_an_all_fluid_mask_is_no_mask(grid, kind):
    if kind == "spectral" and not grid.periodic:
        pytest.skip("the sharp filter needs periodic data")
    f = smooth_flow(grid, scalar=True)
    cg = make_coarse_graining(kind, grid, 4)
    plain = coarse_grain_snapshot(Snapshot(f, grid, 0, None), cg, ["c"])
    masked = coarse_grain_snapshot(Snapshot(f, grid, 0, None, np.ones(grid.shape, bool)), cg,
                                   ["c"], land="fluid", scheme="fd4")
    assert masked.valid is None and masked.fluid is None and masked.land is None
    for group in ("fields", "targets"):
        a, b = getattr(plain, group), getattr(masked, group)
        assert list(a) == list(b)
        for k in a:
            np.testing.assert_array_equal(a[k], b[k])


@pytest.mark.parametrize("land", ["zero", "fluid"])
@pytest.mark.parametrize("kind", ["gaussian", "box", "block"])
def test_valid_points_of_a_closed_basin_equal_the_computation_without_land(land, kind):
    # a closed basin on a non-periodic grid: land frame and an island. Where nothing a coarse
    # point is computed from touches land, the values equal those of the same smooth fields
    # with no land (same real-space path), to round-off; NaN on land never spreads.
    g = NONPERIODIC
    f = smooth_flow(g, scalar=True)
    fluid = basin(g)
    cg = make_coarse_graining(kind, g, 4, None if kind == "block" else 4.0)
    plain = coarse_grain_snapshot(Snapshot(f, g, 0, None), cg, ["c"])
    cs = coarse_grain_snapshot(Snapshot(with_land(f, fluid), g, 0, None, fluid), cg, ["c"],
                               land=land, scheme="fd4")
    assert cs.land == land
    n_valid = int(cs.valid.sum())
    assert 50 < n_valid < cs.valid.size  # some excluded, enough kept to compare
    for group in ("fields", "targets"):
        for k, a in getattr(cs, group).items():
            assert np.isfinite(a).all(), k
            b = getattr(plain, group)[k]
            np.testing.assert_allclose(a[cs.valid], b[cs.valid], rtol=0,
                                       atol=1e-12 * np.abs(b).max(), err_msg=k)


def test_periodic_disc_stress_and_fluxes_against_direct_convolutions():
    # periodic grid, a disc of land: at valid points, tau_ij and the scalar flux are those of
    # scipy.ndimage.gaussian_filter (wrap-around, truncated at 6 sigma) of the unmasked fields
    g = PERIODIC
    f = smooth_flow(g, scalar=True)
    fluid = disc_land(g)
    cg = make_coarse_graining("gaussian", g, 4, 8.0)
    cs = coarse_grain_snapshot(Snapshot(with_land(f, fluid), g, 0, None, fluid), cg, ["c"],
                               targets=["tau_xx", "tau_xy", "flux_c_y"], scheme="fd2")
    sigma = 8.0 / np.sqrt(12)

    def bar(a):
        return scipy.ndimage.gaussian_filter(a, sigma, mode="wrap", truncate=6.0)[::4, ::4]

    u, v, c = f["u"], f["v"], f["c"]
    expected = {"tau_xx": bar(u * u) - bar(u) ** 2, "tau_xy": bar(u * v) - bar(u) * bar(v),
                "flux_c_y": bar(v * c) - bar(v) * bar(c)}
    ok = cs.valid
    assert ok.sum() > 0.5 * ok.size and not ok.all()
    for k, e in expected.items():
        np.testing.assert_allclose(cs.targets[k][ok], e[ok], atol=1e-13, err_msg=k)
    np.testing.assert_allclose(cs.fields["u"][ok], bar(u)[ok], atol=1e-14)


@pytest.mark.parametrize("land", ["zero", "fluid"])
def test_the_conventions_near_land_against_direct_convolutions(land):
    # zero: the ordinary filter of the zero-filled field (Aluie, Hecht & Vallis 2018, from
    # memory); fluid: bar_w(f) = bar(m f) / bar(m) with the fluid mask m, and
    # tau = bar_w(u v) - bar_w(u) bar_w(v). Checked at every coarse fluid point, the ones near
    # land included; reference: scipy.ndimage.gaussian_filter with mirror edges.
    g = NONPERIODIC
    f = smooth_flow(g)
    fluid = basin(g)
    cg = make_coarse_graining("gaussian", g, 4, 4.0)
    cs = coarse_grain_snapshot(Snapshot(with_land(f, fluid), g, 0, None, fluid), cg,
                               targets=["tau_xy"], land=land)
    sigma = 4.0 / np.sqrt(12)

    def gf(a):
        return scipy.ndimage.gaussian_filter(a, sigma, mode="reflect", truncate=6.0)

    m = fluid.astype(float)
    u, v = f["u"] * m, f["v"] * m
    if land == "zero":
        def bar(a):
            return gf(a)
    else:
        def bar(a):
            den = gf(m)
            return np.where(den > 0, gf(m * a) / np.where(den > 0, den, 1), 0.0)
    tau = (bar(u * v) - bar(u) * bar(v))[::4, ::4]
    ubar = bar(u)[::4, ::4]
    at = cs.fluid
    np.testing.assert_array_equal(at, fluid[::4, ::4])
    np.testing.assert_allclose(cs.targets["tau_xy"][at], tau[at], atol=1e-13)
    np.testing.assert_allclose(cs.fields["u"][at], ubar[at], atol=1e-13)
    assert np.all(cs.fields["u"][~at] == 0) and np.all(cs.targets["tau_xy"][~at] == 0)
    near = at & ~cs.valid  # fluid points whose footprint sees land: the conventions differ
    assert near.any()


def test_excluded_points_match_a_direct_count_of_footprints_touching_land():
    # direct count: dilate the fine land by the footprint (Gaussian radius int(6 sigma + 0.5),
    # scipy's truncation, plus the 2-cell fd4 stencil of the fine vorticity field), sample every
    # r-th point, then dilate by the coarse fd2 stencil (1 point per derivative pass)
    g = PERIODIC
    fluid = disc_land(g, radius=12.0)
    r, width = 4, 6.0
    cg = make_coarse_graining("gaussian", g, r, width)
    library = make_library("default", "stress", g.dims)
    passes = pipeline.derivative_passes(library)
    assert passes == 2  # third derivatives: a second-derivative then a first-derivative stencil
    valid, _ = land_validity(fluid, cg, ["tau_xx", "tau_xy", "tau_yy"], "fd2", passes)

    radius = int(6.0 * width / np.sqrt(12) + 0.5) + 2
    square = np.ones((2 * radius + 1,) * 2, bool)
    touched = scipy.ndimage.binary_dilation(~fluid, structure=square)[::r, ::r]
    touched = scipy.ndimage.binary_dilation(touched, structure=np.ones((3, 3), bool),
                                            iterations=passes)
    assert int((~valid).sum()) == int(touched.sum()) > 0
    np.testing.assert_array_equal(valid, ~touched)


def test_land_refuses_the_sharp_filter_and_spectral_derivatives():
    g = PERIODIC
    f = smooth_flow(g)
    snap = Snapshot(f, g, 0, None, disc_land(g))
    with pytest.raises(UserError, match="sharp spectral filter.*--filter gaussian or box"):
        coarse_grain_snapshot(snap, make_coarse_graining("spectral", g, 4))
    with pytest.raises(UserError, match="spectral derivatives.*--scheme fd2 or fd4"):
        coarse_grain_snapshot(snap, make_coarse_graining("gaussian", g, 4), scheme="spectral")
    with pytest.raises(UserError, match="--land zero or fluid"):
        coarse_grain_snapshot(snap, make_coarse_graining("gaussian", g, 4), land="coast")


# --- statistics and scores --------------------------------------------------------------------

def test_transfer_sums_leave_out_excluded_points():
    rng = np.random.default_rng(5)
    m, e = rng.standard_normal((2, 8, 8))
    valid = rng.uniform(size=(8, 8)) > 0.3
    s = TransferSums.from_fields(m, e, valid)
    assert s.count == valid.sum()
    assert s.sum_cross == pytest.approx(float(m[valid] @ e[valid]))  # numpy on the points kept


# --- the pipeline -----------------------------------------------------------------------------

class MaskedSource:
    """An open FieldSource whose snapshots carry a fluid mask and NaN on land (what the reading
    side of closure.io gives for a file with land), built by hand."""

    def __init__(self, path, fluid, periodic=False):
        self.src = open_fields(path, periodic=periodic)
        self.fluid = fluid
        self.velocity, self.grid = self.src.velocity, self.src.grid

    def snapshot(self, i, level=None):
        s = self.src.snapshot(i, level)
        return Snapshot(with_land(s.fields, self.fluid), s.grid, s.index, s.time, self.fluid)

    def close(self):
        self.src.close()


def _basin_file(path, n=128, snapshots=5, frame=8, periodic=False):
    """Smooth random divergence-free fields (modes |k| <= 2) on a (y, x) grid, zero on land,
    and the fluid mask: a closed basin on a non-periodic grid, or an island in a periodic
    domain."""
    g = Grid(("y", "x"), (n, n), (2 * np.pi / n,) * 2, periodic=periodic)
    fluid = disc_land(g, n / 10) if periodic else basin(g, frame)
    us, vs = [], []
    for s in range(snapshots):
        f = smooth_flow(g, seed=s)
        us.append(np.where(fluid, f["u"], 0.0))
        vs.append(np.where(fluid, f["v"], 0.0))
    c = g.coords("x")
    ds = xr.Dataset({"u": (("time", "y", "x"), np.array(us)),
                     "v": (("time", "y", "x"), np.array(vs))},
                    coords={"time": np.arange(snapshots, dtype=float), "y": c, "x": c})
    return write_netcdf(ds, path), fluid


def _run(path, fluid, periodic=False, **filter_options):
    spec = parse_spec({"input": {"path": str(path), "periodic": periodic},
                       "filter": {"kind": "gaussian", "ratio": 4, "width": 4, **filter_options},
                       "scheme": "fd4", "library": "classic", "fit": {"resamples": 0}})
    p = pipeline.plan(spec)
    src = MaskedSource(path, fluid, periodic)
    try:
        stats = {}
        for i in p["snapshots"]:
            stats[i], cs = pipeline._map(spec, p, i, src)
        model = pipeline.reduce(spec, p, stats, source=src)
    finally:
        src.close()
    return spec, p, stats, cs, model


@pytest.fixture(scope="module")
def basin_run(tmp_path_factory):
    path, fluid = _basin_file(tmp_path_factory.mktemp("basin") / "basin.nc")
    return (path, fluid, *_run(path, fluid))


def _gradient_model_coefficient(model):
    """The Delta-scaled gradient-model coefficient, as a multiple of the Leonard value."""
    term = model.library.term("gradient_model")
    ux, uy, vx, vy = (field_symbol(f, c) for f, c in (("u", (1, 0, 0)), ("u", (0, 1, 0)),
                                                      ("v", (1, 0, 0)), ("v", (0, 1, 0))))
    ratio = sympy.simplify(term.components["xy"] / (DELTA**2 * (ux * vx + uy * vy)))
    k = model.names.index("gradient_model")
    return 12 * float(ratio) * model.coefficients_scaled[k]


def test_gradient_model_coefficient_in_a_closed_basin(basin_run):
    # Leonard (1974); Clark, Ferziger & Reynolds (1979): tau_ij = (D^2/12) d_k u_i d_k u_j +
    # O(D^4) for box and Gaussian filters (second moment D^2/12, Pope 2000 Table 13.2); the
    # library's gradient_model term is Delta^2/12 d_k u_i d_k u_j, so its Delta-scaled
    # coefficient is 1 when the land is left out properly.
    model = basin_run[-1]
    assert _gradient_model_coefficient(model) == pytest.approx(1.0, rel=0.05)
    assert model.scores["test"]["r2"] > 0.99


def test_gradient_model_coefficient_around_an_island_in_a_periodic_domain(tmp_path):
    # as above (Leonard 1974; Clark, Ferziger & Reynolds 1979), periodic data with a disc of land
    path, fluid = _basin_file(tmp_path / "island.nc", n=96, snapshots=4, periodic=True)
    model = _run(path, fluid, periodic=True)[-1]
    assert _gradient_model_coefficient(model) == pytest.approx(1.0, rel=0.05)
    assert 0 < model.settings["land"]["excluded_points"] < 0.5 * 4 * 24 * 24


def test_no_nan_reaches_the_fit_and_the_count_is_recorded(basin_run):
    path, fluid, spec, p, stats, cs, model = basin_run
    for s in stats.values():
        s.check_finite()
        assert np.isfinite(s.gram).all() and np.isfinite(s.xy).all()
    # the excluded count: coarse points minus those with weight, against land_validity's own
    # rule applied to the basin directly
    library = make_library("classic", "stress", ("y", "x"))
    valid, _ = land_validity(fluid, make_coarse_graining("gaussian", cs.grid.__class__(
        ("y", "x"), fluid.shape, (2 * np.pi / 128,) * 2, periodic=False), 4, 4.0),
        p["components"], "fd4", pipeline.derivative_passes(library))
    np.testing.assert_array_equal(cs.valid, valid)
    per_snapshot = int((~valid).sum())
    land = model.settings["land"]
    assert land["excluded_points"] == per_snapshot * len(p["snapshots"])
    assert land["excluded_test"] == per_snapshot * len(p["test"])
    assert land["convention"] == "zero"
    # scored entries: valid points times the component weights (tau_xy counts twice)
    assert model.scores["test"]["points"] == (int(valid.sum()) * len(p["test"])
                                              * sum(p["weights"]))
    assert f"land: {per_snapshot * len(p['snapshots'])} of" in model.summary()


def test_the_convention_does_not_change_the_fit(basin_run, tmp_path):
    # valid points do not depend on land, so both conventions give the same statistics
    path, fluid, spec, p, stats, cs, model = basin_run
    _, _, stats_fluid, _, model_fluid = _run(path, fluid, land="fluid")
    for i in stats:
        assert stats[i].equals(stats_fluid[i], rtol=1e-12, atol=1e-300)
    assert model_fluid.settings["land"]["convention"] == "fluid"


def test_too_few_valid_points_is_a_clear_error(tmp_path):
    path, fluid = _basin_file(tmp_path / "narrow.nc", n=64, snapshots=3, frame=24)
    with pytest.raises(UserError, match=r"land mask leaves \d+ of 256 coarse points.*width "
                                        r"4, 4 grid spacings.*--width.*--mask"):
        _run(path, fluid)


# --- coarse files -----------------------------------------------------------------------------

def test_a_netcdf_file_with_nan_land_gives_nan_land_in_the_coarse_file(tmp_path):
    # a fine file as an ocean model writes it: NaN on land. Read here with xarray (the mask is
    # where the values are finite), coarse-grained, written, and read back with xarray.
    g = NONPERIODIC
    fluid = basin(g)
    f = with_land(smooth_flow(g), fluid)
    fine = tmp_path / "ocean.nc"
    xr.Dataset({k: (("y", "x"), v) for k, v in f.items()},
               coords={"y": g.coords("y"), "x": g.coords("x")}).to_netcdf(fine)
    with xr.open_dataset(fine) as ds:
        fields = {k: ds[k].values for k in ("u", "v")}
    mask = np.isfinite(fields["u"]) & np.isfinite(fields["v"])
    np.testing.assert_array_equal(mask, fluid)
    cg = make_coarse_graining("gaussian", g, 4, 4.0)
    cs = coarse_grain_snapshot(Snapshot(fields, g, 0, None, mask), cg, land="fluid")
    assert all(np.isfinite(a).all() for a in (*cs.fields.values(), *cs.targets.values()))
    out = write_coarse(tmp_path / "coarse.nc", [cs])
    with xr.open_dataset(out) as ds:
        assert ds.attrs["land_convention"] == "fluid"
        np.testing.assert_array_equal(np.isnan(ds["u"].values[0]), ~cs.fluid)
        np.testing.assert_array_equal(np.isnan(ds["tau_xy"].values[0]), ~cs.valid)
        ok = cs.valid
        np.testing.assert_array_equal(ds["tau_xy"].values[0][ok], cs.targets["tau_xy"][ok])


# --- command line -----------------------------------------------------------------------------

def test_land_option_reaches_the_spec_and_bad_values_are_named(tmp_path, capsys):
    from closure.cli import main
    from closure.cli.discover import build_spec

    path, _ = _basin_file(tmp_path / "b.nc", n=32, snapshots=2)
    spec = build_spec(path, filter="gaussian", width=None, width_units="grid", ratio=2,
                      target="stress", library="classic", method="threshold", scheme="fd4",
                      test_fraction=0.5, var=None, scalar=None, non_periodic=True,
                      transfer_weight=0.0, seed=0, resamples=0, snapshots=None, land="fluid")
    assert spec.filter.land == "fluid"
    assert parse_spec({"input": {"path": "x.nc"}}).filter.land == "zero"  # the default
    rc = main(["discover", str(path), "--land", "coast", "-o", str(tmp_path / "m.json")])
    assert rc == 2 and "filter.land: must be one of 'zero' or 'fluid'" in capsys.readouterr().err
    rc = main(["coarse-grain", str(path), "--land", "coast", "-o", str(tmp_path / "c.nc")])
    assert rc == 2 and "--land must be one of zero, fluid" in capsys.readouterr().err
    assert not (tmp_path / "m.json").exists() and not (tmp_path / "c.nc").exists()


def test_the_divergence_check_of_the_plan_ignores_the_coast(tmp_path):
    # zero velocity on land makes the normal velocity jump at the coast; that is no divergence
    # of the flow, so a divergence-free basin raises no warning, a divergent one still does
    path, fluid = _basin_file(tmp_path / "b.nc", n=64, snapshots=2)
    library = make_library("default", "stress", ("y", "x"))
    assert any("on incompressible fields" in d for d in library.dropped)
    src = MaskedSource(path, fluid)
    try:
        assert pipeline._compressibility_warning(src, 0, library) == []
        plain = src.src  # the same zero-filled fields without the mask
        assert pipeline._compressibility_warning(plain, 0, library)
        grid = plain.grid
        y, x = grid.mesh()

        class Divergent(MaskedSource):
            def snapshot(self, i, level=None):
                s = super().snapshot(i, level)
                s.fields["u"] = s.fields["u"] + 0.5 * np.sin(x)  # d_x u = 0.5 cos x
                return s

        div = Divergent(path, fluid)
        try:
            assert "not divergence-free" in pipeline._compressibility_warning(div, 0,
                                                                              library)[0]
        finally:
            div.close()
    finally:
        src.close()
