"""Sparse fits of closure coefficients from sufficient statistics only.

Every routine here works on the normal equations (G, b, y^T y, weight sum) of a weighted
least-squares problem, never on the points, so fits cost O(p^3) whatever the data size.

Methods (``spec.fit.method``):

``threshold``  sequentially thresholded least squares (Brunton, Proctor & Kutz 2016, PNAS
               113:3932): least squares, drop terms whose standardised coefficient is below a
               threshold, refit, repeat; over a path of thresholds.
``lasso``      the L1-penalised path (Tibshirani 1996) solved by scikit-learn's coordinate
               descent on the precomputed Gram matrix, then least squares on each support
               (the "debiased" or relaxed lasso).
``ard``        automatic relevance determination: a Gaussian prior of its own precision per
               coefficient, precisions and noise level set by maximising the evidence
               (MacKay 1992, Neural Computation 4:415; Tipping 2001, JMLR 1:211), with the
               same updates and defaults as scikit-learn's ARDRegression, written on G and b.

Coefficients are standardised for thresholds and penalties: ``beta_k = coef_k s_k / s_y`` with
``s_k`` the root-mean-square of term k and ``s_y`` that of the target over the training data,
so one threshold path fits all units and filter widths (there is no intercept: a closure has
no constant term, so the scales are root-mean-squares, not standard deviations).

Model selection uses held-out snapshots: the training snapshots are split into contiguous
blocks in time (never random points: neighbouring points and consecutive snapshots are
correlated), each block is predicted by a fit on the others, and the path point chosen is the
sparsest whose mean held-out error is within one standard error of the best (the
"one-standard-error rule", Hastie, Tibshirani & Friedman 2009, section 7.10), or the best
(``rule="min"``).
"""

from __future__ import annotations

import warnings as _warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg

from closure.errors import OptionError, UserError
from closure.stats import SufficientStats

METHODS = ("threshold", "lasso", "ard")
RULES = ("one_se", "min")
#: Pairs of terms with |correlation| above this on the training data are reported.
CORRELATION_LIMIT = 0.99
#: Condition number of the standardised Gram above which the fit is reported ill-posed
#: (least squares then loses about log10 of it in digits; common practice).
CONDITION_LIMIT = 1e8


# ---------------------------------------------------------------------- the problem
@dataclass(frozen=True)
class Problem:
    """Normal equations of one weighted least-squares problem ``y ~ X @ coef``.

    ``gram`` (p, p) = X^T W X, ``xy`` (p,) = X^T W y, ``yy`` = y^T W y, ``weight`` = sum of
    weights, ``x_sum`` (p,) and ``y_sum`` weighted sums (for centred quantities).
    """

    terms: tuple[str, ...]
    gram: np.ndarray
    xy: np.ndarray
    yy: float
    weight: float
    x_sum: np.ndarray
    y_sum: float

    @classmethod
    def from_stats(cls, stats: SufficientStats, transfer_weight: float = 0.0) -> Problem:
        """The shared-coefficient problem over all components of ``stats``.

        With ``transfer_weight`` L > 0 the rows of every extra block (the transfers) are
        appended, scaled so that their squared norm is L times the target's: the fit then
        minimises ``|y - X c|^2 / |y|^2 + L |t - T c|^2 / |t|^2`` (still linear).
        """
        s = stats.combined()
        G, b, yy = s.gram[0].copy(), s.xy[0].copy(), float(s.yy[0])
        if transfer_weight < 0:
            raise OptionError(f"fit.transfer_weight must be >= 0, got {transfer_weight}")
        if transfer_weight > 0:
            if not stats.extra:
                raise UserError("fit.transfer_weight > 0 needs transfer statistics, which this "
                                "target has none of: set the transfer weight to 0")
            yy0 = yy
            for block in stats.extra.values():
                t = block.combined()
                if t.yy[0] > 0:
                    mu = transfer_weight * yy0 / float(t.yy[0])
                    G += mu * t.gram[0]
                    b += mu * t.xy[0]
                    yy += mu * float(t.yy[0])
        return cls(stats.terms, G, b, yy, float(s.weight_sum[0]), s.x_sum[0].copy(),
                   float(s.y_sum[0]))

    @property
    def n_terms(self) -> int:
        return len(self.terms)

    @property
    def active(self) -> np.ndarray:
        """Terms that are not identically zero on this data (bool, (p,))."""
        d = np.diag(self.gram)
        return d > 1e-300 + 1e-28 * max(float(d.max(initial=0.0)), 0.0)

    @property
    def scale(self) -> np.ndarray:
        """Root-mean-square of each term (1 for a zero term), (p,)."""
        s = np.sqrt(np.clip(np.diag(self.gram), 0.0, None) / self.weight)
        return np.where(self.active, s, 1.0)

    @property
    def y_scale(self) -> float:
        """Root-mean-square of the target (1 when it is zero)."""
        s = float(np.sqrt(max(self.yy, 0.0) / self.weight)) if self.weight > 0 else 0.0
        return s if s > 0 else 1.0

    def sse(self, coef: np.ndarray) -> float:
        """Weighted sum of squared residuals of ``coef`` (clipped at 0 against round-off)."""
        coef = np.asarray(coef, dtype=float)
        return max(self.yy - 2.0 * coef @ self.xy + coef @ self.gram @ coef, 0.0)

    def standardised(self) -> tuple[np.ndarray, np.ndarray, float]:
        """(G_s, b_s, yy_s) of the problem in standardised coefficients beta = coef s / s_y."""
        s, sy = self.scale, self.y_scale
        return self.gram / np.outer(s, s), self.xy / (s * sy), self.yy / sy**2


