import numpy as np
import pytest

from closure import derivatives as D
from closure.derivatives import derivative, divergence, gradient, laplacian
from closure.errors import UserError
from closure.grid import Grid


def taylor_weights(offsets, order):
    """Finite-difference weights on ``offsets`` (in spacings) from the Taylor moment conditions
    sum_k w_k s_k^m / m! = delta(m, order), m = 0..len-1 (common practice; the same weights as
    Fornberg's 1988 recursion, Math. Comp. 51, 699-706)."""
    from math import factorial

    offsets = np.asarray(offsets, dtype=float)
    A = np.array([offsets**m / factorial(m) for m in range(len(offsets))])
    b = np.zeros(len(offsets))
    b[order] = 1.0
    return np.linalg.solve(A, b)


# --- stencils ---------------------------------------------------------------------------------

def test_central_stencils_are_fornberg_table_1():
    # Fornberg (1988), Table 1, centred differences on offsets -2..2
    np.testing.assert_allclose(D._CENTRAL[("fd4", 1)], [1 / 12, -2 / 3, 0, 2 / 3, -1 / 12],
                               atol=1e-15)
    np.testing.assert_allclose(D._CENTRAL[("fd4", 2)], [-1 / 12, 4 / 3, -5 / 2, 4 / 3, -1 / 12],
                               atol=1e-15)
    np.testing.assert_allclose(D._CENTRAL[("fd2", 1)][1:4], [-1 / 2, 0, 1 / 2], atol=1e-15)
    np.testing.assert_allclose(D._CENTRAL[("fd2", 2)][1:4], [1, -2, 1], atol=1e-15)
    for (scheme, order), w in D._CENTRAL.items():
        np.testing.assert_allclose(w, taylor_weights(range(-2, 3), order) if scheme == "fd4"
                                   else np.r_[0, taylor_weights(range(-1, 2), order), 0],
                                   atol=1e-13)


def test_edge_stencils_are_one_sided_fornberg_weights():
    # Fornberg (1988), Table 3 (forward differences): first derivative, 4th order
    # -25/12, 4, -3, 4/3, -1/4; second derivative, 4th order 15/4, -77/6, 107/6, -13, 61/12, -5/6;
    # 2nd order: -3/2, 2, -1/2 and 2, -5, 4, -1
    np.testing.assert_allclose(D._EDGE[("fd4", 1)][0], [-25 / 12, 4, -3, 4 / 3, -1 / 4])
    np.testing.assert_allclose(D._EDGE[("fd4", 2)][0], [15 / 4, -77 / 6, 107 / 6, -13, 61 / 12,
                                                        -5 / 6])
    np.testing.assert_allclose(D._EDGE[("fd2", 1)][0], [-3 / 2, 2, -1 / 2])
    np.testing.assert_allclose(D._EDGE[("fd2", 2)][0], [2, -5, 4, -1])
    # every row i acts on points 0..m-1, i.e. offsets -i..m-1-i, with Taylor weights there
    for (_scheme, order), rows in D._EDGE.items():
        for i, row in enumerate(rows):
            np.testing.assert_allclose(row, taylor_weights(np.arange(len(row)) - i, order),
                                       atol=1e-12)


@pytest.mark.parametrize("scheme,order,degree", [("fd2", 1, 2), ("fd2", 2, 3), ("fd4", 1, 4),
                                                 ("fd4", 2, 5)])
def test_non_periodic_stencils_exact_on_polynomials(scheme, order, degree):
    # a stencil of order p for the m-th derivative is exact on polynomials of degree p + m - 1
    g = Grid(("x",), (11,), (0.3,), (-1.0,), periodic=False)
    x = g.coords("x")
    f = (x + 0.5) ** degree
    exact = np.polyval(np.polyder(np.poly1d([1, 0.5]) ** degree, order), x)
    np.testing.assert_allclose(derivative(f, g, "x", order, scheme), exact, rtol=1e-10,
                               atol=1e-10)


# --- spectral ---------------------------------------------------------------------------------

def test_spectral_exact_on_band_limited_fields():
    g = Grid.regular((16, 24), (2 * np.pi, 3.0))
    y, x = g.mesh()
    kx = 2 * np.pi / 3.0
    f = np.sin(3 * y) * np.cos(5 * kx * x) + np.cos(7 * y)
    np.testing.assert_allclose(derivative(f, g, "x"), -5 * kx * np.sin(3 * y) * np.sin(5 * kx * x),
                               atol=1e-11)
    np.testing.assert_allclose(derivative(f, g, "y", 2),
                               -9 * np.sin(3 * y) * np.cos(5 * kx * x) - 49 * np.cos(7 * y),
                               atol=1e-10)
    np.testing.assert_allclose(derivative(f, g, "y", 3),
                               -27 * np.cos(3 * y) * np.cos(5 * kx * x) + 343 * np.sin(7 * y),
                               atol=1e-9)


