import numpy as np
import pytest
import scipy.stats
from sklearn.linear_model import ARDRegression, Lasso, LinearRegression

from closure.errors import OptionError, UserError
from closure.regression import (
    CrossValidation,
    Path,
    Problem,
    ard,
    blocked_folds,
    choose,
    collinearity,
    correlation_matrix,
    cross_validate,
    default_alphas,
    fit_closure,
    lasso_path_fit,
    lasso_raw,
    least_squares,
    standard_errors,
    threshold_path,
)
from closure.stats import SufficientStats

TRUE = np.array([1.0, 0.0, 5.0, 0.0, 0.3, 0.0])
SCALES = np.array([1.0, 10.0, 0.1, 3.0, 1.0, 2.0])
TERMS = tuple("abcdef")


def _problem_data(C=3, n=400, noise=0.5, seed=0, weights=(1.0, 2.0, 1.0)):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(C, n, TRUE.size)) * SCALES
    y = X @ TRUE + noise * rng.normal(size=(C, n))
    w = np.asarray(weights[:C], dtype=float)
    stats = SufficientStats.from_design(X, y, w, TERMS, [f"c{i}" for i in range(C)])
    return X.reshape(-1, TRUE.size), y.ravel(), np.repeat(w, n), stats


def test_threshold_path_equals_least_squares_on_each_support():
    # scikit-learn LinearRegression (no intercept, sample weights) on the stacked points
    Xs, ys, sw, stats = _problem_data()
    path = threshold_path(Problem.from_stats(stats))
    assert path.n_terms[0] == 6 and path.n_terms.min() <= 1
    seen = set()
    for coef, support in zip(path.coefficients, path.supports, strict=True):
        if not support.any() or tuple(support) in seen:
            continue
        seen.add(tuple(support))
        ref = LinearRegression(fit_intercept=False).fit(Xs[:, support], ys, sample_weight=sw)
        np.testing.assert_allclose(coef[support], ref.coef_, rtol=1e-8, atol=1e-12)
        np.testing.assert_array_equal(coef[~support], 0.0)
    assert (True, False, True, False, True, False) in seen  # the true support is on the path


def test_thresholds_act_on_standardised_coefficients():
    # rescaling a term (a change of units) leaves the path's supports unchanged
    Xs, ys, _, _ = _problem_data()
    k = 1e6
    scaled = SufficientStats.from_design(
        (Xs * np.array([k, 1, 1 / k, 1, 1, 1]))[None], ys[None], None, TERMS)
    unit = SufficientStats.from_design(Xs[None], ys[None], None, TERMS)
    a = threshold_path(Problem.from_stats(unit))
    b = threshold_path(Problem.from_stats(scaled), a.parameters)
    np.testing.assert_array_equal(a.supports, b.supports)
    assert a.n_terms[0] == 6 and a.n_terms[-1] == 1


def test_lasso_from_statistics_equals_sklearn_lasso_on_the_points():
    # scikit-learn Lasso, same alpha, same standardisation (columns and target divided by their
    # weighted root-mean-square), same sample weights, no intercept
    Xs, ys, sw, stats = _problem_data()
    P = Problem.from_stats(stats)
    alphas = default_alphas(P, 12)
    raw = lasso_raw(P, alphas)
    for a, coef in zip(alphas, raw, strict=True):
        ref = Lasso(alpha=a, fit_intercept=False, tol=1e-12, max_iter=100_000)
        ref.fit(Xs / P.scale, ys / P.y_scale, sample_weight=sw)
        np.testing.assert_allclose(coef * P.scale / P.y_scale, ref.coef_, rtol=0, atol=1e-8)
    assert not raw[0].any()  # alpha_max empties the model


def test_lasso_path_is_debiased_on_each_support():
    Xs, ys, sw, stats = _problem_data()
    path = lasso_path_fit(Problem.from_stats(stats))
    for coef, support in zip(path.coefficients, path.supports, strict=True):
        if support.any():
            ref = LinearRegression(fit_intercept=False).fit(Xs[:, support], ys, sample_weight=sw)
            np.testing.assert_allclose(coef[support], ref.coef_, rtol=1e-8)


