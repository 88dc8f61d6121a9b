"""The family kit through both estimators: every registered family, by arrays and by a store view.

The cases come from `family_kit` (fixture ``family_case``), so a family added to the registry is run
through the estimators at once. The checks are contracts of the project: the selector's statistics are
those of the workflow's file route (`screen` on the store and the outcome table, which joins by sample
id), a y and covariates given by sample id in another order give the same bits as arrays in store
order, a constant feature scores 0, no NaN, and the model predicts what its family predicts.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from widescreen.api import IterativeScreeningModel, ScreeningSelector, StoreView
from widescreen.engine import RunFolder, read_stats
from widescreen.families import FAMILIES
from widescreen.workflow import ScreenConfig, screen

from .family_kit import CONSTANT, MISSING, Case, N, P


def _y(case: Case):
    """The case's y as scikit-learn users give it (survival: a structured array)."""
    if case.event is None:
        return case.y
    y = np.empty(N, dtype=[("event", bool), ("time", float)])
    y["event"], y["time"] = case.event.astype(bool), case.y
    return y


def _by_id(case: Case, order: np.ndarray):
    """y as a pandas object indexed by sample id, rows in ``order``."""
    ids = case.sample_ids[order]
    if case.event is None:
        return pd.Series(case.y[order], index=ids)
    return pd.DataFrame({"time": case.y[order], "event": case.event[order] == 1}, index=ids)


def test_selector_equals_the_file_route_by_arrays_and_by_sample_id(family_case: Case, tmp_path):
    c = family_case
    screen(
        c.store,
        c.outcome,
        ScreenConfig(**c.config, covariates=("age",), shortlist=10, list_top=P),
        tmp_path / "r",
    )
    files = read_stats(RunFolder(tmp_path / "r"), "screen")
    arrays = ScreeningSelector(family=c.family, shortlist=10).fit(c.X, _y(c), covariates=c.age)
    np.testing.assert_allclose(arrays.scores_, files["score"], rtol=1e-10, atol=1e-13)
    assert not np.isnan(arrays.scores_).any()
    assert arrays.scores_[CONSTANT] == 0.0
    assert CONSTANT not in arrays.ranking_
    order = np.random.default_rng(3).permutation(N)
    table = pd.DataFrame({"age": c.age[order]}, index=c.sample_ids[order])
    view = ScreeningSelector(family=c.family, shortlist=10, covariates=table).fit(
        StoreView(c.store), _by_id(c, order)
    )
    np.testing.assert_allclose(view.scores_, arrays.scores_, rtol=1e-12, atol=1e-14)
    kept = np.sort(view.ranking_)
    assert list(view.get_feature_names_out()) == [f"f{j}" for j in kept]
    out = view.transform(StoreView(c.store))
    assert out.shape == (N, 10) and not np.isnan(out).any()
    if MISSING in kept:  # missing values at the training mean, as the pass imputed them
        col = out[:, list(kept).index(MISSING)]
        assert np.allclose(col[np.isnan(c.X[:, MISSING])], np.nanmean(c.X[:, MISSING]))


def test_model_by_arrays_and_by_sample_id(family_case: Case):
    c = family_case
    # Short paths, BIC (EBIC keeps nothing in the small logistic case): the kit checks the API's
    # contracts; the fits and their selection have their own tests.
    settings = dict(family=c.family, n_lambda=10, max_iter=1, criterion="bic")
    arrays = IterativeScreeningModel(**settings).fit(c.X, _y(c), covariates=c.age)
    assert CONSTANT not in arrays.selected_
    assert arrays.selected_.size > 0  # so that the comparisons below compare something
    order = np.random.default_rng(4).permutation(N)
    table = pd.DataFrame({"age": c.age[order]}, index=c.sample_ids[order])
    view = IterativeScreeningModel(**settings, covariates=table).fit(
        StoreView(c.store), _by_id(c, order)
    )
    np.testing.assert_array_equal(view.selected_, arrays.selected_)
    np.testing.assert_allclose(view.coef_, arrays.coef_, rtol=1e-9, atol=1e-12)
    pred = view.predict(StoreView(c.store))
    assert pred.shape == (N,)
    if FAMILIES[c.family].loss == "binomial":
        assert set(pred) <= set(np.unique(c.y))
        assert view.predict_proba(StoreView(c.store)).shape == (N, 2)
    else:
        assert np.isfinite(pred).all()
    score = view.score(StoreView(c.store), _by_id(c, order))
    assert score == pytest.approx(arrays.score(c.X, _y(c), covariates=c.age), rel=1e-9)
