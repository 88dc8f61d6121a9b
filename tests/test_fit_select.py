"""Tuning: BIC, extended BIC (Chen & Chen 2008) and K-fold cross-validation."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import comb
from sklearn.linear_model import lasso_path

from widescreen.fit import (
    bic,
    cross_validate,
    default_ebic_gamma,
    ebic,
    fit_path,
    log_binomial,
    select_model,
)


def test_ebic_hand_checked_values():
    # CHECKS.md [derived from Chen & Chen 2008]: n = 100, p = 1000, k = 5.
    assert bic(0.0, 5, 100) == pytest.approx(23.0259, abs=1e-4)  # k log n
    assert ebic(0.0, 5, 100, 1000, 1.0) == pytest.approx(82.5084, abs=1e-4)
    assert ebic(0.0, 5, 100, 1000, 0.5) == pytest.approx(52.7671, abs=1e-4)
    # log C(p, k) against scipy's exact binomial coefficient.
    assert log_binomial(1000, 5) == pytest.approx(
        np.log(float(comb(1000, 5, exact=True))), rel=1e-12
    )
    assert ebic(-10.0, 0, 100, 1000, 1.0) == pytest.approx(20.0)


def test_default_ebic_gamma_follows_the_kappa_bound():
    # Chen & Chen (2008), Theorem 1: consistent for gamma > 1 - 1/(2 kappa), p = O(n^kappa).
    assert default_ebic_gamma(100, 1000) == pytest.approx(1 - 1 / (2 * 1.5))
    assert default_ebic_gamma(100, 10**6) == pytest.approx(1 - 1 / 6)
    assert default_ebic_gamma(100, 10) == 0.0  # p <= sqrt(n): plain BIC
    with pytest.raises(ValueError, match="gamma"):
        ebic(0.0, 1, 10, 10, 1.5)


def _fan_lv_design(n=200, d=100, s=8, sigma=1.5, seed=0):
    # Fan & Lv (2008) simulation I [from memory, CHECKS.md]: x ~ N(0, I), beta_j = (-1)^U (a + |Z|),
    # U ~ Bernoulli(0.4), a = 4 log n / sqrt(n); here on a d-column shortlist.
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, d))
    a = 4 * np.log(n) / np.sqrt(n)
    beta = np.zeros(d)
    support = rng.choice(d, s, replace=False)
    beta[support] = (-1.0) ** rng.binomial(1, 0.4, s) * (a + np.abs(rng.standard_normal(s)))
    y = X @ beta + sigma * rng.standard_normal(n)
    return X, y, np.sort(support)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_scad_ebic_recovers_the_true_support(seed):
    X, y, support = _fan_lv_design(seed=seed)
    path = fit_path(X, y, penalty="scad")
    best = select_model(
        path, "ebic", n_candidates=1000
    )  # the shortlist came from p = 1000 features
    # Every true feature kept, at most one extra (the refit EBIC prefers a 9th in one of these seeds).
    assert set(support) <= set(best.support) and best.support.size <= support.size + 1
    # Its criterion value is the published formula at the unpenalised refit of the chosen support:
    # statsmodels' OLS log-likelihood (variance MLE RSS / n) as the reference.
    ols = sm.OLS(y, sm.add_constant(X[:, best.support])).fit()
    k, n, p, g = best.support.size, len(y), 1000, best.ebic_gamma
    assert g == 1.0  # the refit tuning's default: the conservative end of Chen & Chen's range
    expected = -2 * ols.llf + k * np.log(n) + 2 * g * np.log(float(comb(p, k, exact=True)))
    assert best.criterion_value == pytest.approx(expected, rel=1e-10)
    np.testing.assert_allclose(best.refit_coef[best.support], ols.params[1:], rtol=1e-8)
    np.testing.assert_allclose(best.refit_se[best.support], ols.bse[1:], rtol=1e-8)
    assert best.lambdas is path.lambdas and best.coefs.shape == (len(path.lambdas), X.shape[1])


def test_ebic_needs_the_number_of_candidates():
    X, y, _ = _fan_lv_design(n=60, d=10, s=2)
    path = fit_path(X, y, penalty="lasso", n_lambda=10)
    with pytest.raises(ValueError, match="n_candidates"):
        select_model(path, "ebic")
    with pytest.raises(ValueError, match="below"):
        select_model(path, "ebic", n_candidates=5)
    with pytest.raises(ValueError, match="criterion"):
        select_model(path, "aic")


def test_cv_of_the_lasso_equals_a_direct_sklearn_computation():
    # Independent K-fold computation with scikit-learn's lasso_path on the same folds
    # (numpy default_rng(seed).permutation split into K near-equal parts, as documented).
    X, y, _ = _fan_lv_design(n=120, d=20, s=3, seed=4)
    path = fit_path(X, y, penalty="lasso", n_lambda=30)
    mean, se = cross_validate(path, n_folds=4, seed=11)
    folds = np.array_split(np.random.default_rng(11).permutation(len(y)), 4)
    sq = np.zeros((4, len(path.lambdas)))
    for k, held in enumerate(folds):
        train = np.setdiff1d(np.arange(len(y)), held)
        m, s = X[train].mean(0), X[train].std(0)
        ym = y[train].mean()
        _, coefs, _ = lasso_path((X[train] - m) / s, y[train] - ym, alphas=path.lambdas, tol=1e-10)
        pred = ym + ((X[held] - m) / s) @ coefs
        sq[k] = ((y[held, None] - pred) ** 2).sum(axis=0)
    np.testing.assert_allclose(mean, sq.sum(axis=0) / len(y), rtol=1e-4)
    per_fold = sq / np.array([len(f) for f in folds])[:, None]
    np.testing.assert_allclose(se, per_fold.std(axis=0, ddof=1) / 2, rtol=1e-3)
    best = select_model(path, "cv", cv=4, seed=11, tuning="path")
    assert best.index == int(np.argmin(mean)) and best.cv_std_error is not None


def test_cv_is_deterministic_and_works_for_glm_and_cox():
    X, y, support = _fan_lv_design(n=150, d=15, s=3, seed=5)
    path = fit_path(X, y, penalty="mcp", n_lambda=20)
    a, b = select_model(path, "cv", seed=3), select_model(path, "cv", seed=3)
    np.testing.assert_array_equal(a.criterion_values, b.criterion_values)
    assert set(support) <= set(a.support)
    rng = np.random.default_rng(6)
    yb = (rng.random(150) < 1 / (1 + np.exp(-X @ np.r_[1.5, -1.5, np.zeros(13)]))).astype(float)
    fit = select_model(fit_path(X, yb, loss="binomial", penalty="scad", n_lambda=15), "cv", cv=3)
    assert {0, 1} <= set(fit.support)
    T = rng.exponential(np.exp(-X[:, 0] * 1.2))
    yc = np.column_stack([T, (rng.random(150) < 0.8).astype(float)])
    fit = select_model(fit_path(X, yc, loss="cox", penalty="lasso", n_lambda=15), "cv", cv=3)
    assert 0 in fit.support and np.all(np.isfinite(fit.criterion_values))