def test_ard_from_statistics_equals_sklearn_ard_regression():
    # scikit-learn ARDRegression (no intercept) on the standardised stacked points; unit weights
    # because ARDRegression takes no sample weights. Both iterate the same updates, so with a
    # tight tolerance they stop at the same fixed point.
    Xs, ys, _, stats = _problem_data(weights=(1.0, 1.0, 1.0), noise=2.0)
    P = Problem.from_stats(stats)
    mine = ard(P, tol=1e-10)
    ref = ARDRegression(fit_intercept=False, tol=1e-10).fit(Xs / P.scale, ys / P.y_scale)
    np.testing.assert_allclose(mine.coefficients * P.scale / P.y_scale, ref.coef_, atol=1e-8)
    np.testing.assert_allclose(mine.noise_precision, ref.alpha_, rtol=1e-8)
    assert mine.support.tolist() == [True, False, True, False, True, False]


def test_standard_errors_equal_the_ols_closed_form():
    # scipy.stats.linregress: slope and intercept standard errors of y = a + b x
    rng = np.random.default_rng(1)
    x = rng.normal(size=200)
    y = 2.0 + 0.7 * x + rng.normal(scale=0.3, size=200)
    X = np.stack([np.ones_like(x), x], axis=1)
    stats = SufficientStats.from_design(X[None], y[None], None, ("one", "x"))
    P = Problem.from_stats(stats)
    coef = least_squares(P)
    se = standard_errors(P, coef, np.array([True, True]))
    ref = scipy.stats.linregress(x, y)
    np.testing.assert_allclose(coef, [ref.intercept, ref.slope], rtol=1e-10)
    np.testing.assert_allclose(se, [ref.intercept_stderr, ref.stderr], rtol=1e-8)


def test_collinearity_warning_names_both_terms():
    rng = np.random.default_rng(2)
    a = rng.normal(size=500)
    b = rng.normal(size=500)
    X = np.stack([a, b, 3.0 * a + 1e-4 * rng.normal(size=500)], axis=1)
    stats = SufficientStats.from_design(X[None], (a + b)[None], None, ("grad", "smag", "copy"))
    diag = collinearity(Problem.from_stats(stats))
    assert [(p[0], p[1]) for p in diag.pairs] == [("grad", "copy")]
    assert any("grad and copy" in w for w in diag.warnings)
    assert diag.condition_number > 1e8
    # an exact duplicate: infinite condition number; the later copy is dropped from the fit
    X2 = np.stack([a, b, a], axis=1)
    stats2 = SufficientStats.from_design(X2[None], (a + b)[None], None, ("p", "q", "p2"))
    P2 = Problem.from_stats(stats2)
    d2 = collinearity(P2)
    assert any("p and p2" in w for w in d2.warnings)
    np.testing.assert_allclose(least_squares(P2), [1.0, 1.0, 0.0], atol=1e-8)


def test_correlation_matrix_from_statistics_equals_numpy_corrcoef():
    Xs, ys, _, stats = _problem_data(C=1, weights=(1.0,))
    corr = correlation_matrix(Problem.from_stats(stats))
    np.testing.assert_allclose(corr, np.corrcoef(Xs.T), atol=1e-12)


def test_zero_term_is_reported_and_left_out():
    Xs, ys, _, _ = _problem_data(C=1, weights=(1.0,))
    Xs = Xs.copy()
    Xs[:, 3] = 0.0
    stats = SufficientStats.from_design(Xs[None], ys[None], None, TERMS)
    P = Problem.from_stats(stats)
    diag = collinearity(P)
    assert diag.zero_terms == ["d"]
    assert least_squares(P)[3] == 0.0


