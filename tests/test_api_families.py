"""Every registered family through both estimators: arrays and stores, ids, the error contract.

Parametrised over `widescreen.families.FAMILIES`, so a new family is checked here as soon as it is
registered; ``RESPONSES`` says how to draw its y (a family without an entry fails the kit).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from widescreen.api import IterativeScreeningModel, ScreeningSelector, StoreView
from widescreen.families import FAMILIES

from .conftest import write_store

N, P, STRONG, CONSTANT = 80, 160, 7, 0  # p > n so that HOLP's X X' is invertible


def _quantitative(rng, x):
    return 2.0 * x + rng.standard_normal(x.size)


def _labels(rng, x):
    return np.where(rng.random(x.size) < 1 / (1 + np.exp(-3.0 * x)), "case", "ctrl")


def _counts(rng, x):
    return rng.poisson(np.exp(0.8 * x)).astype(float)


def _survival(rng, x):
    t = rng.exponential(1 / np.exp(1.5 * x))
    c = rng.exponential(2.0, x.size)
    y = np.empty(x.size, dtype=[("event", bool), ("time", float)])
    y["event"], y["time"] = t <= c, np.minimum(t, c)
    return y


RESPONSES = {
    "linear": _quantitative,
    "rank": _quantitative,
    "rank-utility": _quantitative,
    "dcor": _quantitative,
    "spline": _quantitative,
    "holp": _quantitative,
    "logistic": _labels,
    "poisson": _counts,
    "cox": _survival,
}


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    rng = np.random.default_rng(2024)
    X = rng.standard_normal((N, P))
    X[:, CONSTANT] = 1.0
    ys = {name: draw(rng, X[:, STRONG]) for name, draw in RESPONSES.items()}
    ids = np.array([f"n{i}" for i in range(N)])
    ds = write_store(
        tmp_path_factory.mktemp("kit") / "k.zarr", X, chunk_features=64, sample_ids=list(ids)
    )
    return X, ys, ids, ds


@pytest.mark.parametrize("family", list(FAMILIES))
def test_selector_finds_the_strong_feature_and_keeps_the_error_contract(family, data):
    X, ys, ids, ds = data
    assert family in RESPONSES, f"the family kit has no response for {family!r}"
    y = ys[family]
    sel = ScreeningSelector(family=family, shortlist=5).fit(X, y)
    assert sel.ranking_[0] == STRONG
    assert not np.isnan(sel.scores_).any()
    assert sel.scores_[CONSTANT] == 0.0  # a constant feature scores 0 (the kernels' contract)
    # The store, with y in another order matched by sample id, gives the same scores.
    order = np.random.default_rng(1).permutation(N)
    y_by_id = pd.Series(list(y[order]), index=ids[order]) if y.dtype.names is None else None
    if y_by_id is None:  # a structured y: a DataFrame of its fields, indexed by id
        y_by_id = pd.DataFrame(
            {"time": y["time"][order], "event": y["event"][order]}, index=ids[order]
        )
    sto = ScreeningSelector(family=family, shortlist=5).fit(StoreView(ds.path), y_by_id)
    np.testing.assert_allclose(sto.scores_, sel.scores_, rtol=1e-9, atol=1e-12)
    assert list(sto.get_feature_names_out()) == [f"f{j}" for j in np.sort(sel.ranking_)]


@pytest.mark.parametrize("family", list(FAMILIES))
def test_model_selects_the_strong_feature_and_predicts(family, data):
    X, ys, _, _ = data
    y = ys[family]
    m = IterativeScreeningModel(family=family, n_lambda=15, max_iter=1).fit(X, y)
    assert STRONG in m.selected_
    assert CONSTANT not in m.selected_
    pred = m.predict(X)
    assert pred.shape == (N,)
    if family == "logistic":
        assert set(pred) <= {"case", "ctrl"}
    else:
        assert np.isfinite(pred).all()
    assert np.isfinite(m.score(X, y))
