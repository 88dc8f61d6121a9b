"""The scikit-learn selector: estimator contract, inputs matched by sample id, imputation, families."""

from __future__ import annotations

import dask.array as da
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from sklearn.feature_selection import r_regression
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LinearRegression
from sklearn.pipeline import make_pipeline
from sklearn.utils.estimator_checks import check_estimator

from widescreen.api import ScreeningSelector, StoreView
from widescreen.families import FAMILIES

from .conftest import write_store

# Families whose y scikit-learn's generic checks can draw, and why the others are left out.
NOT_CHECKED = {
    # y is (time, event): a structured array or two columns, which the checks never produce.
    "cox": "survival y",
    # HOLP solves with X X' (n x n), which needs more features than samples; the checks use n > p.
    "holp": "needs p >= n",
}


@pytest.mark.parametrize("family", [f for f in FAMILIES if f not in NOT_CHECKED])
def test_passes_check_estimator(family):
    # Reference: scikit-learn's own estimator contract checks.
    check_estimator(ScreeningSelector(family=family, shortlist=2))


def test_families_left_out_of_check_estimator_refuse_its_data_clearly(rng):
    X = rng.normal(size=(30, 10))
    y = rng.normal(size=30)
    with pytest.raises(ValueError, match="family 'cox' needs y as a structured array"):
        ScreeningSelector(family="cox").fit(X, y)
    with pytest.raises(ValueError, match=r"singular.*use ridge"):
        ScreeningSelector(family="holp").fit(X, y)


def test_scores_equal_sklearn_r_regression(rng):
    X = rng.normal(size=(60, 300))
    y = X[:, 5] - X[:, 9] + rng.normal(size=60)
    sel = ScreeningSelector(shortlist=4).fit(X, y)
    # Reference: sklearn.feature_selection.r_regression (Pearson r per feature).
    np.testing.assert_allclose(
        sel.statistics_["correlation"], r_regression(X, y), rtol=1e-10, atol=1e-13
    )
    assert set(sel.ranking_[:2]) == {5, 9}
    assert sel.transform(X).shape == (60, 4)
    assert sel.get_support().sum() == 4


def test_dask_and_store_inputs_agree_with_numpy(tmp_path, rng):
    X = rng.normal(size=(50, 700)).astype(np.float32)
    y = X[:, 600] + rng.normal(size=50)
    ref = ScreeningSelector(shortlist=6).fit(X, y)
    dsk = ScreeningSelector(shortlist=6).fit(da.from_array(X, chunks=(50, 128)), y)
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=256)
    sto = ScreeningSelector(shortlist=6).fit(str(ds.path), y)
    for other in (dsk, sto):
        np.testing.assert_allclose(other.scores_, ref.scores_, rtol=1e-12)
        np.testing.assert_array_equal(other.ranking_, ref.ranking_)
    np.testing.assert_array_equal(sto.transform(str(ds.path)), ref.transform(X.astype(np.float64)))


@pytest.fixture
def stored(tmp_path, rng):
    """A float store of 80 samples x 300 features with ids s0..s79, f0..f299, and a y of feature 17."""
    X = rng.normal(size=(80, 300))
    y = 2.0 * X[:, 17] + rng.normal(size=80)
    ids = [f"s{i}" for i in range(80)]
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=64, sample_ids=ids)
    return ds, X, y, np.array(ids)


def test_y_series_is_matched_to_the_store_by_sample_id(stored, rng):
    # Regression: a Series in another order used to be taken in file order (a silent wrong ranking).
    ds, X, y, ids = stored
    order = rng.permutation(ids.size)
    shuffled = pd.Series(y[order], index=ids[order])
    by_id = ScreeningSelector(shortlist=5).fit(ds.path, shuffled)
    # Reference: sklearn's r_regression on the rows in store order with y in the same order.
    np.testing.assert_allclose(by_id.statistics_["correlation"], r_regression(X, y), rtol=1e-10)
    assert by_id.ranking_[0] == 17
    # A plain array is matched by position (store order), as documented.
    by_pos = ScreeningSelector(shortlist=5).fit(ds.path, y[order])
    np.testing.assert_allclose(
        by_pos.statistics_["correlation"], r_regression(X, y[order]), rtol=1e-10
    )


