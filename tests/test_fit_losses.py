"""Binomial, Poisson and Cox losses against statsmodels (GLM, PHReg) and scikit-learn."""

import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.linear_model import LogisticRegression
from statsmodels.duration.hazard_regression import PHReg

from widescreen.fit import CoxLoss, SolverOptions, fit_path, make_loss


def _glm_data(seed=5, n=300):
    rng = np.random.default_rng(seed)
    Z = rng.standard_normal((n, 3))
    X = rng.standard_normal((n, 4))
    eta = 0.3 + Z @ [0.5, -0.8, 0.2] + X[:, :2] @ [1.0, -1.2]
    yb = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    yp = rng.poisson(np.exp(0.4 * eta)).astype(float)
    off = 0.1 * rng.standard_normal(n)
    return X, Z, eta, yb, yp, off


def _cox_data(seed=6, n=250):
    X, Z, eta, _, _, _ = _glm_data(seed, n)
    rng = np.random.default_rng(seed + 100)
    T = rng.exponential(1 / np.exp(0.5 * eta))
    T = np.round(T * 5) / 5 + 0.2  # coarse times: many ties
    E = (rng.random(n) < 0.7).astype(float)
    return X, Z, T, E


FAMILIES = [("binomial", sm.families.Binomial()), ("poisson", sm.families.Poisson())]


@pytest.mark.parametrize(("loss", "family"), FAMILIES)
def test_glm_unpenalized_limit_equals_statsmodels(loss, family):
    # Huge lambda: features at zero; the covariates' fit (with offset) is the GLM MLE (statsmodels GLM).
    X, Z, _, yb, yp, off = _glm_data()
    y = yb if loss == "binomial" else yp
    path = fit_path(X, y, loss=loss, penalty="lasso", unpenalized=Z, offset=off, lambdas=[1e3])
    ref = sm.GLM(y, sm.add_constant(Z), family=family, offset=off).fit(tol=1e-12)
    assert np.all(path.coefs[0] == 0)
    assert path.intercepts[0] == pytest.approx(ref.params[0], abs=1e-8)
    np.testing.assert_allclose(path.unpenalized_coefs[0], ref.params[1:], atol=1e-8)
    assert path.log_likelihood[0] == pytest.approx(ref.llf, rel=1e-10)
    assert path.deviance[0] == pytest.approx(ref.deviance, rel=1e-10)


@pytest.mark.parametrize(("loss", "family"), FAMILIES)
def test_glm_scad_small_lambda_equals_mle(loss, family):
    # SCAD leaves coefficients past a * lambda unpenalised (Zou & Li 2008): with strong effects and a
    # small lambda the fit is the unpenalised GLM MLE on features and covariates (statsmodels GLM).
    X, Z, _, yb, yp, off = _glm_data()
    y = yb if loss == "binomial" else yp
    path = fit_path(
        X[:, :2],
        y,
        loss=loss,
        penalty="scad",
        unpenalized=Z,
        offset=off,
        n_lambda=20,
        lambda_min_ratio=0.01,
    )
    ref = sm.GLM(y, sm.add_constant(np.column_stack([Z, X[:, :2]])), family=family, offset=off).fit(
        tol=1e-12
    )
    np.testing.assert_allclose(path.coefs[-1], ref.params[4:], atol=1e-7)
    np.testing.assert_allclose(path.unpenalized_coefs[-1], ref.params[1:4], atol=1e-7)
    assert path.intercepts[-1] == pytest.approx(ref.params[0], abs=1e-7)


def test_logistic_lasso_equals_sklearn_l1_logistic_regression():
    # scikit-learn LogisticRegression with an l1 penalty minimises C sum(logloss) + |b|_1 with an
    # unpenalised intercept (saga); ours is sum(logloss)/n + lambda |b|_1, so C = 1 / (n lambda).
    X, _, _, yb, _, _ = _glm_data(seed=7, n=200)
    Xs = (X - X.mean(0)) / X.std(0)
    lam = 0.03
    path = fit_path(
        X,
        yb,
        loss="binomial",
        penalty="lasso",
        lambdas=[0.2, lam],
        options=SolverOptions(tol=1e-12),
    )
    ref = LogisticRegression(
        l1_ratio=1.0, C=1 / (len(yb) * lam), solver="saga", tol=1e-12, max_iter=200_000
    )
    ref.fit(Xs, yb)
    np.testing.assert_allclose(path.coefs_standardized[-1], ref.coef_[0], atol=1e-5)
    assert path.intercepts[-1] + path.coefs[-1] @ X.mean(0) == pytest.approx(
        ref.intercept_[0], abs=1e-5
    )
    assert np.count_nonzero(path.coefs[-1]) == np.count_nonzero(np.abs(ref.coef_[0]) > 1e-8)