#: Terms whose standardised Gram has an eigenvalue below this fraction of the largest are
#: treated as exactly dependent on the data (round-off level, not mere ill-conditioning).
DEPENDENT = 1e-10


def least_squares(problem: Problem, support: np.ndarray | None = None) -> np.ndarray:
    """Least-squares coefficients on ``support`` (bool (p,), default all active), zero off it.

    Solved on the standardised normal equations by Cholesky. When terms of the support are
    exactly dependent on this data (an identity such as A A^T = S S - S R + R S - R R, or a
    duplicated term) the solution is not unique: terms taking part in a dependency are then
    dropped one at a time, the last in library order first, until the rest are independent
    (so the earlier, preferred, term of a library is kept; the collinearity diagnostics name
    the dependent terms).
    """
    support = problem.active if support is None else np.asarray(support, bool) & problem.active
    coef = np.zeros(problem.n_terms)
    idx = list(np.flatnonzero(support))
    while idx:
        A = problem.gram[np.ix_(idx, idx)]
        d = np.sqrt(np.diag(A))
        A = A / np.outer(d, d)
        r = problem.xy[idx] / d
        w, V = np.linalg.eigh(A)
        null = w <= DEPENDENT * w.max()
        if not null.any():
            try:
                c = scipy.linalg.solve(A, r, assume_a="pos")
            except np.linalg.LinAlgError:
                c = V @ ((V.T @ r) / w)
            coef[idx] = c / d
            return coef
        taking_part = np.flatnonzero(np.linalg.norm(V[:, null], axis=1) > 1e-6)
        idx.pop(int(taking_part[-1]))
    return coef


# ---------------------------------------------------------------------- paths
@dataclass
class Path:
    """Fits along a path of one parameter (threshold or penalty), largest model first.

    ``coefficients`` (m, p) are the reported coefficients (least squares on each support);
    ``raw`` (m, p) are the penalised lasso coefficients (None for other methods).
    """

    method: str
    parameters: np.ndarray
    coefficients: np.ndarray
    supports: np.ndarray
    raw: np.ndarray | None = None

    @property
    def n_terms(self) -> np.ndarray:
        return self.supports.sum(axis=1)


def default_thresholds(problem: Problem, n: int = 40) -> np.ndarray:
    """0, then ``n - 1`` thresholds spaced geometrically from 1e-4 of the largest standardised
    least-squares coefficient up to just below it (not at it: a threshold equal to a
    coefficient would make the support depend on round-off)."""
    beta = np.abs(least_squares(problem) * problem.scale / problem.y_scale)
    m = float(beta.max(initial=0.0))
    if m == 0.0:
        return np.zeros(1)
    return np.concatenate([[0.0], np.geomspace(1e-4 * m, 0.999 * m, n - 1)])


