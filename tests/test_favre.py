"""Tests for closure.favre: density-weighted coarse-graining and exact compressible targets."""

import numpy as np
import pytest
import scipy.ndimage

from closure.errors import UserError
from closure.favre import (
    backscatter_fractions,
    favre_coarse_grain,
    favre_field_names,
    favre_target_names,
    thermodynamic_fields,
)
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot
from closure.residuals import backscatter_fraction, coarse_grain_snapshot

TWO_PI = 2 * np.pi


def smooth_field(grid, rng, top_mode, mean=0.0, rms=1.0):
    """Random real field with modes |m| <= top_mode in every direction, given mean and rms."""
    noise = np.fft.fftn(rng.standard_normal(grid.shape))
    for a, n in enumerate(grid.shape):
        m = np.abs(np.fft.fftfreq(n, 1.0 / n))
        shape = [1] * grid.ndim
        shape[a] = n
        noise = noise * (m <= top_mode).reshape(shape)
    f = np.fft.ifftn(noise).real
    f = f - f.mean()
    return mean + f * rms / f.std()


def compressible_snapshot(grid, rng, top_mode=4, density_rms=0.2, constant_density=None):
    dirs = [d for d in ("x", "y", "z") if d in grid.dims]
    fields = {c: smooth_field(grid, rng, top_mode) for c in ("u", "v", "w")[:len(dirs)]}
    fields["rho"] = (np.full(grid.shape, constant_density) if constant_density is not None
                     else np.exp(smooth_field(grid, rng, top_mode, 0.0, density_rms)))
    fields["T"] = smooth_field(grid, rng, top_mode, 300.0, 10.0)
    fields["p"] = fields["rho"] * 287.0 * fields["T"] + smooth_field(grid, rng, top_mode, 0, 50)
    return Snapshot(fields, grid, 0, None)


CASES = [
    (Grid.regular((32, 32), TWO_PI, dims=("y", "x")), "gaussian", 2),
    (Grid.regular((32, 32), TWO_PI, dims=("y", "x")), "spectral", 4),
    (Grid.regular((32, 32), TWO_PI, dims=("y", "x")), "block", 2),
    (Grid((("y", "x")), (30, 36), (0.1, 0.1), periodic=False), "box", 3),
    (Grid.regular((16, 16, 16), TWO_PI, dims=("z", "y", "x")), "gaussian", 2),
]


@pytest.mark.parametrize("grid,kind,ratio", CASES)
def test_constant_density_reduces_to_the_incompressible_terms_times_the_density(grid, kind,
                                                                              ratio):
    # with rho = rho0: u~ = bar(u), T~ = bar(T), tau = rho0 (bar(u_i u_j) - bar(u_i) bar(u_j)),
    # heat flux = rho0 * (scalar flux of T), pi and force likewise (definitions; common practice)
    rho0 = 1.3
    snap = compressible_snapshot(grid, np.random.default_rng(4), constant_density=rho0)
    cg = make_coarse_graining(kind, grid, ratio)
    fav = favre_coarse_grain(snap, cg)
    inc = coarse_grain_snapshot(snap, cg, scalars=("p", "T"))
    dirs = [d for d in ("x", "y", "z") if d in grid.dims]
    assert list(fav.fields) == favre_field_names(grid.dims)
    assert list(fav.targets) == favre_target_names(grid.dims)
    scale = {k: np.max(np.abs(v)) for k, v in inc.targets.items()}
    for c in ("u", "v", "w")[:len(dirs)] + ("p", "T"):
        np.testing.assert_allclose(fav.fields[c], inc.fields[c], rtol=0,
                                   atol=1e-12 * np.max(np.abs(inc.fields[c])))
    np.testing.assert_allclose(fav.fields["rho"], rho0, rtol=1e-13)
    for name, value in inc.targets.items():
        if name.startswith(("tau_", "force_")) or name == "pi":
            np.testing.assert_allclose(fav.targets[name], rho0 * value, rtol=0,
                                       atol=1e-10 * rho0 * scale[name])
    for j in dirs:
        np.testing.assert_allclose(fav.targets[f"heat_flux_{j}"], rho0 * inc.targets[f"flux_T_{j}"],
                                   rtol=0, atol=1e-10 * rho0 * scale[f"flux_T_{j}"])
    if kind != "block":  # the block means of a pointwise product have no fine-grid counterpart
        assert backscatter_fractions(fav)["points"] == backscatter_fraction(inc.targets["pi"])


