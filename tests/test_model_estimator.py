"""The scikit-learn estimator of the iterative workflow: API checks, arrays and stores, predictions."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.model_selection import cross_val_score
from sklearn.utils.estimator_checks import check_estimator

from widescreen.api import IterativeScreeningModel

from .conftest import write_store


def test_passes_scikit_learn_estimator_checks():
    # Reference: scikit-learn's own API conformance suite.
    check_estimator(IterativeScreeningModel(n_lambda=20))


@pytest.fixture
def data(rng):
    n, p = 150, 400
    X = rng.standard_normal((n, p))
    y = 3.0 * X[:, 5] - 3.0 * X[:, 300] + 2.5 * X[:, 77] + rng.standard_normal(n)
    return X, y


def test_selects_the_true_features_and_predicts_like_ols(data):
    X, y = data
    m = IterativeScreeningModel(n_lambda=30).fit(X, y)
    np.testing.assert_array_equal(m.selected_, [5, 77, 300])
    assert m.get_support().sum() == 3 and m.get_support()[[5, 77, 300]].all()
    assert m.transform(X).shape == (X.shape[0], 3)
    assert m.coef_.shape == (X.shape[1],) and np.count_nonzero(m.coef_) == 3
    # SCAD leaves strong effects unpenalised (Fan & Li 2001): the model is least squares on the
    # selected set. Reference: statsmodels OLS fitted values.
    ols = sm.OLS(y, sm.add_constant(X[:, m.selected_])).fit()
    np.testing.assert_allclose(m.predict(X), ols.fittedvalues, rtol=1e-6, atol=1e-6)
    assert m.n_iter_ == len(m.iterations_) >= 1
    assert m.entered_.shape == (3,)


def test_missing_values_are_predicted_at_the_training_mean(data):
    X, y = data
    X = X.copy()
    X[::7, 5] = np.nan
    m = IterativeScreeningModel(n_lambda=30).fit(X, y)
    assert 5 in m.selected_
    col = list(m.selected_).index(5)
    mean5 = np.nanmean(X[:, 5])
    assert m.mean_[col] == pytest.approx(mean5, rel=1e-12)
    filled = np.where(np.isnan(X), np.nanmean(X, axis=0), X)
    np.testing.assert_allclose(m.predict(X), m.predict(filled), rtol=1e-12)


def test_store_and_array_give_the_same_model(tmp_path, data):
    X, y = data
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=64)
    a = IterativeScreeningModel(n_lambda=30).fit(X, y)
    b = IterativeScreeningModel(n_lambda=30).fit(ds.path, y)
    np.testing.assert_array_equal(a.selected_, b.selected_)
    np.testing.assert_allclose(a.coef_, b.coef_, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(b.predict(ds.path), a.predict(X), rtol=1e-10)
    np.testing.assert_array_equal(b.transform(ds.path), X[:, b.selected_])


def test_covariates_are_adjusted_for_and_needed_to_predict(rng):
    n, p = 150, 300
    X = rng.standard_normal((n, p))
    age = rng.uniform(20, 60, n)
    y = 2.0 * X[:, 10] + 0.1 * age + rng.standard_normal(n)
    m = IterativeScreeningModel(n_lambda=30).fit(X, y, covariates=age)
    assert 10 in m.selected_
    # Reference: statsmodels OLS of y ~ 1 + age + X_selected (SCAD leaves strong effects unpenalised).
    ols = sm.OLS(y, sm.add_constant(np.column_stack([age, X[:, m.selected_]]))).fit()
    assert m.covariate_coef_[0] == pytest.approx(ols.params[1], rel=1e-5)
    np.testing.assert_allclose(m.predict(X, covariates=age), ols.fittedvalues, rtol=1e-6)
    with pytest.raises(ValueError, match="adjusts for 1 covariates"):
        m.predict(X)


def test_works_inside_scikit_learn_model_selection(data):
    X, y = data
    scores = cross_val_score(IterativeScreeningModel(n_lambda=20, max_iter=1), X, y, cv=3)
    assert scores.min() > 0.7


def test_bad_parameters_are_refused_at_fit(data):
    X, y = data
    with pytest.raises(ValueError, match="'criterion' must be one of"):
        IterativeScreeningModel(criterion="aic").fit(X, y)
    with pytest.raises(ValueError, match="positive integer or 'auto'"):
        IterativeScreeningModel(shortlist=-3).fit(X, y)
    with pytest.raises(ValueError, match="got n_samples = 3"):
        IterativeScreeningModel().fit(X[:3], y[:3])