def threshold_path(problem: Problem, thresholds: Sequence[float] | None = None,
                   max_iter: int = 50) -> Path:
    """Sequentially thresholded least squares at each threshold (standardised units)."""
    thresholds = (default_thresholds(problem) if thresholds is None
                  else np.asarray(thresholds, dtype=float))
    scale = problem.scale / problem.y_scale
    coefs, supports = [], []
    for lam in thresholds:
        support = problem.active.copy()
        coef = least_squares(problem, support)
        for _ in range(max_iter):
            keep = support & (np.abs(coef * scale) >= lam)
            if np.array_equal(keep, support):
                break
            support = keep
            coef = least_squares(problem, support)
        coefs.append(coef)
        supports.append(support & (coef != 0))
    return Path("threshold", thresholds, np.array(coefs), np.array(supports))


def _augmented(Gs: np.ndarray, bs: np.ndarray, yys: float) -> tuple[np.ndarray, np.ndarray]:
    """A small (k+1, p) design and target with exactly the given Gram, X^T y and y^T y
    (k = rank of G), so scikit-learn's solvers can run on statistics alone."""
    w, V = np.linalg.eigh(Gs)
    keep = w > 1e-13 * max(float(w.max(initial=0.0)), 0.0)
    R = np.sqrt(w[keep])[:, None] * V[:, keep].T
    z = (V[:, keep].T @ bs) / np.sqrt(w[keep])
    rest = max(yys - float(z @ z), 0.0)
    X = np.vstack([R, np.zeros((1, Gs.shape[0]))])
    y = np.append(z, np.sqrt(rest))
    return X, y


def default_alphas(problem: Problem, n: int = 50, ratio: float = 1e-4) -> np.ndarray:
    """Penalties from the smallest that empties the model down by ``ratio``, geometric."""
    _, bs, _ = problem.standardised()
    a_max = float(np.abs(bs).max(initial=0.0)) / problem.weight
    if a_max == 0.0:
        return np.ones(1)
    return np.geomspace(a_max, a_max * ratio, n)


def lasso_raw(problem: Problem, alphas: Sequence[float], tol: float = 1e-10,
              max_iter: int = 100_000) -> np.ndarray:
    """Lasso coefficients (len(alphas), p) in the problem's own units.

    Minimises ``(1 / (2 W)) |y_s - X_s beta|^2_W + alpha |beta|_1`` over standardised
    coefficients beta (W = weight sum; the scikit-learn objective with sample weights), by
    scikit-learn's coordinate descent on the precomputed Gram.
    """
    from sklearn.linear_model import lasso_path

    alphas = np.asarray(alphas, dtype=float)
    Gs, bs, yys = problem.standardised()
    act = problem.active
    out = np.zeros((alphas.size, problem.n_terms))
    if not act.any():
        return out
    Ga, ba = np.ascontiguousarray(Gs[np.ix_(act, act)]), np.ascontiguousarray(bs[act])
    Xa, ya = _augmented(Ga, ba, yys)
    # scikit-learn divides the squared error by its number of rows: rescale the penalty so the
    # objective is the one above, whose rows are the W weighted points.
    n_rows = Xa.shape[0]
    order = np.argsort(-alphas, kind="stable")
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", category=UserWarning)
        from sklearn.exceptions import ConvergenceWarning
        _warnings.simplefilter("ignore", category=ConvergenceWarning)
        _, coefs, _ = lasso_path(Xa, ya, alphas=alphas[order] * problem.weight / n_rows,
                                 precompute=Ga, Xy=ba, tol=tol, max_iter=max_iter)
    beta = np.zeros((alphas.size, act.sum()))
    beta[order] = coefs.T
    out[:, act] = beta * problem.y_scale / problem.scale[act]
    return out


