import numpy as np
import pytest

from closure.errors import UserError
from closure.grid import Grid


def test_regular_grid_spacing_lengths_and_coords():
    g = Grid.regular((8, 16), (2.0, 4.0))
    assert g.dims == ("y", "x")
    assert g.spacing == (0.25, 0.25)
    assert g.lengths == (2.0, 4.0)
    np.testing.assert_allclose(g.coords("x"), np.arange(16) * 0.25)
    y, x = g.mesh()
    assert y.shape == x.shape == (8, 16)
    assert Grid.regular((5,), 1.0).dims == ("x",)
    assert Grid.regular((2, 3, 4), 1.0).dims == ("z", "y", "x")


def test_wavenumbers_match_numpy_fftfreq():
    # reference: numpy.fft.fftfreq / rfftfreq (cycles per unit) times 2 pi
    g = Grid.regular((12, 10), (3.0, 5.0))
    np.testing.assert_allclose(g.wavenumbers("y"), 2 * np.pi * np.fft.fftfreq(12, 0.25))
    np.testing.assert_allclose(g.wavenumbers("x", real=True),
                               2 * np.pi * np.fft.rfftfreq(10, 0.5))


def test_dims_must_be_ordered_and_consistent():
    with pytest.raises(ValueError, match="ordered"):
        Grid(("x", "y"), (4, 4), (1.0, 1.0))
    with pytest.raises(ValueError, match="same length"):
        Grid(("y", "x"), (4,), (1.0, 1.0))
    with pytest.raises(UserError, match="not one of"):
        Grid.regular((4,), 1.0).axis("y")


def test_coarsen_keeps_origin_and_multiplies_spacing():
    g = Grid.regular((8, 12), (1.0, 1.5))
    c = g.coarsen(4)
    assert c.shape == (2, 3)
    assert c.spacing == (0.5, 0.5)
    np.testing.assert_allclose(c.coords("x"), g.coords("x")[::4])
    # non-periodic: every ratio-th point from 0, the last partial block kept
    n = Grid(("x",), (10,), (0.1,), (2.0,), periodic=False)
    np.testing.assert_allclose(n.coarsen(4).coords("x"), n.coords("x")[::4])


def test_coarsen_and_block_errors_say_what_to_change():
    g = Grid.regular((6, 8), 1.0)
    with pytest.raises(UserError, match="not a multiple of the ratio 4.*choose a ratio"):
        g.coarsen(4)
    with pytest.raises(UserError, match="fewer than the ratio 7.*smaller --ratio"):
        g.coarsen(7)
    with pytest.raises(UserError, match="block averaging needs whole blocks"):
        Grid(g.dims, g.shape, g.spacing, periodic=False).block(4)


def test_block_grid_sits_at_block_centres():
    g = Grid(("x",), (8,), (0.5,), (1.0,))
    b = g.block(4)
    # the centre of points 1.0, 1.5, 2.0, 2.5 is 1.75 (common practice: block-mean coordinate)
    np.testing.assert_allclose(b.coords("x"), [1.75, 3.75])
    assert b.spacing == (2.0,)


def test_dict_round_trip():
    g = Grid(("z", "y", "x"), (2, 3, 4), (0.1, 0.2, 0.3), (1.0, 2.0, 3.0), False, "km")
    assert Grid.from_dict(g.to_dict()) == g
