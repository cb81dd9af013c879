import numpy as np
import pytest
import scipy.ndimage
import sympy as sp
import xarray as xr

from closure.derivatives import derivative
from closure.errors import UserError
from closure.filters import make_coarse_graining
from closure.grid import Grid
from closure.io import Snapshot
from closure.residuals import (
    backscatter_fraction,
    coarse_grain_snapshot,
    deviatoric,
    energy_transfer,
    strain_rate,
    stress_names,
    target_names,
)


# Transfer functions of Pope (2000), Turbulent Flows, Table 13.2
def pope_G(kind, k, D):
    k = np.asarray(k, dtype=float)
    if kind == "box":
        return np.sinc(k * D / (2 * np.pi))  # sin(kD/2)/(kD/2)
    if kind == "gaussian":
        return np.exp(-(k**2) * D**2 / 24)
    return (np.abs(k) < np.pi / D).astype(float)


def snapshot(grid, **fields):
    return Snapshot(dict(fields), grid, 0, None)


# --- closed forms -----------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
def test_single_mode_stress_force_and_transfer(kind):
    # u = a cos(kx). u^2 = a^2/2 (1 + cos 2kx), and a filter maps cos(mx) to G(m) cos(mx) with
    # G(0) = 1, so bar(uu) = a^2/2 (1 + G(2k) cos 2kx); bar(u)^2 = a^2 G(k)^2 cos^2 kx
    # = a^2 G(k)^2 / 2 (1 + cos 2kx). Hence
    #   tau_xx = a^2/2 [1 - G(k)^2 + (G(2k) - G(k)^2) cos 2kx],
    #   force_x = d_x tau_xx = -a^2 k (G(2k) - G(k)^2) sin 2kx,
    #   pi = -tau_xx S_xx with S_xx = d_x bar(u) = -a k G(k) sin kx.
    g = Grid.regular((64,), 2 * np.pi)
    a, k = 1.7, 5
    u = a * np.cos(k * g.coords("x"))
    cg = make_coarse_graining(kind, g, 4, 4.0)  # D = 4 spacings: sharp cutoff at |k| < 8
    cs = coarse_grain_snapshot(snapshot(g, u=u), cg)
    D = cg.widths[0]
    G1, G2 = pope_G(kind, k, D), pope_G(kind, 2 * k, D)
    xc = cs.grid.coords("x")
    tau = a**2 / 2 * (1 - G1**2 + (G2 - G1**2) * np.cos(2 * k * xc))
    np.testing.assert_allclose(cs.targets["tau_xx"], tau, atol=1e-13)
    np.testing.assert_allclose(cs.targets["force_x"],
                               -a**2 * k * (G2 - G1**2) * np.sin(2 * k * xc), atol=1e-12)
    np.testing.assert_allclose(cs.fields["u"], a * G1 * np.cos(k * xc), atol=1e-14)
    S = -a * k * G1 * np.sin(k * xc)
    np.testing.assert_allclose(cs.targets["pi"], -tau * S, atol=1e-12)
    assert set(cs.targets) == {"tau_xx", "force_x", "pi"}
    assert cs.grid == cg.coarse