def lasso_path_fit(problem: Problem, alphas: Sequence[float] | None = None,
                   tol: float = 1e-10) -> Path:
    """The lasso path, then least squares on each path point's support."""
    alphas = default_alphas(problem) if alphas is None else np.asarray(alphas, dtype=float)
    raw = lasso_raw(problem, alphas, tol=tol)
    coefs = np.array([least_squares(problem, s) for s in raw != 0])
    return Path("lasso", alphas, coefs, (raw != 0) & (coefs != 0), raw)


@dataclass
class ArdResult:
    """An ARD fit: coefficients (p,), support, posterior covariance on the support (dimensional),
    noise precision and coefficient precisions (standardised units), iterations used."""

    coefficients: np.ndarray
    support: np.ndarray
    covariance: np.ndarray
    noise_precision: float
    precisions: np.ndarray
    n_iter: int


def ard(problem: Problem, *, threshold_lambda: float = 1e4, max_iter: int = 300,
        tol: float = 1e-3, alpha_1: float = 1e-6, alpha_2: float = 1e-6,
        lambda_1: float = 1e-6, lambda_2: float = 1e-6) -> ArdResult:
    """Automatic relevance determination on standardised statistics.

    The evidence updates of MacKay (1992) with Gamma hyper-priors, iterated as in
    scikit-learn's ARDRegression (same defaults, no intercept); terms whose precision exceeds
    ``threshold_lambda`` (standardised coefficient below about 1/sqrt(threshold_lambda)) are
    pruned. The number of observations is the weight sum W.
    """
    Gs, bs, yys = problem.standardised()
    p, N = problem.n_terms, problem.weight
    ys = problem.y_sum / problem.y_scale
    var_y = max(yys / N - (ys / N) ** 2, 0.0)
    eps = np.finfo(np.float64).eps
    alpha = 1.0 / (var_y + eps)
    lam = np.ones(p)
    keep = problem.active.copy()
    lam[~keep] = np.inf
    coef = np.zeros(p)
    coef_old = None
    sigma = np.zeros((0, 0))

    def update(keep, alpha, lam):
        sig = scipy.linalg.pinvh(np.diag(lam[keep]) + alpha * Gs[np.ix_(keep, keep)])
        c = np.zeros(p)
        c[keep] = alpha * (sig @ bs[keep])
        return sig, c

    n_iter = 0
    for it in range(max_iter):
        n_iter = it + 1
        sigma, new = update(keep, alpha, lam)
        coef[keep] = new[keep]
        sse = max(yys - 2.0 * coef @ bs + coef @ Gs @ coef, eps * yys)
        gamma = 1.0 - lam[keep] * np.diag(sigma)
        lam[keep] = (gamma + 2.0 * lambda_1) / (coef[keep] ** 2 + 2.0 * lambda_2)
        alpha = (N - gamma.sum() + 2.0 * alpha_1) / (sse + 2.0 * alpha_2)
        keep = lam < threshold_lambda
        coef[~keep] = 0.0
        if it > 0 and np.sum(np.abs(coef_old - coef)) < tol:
            break
        coef_old = coef.copy()
        if not keep.any():
            break
    if keep.any():
        sigma, new = update(keep, alpha, lam)
        coef = new
    else:
        sigma = np.zeros((0, 0))
    scale = problem.y_scale / problem.scale
    s_keep = scale[keep]
    return ArdResult(coef * scale, keep.copy(), sigma * np.outer(s_keep, s_keep), float(alpha),
                     lam.copy(), n_iter)


def fit_path(problem: Problem, method: str, parameters: Sequence[float] | None = None) -> Path:
    """The path of ``method`` on ``problem`` (ARD: a path of one point, parameter 0)."""
    if method == "threshold":
        return threshold_path(problem, parameters)
    if method == "lasso":
        return lasso_path_fit(problem, parameters)
    if method == "ard":
        r = ard(problem)
        return Path("ard", np.zeros(1), r.coefficients[None], r.support[None] &
                    (r.coefficients[None] != 0))
    raise OptionError(f"unknown fit method {method!r}: choose one of {', '.join(METHODS)}")


