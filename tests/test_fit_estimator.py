"""The scikit-learn style estimator around fit_path and select_model."""

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.utils.estimator_checks import check_estimator

from widescreen.fit import PenalizedRegression


def _design(n, d, s, seed):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, d))
    beta = np.zeros(d)
    support = np.sort(rng.choice(d, s, replace=False))
    beta[support] = rng.choice([-1.0, 1.0], s) * rng.uniform(1.0, 2.0, s)
    return X, X @ beta + rng.standard_normal(n), support


@pytest.mark.parametrize("penalty", ["lasso", "scad"])
def test_passes_sklearn_check_estimator(penalty):
    # scikit-learn's estimator_checks: the API conventions (parameters, validation, fitted attributes).
    check_estimator(PenalizedRegression(penalty=penalty, criterion="bic", n_lambda=10))


def test_estimator_fit_predict_and_params():
    X, y, support = _design(n=150, d=40, s=4, seed=7)
    est = PenalizedRegression(penalty="scad", criterion="ebic", n_candidates=500)
    assert clone(est).get_params() == est.get_params()
    est.fit(X, y)
    np.testing.assert_array_equal(est.support_, support)
    pred = est.predict(X[:5])
    np.testing.assert_allclose(pred, est.intercept_ + X[:5] @ est.coef_)
    assert est.n_features_in_ == 40 and est.lambda_ == est.result_.lambda_
    est2 = PenalizedRegression(
        penalty="enet", penalty_params={"l1_ratio": 0.5}, criterion="bic"
    ).fit(X, y)
    assert set(support) <= set(est2.support_)
    with pytest.raises(ValueError, match="unpenalised"):
        PenalizedRegression(criterion="bic").fit(X, y, unpenalized=X[:, :1] ** 2).predict(X)