def test_spectral_nyquist_mode():
    # cos(n x / 2) on n points alternates +-1. Its exact first derivative, -n/2 sin(n x / 2),
    # vanishes at every grid point, so dropping the Nyquist mode in odd derivatives is exact;
    # even derivatives keep it: d2/dx2 = -(n/2)^2 cos(n x / 2).
    n = 16
    g = Grid.regular((n,), 2 * np.pi)
    x = g.coords("x")
    f = np.cos(n / 2 * x)
    np.testing.assert_allclose(derivative(f, g, "x", 1), 0.0, atol=1e-12)
    np.testing.assert_allclose(derivative(f, g, "x", 2), -(n / 2) ** 2 * f, atol=1e-10)
    # odd length: no Nyquist mode, the highest mode differentiates exactly
    g7 = Grid.regular((7,), 2 * np.pi)
    x7 = g7.coords("x")
    np.testing.assert_allclose(derivative(np.sin(3 * x7), g7, "x"), 3 * np.cos(3 * x7),
                               atol=1e-12)


def test_stacks_are_differentiated_along_trailing_axes():
    g = Grid.regular((8, 12), 2 * np.pi)
    rng = np.random.default_rng(0)
    stack = rng.standard_normal((3, 2, 8, 12))
    for scheme in ("spectral", "fd2", "fd4"):
        out = derivative(stack, g, "y", 1, scheme)
        np.testing.assert_allclose(out[2, 1], derivative(stack[2, 1], g, "y", 1, scheme))


# --- finite-difference convergence ------------------------------------------------------------

def observed_orders(scheme, order, periodic):
    """Max-norm errors on refined grids and the observed orders log2(e_h / e_{h/2})."""
    errors = []
    for n in (16, 32, 64, 128):
        if periodic:
            g = Grid.regular((n,), 2 * np.pi)
        else:
            g = Grid(("x",), (n,), (1.0 / (n - 1),), (0.0,), periodic=False)
        x = g.coords("x")
        if periodic:
            f = np.exp(np.sin(x))
            d1 = np.cos(x) * f
            d2 = (np.cos(x) ** 2 - np.sin(x)) * f
        else:
            f = np.sin(3 * x) + np.exp(x)
            d1 = 3 * np.cos(3 * x) + np.exp(x)
            d2 = -9 * np.sin(3 * x) + np.exp(x)
        exact = d1 if order == 1 else d2
        errors.append(np.max(np.abs(derivative(f, g, "x", order, scheme) - exact)))
    errors = np.array(errors)
    return np.log2(errors[:-1] / errors[1:])


@pytest.mark.parametrize("periodic", [True, False])
@pytest.mark.parametrize("scheme,expected", [("fd2", 2), ("fd4", 4)])
@pytest.mark.parametrize("order", [1, 2])
def test_fd_convergence_orders(scheme, expected, order, periodic):
    # truncation error O(h^p) of a p-th order stencil (common practice: refinement study);
    # the non-periodic edges approach p from above, and a lower-order edge stencil would show
    # up as p - 1
    orders = observed_orders(scheme, order, periodic)
    assert expected - 0.25 < orders[-1] < expected + 0.45, orders


def test_spectral_converges_faster_than_any_fd():
    g = Grid.regular((32,), 2 * np.pi)
    x = g.coords("x")
    f = np.exp(np.sin(x))
    assert np.max(np.abs(derivative(f, g, "x") - np.cos(x) * f)) < 1e-12


# --- operators and errors ---------------------------------------------------------------------

def test_gradient_laplacian_divergence():
    g = Grid.regular((16, 16), 2 * np.pi)
    y, x = g.mesh()
    f = np.sin(x) * np.cos(2 * y)
    gr = gradient(f, g)
    np.testing.assert_allclose(gr["x"], np.cos(x) * np.cos(2 * y), atol=1e-12)
    np.testing.assert_allclose(gr["y"], -2 * np.sin(x) * np.sin(2 * y), atol=1e-12)
    np.testing.assert_allclose(laplacian(f, g), -5 * f, atol=1e-11)
    np.testing.assert_allclose(divergence(gr, g), -5 * f, atol=1e-11)


def test_scheme_errors_are_user_errors():
    g = Grid(("x",), (16,), (1.0,), periodic=False)
    with pytest.raises(UserError, match="choose one of spectral, fd2, fd4"):
        derivative(np.zeros(16), g, "x", 1, "fd6")
    with pytest.raises(UserError, match="need periodic data"):
        derivative(np.zeros(16), g, "x", 1, "spectral")
    short = Grid(("x",), (5,), (1.0,), periodic=False)
    with pytest.raises(UserError, match="at least 6 points"):
        derivative(np.zeros(5), short, "x", 2, "fd4")
    with pytest.raises(ValueError, match="grid shape"):
        derivative(np.zeros(4), g, "x", 1, "fd2")