# ---------------------------------------------------------------------- uncertainty
def standard_errors(problem: Problem, coef: np.ndarray, support: np.ndarray) -> np.ndarray:
    """Ordinary least-squares standard errors on the support, 0 off it, (p,).

    ``sigma^2 (X_S^T W X_S)^-1`` with ``sigma^2 = SSE / (W - k)``: the classical formula, which
    treats every point as independent. Neighbouring grid points are correlated, so the
    effective sample size is smaller than W and these errors are optimistic; the selection
    frequency over snapshot resamples is the more honest measure of robustness.
    """
    support = np.asarray(support, bool)
    out = np.zeros(problem.n_terms)
    idx = np.flatnonzero(support)
    dof = problem.weight - idx.size
    if idx.size == 0 or dof <= 0:
        return out
    sigma2 = problem.sse(coef) / dof
    cov = scipy.linalg.pinvh(problem.gram[np.ix_(idx, idx)])
    out[idx] = np.sqrt(np.clip(np.diag(cov), 0.0, None) * sigma2)
    return out


# ---------------------------------------------------------------------- diagnostics
@dataclass
class Collinearity:
    """Condition number of the standardised Gram, nearly dependent pairs, groups of terms
    spanning a near-null direction of it (eigenvalue below largest / cond_limit), warnings."""

    condition_number: float
    pairs: list[tuple[str, str, float]]
    zero_terms: list[str]
    warnings: list[str]
    dependent_groups: list[list[str]] = field(default_factory=list)


def correlation_matrix(problem: Problem) -> np.ndarray:
    """Pearson correlation between terms over the weighted points, from G and the sums
    (NaN where a term is constant)."""
    W = problem.weight
    m = problem.x_sum / W
    cov = problem.gram / W - np.outer(m, m)
    var = np.diag(cov).copy()
    scale2 = np.diag(problem.gram) / W
    constant = var <= 1e-12 * np.maximum(scale2, 1e-300)
    sd = np.sqrt(np.where(constant, np.nan, var))
    return cov / np.outer(sd, sd)


def collinearity(problem: Problem, corr_limit: float = CORRELATION_LIMIT,
                 cond_limit: float = CONDITION_LIMIT) -> Collinearity:
    """Warn, naming the terms, when candidates are nearly dependent on this data."""
    terms = problem.terms
    act = problem.active
    zero = [t for t, a in zip(terms, act, strict=True) if not a]
    out = [f"term {t} is zero everywhere on the training data; it cannot be fitted"
           for t in zero]
    Gs, _, _ = problem.standardised()
    Ga = Gs[np.ix_(act, act)]
    groups: list[list[str]] = []
    if Ga.size:
        w, V = np.linalg.eigh(Ga)
        cond = float(w.max() / w.min()) if w.min() > 0 else float("inf")
        names = [t for t, a in zip(terms, act, strict=True) if a]
        for k in np.flatnonzero(w <= w.max() / cond_limit):
            v = V[:, k]
            groups.append([names[i] for i in np.flatnonzero(np.abs(v) > 0.1 * np.abs(v).max())])
    else:
        cond = float("nan")
    corr = correlation_matrix(problem)
    # uncentred cosine as well: catches proportional terms with a mean (e.g. c*T and T)
    cos = Gs / problem.weight  # unit diagonal
    pairs = []
    for i in range(len(terms)):
        for j in range(i + 1, len(terms)):
            if not (act[i] and act[j]):
                continue
            r = corr[i, j] if np.isfinite(corr[i, j]) else cos[i, j]
            if abs(r) > corr_limit or abs(cos[i, j]) > 1 - 1e-10:
                pairs.append((terms[i], terms[j], float(r)))
    for a, b, r in pairs:
        out.append(f"terms {a} and {b} are nearly collinear on this data (correlation {r:.4f}); "
                   "their coefficients are not separately determined: drop one of them")
    for g in groups:
        if len(g) > 2 or not any({a, b} == set(g) for a, b, _ in pairs):
            out.append(f"terms {', '.join(g)} are nearly linearly dependent on this data: a "
                       "combination of them is (almost) zero, so their coefficients trade off")
    if cond > cond_limit:
        out.append(f"the standardised Gram matrix has condition number {cond:.3g} "
                   f"(> {cond_limit:.0e}): the library is nearly dependent on this data and "
                   "coefficients may be unstable")
    return Collinearity(cond, pairs, zero, out, groups)


