"""Tests for closure.spectral: operators, spectra, time stepping and the 2-D vorticity equation."""

import math

import numpy as np
import pytest

from closure.errors import UserError
from closure.grid import Grid
from closure.spectral import (
    Forcing,
    StepCollapse,
    VorticityEquation,
    cfl_time_step,
    dealias_mask,
    divergence_hat_norm,
    energy_spectrum,
    enstrophy,
    fourier,
    ifrk4_step,
    kinetic_energy,
    project,
    project_hat,
    random_field_hat,
    scalar_spectrum,
    shell_modes,
    substeps,
    velocity_from_vorticity,
    vorticity_from_velocity,
)

TWO_PI = 2 * np.pi


def grid2(n=32, length=TWO_PI):
    return Grid.regular((n, n), length, dims=("y", "x"))


def test_fourier_needs_periodic_grid():
    g = Grid.regular((16, 16), 1.0, periodic=False)
    with pytest.raises(UserError, match="periodic"):
        fourier(g).k  # noqa: B018


def test_dealias_mask_keeps_modes_below_a_third():
    # Orszag (1971, J. Atmos. Sci. 28:1074): with n points keep |m| < n/3
    g = Grid.regular((12,), TWO_PI, dims=("x",))
    mask = dealias_mask(g)
    assert mask.tolist() == [1, 1, 1, 1, 0, 0, 0]  # m = 0..6 on the rfft axis
    g2 = grid2(12)
    m2 = dealias_mask(g2)
    ky = np.fft.fftfreq(12, 1 / 12)
    assert np.array_equal(m2[:, 0], (np.abs(ky) < 4).astype(float))


