"""Both estimators inside scikit-learn's model selection, on a store split by sample (StoreView)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import LinearRegression
from sklearn.model_selection import GridSearchCV, KFold, cross_val_score
from sklearn.pipeline import make_pipeline

from widescreen.api import IterativeScreeningModel, ScreeningSelector, StoreView
from widescreen.store import DatasetWriter, StoreError

from .conftest import write_store


@pytest.fixture
def cohort(tmp_path, rng):
    n, p = 90, 240
    X = rng.standard_normal((n, p))
    X[rng.random(X.shape) < 0.03] = np.nan
    filled = np.where(np.isnan(X), 0.0, X)
    age = rng.uniform(20, 60, n)
    y = 2.0 * filled[:, 12] - 1.5 * filled[:, 200] + 0.05 * age + rng.standard_normal(n)
    ids = np.array([f"id{i:03d}" for i in range(n)])
    ds = write_store(tmp_path / "c.zarr", X, chunk_features=64, sample_ids=list(ids))
    return ds, X, y, age, ids


def test_store_view_indexes_rows_like_an_array(cohort):
    ds, _, _, _, ids = cohort
    v = StoreView(ds.path)
    assert v.shape == (90, 240) and len(v) == 90
    np.testing.assert_array_equal(v[[5, 2]].sample_ids, ids[[5, 2]])
    np.testing.assert_array_equal(v[10:13].rows, [10, 11, 12])
    mask = np.zeros(90, bool)
    mask[[1, 4]] = True
    np.testing.assert_array_equal(v[mask, ...].sample_ids, ids[[1, 4]])
    np.testing.assert_array_equal(v[[5, 2]][[1]].rows, [2])
    np.testing.assert_array_equal(v.select(["id007", "id003"]).rows, [7, 3])
    with pytest.raises(KeyError, match="'nobody'"):
        v.select(["nobody"])
    with pytest.raises(IndexError, match="selects rows"):
        v[:, 3]
    with pytest.raises(IndexError, match=r"row 90 is outside 0\.\.89"):
        StoreView(ds.path, [0, 90])


def test_cross_val_score_on_a_store_view_equals_the_array_route(cohort):
    ds, X, y, _, ids = cohort
    pipe = make_pipeline(ScreeningSelector(shortlist=5), LinearRegression())
    folds = KFold(3, shuffle=True, random_state=0)
    on_store = cross_val_score(pipe, StoreView(ds.path), pd.Series(y, index=ids), cv=folds)
    # Reference: scikit-learn's cross_val_score on the same values as a numpy array.
    on_array = cross_val_score(pipe, X, y, cv=folds)
    np.testing.assert_allclose(on_store, on_array, rtol=1e-9)
    assert on_store.min() > 0.5


def test_grid_search_on_a_store_view_equals_the_array_route(cohort):
    ds, X, y, _, ids = cohort
    grid = {"shortlist": [1, 4]}
    est = IterativeScreeningModel(n_lambda=20, max_iter=1)
    a = GridSearchCV(est, grid, cv=3).fit(StoreView(ds.path), pd.Series(y, index=ids))
    # Reference: scikit-learn's GridSearchCV on the numpy array.
    b = GridSearchCV(est, grid, cv=3).fit(X, y)
    np.testing.assert_allclose(
        a.cv_results_["mean_test_score"], b.cv_results_["mean_test_score"], rtol=1e-9
    )
    assert a.best_params_ == b.best_params_ == {"shortlist": 4}
    assert list(a.best_estimator_.feature_ids_) == [f"f{j}" for j in (12, 200)]


def test_covariates_by_sample_id_follow_each_fold(cohort):
    ds, X, y, age, ids = cohort
    table = pd.DataFrame({"age": age}, index=ids).iloc[::-1]  # any order: matched by id
    est = IterativeScreeningModel(n_lambda=20, max_iter=1, covariates=table)
    folds = KFold(3, shuffle=True, random_state=1)
    got = cross_val_score(est, StoreView(ds.path), pd.Series(y, index=ids), cv=folds)
    # Reference: the same folds by hand, covariates passed to fit and score by position.
    want = []
    for train, test in folds.split(X):
        m = IterativeScreeningModel(n_lambda=20, max_iter=1).fit(
            X[train], y[train], covariates=age[train]
        )
        want.append(m.score(X[test], y[test], covariates=age[test]))
    np.testing.assert_allclose(got, want, rtol=1e-9)


def test_logistic_grid_search_with_text_labels_on_a_store_view(cohort, rng):
    ds, X, _, _, ids = cohort
    filled = np.where(np.isnan(X), 0.0, X)
    eta = 2.5 * filled[:, 30]
    labels = pd.Series(np.where(rng.random(90) < 1 / (1 + np.exp(-eta)), "yes", "no"), index=ids)
    est = IterativeScreeningModel(family="logistic", n_lambda=15, max_iter=1)
    search = GridSearchCV(est, {"shortlist": [1, 3]}, cv=3).fit(StoreView(ds.path), labels)
    # Reference: the same search on the numpy array (StratifiedKFold either way: a classifier).
    ref = GridSearchCV(est, {"shortlist": [1, 3]}, cv=3).fit(X, labels.to_numpy())
    np.testing.assert_allclose(
        search.cv_results_["mean_test_score"], ref.cv_results_["mean_test_score"], rtol=1e-9
    )
    assert 30 in search.best_estimator_.selected_
    assert set(search.predict(StoreView(ds.path))) <= {"yes", "no"}


def test_estimators_read_only_the_ids_they_keep(tmp_path, rng):
    # Twenty chunks of feature ids; every chunk but the two holding the model's features is damaged
    # inside (its size and trailing checksum kept, so the store's fingerprint still passes): reading
    # every id (as `StoreView.feature_ids` does) fails its checksum, reading by coordinate works.
    n, p, chunk, keep = 60, 2000, 100, (150, 1730)
    X = rng.integers(0, 3, (n, p), dtype=np.int8)
    y = 3.0 * X[:, keep[0]] - 3.0 * X[:, keep[1]] + 0.1 * rng.standard_normal(n)
    sid = [f"s{i}" for i in range(n)]
    w = DatasetWriter(tmp_path / "s.zarr", sid, "dosage", "int8", chunks=(n, 250), id_chunk=chunk)
    w.append(X, [f"f{j}" for j in range(p)])
    path = w.finalize().path
    for c in set(range(p // chunk)) - {j // chunk for j in keep}:
        f = path / "features" / "id" / "c" / str(c)
        data = bytearray(f.read_bytes())
        data[2:6] = bytes(b ^ 0xFF for b in data[2:6])
        f.write_bytes(bytes(data))
    view = StoreView(path)
    with pytest.raises(StoreError, match="features/id"):
        _ = view.feature_ids
    target = pd.Series(y, index=sid)
    sel = ScreeningSelector(shortlist=2).fit(view, target)
    assert list(sel.get_feature_names_out()) == [f"f{j}" for j in keep]
    assert list(view.feature_ids_at(sel.ranking_[::-1])) == [f"f{j}" for j in sel.ranking_[::-1]]
    np.testing.assert_array_equal(sel.transform(view[:5]), X[:5, list(keep)])
    model = IterativeScreeningModel(shortlist=2, n_lambda=10, max_iter=1).fit(
        view[10:], target[10:]
    )
    assert list(model.get_feature_names_out()) == [f"f{j}" for j in keep]
    # Reference: y is built without error at the kept features, so R^2 on held-out rows is ~1
    # (scikit-learn's r2_score inside score).
    assert model.score(view[:10], target[:10]) > 0.99