# ---------------------------------------------------------------------- selection
def blocked_folds(snapshots: Sequence[int], n_folds: int) -> list[list[int]]:
    """Split snapshots (in time order) into ``min(n_folds, len)`` contiguous blocks."""
    snapshots = list(snapshots)
    k = min(int(n_folds), len(snapshots))
    if k < 1:
        return []
    return [list(b) for b in np.array_split(np.array(snapshots, dtype=int), k)]


@dataclass
class CrossValidation:
    """Held-out relative squared error per fold and path point: ``errors`` (folds, m)."""

    folds: list[list[int]]
    errors: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        return self.errors.mean(axis=0)

    @property
    def standard_error(self) -> np.ndarray:
        k = self.errors.shape[0]
        if k < 2:
            return np.zeros(self.errors.shape[1])
        return self.errors.std(axis=0, ddof=1) / np.sqrt(k)


def _sum(stats: Mapping[int, SufficientStats], indices) -> SufficientStats:
    return SufficientStats.merge([stats[i] for i in sorted(indices)])


def cross_validate(stats: Mapping[int, SufficientStats], train: Sequence[int], method: str,
                   parameters: np.ndarray, n_folds: int = 5,
                   transfer_weight: float = 0.0) -> CrossValidation:
    """Blocked cross-validation over the training snapshots along a fixed parameter path.

    The error of a fold is the held-out relative squared error of the target,
    ``|y - X c|^2_W / |y|^2_W`` on that fold.
    """
    folds = blocked_folds(train, n_folds)
    errors = []
    for fold in folds:
        held = set(fold)
        rest = [i for i in train if i not in held]
        fit_p = Problem.from_stats(_sum(stats, rest), transfer_weight)
        val = Problem.from_stats(_sum(stats, fold))
        path = fit_path(fit_p, method, parameters)
        denom = val.yy if val.yy > 0 else 1.0
        errors.append([val.sse(c) / denom for c in path.coefficients])
    return CrossValidation(folds, np.array(errors))


def choose(path: Path, cv: CrossValidation, rule: str = "one_se") -> int:
    """Index of the chosen path point: ``min`` (best mean held-out error) or ``one_se`` (the
    fewest terms with mean error within one standard error of the best; ties: lower error)."""
    if rule not in RULES:
        raise OptionError(f"unknown selection rule {rule!r}: choose one of {', '.join(RULES)}")
    mean, se = cv.mean, cv.standard_error
    best = int(np.argmin(mean))
    if rule == "min":
        return best
    ok = np.flatnonzero(mean <= mean[best] + se[best])
    n_terms = path.n_terms
    return int(min(ok, key=lambda i: (n_terms[i], mean[i], i)))


def _bic_choice(problem: Problem, path: Path) -> int:
    """Path point of least ``W log(SSE / W) + k log W`` (Schwarz 1978) on the training data."""
    W = problem.weight
    floor = 1e-300 + 1e-16 * problem.yy
    bic = [W * np.log(max(problem.sse(c), floor) / W) + k * np.log(W)
           for c, k in zip(path.coefficients, path.n_terms, strict=True)]
    return int(np.argmin(bic))