def test_ids_that_do_not_match_are_refused(stored):
    ds, _, y, ids = stored
    extra = pd.Series(np.append(y, 1.0), index=[*ids, "zz9"])
    with pytest.raises(ValueError, match=r"y: 1 of its 81 sample ids are not samples of X .*'zz9'"):
        ScreeningSelector().fit(ds.path, extra)
    short = pd.Series(y[1:], index=ids[1:])
    with pytest.raises(
        ValueError, match=r"y: no value for 1 of the 80 samples of X \(first: 's0'\)"
    ):
        ScreeningSelector().fit(ds.path, short)
    twice = pd.Series(y, index=[*ids[:-1], "s0"])
    with pytest.raises(ValueError, match="sample id 's0' appears twice"):
        ScreeningSelector().fit(ds.path, twice)
    # A view of the samples the Series has is the documented way to screen a subset.
    sub = ScreeningSelector(shortlist=3).fit(StoreView(ds.path).select(ids[1:]), short)
    assert sub.ranking_[0] == 17


def test_dataframe_x_is_matched_to_a_series_y_by_index(rng):
    X = rng.normal(size=(40, 30))
    y = 2.0 * X[:, 3] + rng.normal(size=40)
    idx = [f"p{i}" for i in range(40)]
    Xdf = pd.DataFrame(X, index=idx, columns=[f"g{j}" for j in range(30)])
    rev = pd.Series(y, index=idx).iloc[::-1]
    sel = ScreeningSelector(shortlist=2).fit(Xdf, rev)
    np.testing.assert_allclose(sel.statistics_["correlation"], r_regression(X, y), rtol=1e-10)
    assert list(sel.get_feature_names_out()) == sorted(
        [f"g{j}" for j in sel.ranking_], key=lambda s: int(s[1:])
    )


def test_transform_imputes_like_fit_and_a_pipeline_with_a_regressor_runs(tmp_path, rng):
    X = rng.normal(size=(60, 200))
    y = X[:, 4] - X[:, 150] + 0.5 * rng.normal(size=60)
    X[rng.random(X.shape) < 0.1] = np.nan
    ds = write_store(tmp_path / "m.zarr", X, chunk_features=50)
    sel = ScreeningSelector(shortlist=6).fit(ds.path, y)
    out = sel.transform(ds.path)
    assert not np.isnan(out).any()
    # Reference: scikit-learn's SimpleImputer (mean strategy) on the kept columns.
    cols = X[:, sel.get_support()]
    np.testing.assert_allclose(out, SimpleImputer().fit_transform(cols), rtol=1e-12)
    # New samples get the training means, as SimpleImputer fitted on the training rows does.
    new = X[:10].copy()
    new[:, sel.get_support()] = np.nan
    np.testing.assert_allclose(
        sel.transform(new), SimpleImputer().fit(cols).transform(new[:, sel.get_support()])
    )
    pipe = make_pipeline(ScreeningSelector(shortlist=6), LinearRegression()).fit(ds.path, y)
    assert np.isfinite(pipe.predict(ds.path)).all()


def test_feature_names_out_are_the_store_feature_ids(stored):
    ds, _, y, _ = stored
    sel = ScreeningSelector(shortlist=4).fit(ds.path, y)
    expected = [f"f{j}" for j in np.sort(sel.ranking_)]
    assert list(sel.get_feature_names_out()) == expected
    assert list(sel.feature_ids_) == expected
    out = sel.set_output(transform="pandas").transform(ds.path)
    assert list(out.columns) == expected


def test_covariates_are_adjusted_for_and_matched_by_id(stored, rng):
    ds, X, _, ids = stored
    age = rng.uniform(20, 60, ids.size)
    y = 1.5 * X[:, 40] + 0.2 * age + rng.normal(size=ids.size)
    sel = ScreeningSelector(shortlist=3).fit(ds.path, y, covariates=age)
    # Reference: the t value of x_j in the statsmodels OLS fit y ~ 1 + age + x_j.
    for j in (40, 41):
        ols = sm.OLS(y, sm.add_constant(np.column_stack([age, X[:, j]]))).fit()
        assert sel.statistics_["t"][j] == pytest.approx(ols.tvalues[2], rel=1e-8)
    # A covariate table indexed by sample id, in another order, given to the estimator.
    table = pd.DataFrame({"age": age}, index=ids).iloc[::-1]
    by_id = ScreeningSelector(shortlist=3, covariates=table).fit(ds.path, pd.Series(y, index=ids))
    np.testing.assert_allclose(by_id.statistics_["t"], sel.statistics_["t"], rtol=1e-12)
    with pytest.raises(ValueError, match="covariate 'flat' is constant"):
        ScreeningSelector(covariates=pd.DataFrame({"flat": 1.0}, index=ids)).fit(ds.path, y)


