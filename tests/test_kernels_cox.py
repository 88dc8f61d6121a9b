"""Marginal Cox kernel against statsmodels PHReg (Breslow ties) fitted one feature at a time.

Every test runs twice: with the compiled sums of a Newton step (when numba is installed) and with numpy.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as ss
from statsmodels.duration.hazard_regression import PHReg

from widescreen.kernels import _tiles
from widescreen.kernels._cox import cox_statistics, prepare_cox
from widescreen.store import _accel
from widescreen.store._reader import prepare_block

ROUTES = [pytest.param(False, id="numpy")]
if _accel.HAVE_NUMBA:
    ROUTES.insert(0, pytest.param(True, id="numba"))


@pytest.fixture(params=ROUTES, autouse=True)
def route(request, monkeypatch):
    monkeypatch.setattr(_accel, "use_numba", request.param)
    return request.param


def _survival(rng, n=200, p=20, ties=True):
    X = rng.standard_normal((n, p))
    X[:, 3] = rng.integers(0, 3, n)
    X[:, 4] = rng.exponential(size=n)
    Z = np.column_stack([rng.standard_normal(n), rng.integers(0, 2, n)])
    offset = rng.uniform(-0.5, 0.5, n)
    hazard = np.exp(0.7 * X[:, 0] - 0.4 * X[:, 3] + 0.5 * Z[:, 0] + offset)
    t_event = rng.exponential(1 / hazard)
    t_censor = rng.exponential(1.5, n)
    time = np.minimum(t_event, t_censor)
    if ties:
        time = np.round(time, 1) + 0.05  # coarse times: many tied events and censorings
    return X, Z, offset, time, (t_event <= t_censor).astype(int)


def _phreg_marginal(time, event, X, Z, offset):
    """beta, se, LR chi2 of x_j from statsmodels PHReg(ties="breslow") joint fits on (Z, x_j)."""
    base = np.zeros(time.size) if offset is None else offset
    out = []
    null_llf = None
    if Z is not None:
        null_llf = PHReg(time, Z, status=event, ties="breslow", offset=base).fit(tol=1e-13).llf
    for j in range(X.shape[1]):
        ex = X[:, [j]] if Z is None else np.column_stack([Z, X[:, j]])
        model = PHReg(time, ex, status=event, ties="breslow", offset=base)
        fit = model.fit(tol=1e-13)
        ll0 = model.loglike(np.zeros(1)) if Z is None else null_llf
        out.append([fit.params[-1], fit.bse[-1], 2.0 * (fit.llf - ll0)])
    return np.array(out)


@pytest.mark.parametrize(
    ("ties", "covariates", "use_offset"),
    [
        (True, False, False),
        (False, False, False),
        (True, True, False),
        (True, True, True),
        (True, False, True),
    ],
)
def test_marginal_fits_equal_statsmodels_phreg(rng, ties, covariates, use_offset):
    X, Z, offset, time, event = _survival(rng, ties=ties)
    X[:, 1] += 0.8 * Z[:, 0]  # a feature correlated with a covariate: the adjustment matters
    assert (np.unique(time).size < time.size) == ties
    Z = Z if covariates else None
    offset = offset if use_offset else None
    res = cox_statistics(prepare_block(X, 0), prepare_cox(time, event, Z, offset))
    # statsmodels PHReg, Breslow ties, joint fit on (Z, x_j): beta and its Wald se from the full fit,
    # the partial-likelihood ratio 2 (llf_full - llf_null) and its chi-square(1) p-value
    ref = _phreg_marginal(time, event, X, Z, offset)
    np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(res["std_error"], ref[:, 1], rtol=1e-6)
    np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(res["z"], ref[:, 0] / ref[:, 1], rtol=1e-6)
    # p-value of the likelihood ratio: chi-square with 1 df (scipy.stats.chi2)
    np.testing.assert_allclose(res["p_value"], ss.chi2.sf(ref[:, 2], 1), rtol=1e-5, atol=1e-12)
    np.testing.assert_allclose(res["score"], ref[:, 2] / 2, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(res["std_beta"], ref[:, 0] * X.std(axis=0), rtol=1e-6)
    assert res["converged"].all() and not res["degenerate"].any()


def test_small_tiles_and_sample_order_do_not_matter(rng, monkeypatch):
    X, _, _, time, event = _survival(rng, n=130, p=40)
    X[:, 10:20] *= 2.5  # stronger columns need more steps: the working set shrinks
    monkeypatch.setattr(
        _tiles, "TILE_BYTES", 16 * 130 * 8
    )  # tiles of 16 columns, the last one ragged
    res = cox_statistics(prepare_block(X, 0), prepare_cox(time, event))
    ref = _phreg_marginal(time, event, X, None, None)  # statsmodels PHReg, Breslow ties
    np.testing.assert_allclose(res["beta"], ref[:, 0], rtol=1e-6)
    np.testing.assert_allclose(res["lr_chi2"], ref[:, 2], rtol=1e-6, atol=1e-9)
    perm = rng.permutation(time.size)
    shuffled = cox_statistics(prepare_block(X[perm], 0), prepare_cox(time[perm], event[perm]))
    np.testing.assert_allclose(shuffled["beta"], ref[:, 0], rtol=1e-6)


def test_constant_features_score_zero_and_nothing_is_nan(rng):
    n = 100
    raw = rng.integers(0, 3, (n, 6)).astype(np.int8)
    raw[:, 1] = 2  # constant
    raw[:, 4] = -128  # all missing
    time = rng.exponential(size=n)
    event = (rng.random(n) < 0.7).astype(int)
    res = cox_statistics(prepare_block(raw, 0), prepare_cox(time, event))
    # common practice: a feature without variation carries no evidence (score 0, p-value 1)
    assert np.all(res["score"][[1, 4]] == 0) and np.all(res["p_value"][[1, 4]] == 1)
    assert res["degenerate"][[1, 4]].all() and not res["degenerate"][[0, 2, 3, 5]].any()
    for key, val in res.items():
        assert not np.isnan(np.asarray(val, dtype=float)).any(), key


def test_feature_varying_only_before_the_first_event_is_degenerate(rng):
    # Samples censored before the first event are in no risk set of an event (Cox 1972 partial
    # likelihood): a feature that varies only among them has zero information.
    n = 60
    time = np.arange(1.0, n + 1)
    event = np.r_[np.zeros(10), (rng.random(n - 10) < 0.7)].astype(int)
    event[10] = 1
    X = rng.standard_normal((n, 2))
    X[:, 1] = np.r_[rng.standard_normal(10), np.zeros(n - 10)]
    res = cox_statistics(prepare_block(X, 0), prepare_cox(time, event))
    assert res["degenerate"].tolist() == [False, True]
    assert res["score"][1] == 0 and res["p_value"][1] == 1 and res["score"][0] > 0


def test_true_signal_ranks_first(rng):
    # Fan & Song (2010), Cox case: the marginal partial-likelihood reduction ranks the active feature first
    n, p = 300, 400
    X = rng.standard_normal((n, p))
    t_event = rng.exponential(1 / np.exp(0.8 * X[:, 77]))
    t_censor = rng.exponential(2.0, n)
    time, event = np.minimum(t_event, t_censor), (t_event <= t_censor).astype(int)
    res = cox_statistics(prepare_block(X, 0), prepare_cox(time, event))
    assert np.argmax(res["score"]) == 77
    assert res["p_value"][77] < 1e-8


def test_non_convergence_is_reported_not_raised(rng):
    X, _, _, time, event = _survival(rng, n=120, p=8)
    X[:, 0] *= 5.0
    res = cox_statistics(prepare_block(X, 0), prepare_cox(time, event, max_iter=1))
    assert not res["converged"].all() and np.all(res["n_iter"] <= 1)
    for key in ("beta", "std_error", "lr_chi2", "p_value", "score"):
        assert np.all(np.isfinite(res[key])), key


@pytest.mark.parametrize(
    ("time", "event", "message"),
    [
        (np.array([1.0, 2.0, np.nan]), np.array([1, 0, 1]), "time"),
        (np.array([1.0, 2.0, 3.0]), np.array([1, 2, 0]), "event"),
        (np.array([1.0, 2.0, 3.0]), np.array([0, 0, 0]), "no events"),
        (np.array([1.0, 2.0, 3.0]), np.array([1, 0]), "event"),
    ],
)
def test_bad_input_raises_a_clear_error(time, event, message):
    with pytest.raises(ValueError, match=message):
        prepare_cox(time, event)


def test_block_with_other_samples_is_refused(rng):
    st = prepare_cox(rng.exponential(size=30), np.ones(30))
    with pytest.raises(ValueError, match="samples"):
        cox_statistics(prepare_block(rng.standard_normal((25, 3)), 0), st)


def test_collinear_covariates_are_refused(rng):
    z = rng.standard_normal(50)
    with pytest.raises(ValueError, match="collinear"):
        prepare_cox(rng.exponential(size=50), np.ones(50), covariates=np.column_stack([z, -z]))
    with pytest.raises(ValueError, match="collinear"):
        prepare_cox(rng.exponential(size=50), np.ones(50), covariates=np.full((50, 1), 3.0))