@dataclass
class FitResult:
    """The chosen fit with its selection record and diagnostics (coefficients in design units)."""

    method: str
    terms: tuple[str, ...]
    coefficients: np.ndarray
    support: np.ndarray
    parameter: float
    standard_errors: np.ndarray
    selection_frequency: np.ndarray | None
    path: Path
    cv: CrossValidation | None
    rule: str
    collinearity: Collinearity
    transfer_weight: float = 0.0
    train: list[int] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def selected_terms(self) -> list[str]:
        return [t for t, s in zip(self.terms, self.support, strict=True) if s]

    def to_dict(self) -> dict:
        """Plain JSON-able record of the fit and its selection."""
        def fl(a):
            return [float(x) for x in np.asarray(a).ravel()]
        d = {
            "method": self.method,
            "rule": self.rule,
            "terms": list(self.terms),
            "coefficients": fl(self.coefficients),
            "support": [bool(s) for s in self.support],
            "parameter": float(self.parameter),
            "standard_errors": fl(self.standard_errors),
            "selection_frequency": (None if self.selection_frequency is None
                                    else fl(self.selection_frequency)),
            "transfer_weight": float(self.transfer_weight),
            "train_snapshots": [int(i) for i in self.train],
            "path": {"parameters": fl(self.path.parameters),
                     "n_terms": [int(n) for n in self.path.n_terms]},
            "condition_number": float(self.collinearity.condition_number),
            "collinear_pairs": [[a, b, float(r)] for a, b, r in self.collinearity.pairs],
            "dependent_groups": self.collinearity.dependent_groups,
            "warnings": list(self.warnings),
        }
        if self.cv is not None:
            d["path"]["cv_error"] = fl(self.cv.mean)
            d["path"]["cv_standard_error"] = fl(self.cv.standard_error)
            d["folds"] = [[int(i) for i in f] for f in self.cv.folds]
        return d


def fit_closure(stats: Mapping[int, SufficientStats], train: Sequence[int],
                method: str = "threshold", *, transfer_weight: float = 0.0, n_folds: int = 5,
                resamples: int = 20, seed: int = 0, rule: str = "one_se") -> FitResult:
    """Fit, select and diagnose a closure from per-snapshot statistics.

    ``stats`` maps snapshot index -> statistics; ``train`` lists the training snapshots in time
    order (folds are contiguous in this order). The path is computed on all training
    snapshots, its parameters are chosen by blocked cross-validation, and the chosen parameter
    is refitted on all of them. Selection frequency: the share of ``resamples`` fits on
    random halves of the training snapshots that keep each term (stability selection,
    Meinshausen & Buhlmann 2010, JRSS B 72:417).
    """
    if method not in METHODS:
        raise OptionError(f"unknown fit method {method!r}: choose one of {', '.join(METHODS)}")
    train = [int(i) for i in train]
    missing = [i for i in train if i not in stats]
    if missing:
        raise ValueError(f"no statistics for training snapshots {missing}")
    if not train:
        raise UserError("no training snapshots: lower fit.test_fraction or add snapshots")
    notes: list[str] = []
    full = _sum(stats, train)
    problem = Problem.from_stats(full, transfer_weight)
    plain = Problem.from_stats(full) if transfer_weight > 0 else problem
    diag = collinearity(plain)
    notes += diag.warnings
    path = fit_path(problem, method)
    cv = None
    if len(train) >= 2:
        cv = cross_validate(stats, train, method, path.parameters, n_folds, transfer_weight)
        index = choose(path, cv, rule)
    else:
        notes.append("only one training snapshot: no held-out selection was possible, so the "
                     "path point was chosen by the Bayesian information criterion, which "
                     "overfits on correlated points; add snapshots")
        index = _bic_choice(plain, path)
    coef = path.coefficients[index].copy()
    support = path.supports[index].copy()
    parameter = float(path.parameters[index])
    se = standard_errors(plain, coef, support)
    freq = None
    if resamples > 0 and len(train) >= 2:
        rng = np.random.default_rng(seed)
        half = max(1, len(train) // 2)
        counts = np.zeros(len(problem.terms))
        for _ in range(resamples):
            pick = rng.choice(len(train), size=half, replace=False)
            sub = Problem.from_stats(_sum(stats, [train[i] for i in pick]), transfer_weight)
            counts += fit_path(sub, method, [parameter] if method != "ard" else None).supports[0]
        freq = counts / resamples
        shaky = [t for t, f, s in zip(problem.terms, freq, support, strict=True)
                 if s and f < 0.5]
        if shaky:
            notes.append(f"terms {', '.join(shaky)} were selected in fewer than half of the "
                         "fits on random halves of the training snapshots: treat them as "
                         "uncertain")
    return FitResult(method, problem.terms, coef, support, parameter, se, freq, path, cv, rule,
                     diag, transfer_weight, train, notes)
