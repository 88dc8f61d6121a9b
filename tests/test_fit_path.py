"""Lambda paths of the Gaussian fits against scikit-learn, statsmodels and scipy's linprog."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import linprog
from sklearn.linear_model import ElasticNet, Lasso, enet_path, lasso_path

from widescreen.fit import AdaptiveLasso, SolverOptions, fit_path
from widescreen.fit._quadratic import weighted_lasso, working_problem

TIGHT = SolverOptions(tol=1e-13, max_iter=100_000)


def _data(n=120, d=30, seed=0, scale=True):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, d)) @ np.linalg.cholesky(0.3 + 0.7 * np.eye(d)).T
    if scale:
        X = X * rng.uniform(0.5, 5.0, d) + rng.uniform(-3, 3, d)
    beta = np.zeros(d)
    beta[:5] = [2.0, -1.5, 1.0, 0.8, -0.6]
    y = 1.5 + ((X - X.mean(0)) / X.std(0)) @ beta + rng.standard_normal(n)
    return X, y


def _standardise(X):
    return (X - X.mean(0)) / X.std(0)


def test_lasso_path_equals_sklearn_lasso_path():
    # scikit-learn's lasso_path minimises the same (1/2n)||y - Xb||^2 + alpha |b|_1; on standardised
    # columns and centred y (our intercept) the paths agree.
    X, y = _data()
    path = fit_path(X, y, penalty="lasso", n_lambda=50, options=TIGHT)
    Xs = _standardise(X)
    _, ref, _ = lasso_path(Xs, y - y.mean(), alphas=path.lambdas, tol=1e-13, max_iter=100_000)
    np.testing.assert_allclose(path.coefs_standardized, ref.T, atol=1e-6)
    # lambda_max is the smallest level with an empty model (scikit-learn's alpha grid maximum).
    assert path.df[0] == 0 and path.df[1] > 0
    assert path.lambdas[0] == pytest.approx(np.abs(Xs.T @ (y - y.mean())).max() / len(y))
    assert path.lambdas[-1] == pytest.approx(1e-3 * path.lambdas[0])


def test_lasso_original_scale_equals_sklearn_lasso_with_intercept():
    # scikit-learn's Lasso with an intercept on the standardised columns, mapped back to the raw scale.
    X, y = _data(seed=1)
    path = fit_path(X, y, penalty="lasso", lambdas=[0.2, 0.05], options=TIGHT)
    m, s = X.mean(0), X.std(0)
    for i, lam in enumerate(path.lambdas):
        ref = Lasso(alpha=lam, tol=1e-13, max_iter=100_000).fit((X - m) / s, y)
        coef = ref.coef_ / s
        np.testing.assert_allclose(path.coefs[i], coef, atol=1e-6)
        assert path.intercepts[i] == pytest.approx(ref.intercept_ - m @ coef, abs=1e-6)


def test_elastic_net_path_equals_sklearn():
    # scikit-learn's enet_path / ElasticNet, same parametrisation (alpha, l1_ratio).
    X, y = _data(seed=2)
    path = fit_path(X, y, penalty="enet", l1_ratio=0.3, n_lambda=40, options=TIGHT)
    Xs = _standardise(X)
    assert path.lambdas[0] == pytest.approx(np.abs(Xs.T @ (y - y.mean())).max() / len(y) / 0.3)
    _, ref, _ = enet_path(
        Xs, y - y.mean(), l1_ratio=0.3, alphas=path.lambdas, tol=1e-13, max_iter=100_000
    )
    np.testing.assert_allclose(path.coefs_standardized, ref.T, atol=1e-6)
    one = ElasticNet(alpha=path.lambdas[20], l1_ratio=0.3, tol=1e-13, max_iter=100_000).fit(Xs, y)
    np.testing.assert_allclose(path.coefs_standardized[20], one.coef_, atol=1e-6)


@pytest.mark.parametrize("reusable", [True, False])
def test_weighted_lasso_working_set_equals_sklearn_on_rescaled_columns(reusable):
    # Per-feature weights by column rescaling (Zou 2006, Section 3.5); weight 0 = unpenalised (projected
    # out), inf = excluded. Reference: scikit-learn's Lasso on the rescaled, projected columns.
    X, y = _data(n=150, d=25, seed=3, scale=False)
    Xs = _standardise(X)
    n, d = Xs.shape
    rng = np.random.default_rng(4)
    v = rng.uniform(0.3, 2.0, d)
    v[[0, 7]] = 0.0
    v[[3, 11]] = np.inf
    prob = working_problem(Xs, np.ones((n, 1)), y, np.ones(n), reusable=reusable)
    lam = 0.08
    b, ok = weighted_lasso(prob, [lam], v, np.zeros(d), tol=1e-13, max_iter=100_000)
    pen = np.isfinite(v) & (v > 0)
    F = np.column_stack([np.ones(n), Xs[:, v == 0]])
    Q, _ = np.linalg.qr(F)
    Xp = Xs[:, pen] / v[pen]
    Xp = Xp - Q @ (Q.T @ Xp)
    yp = y - Q @ (Q.T @ y)
    ref = Lasso(alpha=lam, fit_intercept=False, tol=1e-13, max_iter=100_000).fit(Xp, yp)
    assert ok.all()
    np.testing.assert_allclose(b[pen, 0], ref.coef_ / v[pen], atol=1e-7)
    assert np.all(b[[3, 11], 0] == 0)
    # Unpenalised coefficients: least squares of y on [1, X_free] given the penalised part (numpy lstsq).
    g = np.linalg.lstsq(F, y - Xs[:, pen] @ b[pen, 0], rcond=None)[0]
    np.testing.assert_allclose(b[v == 0, 0], g[1:], atol=1e-7)


def test_adaptive_lasso_with_given_initial_estimate():
    # Adaptive lasso = lasso on columns rescaled by |beta_init|^gamma (Zou 2006, Section 3.5);
    # scikit-learn's Lasso on those columns is the reference.
    X, y = _data(seed=5, scale=False)
    Xs = _standardise(X)
    init = np.linalg.lstsq(np.column_stack([np.ones(len(y)), Xs]), y, rcond=None)[0][1:]
    init[4] = 0.0  # an initial zero excludes the feature
    pen = AdaptiveLasso(gamma=1.0, init=init / X.std(0))  # init is on the original scale
    path = fit_path(X, y, penalty=pen, lambdas=[0.05, 0.01], options=TIGHT)
    w = np.abs(init)
    for i, lam in enumerate(path.lambdas):
        ref = Lasso(alpha=lam, tol=1e-13, max_iter=100_000).fit(Xs * w, y)
        np.testing.assert_allclose(path.coefs_standardized[i], ref.coef_ * w, atol=1e-6)
    assert np.all(path.coefs[:, 4] == 0)


@pytest.mark.parametrize("init", ["ridge", "lasso"])
def test_adaptive_lasso_default_initial_estimates_find_the_signal(init):
    X, y = _data(n=200, d=30, seed=6)
    path = fit_path(X, y, penalty="adaptive_lasso", init=init, n_lambda=40)
    # Zou (2006): the adaptive weights penalise the true features least.
    w = path.feature_weights
    assert np.all(np.max(w[:5]) < np.sort(w[5:])[len(w[5:]) // 2])


def test_dantzig_selector_constraint_and_lp_objective():
    # Candes & Tao (2007): min ||b||_1 s.t. ||X^T (y - X b)||_inf / n <= lambda. The reference is
    # scipy's linprog on an independent formulation: variables (b, t), -t <= b <= t, minimise sum t.
    X, y = _data(n=80, d=12, seed=7, scale=False)
    path = fit_path(X, y, penalty="dantzig", n_lambda=6, lambda_min_ratio=0.05)
    Xs = _standardise(X)
    yc = y - y.mean()
    n, d = Xs.shape
    G, c = Xs.T @ Xs / n, Xs.T @ yc / n
    for lam, b in zip(path.lambdas, path.coefs_standardized, strict=True):
        assert np.abs(c - G @ b).max() <= lam + 1e-8
        eye = np.eye(d)
        A = np.block([[eye, -eye], [-eye, -eye], [G, np.zeros((d, d))], [-G, np.zeros((d, d))]])
        rhs = np.concatenate([np.zeros(2 * d), lam + c, lam - c])
        ref = linprog(
            np.r_[np.zeros(d), np.ones(d)], A_ub=A, b_ub=rhs, bounds=(None, None), method="highs"
        )
        assert ref.status == 0
        assert np.abs(b).sum() == pytest.approx(ref.fun, abs=1e-7)
    assert path.df[0] == 0 and path.df[-1] > 3


def test_dantzig_needs_gaussian_loss():
    X, y = _data(n=50, d=5)
    with pytest.raises(ValueError, match="Gaussian"):
        fit_path(X, (y > y.mean()).astype(float), penalty="dantzig", loss="binomial")


@pytest.mark.parametrize("penalty", ["lasso", "scad", "mcp"])
def test_unpenalized_covariates_equal_ols_at_huge_lambda(penalty):
    # With every feature shrunk to zero, the covariates' coefficients are OLS of y on [1, Z]
    # (statsmodels OLS).
    X, y = _data(n=100, d=10, seed=8)
    rng = np.random.default_rng(9)
    Z = rng.standard_normal((100, 3)) + X[:, :3] * 0.3
    y = y + Z @ [1.0, -2.0, 0.5]
    path = fit_path(X, y, penalty=penalty, unpenalized=Z, lambdas=[1e6])
    ols = sm.OLS(y, sm.add_constant(Z)).fit()
    assert np.all(path.coefs[0] == 0)
    assert path.intercepts[0] == pytest.approx(ols.params[0], abs=1e-10)
    np.testing.assert_allclose(path.unpenalized_coefs[0], ols.params[1:], atol=1e-10)
    assert path.log_likelihood[0] == pytest.approx(ols.llf, rel=1e-12)


def test_offset_enters_the_gaussian_fit():
    # An offset is y's known part: the fit equals the fit of y - offset (scikit-learn Lasso reference).
    X, y = _data(n=90, d=8, seed=10, scale=False)
    off = np.linspace(-1, 1, 90)
    a = fit_path(X, y, penalty="lasso", offset=off, lambdas=[0.05], options=TIGHT)
    ref = Lasso(alpha=0.05, tol=1e-13).fit(_standardise(X), y - off)
    np.testing.assert_allclose(a.coefs_standardized[0], ref.coef_, atol=1e-7)


def test_scad_small_lambda_equals_ols():
    # Coefficients past a * lambda are unpenalised (Zou & Li 2008), so SCAD at a small lambda on a
    # strong-signal design is the OLS fit (statsmodels).
    rng = np.random.default_rng(11)
    X = rng.standard_normal((200, 4))
    y = X @ [3.0, -2.0, 1.5, 2.5] + 0.5 * rng.standard_normal(200)
    path = fit_path(X, y, penalty="scad", lambdas=[0.2, 0.05])
    ols = sm.OLS(y, sm.add_constant(X)).fit()
    np.testing.assert_allclose(path.coefs[-1], ols.params[1:], atol=1e-10)
    assert path.intercepts[-1] == pytest.approx(ols.params[0], abs=1e-10)


def test_constant_columns_stay_out_and_bad_input_raises():
    X, y = _data(n=60, d=6, seed=12)
    X[:, 2] = 4.0
    path = fit_path(X, y, penalty="scad", n_lambda=10)
    assert np.all(path.coefs[:, 2] == 0)
    with pytest.raises(ValueError, match="rows"):
        fit_path(X, y[:-1])
    with pytest.raises(ValueError, match="non-finite"):
        fit_path(np.where(X > 5, np.nan, X) * np.r_[np.nan, np.ones(59)][:, None], y)
    with pytest.raises(ValueError, match="linearly dependent"):
        fit_path(X, y, unpenalized=np.ones((60, 1)))
    with pytest.raises(ValueError, match="lambdas"):
        fit_path(X, y, lambdas=[0.1, -1.0])
    with pytest.raises(ValueError, match="Unknown parameter"):
        fit_path(X, y, penalty="scad", l1_ratio=0.5)