def test_dealiased_product_has_no_aliasing_error():
    # 2/3 rule (Orszag 1971): the product of two fields with |m| < n/3, truncated, equals the
    # exact product (computed on a grid twice as fine) truncated the same way.
    n = 24
    g = Grid.regular((n,), TWO_PI, dims=("x",))
    fine = Grid.regular((2 * n,), TWO_PI, dims=("x",))
    rng = np.random.default_rng(3)
    F, Ff = fourier(g), fourier(fine)
    a_hat = (rng.standard_normal(n // 2 + 1) + 1j * rng.standard_normal(n // 2 + 1)) * F.dealias
    b_hat = (rng.standard_normal(n // 2 + 1) + 1j * rng.standard_normal(n // 2 + 1)) * F.dealias
    a_hat[0] = a_hat[0].real
    b_hat[0] = b_hat[0].real
    ab = F.forward(F.backward(a_hat) * F.backward(b_hat)) * F.dealias

    def pad(h):
        out = np.zeros(n + 1, dtype=complex)
        out[: h.size] = h * 2  # twice as many points: unnormalised coefficients double
        return out

    exact = Ff.forward(Ff.backward(pad(a_hat)) * Ff.backward(pad(b_hat)))[: n // 2 + 1] / 2
    np.testing.assert_allclose(ab, exact * F.dealias, atol=1e-10)
    # the modes the rule removes do carry aliasing errors
    plain = F.forward(F.backward(a_hat) * F.backward(b_hat))
    assert np.max(np.abs(plain - exact)) > 1e-3


def test_spectrum_of_a_single_mode():
    # u = A cos(3 x): mean energy A^2/4, all of it in the shell k = 3 (Parseval)
    g = Grid.regular((64,), TWO_PI, dims=("x",))
    x = g.coords("x")
    k, E = energy_spectrum((2.0 * np.cos(3 * x),), g)
    dk = k[1] - k[0]
    assert dk == pytest.approx(1.0)
    assert E[3] * dk == pytest.approx(1.0)
    assert np.sum(np.delete(E, 3)) == pytest.approx(0.0, abs=1e-20)
    # oblique 2-D mode (m_y, m_x) = (4, 3): |k| = 5
    g2 = grid2(32)
    y, x = g2.mesh()
    u = np.cos(3 * x + 4 * y)
    k, E = energy_spectrum((u, 0 * u), g2)
    assert E[5] == pytest.approx(0.25)
    assert E.sum() == pytest.approx(0.25)


def test_spectrum_sums_to_energy_on_a_non_square_box():
    g = Grid.regular((24, 40), (3.0, 5.0), dims=("y", "x"))
    rng = np.random.default_rng(0)
    u, v = rng.standard_normal((2, 24, 40))
    k, E = energy_spectrum((u, v), g)
    assert k[1] == pytest.approx(TWO_PI / 5.0)
    assert np.sum(E) * k[1] == pytest.approx(kinetic_energy((u, v)), rel=1e-12)
    k, S = scalar_spectrum(u, g)
    assert np.sum(S) * k[1] == pytest.approx(0.5 * np.mean(u**2), rel=1e-12)


def test_energy_spectrum_rejects_wrong_shapes():
    with pytest.raises(UserError, match="shape"):
        energy_spectrum((np.zeros((8, 8)),), grid2(16))


def test_velocity_from_vorticity_of_a_known_streamfunction():
    # psi = sin(2x) cos(3y): u = d_y psi, v = -d_x psi, omega = -lap psi = 13 psi
    g = grid2(32)
    y, x = g.mesh()
    psi = np.sin(2 * x) * np.cos(3 * y)
    u, v = velocity_from_vorticity(13 * psi, g)
    np.testing.assert_allclose(u, -3 * np.sin(2 * x) * np.sin(3 * y), atol=1e-12)
    np.testing.assert_allclose(v, -2 * np.cos(2 * x) * np.cos(3 * y), atol=1e-12)
    np.testing.assert_allclose(vorticity_from_velocity(u, v, g), 13 * psi, atol=1e-11)


def test_velocity_from_vorticity_on_a_non_square_box():
    g = Grid.regular((24, 48), (2.0, 4.0), dims=("y", "x"))
    y, x = g.mesh()
    ky, kx = TWO_PI / 2.0, 2 * TWO_PI / 4.0
    psi = np.cos(kx * x + ky * y)
    u, v = velocity_from_vorticity((kx**2 + ky**2) * psi, g)
    np.testing.assert_allclose(u, -ky * np.sin(kx * x + ky * y), atol=1e-11)
    np.testing.assert_allclose(v, kx * np.sin(kx * x + ky * y), atol=1e-11)


def test_projection_removes_gradients_and_keeps_solenoidal_fields():
    g = Grid.regular((16, 16, 16), TWO_PI)
    z, y, x = g.mesh()
    # the gradient of phi = sin(x + 2y) cos(3z)
    grad = (-3 * np.sin(x + 2 * y) * np.sin(3 * z),            # d_z
            2 * np.cos(x + 2 * y) * np.cos(3 * z),              # d_y
            np.cos(x + 2 * y) * np.cos(3 * z))                  # d_x
    for c in project(grad, g):
        np.testing.assert_allclose(c, 0.0, atol=1e-12)
    # Taylor-Green velocity (solenoidal) is unchanged
    tg = (0 * x, -np.cos(x) * np.sin(y) * np.cos(z), np.sin(x) * np.cos(y) * np.cos(z))
    for a, b in zip(project(tg, g), tg, strict=True):
        np.testing.assert_allclose(a, b, atol=1e-12)
    # a random field becomes divergence-free to round-off and projecting twice changes nothing
    rng = np.random.default_rng(1)
    F = fourier(g)
    uh = project_hat(F.forward(rng.standard_normal((3, 16, 16, 16))), g)
    assert divergence_hat_norm(uh, g) < 1e-14
    np.testing.assert_allclose(project_hat(uh, g), uh, atol=1e-12)


def test_random_field_has_the_prescribed_spectrum():
    g = grid2(64)
    rng = np.random.default_rng(5)
    uh = random_field_hat(g, lambda k: k**2 * np.exp(-k), rng, components=2, solenoidal=True)
    F = fourier(g)
    u, v = F.backward(uh)
    k, E = energy_spectrum((u, v), g)
    keep = (k > 0) & (k < 20)
    np.testing.assert_allclose(E[keep], k[keep] ** 2 * np.exp(-k[keep]), rtol=1e-10)
    assert divergence_hat_norm(uh, g) < 1e-14


def test_ifrk4_is_exact_for_the_linear_part_and_fourth_order_for_the_rest():
    # dq/dt = L q + i w q has the solution exp((L + i w) t) q0
    L, w, T = -3.0, 2.0, 1.0

    def solve(n, linear):
        q = np.array([1.0 + 0j])
        lin = None if linear is None else np.array([linear])
        extra = (0.0 if linear is not None else L)
        for _ in range(n):
            q = ifrk4_step(q, T / n, lambda q: (extra + 1j * w) * q, lin)
        return abs(q[0] - np.exp((L + 1j * w) * T))

    # classical RK4 global error ~ dt^4 (Butcher 2008, Numerical Methods for ODEs, sec. 32)
    for linear in (L, None):
        e1, e2 = solve(20, linear), solve(40, linear)
        assert 14 < e1 / e2 < 18
    # with no explicit term, the integrating factor is exact whatever the step
    q = ifrk4_step(np.array([2.0]), 5.0, lambda q: 0 * q, np.array([-1.5]))
    assert q[0] == pytest.approx(2.0 * np.exp(-7.5), rel=1e-14)


def test_cfl_time_step_and_substeps():
    g = grid2(16)  # h = 2 pi / 16
    u = np.full((16, 16), 2.0)
    v = np.full((16, 16), -1.0)
    h = TWO_PI / 16
    assert cfl_time_step((v, u), g, 0.5) == pytest.approx(0.5 / (3.0 / h))
    assert cfl_time_step((0 * v, 0 * u), g, 0.5, max_step=0.1) == 0.1
    assert substeps(1.0, 0.3) == (4, 0.25)
    assert substeps(1.0, 0.25) == (4, 0.25)
    with pytest.raises(StepCollapse):
        substeps(1.0, 1e-9, max_substeps=1000)
    with pytest.raises(StepCollapse):
        substeps(1.0, cfl_time_step((np.full((16, 16), np.nan), u), g, 0.5))


def taylor_green(g, k=2):
    y, x = g.mesh()
    u = np.sin(k * x) * np.cos(k * y)
    v = -np.cos(k * x) * np.sin(k * y)
    return u, v


def test_taylor_green_decays_at_the_viscous_rate():
    # 2-D Taylor-Green vortex (Taylor & Green 1937): an exact Navier-Stokes solution whose
    # velocity decays as exp(-2 nu k^2 t) (the nonlinear term is a pure gradient)
    g = grid2(32)
    nu, k, T = 0.05, 2, 1.5
    u0, v0 = taylor_green(g, k)
    eq = VorticityEquation(g, viscosity=nu)
    q = eq.initial_state(vorticity_from_velocity(u0, v0, g))
    q, steps = eq.advance(q, T, cfl=0.5)
    assert steps > 1
    f = eq.fields(q)
    decay = np.exp(-2 * nu * k**2 * T)
    np.testing.assert_allclose(f["u"], u0 * decay, atol=1e-12)
    np.testing.assert_allclose(f["v"], v0 * decay, atol=1e-12)


def test_linear_drag_decays_energy_at_twice_the_drag_rate():
    # a single Fourier mode is a steady Euler flow, so with drag mu alone E(t) = E0 exp(-2 mu t)
    g = grid2(32)
    y, x = g.mesh()
    omega = np.cos(3 * x + 1 * y)
    mu, T = 0.3, 2.0
    eq = VorticityEquation(g, drag=mu)
    q = eq.initial_state(omega)
    e0 = kinetic_energy(velocity_from_vorticity(omega, g))
    q, _ = eq.advance(q, T, cfl=0.5)
    f = eq.fields(q)
    assert kinetic_energy((f["u"], f["v"])) == pytest.approx(e0 * np.exp(-2 * mu * T), rel=1e-12)


def test_hyperviscosity_damps_at_k_to_the_power_2p():
    g = grid2(32)
    y, x = g.mesh()
    omega = np.cos(4 * x)
    nu, T = 1e-3, 0.5
    eq = VorticityEquation(g, viscosity=nu, hyperviscosity_order=2)
    q, _ = eq.advance(eq.initial_state(omega), T, cfl=0.5)
    np.testing.assert_allclose(eq.fields(q)["vorticity"], omega * np.exp(-nu * 4**4 * T),
                               atol=1e-12)


def test_kolmogorov_flow_reaches_the_laminar_steady_state():
    # body force f_x = F sin(k y): the steady laminar solution is u = F sin(k y) / (nu k^2 + mu)
    # (Kolmogorov flow; Meshalkin & Sinai 1961), stable at this low Reynolds number
    g = grid2(32)
    y, x = g.mesh()
    nu, mu, F0, kf = 0.5, 0.2, 1.0, 2
    eq = VorticityEquation(g, viscosity=nu, drag=mu, forcing=Forcing("kolmogorov", kf, F0))
    q = eq.initial_state(np.zeros(g.shape))
    q, _ = eq.advance(q, 25.0 / (nu * kf**2 + mu), cfl=0.5, max_step=0.1)
    f = eq.fields(q)
    np.testing.assert_allclose(f["u"], F0 * np.sin(kf * y) / (nu * kf**2 + mu), atol=1e-6)
    np.testing.assert_allclose(f["v"], 0.0, atol=1e-9)


def test_shell_forcing_is_seeded_band_limited_and_grid_independent():
    f = Forcing("shell", 4.0, 0.7, seed=11)
    g64, g128 = grid2(64), grid2(128)
    F = fourier(g64)
    fh = f.vorticity_hat(g64)
    field = F.backward(fh)
    assert np.sqrt(np.mean(field**2)) == pytest.approx(0.7, rel=1e-12)
    assert abs(np.mean(field)) < 1e-14
    m = np.sqrt(F.modes[0] ** 2 + F.modes[1] ** 2)
    assert np.all(np.abs(fh[np.abs(m - 4.0) > 1.0 + 1e-9]) == 0)
    on_fine = fourier(g128).backward(f.vorticity_hat(g128))
    np.testing.assert_allclose(on_fine[::2, ::2], field, atol=1e-13)
    np.testing.assert_array_equal(Forcing("shell", 4.0, 0.7, seed=11).vorticity_hat(g64), fh)
    assert not np.allclose(Forcing("shell", 4.0, 0.7, seed=12).vorticity_hat(g64), fh)
    assert Forcing.from_attrs(f.to_attrs()) == f
    assert all(abs(math.hypot(a, b) - 4) <= 1 for a, b in shell_modes(4.0))


def test_forcing_errors_name_the_fix():
    with pytest.raises(UserError, match="choose one of"):
        Forcing("spiral")
    with pytest.raises(UserError, match="smaller forcing wavenumber"):
        Forcing("shell", 12.0, 1.0).vorticity_hat(grid2(32))
    with pytest.raises(UserError, match="whole number"):
        Forcing("kolmogorov", 2.5, 1.0).vorticity_hat(grid2(32))


def random_flow(g, seed=0):
    rng = np.random.default_rng(seed)
    uh = random_field_hat(g, lambda k: k**4 * np.exp(-2 * (k / 3) ** 2), rng, 2, True)
    u, v = fourier(g).backward(uh)
    return vorticity_from_velocity(u, v, g)


def test_inviscid_dealiased_flow_conserves_energy_and_enstrophy():
    # the truncated (Galerkin) 2-D Euler equations conserve energy and enstrophy exactly
    # (Kraichnan & Montgomery 1980, Rep. Prog. Phys. 43:547); only the RK4 error remains
    g = grid2(64)
    eq = VorticityEquation(g)
    q = eq.initial_state(random_flow(g))
    f0 = eq.fields(q)
    q, _ = eq.advance(q, 1.0, cfl=0.3)
    f1 = eq.fields(q)
    assert np.max(np.abs(f1["vorticity"] - f0["vorticity"])) > 0.1  # the flow did evolve
    e0, e1 = kinetic_energy((f0["u"], f0["v"])), kinetic_energy((f1["u"], f1["v"]))
    assert e1 == pytest.approx(e0, rel=1e-6)
    assert enstrophy(f1["vorticity"]) == pytest.approx(enstrophy(f0["vorticity"]), rel=1e-5)


def test_passive_scalar_mean_is_conserved():
    g = grid2(32)
    rng = np.random.default_rng(2)
    c0 = 3.0 + random_flow(g, seed=4) + 0.1 * rng.standard_normal(g.shape)
    for gradient in (0.0, 1.5):
        eq = VorticityEquation(g, viscosity=1e-3, scalar=True, diffusivity=1e-3,
                               scalar_gradient=gradient)
        q = eq.initial_state(random_flow(g, seed=1), c0)
        mean0 = np.mean(eq.fields(q)["c"])
        q, _ = eq.advance(q, 0.5, cfl=0.5)
        c1 = eq.fields(q)["c"]
        assert np.max(np.abs(c1 - eq.fields(eq.initial_state(random_flow(g, 1), c0))["c"])) > 1e-2
        assert np.mean(c1) == pytest.approx(mean0, abs=1e-12)


def test_subgrid_term_enters_the_vorticity_tendency():
    # a subgrid term S = -a omega is linear damping: the mode decays as exp(-a t)
    g = grid2(32)
    y, x = g.mesh()
    omega = np.cos(2 * x + 3 * y)
    eq = VorticityEquation(g, subgrid=lambda f: -0.4 * f["vorticity"])
    q, _ = eq.advance(eq.initial_state(omega), 1.0, cfl=0.5, max_step=0.01)
    np.testing.assert_allclose(eq.fields(q)["vorticity"], omega * np.exp(-0.4), atol=1e-9)


def test_advance_stops_when_asked():
    g = grid2(16)
    eq = VorticityEquation(g, viscosity=0.1)
    q = eq.initial_state(random_flow(g))
    seen = []
    _, n = eq.advance(q, 1.0, cfl=0.5, on_step=lambda q, t: seen.append(t) or len(seen) < 3)
    assert n == 3 and seen == pytest.approx([seen[0], 2 * seen[0], 3 * seen[0]])
    assert 1.0 / seen[0] == pytest.approx(round(1.0 / seen[0]))


def test_equation_rejects_bad_options():
    with pytest.raises(UserError, match="2-D"):
        VorticityEquation(Grid.regular((8, 8, 8), 1.0))
    with pytest.raises(UserError, match=">= 0"):
        VorticityEquation(grid2(16), viscosity=-1.0)
    with pytest.raises(UserError, match="hyperviscosity"):
        VorticityEquation(grid2(16), hyperviscosity_order=0)
