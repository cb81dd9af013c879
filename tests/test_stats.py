import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from closure.errors import InputFileError, UserError
from closure.stats import SufficientStats

TERMS = ("a", "b", "c")
COMPONENTS = ("tau_xx", "tau_xy", "tau_yy")
WEIGHTS = np.array([1.0, 2.0, 1.0])


def _data(n, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(3, n, 3)) * np.array([1.0, 5.0, 0.2])
    y = X @ np.array([0.5, -1.0, 3.0]) + rng.normal(size=(3, n))
    return X, y


def test_from_design_matches_the_definitions():
    # the definitions themselves (weighted normal equations, common practice)
    X, y = _data(50)
    s = SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS, snapshot=3)
    for c in range(3):
        w = WEIGHTS[c]
        np.testing.assert_allclose(s.gram[c], w * np.einsum("ni,nj->ij", X[c], X[c]), rtol=1e-13)
        np.testing.assert_allclose(s.xy[c], w * np.einsum("ni,n->i", X[c], y[c]), rtol=1e-13)
        np.testing.assert_allclose(s.yy[c], w * np.sum(y[c] ** 2), rtol=1e-13)
        np.testing.assert_allclose(s.x_sum[c], w * X[c].sum(0), rtol=1e-13)
        np.testing.assert_allclose(s.y_sum[c], w * y[c].sum(), rtol=1e-13)
    np.testing.assert_array_equal(s.weight_sum, 50 * WEIGHTS)
    np.testing.assert_array_equal(s.count, [50, 50, 50])
    assert s.snapshots == (3,)
    assert s.gram.dtype == np.float64 and np.array_equal(s.gram, s.gram.transpose(0, 2, 1))


@settings(max_examples=30, deadline=None)
@given(cuts=st.lists(st.integers(1, 59), max_size=6, unique=True), seed=st.integers(0, 2**16),
       order_seed=st.integers(0, 2**16))
def test_merge_in_any_order_equals_stats_of_concatenated_data(cuts, seed, order_seed):
    X, y = _data(60, seed)
    whole = SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS)
    edges = [0, *sorted(cuts), 60]
    parts = [SufficientStats.from_design(X[:, a:b], y[:, a:b], WEIGHTS, TERMS, COMPONENTS)
             for a, b in zip(edges[:-1], edges[1:], strict=True)]
    np.random.default_rng(order_seed).shuffle(parts)
    total = sum(parts)
    assert total.equals(whole, rtol=1e-12, atol=1e-10)
    assert total.count.tolist() == [60, 60, 60]


def test_merge_is_bit_identical_whatever_order_the_parts_come_in():
    parts = {}
    for i in range(7):
        X, y = _data(20, seed=i)
        parts[i] = SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS, snapshot=i)
    a = SufficientStats.merge(parts)
    b = SufficientStats.merge([parts[i] for i in (6, 2, 0, 5, 1, 4, 3)])
    assert a.equals(b)  # exact
    assert a.snapshots == tuple(range(7))


def test_a_snapshot_counted_twice_is_refused():
    X, y = _data(5)
    s = SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS, snapshot=1)
    with pytest.raises(ValueError, match="counted twice"):
        s + s


def test_stats_of_different_terms_do_not_add():
    X, y = _data(5)
    s = SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS)
    t = SufficientStats.from_design(X, y, WEIGHTS, ("a", "b", "d"), COMPONENTS)
    with pytest.raises(ValueError, match="different terms"):
        s + t


def _with_extra():
    X, y = _data(30)
    rng = np.random.default_rng(5)
    T = rng.normal(size=(1, 30, 3))
    extra = SufficientStats.from_design(T, rng.normal(size=(1, 30)), None, TERMS,
                                        ("energy_transfer",))
    return SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS, snapshot=4,
                                       extra={"energy_transfer": extra})