def test_blocked_folds_are_contiguous_and_never_mix_times():
    snaps = [10, 11, 12, 13, 14, 15, 16]
    folds = blocked_folds(snaps, 3)
    assert folds == [[10, 11, 12], [13, 14], [15, 16]]
    assert sorted(sum(folds, [])) == snaps
    for f in folds:
        pos = [snaps.index(i) for i in f]
        assert pos == list(range(pos[0], pos[0] + len(pos)))
    assert blocked_folds([4, 5], 5) == [[4], [5]]


def _snapshot_stats(n_snap=6, noise=0.5, seed=0):
    rng = np.random.default_rng(seed)
    out = {}
    for i in range(n_snap):
        X = rng.normal(size=(2, 300, 6)) * SCALES
        y = X @ TRUE + noise * rng.normal(size=(2, 300))
        out[i] = SufficientStats.from_design(X, y, [1.0, 2.0], TERMS, ("c0", "c1"), snapshot=i)
    return out


def test_cross_validation_holds_out_whole_snapshots():
    stats = _snapshot_stats()
    P = Problem.from_stats(SufficientStats.merge([stats[i] for i in range(6)]))
    path = threshold_path(P)
    cv = cross_validate(stats, list(range(6)), "threshold", path.parameters, n_folds=3)
    assert cv.folds == [[0, 1], [2, 3], [4, 5]]
    # fold 0 error by hand: fit on snapshots 2..5, relative squared error on 0 and 1
    fit_p = Problem.from_stats(SufficientStats.merge([stats[i] for i in (2, 3, 4, 5)]))
    val = Problem.from_stats(stats[0] + stats[1])
    c = threshold_path(fit_p, path.parameters).coefficients[5]
    np.testing.assert_allclose(cv.errors[0, 5], val.sse(c) / val.yy, rtol=1e-12)


def test_one_standard_error_rule_picks_the_sparsest_close_to_the_best():
    path = Path("threshold", np.arange(4.0), np.zeros((4, 2)),
                np.array([[1, 1], [1, 1], [1, 0], [0, 0]], dtype=bool))
    cv = CrossValidation([[0], [1]], np.array([[0.10, 0.09, 0.12, 0.9], [0.10, 0.09, 0.10, 0.9]]))
    assert choose(path, cv, "min") == 1
    # best 0.09 +- 0.0 (no spread) -> only index 1 qualifies
    assert choose(path, cv, "one_se") == 1
    # means 0.12, 0.09, 0.11, 0.9; the best (index 1) has standard error 0.04: indices 0-2
    # are within it and index 2 has the fewest terms
    cv2 = CrossValidation([[0], [1]], np.array([[0.12, 0.05, 0.12, 0.9], [0.12, 0.13, 0.10, 0.9]]))
    assert choose(path, cv2, "one_se") == 2
    with pytest.raises(OptionError, match="unknown selection rule"):
        choose(path, cv2, "best")


@pytest.mark.parametrize("method", ["threshold", "lasso", "ard"])
def test_fit_closure_recovers_a_sparse_truth(method):
    stats = _snapshot_stats()
    res = fit_closure(stats, list(range(6)), method, resamples=8, seed=1)
    if method == "ard":
        # ARD keeps terms whose evidence-optimal precision stays below its pruning threshold
        # (1e4 in standardised units, scikit-learn's default): a null term may survive with a
        # coefficient at the noise level, so only require the true terms and small extras
        assert {"a", "c", "e"} <= set(res.selected_terms)
    else:
        assert res.selected_terms == ["a", "c", "e"]
    np.testing.assert_allclose(res.coefficients, TRUE, atol=0.02 * np.abs(TRUE).max())
    np.testing.assert_array_equal(res.selection_frequency[[0, 2, 4]], 1.0)
    assert (res.standard_errors[res.support] > 0).all()
    assert (res.standard_errors[~res.support] == 0).all()
    d = res.to_dict()
    assert d["method"] == method and len(d["coefficients"]) == 6
    import json
    json.dumps(d)