def two_mode_closed_form(kind, grid, widths, a, p, b, q):
    """Sympy closed forms for u = a cos(p.x), v = b cos(q.x) under a tensor-product filter.

    With G(k) = G1(k_x) G1(k_y) and cos A cos B = [cos(A+B) + cos(A-B)] / 2:
      tau_xy = ab/2 [(G(p+q) - G(p)G(q)) cos((p+q).x) + (G(p-q) - G(p)G(q)) cos((p-q).x)]
      tau_xx = a^2/2 [1 - G(p)^2 + (G(2p) - G(p)^2) cos(2p.x)], tau_yy likewise with b, q.
    """
    Dy, Dx = widths

    def G(kv):
        return float(pope_G(kind, kv[0], Dx) * pope_G(kind, kv[1], Dy))

    x, y = sp.symbols("x y")
    p, q = np.array(p), np.array(q)

    def phase(kv):
        return kv[0] * x + kv[1] * y

    Gp, Gq = G(p), G(q)
    tau = {
        "xx": a**2 / 2 * (1 - Gp**2 + (G(2 * p) - Gp**2) * sp.cos(phase(2 * p))),
        "yy": b**2 / 2 * (1 - Gq**2 + (G(2 * q) - Gq**2) * sp.cos(phase(2 * q))),
        "xy": a * b / 2 * ((G(p + q) - Gp * Gq) * sp.cos(phase(p + q))
                           + (G(p - q) - Gp * Gq) * sp.cos(phase(p - q))),
    }
    ubar, vbar = a * Gp * sp.cos(phase(p)), b * Gq * sp.cos(phase(q))
    S = {"xx": sp.diff(ubar, x), "yy": sp.diff(vbar, y),
         "xy": (sp.diff(ubar, y) + sp.diff(vbar, x)) / 2}
    exprs = {f"tau_{c}": e for c, e in tau.items()}
    exprs["force_x"] = sp.diff(tau["xx"], x) + sp.diff(tau["xy"], y)
    exprs["force_y"] = sp.diff(tau["xy"], x) + sp.diff(tau["yy"], y)
    exprs["pi"] = -(tau["xx"] * S["xx"] + 2 * tau["xy"] * S["xy"] + tau["yy"] * S["yy"])
    exprs["u"], exprs["v"] = ubar, vbar
    exprs["vorticity"] = sp.diff(vbar, x) - sp.diff(ubar, y)
    Y, X = grid.mesh()
    return {k: np.broadcast_to(sp.lambdify((x, y), e, "numpy")(X, Y), grid.shape)
            for k, e in exprs.items()}


@pytest.mark.parametrize("kind", ["box", "gaussian"])
def test_two_mode_2d_stress_force_pi_against_closed_form(kind):
    g = Grid.regular((48, 32), (2 * np.pi, 2 * np.pi))
    Y, X = g.mesh()
    a, p, b, q = 1.3, (2, 1), 0.8, (1, 3)  # wavevectors (k_x, k_y)
    u = a * np.cos(p[0] * X + p[1] * Y)
    v = b * np.cos(q[0] * X + q[1] * Y)
    cg = make_coarse_graining(kind, g, 4, 5.0)
    cs = coarse_grain_snapshot(snapshot(g, u=u, v=v), cg)
    ref = two_mode_closed_form(kind, cs.grid, cg.widths, a, p, b, q)
    for name in ("tau_xx", "tau_xy", "tau_yy", "force_x", "force_y", "pi"):
        np.testing.assert_allclose(cs.targets[name], ref[name], atol=1e-12, err_msg=name)
    for name in ("u", "v", "vorticity"):
        np.testing.assert_allclose(cs.fields[name], ref[name], atol=1e-12, err_msg=name)


def test_3d_stress_components_and_a_closed_form():
    g = Grid.regular((16, 8, 8), 2 * np.pi)
    Z, Y, X = g.mesh()
    k = 3
    # u = a cos(kz), w = b cos(kz): tau_xz = ab/2 [1 - G^2 + (G(2k) - G^2) cos 2kz] as in 1-D
    a, b = 1.1, -0.6
    fields = {"u": a * np.cos(k * Z), "v": np.sin(X), "w": b * np.cos(k * Z)}
    cg = make_coarse_graining("gaussian", g, 2, 3.0)
    cs = coarse_grain_snapshot(snapshot(g, **fields), cg)
    assert list(cs.targets) == ["tau_xx", "tau_xy", "tau_yy", "tau_xz", "tau_yz", "tau_zz",
                                "force_x", "force_y", "force_z", "pi"]
    assert list(cs.fields) == ["u", "v", "w"]
    G1, G2 = pope_G("gaussian", k, cg.widths[0]), pope_G("gaussian", 2 * k, cg.widths[0])
    Zc = cs.grid.mesh()[0]
    np.testing.assert_allclose(cs.targets["tau_xz"],
                               a * b / 2 * (1 - G1**2 + (G2 - G1**2) * np.cos(2 * k * Zc)),
                               atol=1e-13)