def test_logistic_takes_text_labels(rng):
    X = rng.normal(size=(120, 40))
    p = 1 / (1 + np.exp(-2.0 * X[:, 8]))
    y01 = (rng.random(120) < p).astype(int)
    labels = np.where(y01 == 1, "case", "control")  # sorted: "case" -> 0, "control" -> 1
    text = ScreeningSelector(family="logistic", shortlist=3).fit(X, labels)
    num = ScreeningSelector(family="logistic", shortlist=3).fit(X, 1 - y01)
    np.testing.assert_allclose(text.scores_, num.scores_, rtol=1e-12)
    assert text.ranking_[0] == 8
    # Reference: statsmodels Logit of y ~ 1 + x_8 (the marginal fit the kernel does).
    ref = sm.Logit(1 - y01, sm.add_constant(X[:, 8])).fit(disp=0)
    assert text.statistics_["beta"][8] == pytest.approx(ref.params[1], rel=1e-6)
    with pytest.raises(ValueError, match="Only binary classification is supported"):
        ScreeningSelector(family="logistic").fit(X, np.arange(120) % 3)


def _survival(rng, n, eta):
    t = rng.exponential(1 / np.exp(eta))
    c = rng.exponential(2.0, n)
    return np.minimum(t, c), t <= c


def test_cox_takes_a_structured_y_or_two_columns(rng):
    n = 100
    X = rng.normal(size=(n, 30))
    time, event = _survival(rng, n, 1.2 * X[:, 11])
    structured = np.empty(n, dtype=[("event", bool), ("time", float)])
    structured["event"], structured["time"] = event, time
    a = ScreeningSelector(family="cox", shortlist=3).fit(X, structured)
    b = ScreeningSelector(family="cox", shortlist=3).fit(X, np.column_stack([time, event]))
    c = ScreeningSelector(family="cox", shortlist=3).fit(
        X, pd.DataFrame({"time": time, "status": event.astype(int)})
    )
    np.testing.assert_allclose(a.scores_, b.scores_, rtol=1e-12)
    np.testing.assert_allclose(a.scores_, c.scores_, rtol=1e-12)
    assert a.ranking_[0] == 11
    # Reference: statsmodels PHReg (Breslow ties) of the marginal model of x_11.
    ref = sm.PHReg(time, X[:, 11], status=event.astype(int), ties="breslow").fit()
    assert a.statistics_["beta"][11] == pytest.approx(ref.params[0], rel=1e-5)
    bad = np.empty(n, dtype=[("a", float), ("b", float)])
    with pytest.raises(ValueError, match="boolean event field and a float time field"):
        ScreeningSelector(family="cox").fit(X, bad)
    negative = np.column_stack([time, event])
    negative[4, 0] = -1.0
    with pytest.raises(ValueError, match=r"y\[4\]: '-1.0' is not a positive time"):
        ScreeningSelector(family="cox").fit(X, negative)


def test_holp_runs_in_the_selector(rng):
    n, p = 40, 120
    X = rng.normal(size=(n, p))
    y = 3.0 * X[:, 2] - 2.0 * X[:, 90] + 0.5 * rng.normal(size=n)
    sel = ScreeningSelector(family="holp", shortlist=4).fit(X, y)
    # Reference: numpy's minimum-norm least squares (LAPACK gelsd) on centred X and y, which is
    # HOLP's X'(XX')^-1 y for p > n (Wang & Leng 2016).
    Xc, yc = X - X.mean(axis=0), y - y.mean()
    beta = np.linalg.lstsq(Xc, yc, rcond=None)[0]
    np.testing.assert_allclose(sel.statistics_["beta"], beta, rtol=1e-6, atol=1e-9)
    assert set(sel.ranking_[:2]) == {2, 90}