def test_fit_closure_is_deterministic_for_a_seed():
    stats = _snapshot_stats(noise=5.0)
    a = fit_closure(stats, list(range(6)), "threshold", resamples=6, seed=3)
    b = fit_closure(dict(reversed(list(stats.items()))), list(range(6)), "threshold",
                    resamples=6, seed=3)
    np.testing.assert_array_equal(a.coefficients, b.coefficients)
    np.testing.assert_array_equal(a.selection_frequency, b.selection_frequency)


def test_transfer_weight_adds_the_transfer_rows_to_least_squares():
    # y rows and transfer rows t scaled by sqrt(mu), mu = L |y|^2 / |t|^2: ordinary least
    # squares on the stacked rows (scikit-learn LinearRegression)
    rng = np.random.default_rng(4)
    X = rng.normal(size=(1, 200, 3))
    y = X[0] @ [1.0, 2.0, 0.0] + rng.normal(size=200)
    T = rng.normal(size=(1, 100, 3))
    t = T[0] @ [1.5, 1.0, 0.5] + 0.1 * rng.normal(size=100)
    block = SufficientStats.from_design(T, t[None], None, ("a", "b", "c"), ("energy_transfer",))
    stats = SufficientStats.from_design(X, y[None], None, ("a", "b", "c"),
                                        extra={"energy_transfer": block})
    L = 0.7
    P = Problem.from_stats(stats, transfer_weight=L)
    mu = L * (y @ y) / (t @ t)
    rows = np.vstack([X[0], np.sqrt(mu) * T[0]])
    target = np.concatenate([y, np.sqrt(mu) * t])
    ref = LinearRegression(fit_intercept=False).fit(rows, target)
    np.testing.assert_allclose(least_squares(P), ref.coef_, rtol=1e-9)
    plain = SufficientStats.from_design(X, y[None], None, ("a", "b", "c"))
    with pytest.raises(UserError, match="set the transfer weight to 0"):
        Problem.from_stats(plain, transfer_weight=1.0)


def test_one_training_snapshot_warns_and_still_fits():
    stats = _snapshot_stats(n_snap=1)
    res = fit_closure(stats, [0], "threshold")
    assert any("only one training snapshot" in w for w in res.warnings)
    assert res.selected_terms == ["a", "c", "e"]


def test_unknown_method_is_a_clear_error():
    with pytest.raises(OptionError, match="choose one of threshold, lasso, ard"):
        fit_closure(_snapshot_stats(2), [0, 1], "magic")


def test_exactly_dependent_terms_resolve_to_the_sparse_solution():
    # the identity A A^T = S S - (S R - R S) - R R with S, R the symmetric and antisymmetric
    # parts of A (algebra): a target A A^T is fitted by the one term, not spread over four
    rng = np.random.default_rng(7)
    A = rng.normal(size=(400, 2, 2))
    S = 0.5 * (A + A.transpose(0, 2, 1))
    R = 0.5 * (A - A.transpose(0, 2, 1))
    tensors = {"gradient": A @ A.transpose(0, 2, 1), "ss": S @ S, "sr": S @ R - R @ S,
               "rr": R @ R, "s": S}
    keys = [(0, 0), (0, 1), (1, 1)]
    X = np.stack([np.stack([t[:, i, j] for t in tensors.values()], axis=1) for i, j in keys])
    y = np.stack([tensors["gradient"][:, i, j] for i, j in keys])
    y = y + 1e-3 * rng.normal(size=y.shape)
    stats = SufficientStats.from_design(X, y, [1.0, 2.0, 1.0], list(tensors))
    P = Problem.from_stats(stats)
    diag = collinearity(P)
    assert diag.condition_number > 1e12
    assert [sorted(g) for g in diag.dependent_groups] == [["gradient", "rr", "sr", "ss"]]
    assert any("gradient, ss, sr, rr are nearly linearly dependent" in w for w in diag.warnings)
    path = threshold_path(P)
    final = path.coefficients[path.n_terms == 1][0]
    np.testing.assert_allclose(final, [1.0, 0, 0, 0, 0], atol=1e-3)
    coef = least_squares(P)
    assert coef[0] == pytest.approx(1.0, abs=1e-3) and np.count_nonzero(coef[1:4]) <= 2