# --- identities -------------------------------------------------------------------------------

def band_limited_flow(grid, kmax, seed):
    """Incompressible velocity from a random streamfunction with |k_x|, |k_y| <= kmax, and a
    scalar of the same band."""
    rng = np.random.default_rng(seed)
    Y, X = grid.mesh()
    psi = np.zeros(grid.shape)
    dpsi_dx, dpsi_dy = np.zeros(grid.shape), np.zeros(grid.shape)
    c = np.zeros(grid.shape)
    for kx in range(0, kmax + 1):
        for ky in range(-kmax, kmax + 1):
            if kx == 0 and ky <= 0:
                continue
            A, B, C = rng.standard_normal(3) / (kx**2 + ky**2)
            ph = kx * X + ky * Y
            psi += A * np.cos(ph) + B * np.sin(ph)
            dpsi_dx += kx * (-A * np.sin(ph) + B * np.cos(ph))
            dpsi_dy += ky * (-A * np.sin(ph) + B * np.cos(ph))
            c += C * np.cos(ph + 0.3)
    return {"u": dpsi_dy, "v": -dpsi_dx, "c": c}


def test_vorticity_forcing_is_the_curl_of_the_force():
    # For div u = 0 in 2-D, curl d_j(u_i u_j) = d_x d_j(v u_j) - d_y d_j(u u_j)
    #   = d_j(u_j omega) + [d_x v div u - d_y u div u + v d_x div u - u d_y div u]
    #   = d_j(u_j omega)
    # (product rule; the bracket collects the remaining terms). The filter commutes with
    # derivatives, so bar(u) is divergence-free with curl bar(omega), and
    #   curl(force) = d_j bar(u_j omega) - d_j(bar(u_j) bar(omega)) = vorticity_forcing.
    # Modes |k| <= 3 on 48 points: every product (|k| <= 6) is resolved without aliasing on the
    # fine grid and below the Nyquist wavenumber 8 of the 16-point coarse grid, so spectral
    # derivatives of the coarse samples are exact and the identity holds to round-off.
    g = Grid.regular((48, 48), 2 * np.pi)
    f = band_limited_flow(g, 3, seed=7)
    cg = make_coarse_graining("gaussian", g, 3)
    cs = coarse_grain_snapshot(snapshot(g, u=f["u"], v=f["v"]), cg)
    c = cs.grid
    curl = (derivative(cs.targets["force_y"], c, "x")
            - derivative(cs.targets["force_x"], c, "y"))
    scale = np.max(np.abs(cs.targets["vorticity_forcing"]))
    assert scale > 1e-3
    np.testing.assert_allclose(cs.targets["vorticity_forcing"], curl, atol=1e-12 * scale)


