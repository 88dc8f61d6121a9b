"""The scikit-learn selector: estimator contract, numpy / Dask / store inputs agree."""

from __future__ import annotations

import dask.array as da
import numpy as np
from sklearn.feature_selection import r_regression
from sklearn.utils.estimator_checks import check_estimator

from widescreen.api import ScreeningSelector

from .conftest import write_store


def test_passes_check_estimator():
    # scikit-learn's own estimator contract checks.
    check_estimator(ScreeningSelector(shortlist=2))


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