def _gaussian_by_hand(f, grid, width):
    # Gaussian filter G(k) = exp(-k^2 D^2 / 24) (Pope 2000, Turbulent Flows, Table 13.2),
    # applied with numpy's complex FFT
    fh = np.fft.fftn(f)
    for a, (n, h) in enumerate(zip(grid.shape, grid.spacing, strict=True)):
        k = 2 * np.pi * np.fft.fftfreq(n, h)
        shape = [1] * grid.ndim
        shape[a] = n
        fh = fh * np.exp(-(k**2) * width**2 / 24).reshape(shape)
    return np.fft.ifftn(fh).real


def _spectral_dx(f, grid, axis):
    n, h = grid.shape[axis], grid.spacing[axis]
    k = 2 * np.pi * np.fft.fftfreq(n, h)
    if n % 2 == 0:
        k[n // 2] = 0.0
    shape = [1] * grid.ndim
    shape[axis] = n
    return np.fft.ifftn(1j * k.reshape(shape) * np.fft.fftn(f)).real


def test_favre_terms_match_a_direct_computation_on_periodic_data():
    # products and filters written out directly (numpy FFT), the definitions of the module
    # docstring (Favre 1983; Garnier, Adams & Sagaut 2009, ch. 3, from memory)
    grid = Grid.regular((32, 32), TWO_PI, dims=("y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(7), top_mode=8, density_rms=0.3)
    f = snap.fields
    ratio, width_cells = 2, 4.0
    D = width_cells * grid.spacing[0]
    cg = make_coarse_graining("gaussian", grid, ratio, width_cells)
    cs = favre_coarse_grain(snap, cg)

    def bar(a):
        return _gaussian_by_hand(a, grid, D)

    rho_bar = bar(f["rho"])
    ut = {c: bar(f["rho"] * f[c]) / rho_bar for c in "uv"}
    Tt = bar(f["rho"] * f["T"]) / rho_bar
    sample = (slice(None, None, ratio),) * 2
    expect = {
        "tau_xx": bar(f["rho"] * f["u"] * f["u"]) - rho_bar * ut["u"] ** 2,
        "tau_xy": bar(f["rho"] * f["u"] * f["v"]) - rho_bar * ut["u"] * ut["v"],
        "tau_yy": bar(f["rho"] * f["v"] * f["v"]) - rho_bar * ut["v"] ** 2,
        "heat_flux_x": bar(f["rho"] * f["u"] * f["T"]) - rho_bar * ut["u"] * Tt,
        "heat_flux_y": bar(f["rho"] * f["v"] * f["T"]) - rho_bar * ut["v"] * Tt,
    }
    div = _spectral_dx(f["u"], grid, 1) + _spectral_dx(f["v"], grid, 0)
    div_t = _spectral_dx(ut["u"], grid, 1) + _spectral_dx(ut["v"], grid, 0)
    expect["pressure_dilatation"] = bar(f["p"] * div) - bar(f["p"]) * div_t
    sxy = 0.5 * (_spectral_dx(ut["u"], grid, 0) + _spectral_dx(ut["v"], grid, 1))
    expect["pi"] = -(expect["tau_xx"] * _spectral_dx(ut["u"], grid, 1)
                     + 2 * expect["tau_xy"] * sxy
                     + expect["tau_yy"] * _spectral_dx(ut["v"], grid, 0))
    for name, value in expect.items():
        np.testing.assert_allclose(cs.targets[name], value[sample], rtol=0,
                                   atol=1e-11 * np.max(np.abs(value)), err_msg=name)
    np.testing.assert_allclose(cs.fields["T"], Tt[sample], rtol=1e-13)
    np.testing.assert_allclose(cs.fields["u"], ut["u"][sample], atol=1e-13)
    # the trace is twice the subgrid kinetic energy times bar(rho):
    # k_sgs = (bar(rho u_i u_i) / bar(rho) - u~_i u~_i) / 2 (definition)
    k_sgs = 0.5 * (bar(f["rho"] * (f["u"] ** 2 + f["v"] ** 2)) / rho_bar
                   - ut["u"] ** 2 - ut["v"] ** 2)
    np.testing.assert_allclose(cs.targets["tau_xx"] + cs.targets["tau_yy"],
                               (2 * rho_bar * k_sgs)[sample], rtol=1e-10)


def test_favre_stress_and_heat_flux_match_scipy_on_bounded_data():
    # box filter of odd width 3 cells on a non-periodic grid: scipy.ndimage.uniform_filter with
    # mirror ('reflect') edges, an implementation independent of closure.filters
    grid = Grid(("y", "x"), (30, 36), (0.1, 0.1), periodic=False)
    snap = compressible_snapshot(grid, np.random.default_rng(11), top_mode=5, density_rms=0.3)
    f = snap.fields
    cg = make_coarse_graining("box", grid, 3, 3.0)
    cs = favre_coarse_grain(snap, cg, targets=["tau_xx", "tau_xy", "tau_yy", "heat_flux_x",
                                               "heat_flux_y"])
    assert set(cs.targets) == {"tau_xx", "tau_xy", "tau_yy", "heat_flux_x", "heat_flux_y"}

    def bar(a):
        return scipy.ndimage.uniform_filter(a, size=3, mode="reflect")

    rho_bar = bar(f["rho"])
    ut = {c: bar(f["rho"] * f[c]) / rho_bar for c in "uv"}
    Tt = bar(f["rho"] * f["T"]) / rho_bar
    s = (slice(None, None, 3),) * 2
    for name, value in {
        "tau_xx": bar(f["rho"] * f["u"] ** 2) - rho_bar * ut["u"] ** 2,
        "tau_xy": bar(f["rho"] * f["u"] * f["v"]) - rho_bar * ut["u"] * ut["v"],
        "tau_yy": bar(f["rho"] * f["v"] ** 2) - rho_bar * ut["v"] ** 2,
        "heat_flux_x": bar(f["rho"] * f["u"] * f["T"]) - rho_bar * ut["u"] * Tt,
        "heat_flux_y": bar(f["rho"] * f["v"] * f["T"]) - rho_bar * ut["v"] * Tt,
    }.items():
        np.testing.assert_allclose(cs.targets[name], value[s], rtol=0,
                                   atol=1e-11 * np.max(np.abs(value)), err_msg=name)


def test_favre_stress_is_positive_semidefinite_for_a_positive_filter():
    # realizability: with a positive kernel, bar(rho) tau_ij is a covariance under the weight
    # rho G, hence positive semidefinite (Vreman, Geurts & Kuerten 1994, J. Fluid Mech. 278:351)
    grid = Grid.regular((16, 16, 16), TWO_PI, dims=("z", "y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(2), top_mode=6, density_rms=0.3)
    cs = favre_coarse_grain(snap, make_coarse_graining("block", grid, 2),
                            targets=[n for n in favre_target_names(grid.dims)
                                     if n.startswith("tau_")])
    t = cs.targets
    tensor = np.array([[t["tau_xx"], t["tau_xy"], t["tau_xz"]],
                       [t["tau_xy"], t["tau_yy"], t["tau_yz"]],
                       [t["tau_xz"], t["tau_yz"], t["tau_zz"]]])
    eig = np.linalg.eigvalsh(np.moveaxis(tensor, (0, 1), (-2, -1)))
    assert eig.min() > -1e-12 * eig.max()


@pytest.mark.parametrize("kind", ["gaussian", "box"])
def test_least_squares_recovers_the_density_weighted_gradient_model(kind):
    # Second-order Taylor expansion of the Favre filter (Clark, Ferziger & Reynolds 1979 for
    # constant density; Vreman et al. 1997 for the Favre form, from memory). For a symmetric
    # kernel G with int G = 1, int G r_k = 0, int G r_k r_l = delta_kl D^2 / 12 (box and
    # Gaussian: Pope 2000, Table 13.2), and bar(f)(x) = int G(r) f(x - r) dr:
    #   tau_ij = bar(rho u_i u_j) - bar(rho) u~_i u~_j = bar(rho (u_i - u~_i)(u_j - u~_j))
    # because bar(rho (u_i - u~_i)) = 0. Expand about x: u_i(x - r) - u~_i(x)
    #   = -r_k d_k u_i(x) + (u_i - u~_i)(x) + O(r^2),  where (u_i - u~_i)(x) = O(D^2),
    # so (u_i - u~_i)(x - r) (u_j - u~_j)(x - r) = r_k r_l d_k u_i d_l u_j + O(r^3, r D^2),
    # and rho(x - r) = rho(x) - r_m d_m rho + O(r^2). Integrating against G, odd moments
    # vanish, leaving tau_ij = rho (D^2 / 12) d_k u_i d_k u_j + O(D^4); replacing rho, u by
    # bar(rho), u~ changes it by O(D^4) only:
    #   tau_ij = bar(rho) (D^2 / 12) d_k u~_i d_k u~_j + O(D^4).
    # So a least-squares fit (numpy lstsq) of tau on the column bar(rho) D^2 d_k u~_i d_k u~_j
    # has coefficient 1/12 up to O(D^2) relative errors: within 5 % for smooth fields.
    grid = Grid.regular((64, 64), TWO_PI, dims=("y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(5), top_mode=3, density_rms=0.25)

    def fit(width_cells, favre=True):
        cg = make_coarse_graining(kind, grid, 2, width_cells)
        cs = favre_coarse_grain(snap, cg, targets=["tau_xx", "tau_xy", "tau_yy"])
        # the model column from the Favre fields, or (contrast) from the unweighted ones
        fields = cs.fields if favre else coarse_grain_snapshot(snap, cg).fields
        rho = cs.fields["rho"] if favre else 1.0
        grad = {(c, a): _spectral_dx(fields[c], cs.grid, ax)
                for c in "uv" for a, ax in (("x", 1), ("y", 0))}
        column, target = [], []
        for name, (i, j) in {"tau_xx": ("u", "u"), "tau_xy": ("u", "v"),
                             "tau_yy": ("v", "v")}.items():
            model = rho * cg.delta**2 * sum(grad[(i, k)] * grad[(j, k)] for k in "xy")
            column.append(model.ravel())
            target.append(cs.targets[name].ravel())
        A, b = np.concatenate(column)[:, None], np.concatenate(target)
        coef, *_ = np.linalg.lstsq(A, b, rcond=None)
        return 12 * coef[0], np.linalg.norm(b - A[:, 0] * coef[0]) / np.linalg.norm(b)

    c3, r3 = fit(3.0)
    assert c3 == pytest.approx(1.0, abs=0.05)
    assert r3 < 0.05
    # the relative error is O(D^2): halving D divides it by about 4
    c2, _ = fit(2.0)
    c4, _ = fit(4.0)
    assert 3.0 < (c4 - 1) / (c2 - 1) < 5.5
    # density weighting matters: the unweighted model misses the Favre stress by far more
    _, r_plain = fit(3.0, favre=False)
    assert r_plain > 3 * r3


def test_pressure_or_temperature_follows_from_the_gas_law():
    grid = Grid.regular((16, 16), TWO_PI, dims=("y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(0))
    f = snap.fields
    p, T = thermodynamic_fields({"rho": f["rho"], "T": f["T"]}, 287.0)
    np.testing.assert_allclose(p, f["rho"] * 287.0 * f["T"])
    p2, T2 = thermodynamic_fields({"rho": f["rho"], "p": p}, 287.0)
    np.testing.assert_allclose(T2, f["T"], rtol=1e-14)
    with pytest.raises(UserError, match="gas constant"):
        thermodynamic_fields({"rho": f["rho"], "T": f["T"]})
    with pytest.raises(UserError, match="positive"):
        thermodynamic_fields({"rho": f["rho"], "T": f["T"]}, -1.0)


def test_user_errors_say_what_to_change():
    grid = Grid.regular((16, 16), TWO_PI, dims=("y", "x"))
    cg = make_coarse_graining("gaussian", grid, 2)
    snap = compressible_snapshot(grid, np.random.default_rng(0))
    no_rho = Snapshot({k: v for k, v in snap.fields.items() if k != "rho"}, grid, 0, None)
    with pytest.raises(UserError, match="'rho'"):
        favre_coarse_grain(no_rho, cg)
    bad = Snapshot({**snap.fields, "rho": snap.fields["rho"] - 5.0}, grid, 0, None)
    with pytest.raises(UserError, match="positive"):
        favre_coarse_grain(bad, cg)
    only_u = Snapshot({k: v for k, v in snap.fields.items() if k not in ("p", "T")}, grid, 0,
                      None)
    with pytest.raises(UserError, match="--var"):
        favre_coarse_grain(only_u, cg)
    with pytest.raises(UserError, match="choose from"):
        favre_coarse_grain(snap, cg, targets=["flux_c_x"])
    land = np.ones(grid.shape, bool)
    land[:3, :3] = False
    masked = Snapshot(snap.fields, grid, 0, None, mask=land)
    with pytest.raises(UserError, match="use --filter gaussian or box"):
        favre_coarse_grain(masked, make_coarse_graining("spectral", grid, 2))
    with pytest.raises(UserError, match="use --scheme fd2 or fd4"):
        favre_coarse_grain(masked, cg, scheme="spectral")
    bad_land = Snapshot({**snap.fields, "rho": np.where(land, -1.0, 1.0)}, grid, 0, None,
                        mask=land)
    with pytest.raises(UserError, match="at every fluid point"):
        favre_coarse_grain(bad_land, cg)
    other = make_coarse_graining("gaussian", Grid.regular((32, 32), TWO_PI, dims=("y", "x")), 2)
    with pytest.raises(UserError, match="does not match"):
        favre_coarse_grain(snap, other)


def test_backscatter_share():
    grid = Grid.regular((32, 32), TWO_PI, dims=("y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(3), top_mode=8, density_rms=0.3)
    cs = favre_coarse_grain(snap, make_coarse_graining("box", grid, 2))
    pi = cs.targets["pi"]
    out = backscatter_fractions(cs)
    assert out["points"] == pytest.approx(np.mean(pi < 0))
    assert out["share"] == pytest.approx(-pi[pi < 0].sum() / np.abs(pi).sum())
    assert 0 < out["share"] < 0.5  # forward transfer dominates for these fields


@pytest.mark.parametrize("kind", ["gaussian", "block"])
def test_asking_for_some_targets_gives_the_same_values(kind):
    grid = Grid.regular((32, 32), TWO_PI, dims=("y", "x"))
    snap = compressible_snapshot(grid, np.random.default_rng(9), top_mode=8, density_rms=0.3)
    cg = make_coarse_graining(kind, grid, 2)
    full = favre_coarse_grain(snap, cg)
    for subset in (["heat_flux_x", "heat_flux_y"], ["pressure_dilatation"], ["pi"],
                   ["force_y", "tau_xy"]):
        part = favre_coarse_grain(snap, cg, targets=subset)
        assert set(part.targets) == set(subset)  # (in output order)
        for name in subset:
            np.testing.assert_allclose(part.targets[name], full.targets[name], rtol=1e-13,
                                       atol=1e-13 * np.max(np.abs(full.targets[name])))
        for name, value in full.fields.items():
            np.testing.assert_allclose(part.fields[name], value, rtol=1e-13)


def _with_land(snap, land):
    """The snapshot with land where ``land`` is True: NaN in every field there, and the mask."""
    fields = {k: np.where(land, np.nan, v) for k, v in snap.fields.items()}
    return Snapshot(fields, snap.grid, snap.index, snap.time, mask=~land)


@pytest.mark.parametrize("kind", ["gaussian", "box", "block"])
def test_land_leaves_the_valid_points_as_without_land(kind):
    # the valid-point rule (closure.residuals.land_validity, here favre_validity): a coarse
    # point whose filter footprint and derivative stencils see no land has the values of the
    # same data without land. Bounded grid: real-space filters and fd4 derivatives either way
    grid = Grid.regular((48, 48), TWO_PI, dims=("y", "x"), periodic=False)
    snap = compressible_snapshot(grid, np.random.default_rng(11), top_mode=5, density_rms=0.3)
    land = np.zeros(grid.shape, bool)
    land[18:26, 20:30] = True
    cg = make_coarse_graining(kind, grid, 2)
    plain = favre_coarse_grain(snap, cg)
    wet = favre_coarse_grain(_with_land(snap, land), cg, scheme="fd4")
    assert wet.land == "fluid"
    valid = wet.valid
    assert 0 < valid.sum() < valid.size
    for group, ref in ((wet.targets, plain.targets), (wet.fields, plain.fields)):
        for name, a in group.items():
            assert np.all(np.isfinite(a)), name
            scale = float(np.max(np.abs(ref[name])))
            np.testing.assert_allclose(a[valid], ref[name][valid], rtol=0,
                                       atol=1e-11 * scale, err_msg=name)
    # the coarse land points hold 0
    assert np.all(wet.fields["rho"][~wet.fluid] == 0)
    # an all-fluid mask is no mask: bit for bit the result without one
    none = favre_coarse_grain(Snapshot(snap.fields, grid, 0, None,
                                       mask=np.ones(grid.shape, bool)), cg)
    for name in plain.targets:
        np.testing.assert_array_equal(none.targets[name], plain.targets[name])
    assert none.valid is None