def test_save_load_is_lossless(tmp_path):
    s = _with_extra()
    path = s.save(tmp_path / "sub" / "s.npz")
    back = SufficientStats.load(path)
    assert back.equals(s)  # bit-exact, extra blocks and names included
    assert back.terms == TERMS and back.components == COMPONENTS
    assert list(back.extra) == ["energy_transfer"]
    assert not list(tmp_path.glob("sub/.*tmp"))  # the temporary file was renamed away


def test_plain_dict_round_trip_through_json_is_lossless():
    s = _with_extra()
    back = SufficientStats.from_dict(json.loads(json.dumps(s.to_dict())))
    assert back.equals(s)


def test_load_rejects_other_files_with_a_clear_message(tmp_path):
    bad = tmp_path / "x.npz"
    np.savez(bad, a=np.zeros(2))
    with pytest.raises(InputFileError, match="cannot read statistics file"):
        SufficientStats.load(bad)
    with pytest.raises(InputFileError, match="not a closure.stats document"):
        SufficientStats.from_dict({"format": "other"})


def test_non_finite_terms_are_named():
    X, y = _data(10)
    X[1, 3, 2] = np.inf
    with pytest.raises(UserError, match="library terms c give non-finite"):
        SufficientStats.from_design(X, y, WEIGHTS, TERMS, COMPONENTS)


def test_select_and_combined_and_component():
    s = _with_extra()
    sub = s.select(["c", "a"])
    assert sub.terms == ("c", "a")
    np.testing.assert_array_equal(sub.gram[1], s.gram[1][np.ix_([2, 0], [2, 0])])
    assert sub.extra["energy_transfer"].terms == ("c", "a")
    comb = s.combined()
    np.testing.assert_allclose(comb.gram[0], s.gram.sum(0))
    assert comb.weight_sum[0] == s.weight_sum.sum()
    one = s.component("tau_xy")
    np.testing.assert_array_equal(one.xy[0], s.xy[1])
    with pytest.raises(UserError, match="not in these statistics"):
        s.select(["zz"])


def test_zeros_is_the_identity():
    s = _with_extra()
    z = SufficientStats.zeros(TERMS, COMPONENTS)
    z.extra = {}
    t = SufficientStats.from_design(*_data(4), WEIGHTS, TERMS, COMPONENTS)
    assert (z + t).equals(t)
    assert s.n_terms == 3 and s.n_components == 3


def test_point_weights_equal_repeated_and_dropped_rows():
    # the definition: integer point weights count a row that many times (0: not at all),
    # checked against numpy on the rows written out
    rng = np.random.default_rng(4)
    X = rng.standard_normal((2, 50, 3))
    y = rng.standard_normal((2, 50))
    pw = rng.integers(0, 3, 50)
    X[:, pw == 0] = np.nan  # excluded points are never read
    s = SufficientStats.from_design(X, y, [1.0, 2.0], point_weights=pw)
    rows = np.repeat(np.arange(50), pw)
    ref = SufficientStats.from_design(X[:, rows], y[:, rows], [1.0, 2.0])
    for name in ("gram", "xy", "yy", "x_sum", "y_sum", "weight_sum"):
        np.testing.assert_allclose(getattr(s, name), getattr(ref, name), rtol=1e-12)
    np.testing.assert_array_equal(s.count, [(pw > 0).sum()] * 2)
    # additive: two halves with their own weights sum to the whole
    a = SufficientStats.from_design(X[:, :20], y[:, :20], point_weights=pw[:20], snapshot=0)
    b = SufficientStats.from_design(X[:, 20:], y[:, 20:], point_weights=pw[20:], snapshot=1)
    whole = SufficientStats.from_design(X, y, point_weights=pw)
    np.testing.assert_allclose((a + b).gram, whole.gram, rtol=1e-12)
    assert (a + b).count[0] == whole.count[0]
    # all-ones weights are no weights, bit for bit
    X = rng.standard_normal((1, 30, 2))
    y = rng.standard_normal((1, 30))
    assert SufficientStats.from_design(X, y, point_weights=np.ones(30, bool)).equals(
        SufficientStats.from_design(X, y))
