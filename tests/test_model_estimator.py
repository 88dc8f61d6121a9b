"""The scikit-learn estimator of the iterative workflow: API checks, arrays and stores, predictions."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import kendalltau
from sklearn.base import is_classifier
from sklearn.metrics import accuracy_score, r2_score
from sklearn.model_selection import cross_val_score
from sklearn.utils.estimator_checks import check_estimator

from widescreen.api import IterativeScreeningModel, concordance_index
from widescreen.families import FAMILIES

from .conftest import write_store

# Families whose y scikit-learn's generic checks can draw, and why the others are left out.
NOT_CHECKED = {
    # y is (time, event): a structured array or two columns, which the checks never produce.
    "cox": "survival y",
    # y must be non-negative integer counts (as on the command line); the checks draw real values.
    "poisson": "integer counts",
    # HOLP solves with X X' (n x n), which needs more features than samples; the checks use n > p.
    "holp": "needs p >= n",
}


@pytest.mark.parametrize("family", [f for f in FAMILIES if f not in NOT_CHECKED])
def test_passes_scikit_learn_estimator_checks(family):
    # Reference: scikit-learn's own API conformance suite (classifier checks for logistic).
    # SCAD (the default) for linear and logistic; lasso for the others, whose API code is the same
    # and whose SCAD fits would only lengthen the suite. Short paths and one conditional pass.
    if family in ("linear", "logistic"):
        est = IterativeScreeningModel(family=family, n_lambda=10, max_iter=1)
    else:
        est = IterativeScreeningModel(family=family, n_lambda=10, max_iter=1, penalty="lasso")
    check_estimator(est)


def test_families_left_out_of_check_estimator_refuse_its_data_clearly(rng):
    X = rng.normal(size=(30, 10))
    y = rng.normal(size=30)
    with pytest.raises(ValueError, match="family 'cox' needs y as a structured array"):
        IterativeScreeningModel(family="cox").fit(X, y)
    with pytest.raises(ValueError, match=r"y\[\d+\]: .* is not a non-negative integer count"):
        IterativeScreeningModel(family="poisson").fit(X, y)
    with pytest.raises(ValueError, match=r"singular.*use ridge"):
        IterativeScreeningModel(family="holp").fit(X, y)


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


def test_logistic_is_a_binary_classifier_with_text_labels(rng):
    n, p = 300, 200
    X = rng.standard_normal((n, p))
    eta = 2.5 * X[:, 3] - 2.5 * X[:, 120]
    labels = np.where(rng.random(n) < 1 / (1 + np.exp(-eta)), "sick", "well")
    m = IterativeScreeningModel(family="logistic", n_lambda=30).fit(X, labels)
    assert is_classifier(m)
    np.testing.assert_array_equal(m.classes_, ["sick", "well"])
    assert {3, 120} <= set(m.selected_.tolist())
    proba = m.predict_proba(X)
    assert proba.shape == (n, 2)
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    pred = m.predict(X)
    assert set(pred) <= {"sick", "well"}
    np.testing.assert_array_equal(pred, m.classes_[proba.argmax(axis=1)])
    # Reference: sklearn.metrics.accuracy_score of the predicted labels.
    assert m.score(X, labels) == pytest.approx(accuracy_score(labels, pred))
    # SCAD leaves strong effects unpenalised (Fan & Li 2001): the probabilities are the maximum
    # likelihood ones on the selected set. Reference: statsmodels Logit, "well" as 1 (sorted labels).
    ref = sm.Logit((labels == "well").astype(float), sm.add_constant(X[:, m.selected_])).fit(disp=0)
    np.testing.assert_allclose(proba[:, 1], ref.predict(), rtol=1e-4, atol=1e-6)


def _survival(rng, eta):
    t = rng.exponential(1 / np.exp(eta))
    c = rng.exponential(2.0, eta.size)
    return np.minimum(t, c), t <= c


def test_cox_takes_a_structured_y_and_scores_by_concordance(rng):
    n, p = 200, 150
    X = rng.standard_normal((n, p))
    time, event = _survival(rng, 1.5 * X[:, 7] - 1.5 * X[:, 60])
    y = np.empty(n, dtype=[("status", bool), ("days", float)])
    y["status"], y["days"] = event, time
    m = IterativeScreeningModel(family="cox", n_lambda=20, max_iter=1).fit(X, y)
    two = IterativeScreeningModel(family="cox", n_lambda=20, max_iter=1).fit(
        X, np.column_stack([time, event])
    )
    np.testing.assert_array_equal(m.selected_, two.selected_)
    np.testing.assert_allclose(m.coef_, two.coef_, rtol=1e-10)
    assert {7, 60} <= set(m.selected_.tolist())
    np.testing.assert_allclose(m.predict(X), np.exp(m.linear_predictor(X)), rtol=1e-12)
    c = m.score(X, y)
    assert c == pytest.approx(concordance_index(time, event, m.linear_predictor(X)))
    assert 0.7 < c <= 1.0


def test_concordance_index_matches_kendall_tau_without_censoring(rng):
    # Without censoring or ties every pair is usable and Harrell's C = (1 + tau) / 2 for Kendall's
    # tau between risk and -time (Harrell et al. 1982; reference: scipy.stats.kendalltau).
    time = rng.exponential(size=60)
    risk = -np.log(time) + rng.normal(size=60)
    tau = kendalltau(risk, -time).statistic
    assert concordance_index(time, np.ones(60, bool), risk) == pytest.approx((1 + tau) / 2)
    # A worked example of the definition: times 1, 2, 3, 4 with events at 1 and 3 (2 and 4
    # censored). Usable pairs: (1,2), (1,3), (1,4), (3,4); with risks 4, 1, 2, 2 the pairs are
    # concordant, concordant, concordant and a tie (one half): C = 3.5 / 4.
    assert concordance_index(
        np.array([1.0, 2, 3, 4]), np.array([1, 0, 1, 0], bool), np.array([4.0, 1, 2, 2])
    ) == pytest.approx(3.5 / 4)


def test_score_after_a_covariate_adjusted_fit(rng):
    n, p = 150, 300
    X = rng.standard_normal((n, p))
    age = rng.uniform(20, 60, n)
    y = 2.0 * X[:, 10] + 0.1 * age + rng.standard_normal(n)
    m = IterativeScreeningModel(n_lambda=30).fit(X, y, covariates=age)
    # Reference: sklearn.metrics.r2_score of the predictions.
    assert m.score(X, y, covariates=age) == pytest.approx(r2_score(y, m.predict(X, covariates=age)))
    with pytest.raises(ValueError, match="adjusts for 1 covariates; pass them"):
        m.score(X, y)
    # Given to the estimator instead, the covariates are found at predict and score time.
    m2 = IterativeScreeningModel(n_lambda=30, covariates=age).fit(X, y)
    assert m2.score(X, y) == pytest.approx(m.score(X, y, covariates=age))