def numpy_reference_2d(fields, grid, kind, widths, ratio):
    """Every 2-D term from numpy FFTs and Pope's transfer functions, independent of closure."""
    ny, nx = grid.shape
    ky = 2 * np.pi * np.fft.fftfreq(ny, grid.spacing[0])[:, None]
    kx = 2 * np.pi * np.fft.fftfreq(nx, grid.spacing[1])[None, :]
    Gk = pope_G(kind, ky, widths[0]) * pope_G(kind, kx, widths[1])

    def bar(f):
        return np.fft.ifft2(np.fft.fft2(f) * Gk).real

    # odd derivatives drop the Nyquist mode of even-length axes (common practice)
    mx, my = 1j * kx.copy(), 1j * ky.copy()
    if nx % 2 == 0:
        mx[0, nx // 2] = 0
    if ny % 2 == 0:
        my[ny // 2, 0] = 0

    def dx(f):
        return np.fft.ifft2(np.fft.fft2(f) * mx).real

    def dy(f):
        return np.fft.ifft2(np.fft.fft2(f) * my).real

    u, v, c = fields["u"], fields["v"], fields["c"]
    om = dx(v) - dy(u)
    ub, vb, cb, omb = bar(u), bar(v), bar(c), bar(om)
    tau = {"xx": bar(u * u) - ub * ub, "xy": bar(u * v) - ub * vb, "yy": bar(v * v) - vb * vb}
    sig = {"x": bar(u * om) - ub * omb, "y": bar(v * om) - vb * omb}
    Sxx, Syy, Sxy = dx(ub), dy(vb), (dy(ub) + dx(vb)) / 2
    out = {
        "u": ub, "v": vb, "c": cb, "vorticity": dx(vb) - dy(ub),
        "tau_xx": tau["xx"], "tau_xy": tau["xy"], "tau_yy": tau["yy"],
        "force_x": dx(tau["xx"]) + dy(tau["xy"]), "force_y": dx(tau["xy"]) + dy(tau["yy"]),
        "flux_c_x": bar(u * c) - ub * cb, "flux_c_y": bar(v * c) - vb * cb,
        "pi": -(tau["xx"] * Sxx + 2 * tau["xy"] * Sxy + tau["yy"] * Syy),
        "vorticity_forcing": dx(sig["x"]) + dy(sig["y"]),
        "enstrophy_transfer": -(sig["x"] * dx(omb) + sig["y"] * dy(omb)),
    }
    return {k: a[::ratio, ::ratio] for k, a in out.items()}


@pytest.mark.parametrize("kind", ["box", "gaussian", "spectral"])
def test_all_2d_terms_against_an_independent_numpy_evaluation(kind):
    g = Grid.regular((32, 40), (2 * np.pi, 2.5 * np.pi))
    f = band_limited_flow(Grid.regular((32, 40), 2 * np.pi), 9, seed=3)  # aliased products too
    cg = make_coarse_graining(kind, g, 4)
    cs = coarse_grain_snapshot(snapshot(g, **f), cg, scalars=("c",))
    ref = numpy_reference_2d(f, g, kind, cg.widths, 4)
    got = {**cs.fields, **cs.targets}
    assert set(got) == set(ref)
    for name, r in ref.items():
        np.testing.assert_allclose(got[name], r, atol=1e-11 * max(1.0, np.max(np.abs(r))),
                                   err_msg=name)


def test_stress_is_galilean_invariant():
    # tau_ij is unchanged by a uniform velocity added to u (Speziale 1985, J. Fluid Mech. 156),
    # for any filter with G(0) = 1
    g = Grid.regular((32, 32), 1.0)
    f = band_limited_flow(g, 6, seed=1)
    cg = make_coarse_graining("box", g, 4)
    a = coarse_grain_snapshot(snapshot(g, u=f["u"], v=f["v"]), cg)
    b = coarse_grain_snapshot(snapshot(g, u=f["u"] + 3.0, v=f["v"] - 2.0), cg)
    for name in stress_names(g.dims):
        np.testing.assert_allclose(a.targets[name], b.targets[name], atol=1e-12)


def fine_grid_reference(fields, cg, scalars):
    """Every term filtered and differentiated on the fine grid, then sampled: the definition
    of the module docstring written out with closure.filters.filter (Pope's transfer functions)
    and closure.derivatives (spectral), without the one-step spectral coarsening."""
    g = cg.fine
    dirs = [d for d in ("x", "y", "z") if d in g.dims]
    vel = {"x": "u", "y": "v", "z": "w"}
    u = {d: fields[vel[d]] for d in dirs}
    bar = cg.filter
    ub = {d: bar(u[d]) for d in dirs}
    out = {vel[d]: ub[d] for d in dirs}
    tau = {}
    for i, j in [(i, j) for i in dirs for j in dirs if "xyz".index(i) <= "xyz".index(j)]:
        tau[i, j] = tau[j, i] = bar(u[i] * u[j]) - ub[i] * ub[j]
        out[f"tau_{i}{j}"] = tau[i, j]
    for i in dirs:
        out[f"force_{i}"] = sum(derivative(tau[i, j], g, j) for j in dirs)
    for c in scalars:
        cb = bar(fields[c])
        out[c] = cb
        for j in dirs:
            out[f"flux_{c}_{j}"] = bar(u[j] * fields[c]) - ub[j] * cb
    S = {(i, j): 0.5 * (derivative(ub[i], g, j) + derivative(ub[j], g, i))
         for i in dirs for j in dirs}
    out["pi"] = -sum(tau[i, j] * S[i, j] for i in dirs for j in dirs)
    if len(dirs) == 2:
        om = derivative(u["y"], g, "x") - derivative(u["x"], g, "y")
        omb = bar(om)
        out["vorticity"] = derivative(ub["y"], g, "x") - derivative(ub["x"], g, "y")
        sig = {j: bar(u[j] * om) - ub[j] * omb for j in dirs}
        out["vorticity_forcing"] = sum(derivative(sig[j], g, j) for j in dirs)
        out["enstrophy_transfer"] = -sum(sig[j] * derivative(omb, g, j) for j in dirs)
    return {k: cg.sample(a) for k, a in out.items()}


@pytest.mark.parametrize("shape,ratio,kind", [
    ((48,), 4, "box"), ((45,), 3, "gaussian"), ((30, 24), 3, "spectral"),
    ((28, 21), 7, "gaussian"), ((12, 9, 18), 3, "box"), ((8, 12, 10), 2, "gaussian")])
def test_one_step_spectral_terms_equal_filtering_and_differentiating_on_the_fine_grid(
        shape, ratio, kind):
    # random (not band-limited) fields, odd and even fine and coarse sizes, 1-, 2- and 3-D
    g = Grid.regular(shape, 2 * np.pi)
    rng = np.random.default_rng(sum(shape))
    names = ["u", "v", "w"][:len(shape)]
    f = {c: rng.standard_normal(shape) for c in (*names, "c")}
    cg = make_coarse_graining(kind, g, ratio)
    cs = coarse_grain_snapshot(snapshot(g, **f), cg, scalars=("c",))
    ref = fine_grid_reference(f, cg, ("c",))
    got = {**cs.fields, **cs.targets}
    assert set(got) == set(ref)
    for name, r in ref.items():
        np.testing.assert_allclose(got[name], r, atol=1e-12 * max(1.0, np.max(np.abs(r))),
                                   err_msg=name)


@pytest.mark.parametrize("grid,kind", [
    (Grid.regular((24, 30), 2 * np.pi), "gaussian"),
    (Grid.regular((12, 8, 16), 2 * np.pi), "spectral"),
    (Grid.regular((32,), 2 * np.pi), "box"),
    (Grid(("y", "x"), (24, 30), (0.1, 0.1), periodic=False), "gaussian"),
    (Grid.regular((24, 32), 2 * np.pi), "block")])
def test_asking_for_some_targets_gives_the_same_bits(grid, kind):
    # the pipeline asks only for the fitted target: it must be the very array that
    # `closure coarse-grain` computes among all the others, and the fields must not change
    rng = np.random.default_rng(6)
    f = {c: rng.standard_normal(grid.shape) for c in ("u", "v", "w")[:grid.ndim]}
    f["c"] = rng.standard_normal(grid.shape)
    cg = make_coarse_graining(kind, grid, 2)
    snap = snapshot(grid, **f)
    full = coarse_grain_snapshot(snap, cg, ["c"])
    assert list(full.targets) == target_names(grid.dims, ["c"])
    for want in [stress_names(grid.dims), ["pi"], [f"force_{grid.dims[-1]}"],
                 [n for n in full.targets if n.startswith("flux_")],
                 *([["vorticity_forcing"], ["enstrophy_transfer"]] if grid.ndim == 2 else [])]:
        part = coarse_grain_snapshot(snap, cg, ["c"], targets=want)
        assert list(part.targets) == want
        for name in want:
            np.testing.assert_array_equal(part.targets[name], full.targets[name], err_msg=name)
        assert list(part.fields) == list(full.fields)
        for name in full.fields:
            np.testing.assert_array_equal(part.fields[name], full.fields[name], err_msg=name)
    assert coarse_grain_snapshot(snap, cg, targets=[]).targets == {}


def test_unknown_targets_are_named():
    g = Grid.regular((16, 16), 2 * np.pi)
    cg = make_coarse_graining("gaussian", g, 2)
    s = snapshot(g, u=np.zeros(g.shape), v=np.zeros(g.shape), c=np.zeros(g.shape))
    with pytest.raises(UserError, match="unknown target variable.*tau_zz.*choose from tau_xx"):
        coarse_grain_snapshot(s, cg, targets=["tau_xx", "tau_zz"])
    with pytest.raises(UserError, match="flux_c_x.*needs its scalar"):
        coarse_grain_snapshot(s, cg, targets=["flux_c_x"])
    assert list(coarse_grain_snapshot(s, cg, ["c"], targets="flux_c_x").targets) == ["flux_c_x"]


# --- block averaging and non-periodic data ----------------------------------------------------

def test_block_terms_match_xarray_coarsen_and_coarse_derivatives():
    g = Grid.regular((24, 32), 2 * np.pi)
    f = band_limited_flow(g, 5, seed=4)
    cg = make_coarse_graining("block", g, 4)
    cs = coarse_grain_snapshot(snapshot(g, **f), cg, scalars=["c"])
    ds = xr.Dataset({k: (("y", "x"), v) for k, v in {
        "u": f["u"], "v": f["v"], "c": f["c"], "uu": f["u"] ** 2, "uv": f["u"] * f["v"],
        "vc": f["v"] * f["c"]}.items()}).coarsen(x=4, y=4).mean()  # reference: xarray
    np.testing.assert_allclose(cs.targets["tau_xx"], ds.uu - ds.u**2, atol=1e-13)
    np.testing.assert_allclose(cs.targets["tau_xy"], ds.uv - ds.u * ds.v, atol=1e-13)
    np.testing.assert_allclose(cs.targets["flux_c_y"], ds.vc - ds.v * ds.c, atol=1e-13)
    np.testing.assert_allclose(cs.fields["u"], ds.u, atol=1e-14)
    # force: spectral derivative of the block-averaged stress on the coarse grid
    c = cs.grid
    fx = derivative(cs.targets["tau_xx"], c, "x") + derivative(cs.targets["tau_xy"], c, "y")
    np.testing.assert_allclose(cs.targets["force_x"], fx, atol=1e-12)
    vort = derivative(cs.fields["v"], c, "x") - derivative(cs.fields["u"], c, "y")
    np.testing.assert_allclose(cs.fields["vorticity"], vort, atol=1e-12)


def test_non_periodic_terms_use_reflecting_filters_and_fd4():
    g = Grid(("y", "x"), (24, 30), (0.1, 0.1), periodic=False)
    rng = np.random.default_rng(9)
    u = scipy.ndimage.gaussian_filter(rng.standard_normal(g.shape), 2.0)
    v = scipy.ndimage.gaussian_filter(rng.standard_normal(g.shape), 2.0)
    cg = make_coarse_graining("gaussian", g, 3, 4.0)
    cs = coarse_grain_snapshot(snapshot(g, u=u, v=v), cg)
    sigma = 4.0 / np.sqrt(12)  # reference: scipy.ndimage with mirror ('reflect') edges

    def bar(f):
        return scipy.ndimage.gaussian_filter(f, sigma, mode="reflect", truncate=6.0)

    tau_xy = bar(u * v) - bar(u) * bar(v)
    np.testing.assert_allclose(cs.targets["tau_xy"], tau_xy[::3, ::3], atol=1e-13)
    tau_xx = bar(u * u) - bar(u) ** 2
    fx = derivative(tau_xx, g, "x", 1, "fd4") + derivative(tau_xy, g, "y", 1, "fd4")
    np.testing.assert_allclose(cs.targets["force_x"], fx[::3, ::3], atol=1e-12)
    assert cs.grid.shape == (8, 10)


# --- helpers ----------------------------------------------------------------------------------

def test_energy_transfer_sums_all_components():
    rng = np.random.default_rng(0)
    T = rng.standard_normal((3, 3, 5))
    T = T + T.transpose(1, 0, 2)
    S = rng.standard_normal((3, 3, 5))
    S = S + S.transpose(1, 0, 2)
    idx = {"x": 0, "y": 1, "z": 2}
    dims = ("z", "y", "x")
    names = [n[4:] for n in stress_names(dims)]
    stress = {f"tau_{n}": T[idx[n[0]], idx[n[1]]] for n in names}
    strain = {n: S[idx[n[0]], idx[n[1]]] for n in names}
    np.testing.assert_allclose(energy_transfer(stress, strain, dims),
                               -np.einsum("ijn,ijn->n", T, S), atol=1e-12)


def test_strain_rate_of_a_shear():
    g = Grid.regular((16, 16), 2 * np.pi)
    Y, X = g.mesh()
    S = strain_rate({"u": np.sin(Y), "v": np.zeros(g.shape)}, g)
    np.testing.assert_allclose(S["xy"], 0.5 * np.cos(Y), atol=1e-12)
    np.testing.assert_allclose(S["xx"], 0.0, atol=1e-12)


def test_deviatoric_part_is_trace_free():
    rng = np.random.default_rng(2)
    stress = {n: rng.standard_normal(4) for n in stress_names(("y", "x"))}
    dev = deviatoric(stress, ("y", "x"))
    np.testing.assert_allclose(dev["tau_xx"] + dev["tau_yy"], 0.0, atol=1e-15)
    np.testing.assert_allclose(dev["tau_xy"], stress["tau_xy"])
    np.testing.assert_allclose(dev["tau_xx"], (stress["tau_xx"] - stress["tau_yy"]) / 2)


def test_backscatter_fraction():
    assert backscatter_fraction(np.array([1.0, -2.0, 0.0, -0.1])) == 0.5
    assert backscatter_fraction(np.ones((3, 3))) == 0.0


def test_stress_names_order():
    assert stress_names(("x",)) == ["tau_xx"]
    assert stress_names(("y", "x")) == ["tau_xx", "tau_xy", "tau_yy"]
    assert stress_names(("z", "y", "x")) == ["tau_xx", "tau_xy", "tau_yy", "tau_xz", "tau_yz",
                                            "tau_zz"]


def test_scalar_names_cannot_collide_with_internal_terms():
    g = Grid.regular((16, 16), 2 * np.pi)
    f = band_limited_flow(g, 4, seed=5)
    cg = make_coarse_graining("gaussian", g, 2)
    a = coarse_grain_snapshot(snapshot(g, u=f["u"], v=f["v"], c=f["c"]), cg, ["c"])
    b = coarse_grain_snapshot(snapshot(g, u=f["u"], v=f["v"], omega=f["c"], tau=f["c"]), cg,
                              ["omega", "tau"])
    for name in ("tau_xy", "vorticity_forcing", "enstrophy_transfer"):
        np.testing.assert_array_equal(a.targets[name], b.targets[name])
    np.testing.assert_array_equal(a.targets["flux_c_x"], b.targets["flux_omega_x"])
    np.testing.assert_array_equal(a.fields["c"], b.fields["tau"])
    with pytest.raises(UserError, match="'vorticity' is taken"):
        coarse_grain_snapshot(snapshot(g, u=f["u"], v=f["v"], vorticity=f["c"]), cg,
                              ["vorticity"])


def test_input_errors():
    g = Grid.regular((16, 16), 1.0)
    cg = make_coarse_graining("box", g, 4)
    with pytest.raises(UserError, match="no field 'v'"):
        coarse_grain_snapshot(snapshot(g, u=np.zeros(g.shape)), cg)
    with pytest.raises(UserError, match="no field 'theta'.*--scalar"):
        coarse_grain_snapshot(snapshot(g, u=np.zeros(g.shape), v=np.zeros(g.shape)), cg,
                              scalars=["theta"])
    other = Grid.regular((32, 16), 1.0)
    with pytest.raises(UserError, match="does not match"):
        coarse_grain_snapshot(snapshot(other, u=np.zeros(other.shape),
                                       v=np.zeros(other.shape)), cg)