def test_cox_unpenalized_limit_equals_phreg_breslow():
    # statsmodels PHReg with ties="breslow" is the reference partial likelihood.
    X, Z, T, E = _cox_data()
    assert len(np.unique(T)) < len(T) // 2  # many ties
    y = np.column_stack([T, E])
    path = fit_path(X, y, loss="cox", penalty="lasso", unpenalized=Z, lambdas=[1e3])
    model = PHReg(T, Z, status=E, ties="breslow")
    ref = model.fit()
    assert path.intercepts[0] == 0.0
    np.testing.assert_allclose(path.unpenalized_coefs[0], ref.params, atol=1e-6)
    assert path.log_likelihood[0] == pytest.approx(model.loglike(ref.params), rel=1e-10)
    assert path.log_likelihood[0] == pytest.approx(
        model.loglike(path.unpenalized_coefs[0]), rel=1e-12
    )


def test_cox_scad_small_lambda_equals_phreg():
    # As for the GLMs: small-lambda SCAD on strong effects is the unpenalised PHReg fit.
    X, Z, T, E = _cox_data()
    y = np.column_stack([T, E])
    path = fit_path(
        X[:, :2], y, loss="cox", penalty="scad", unpenalized=Z, n_lambda=20, lambda_min_ratio=0.01
    )
    ref = PHReg(T, np.column_stack([Z, X[:, :2]]), status=E, ties="breslow").fit()
    np.testing.assert_allclose(path.coefs[-1], ref.params[3:], atol=1e-6)
    np.testing.assert_allclose(path.unpenalized_coefs[-1], ref.params[:3], atol=1e-6)


def test_cox_score_and_hessian_diagonal_equal_phreg():
    # With the identity as design, PHReg's score and Hessian are those of the partial likelihood in
    # eta itself: the IRLS score w (z - eta) and weights w (Hessian diagonal) must match them.
    rng = np.random.default_rng(8)
    n = 25
    T = rng.integers(1, 8, n).astype(float)
    E = (rng.random(n) < 0.7).astype(float)
    E[0] = 1.0
    eta = 0.5 * rng.standard_normal(n)
    model = PHReg(T, np.eye(n), status=E, ties="breslow")
    loss = CoxLoss()
    y = np.column_stack([T, E])
    z, w = loss.working(y, eta)
    np.testing.assert_allclose(w * (z - eta), model.score(eta), atol=1e-12)
    np.testing.assert_allclose(w, -np.diag(model.hessian(eta)), atol=1e-12)
    assert loss.log_likelihood(y, eta) == pytest.approx(model.loglike(eta), rel=1e-12)


def test_poisson_and_binomial_working_response():
    # IRLS for canonical links (McCullagh & Nelder 1989, Section 2.5): w = var(mu), z = eta + (y - mu) / w.
    rng = np.random.default_rng(9)
    eta = rng.standard_normal(10)
    y = rng.poisson(np.exp(eta)).astype(float)
    z, w = make_loss("poisson").working(y, eta)
    np.testing.assert_allclose(w, np.exp(eta))
    np.testing.assert_allclose(z, eta + (y - np.exp(eta)) / np.exp(eta))
    yb = (y > 0).astype(float)
    mu = 1 / (1 + np.exp(-eta))
    z, w = make_loss("binomial").working(yb, eta)
    np.testing.assert_allclose(w, mu * (1 - mu))
    np.testing.assert_allclose(z, eta + (yb - mu) / (mu * (1 - mu)))


def test_responses_are_validated():
    X = np.random.default_rng(0).standard_normal((20, 3))
    with pytest.raises(ValueError, match="only 0 and 1"):
        fit_path(X, np.arange(20.0), loss="binomial")
    with pytest.raises(ValueError, match=">= 0"):
        fit_path(X, -np.ones(20), loss="poisson")
    with pytest.raises(ValueError, match=r"\(n, 2\)"):
        fit_path(X, np.ones(20), loss="cox")
    with pytest.raises(ValueError, match="at least one event"):
        fit_path(X, np.column_stack([np.arange(1.0, 21.0), np.zeros(20)]), loss="cox")
    with pytest.raises(ValueError, match="loss"):
        fit_path(X, np.ones(20), loss="gamma")
