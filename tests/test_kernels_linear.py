"""The linear screening kernel against scipy, scikit-learn and statsmodels.

Every check runs twice: with the compiled block loops (when numba is installed) and with the numpy route.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from sklearn.feature_selection import r_regression

from widescreen.engine import ArraySource, PassSpec, run_pass
from widescreen.kernels import linear_statistics, prepare_linear
from widescreen.store import MISSING_INT8, _accel
from widescreen.store._reader import prepare_block

ROUTES = [pytest.param(False, id="numpy")]
if _accel.HAVE_NUMBA:
    ROUTES.insert(0, pytest.param(True, id="numba"))


@pytest.fixture(params=ROUTES)
def route(request, monkeypatch):
    monkeypatch.setattr(_accel, "use_numba", request.param)
    return request.param


def imputed(X: np.ndarray) -> np.ndarray:
    """float64 copy of X with every missing value replaced by its column's observed mean."""
    x = X.astype(np.float64)
    miss = (X == MISSING_INT8) if X.dtype == np.int8 else np.isnan(x)
    x[miss] = np.nan
    mean = np.nanmean(np.where(miss.all(axis=0), 0.0, x), axis=0)
    return np.where(miss, mean, x)


def reference(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """r and two-sided p of each column by scipy.stats.pearsonr on the mean-imputed matrix."""
    x = imputed(X)
    res = [stats.pearsonr(x[:, j], y) for j in range(x.shape[1])]
    return np.array([r.statistic for r in res]), np.array([r.pvalue for r in res])


def dosages(rng, n: int, p: int, missing: float = 0.0) -> np.ndarray:
    X = rng.binomial(2, rng.uniform(0.05, 0.5, p), (n, p)).astype(np.int8)
    if missing:
        X[rng.random((n, p)) < missing] = MISSING_INT8
    return X


def test_pearson_float(rng, route):
    n, p = 120, 40
    X = rng.standard_normal((n, p))
    y = X[:, 3] - 0.5 * X[:, 7] + rng.standard_normal(n)
    out = linear_statistics(prepare_block(X, 0), prepare_linear(y))
    r, pv = reference(X, y)
    # scipy.stats.pearsonr: r and its exact two-sided p (beta distribution of r under independence)
    np.testing.assert_allclose(out["correlation"], r, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(out["p_value"], pv, rtol=1e-8, atol=1e-300)
    np.testing.assert_allclose(out["score"], np.abs(r), rtol=1e-12, atol=1e-14)
    # sklearn.feature_selection.r_regression: Pearson r of every column with y
    np.testing.assert_allclose(out["correlation"], r_regression(X, y), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("dtype", ["int8", "float32", "float64"])
def test_pearson_with_missing_values(rng, route, dtype):
    n, p = 150, 30
    if dtype == "int8":
        X = dosages(rng, n, p, missing=0.05)
    else:
        X = rng.standard_normal((n, p)).astype(dtype)
        X[rng.random((n, p)) < 0.05] = np.nan
    y = imputed(X)[:, 2] + rng.standard_normal(n)
    block = prepare_block(X, 0)
    out = linear_statistics(block, prepare_linear(y))
    r, pv = reference(X, y)
    # scipy.stats.pearsonr on the mean-imputed array (the imputation rule of common practice)
    np.testing.assert_allclose(out["correlation"], r, rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(out["p_value"], pv, rtol=1e-7, atol=1e-300)
    miss = (X == MISSING_INT8) if dtype == "int8" else np.isnan(X)
    np.testing.assert_array_equal(block.missing_rate, miss.mean(axis=0))


def test_dosages_without_missing_values(rng, route):
    X = dosages(rng, 201, 50)
    y = X[:, 0] + rng.standard_normal(201)
    out = linear_statistics(prepare_block(X, 0), prepare_linear(y))
    r, pv = reference(X, y)
    # scipy.stats.pearsonr
    np.testing.assert_allclose(out["correlation"], r, rtol=1e-11, atol=1e-13)
    np.testing.assert_allclose(out["p_value"], pv, rtol=1e-7, atol=1e-300)


def test_wide_int8_values(rng, route):
    # Values far outside the dosage range take the wide integer route of the moments.
    n, p = 90, 12
    X = rng.integers(-127, 128, (n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.03] = MISSING_INT8
    y = rng.standard_normal(n)
    block = prepare_block(X, 0)
    out = linear_statistics(block, prepare_linear(y))
    r, _ = reference(X, y)
    # scipy.stats.pearsonr on the mean-imputed array
    np.testing.assert_allclose(out["correlation"], r, rtol=1e-11, atol=1e-13)
    x = imputed(X)
    # numpy: sum of squares about the mean of the imputed column
    np.testing.assert_allclose(block.sumsq, ((x - x.mean(axis=0)) ** 2).sum(axis=0), rtol=1e-13)


@pytest.mark.parametrize("dtype", ["int8", "float64"])
def test_constant_columns_score_zero(rng, route, dtype):
    n = 60
    y = rng.standard_normal(n)
    if dtype == "int8":
        X = dosages(rng, n, 6)
        X[:, 1] = 2
        X[:, 2] = MISSING_INT8  # all missing
        X[:, 3] = MISSING_INT8
        X[5, 3] = 1  # one observed value
        X[:, 4] = 1
        X[::7, 4] = MISSING_INT8  # constant among the observed
    else:
        X = rng.standard_normal((n, 6))
        X[:, 1] = 3.25
        X[:, 2] = np.nan
        X[:, 3] = np.nan
        X[5, 3] = 1.0
        X[:, 4] = 1e8
        X[::7, 4] = np.nan
    block = prepare_block(X, 0)
    out = linear_statistics(block, prepare_linear(y))
    for key in ("score", "correlation", "t", "p_value"):
        assert np.all(np.isfinite(out[key])), key
    np.testing.assert_array_equal(block.constant, [False, True, True, True, True, False])
    np.testing.assert_array_equal(out["score"][1:5], 0.0)
    np.testing.assert_array_equal(out["p_value"][1:5], 1.0)
    # scipy.stats.pearsonr on the varying columns
    r, _ = reference(X[:, [0, 5]], y)
    np.testing.assert_allclose(out["correlation"][[0, 5]], r, rtol=1e-12)


@pytest.mark.parametrize("missing", [0.0, 0.05])
def test_ill_conditioned_offset(rng, route, missing):
    # Values offset by 1e8 (dask's reduction tests use the same trap): a one-pass variance would lose
    # every digit; subtracting 1e8 again is exact, so the reference sees the very same data.
    n, p = 100, 8
    Z = rng.standard_normal((n, p))
    X = Z + 1e8
    X[rng.random((n, p)) < missing] = np.nan
    y = rng.standard_normal(n) + Z[:, 0]
    block = prepare_block(X, 0)
    out = linear_statistics(block, prepare_linear(y))
    # scipy.stats.pearsonr of the un-offset, mean-imputed columns. With missing values the stored mean
    # itself is rounded to the spacing of doubles at 1e8 (1.5e-8), which shifts the centred observed
    # values against the imputed zeros: r can then only agree to about 1e-8.
    r, pv = reference(X - 1e8, y)
    rtol = 1e-10 if missing == 0 else 1e-7
    np.testing.assert_allclose(out["correlation"], r, rtol=rtol)
    np.testing.assert_allclose(out["p_value"], pv, rtol=100 * rtol)
    assert not block.constant.any()


@pytest.mark.parametrize("dtype", ["int8", "float32"])
def test_odd_last_block_through_a_pass(rng, route, dtype):
    # 53 features in blocks of 16 and sub-blocks of 7: the last block and sub-blocks are smaller.
    n, p = 80, 53
    if dtype == "int8":
        X = dosages(rng, n, p, missing=0.02)
    else:
        X = rng.standard_normal((n, p)).astype(np.float32)
        X[rng.random((n, p)) < 0.02] = np.nan
    y = imputed(X)[:, 50] + rng.standard_normal(n)
    spec = PassSpec(
        name="linear",
        kernel=linear_statistics,
        state=prepare_linear(y),
        columns=("score", "correlation", "t", "p_value"),
        keep=5,
        sub_block=7,
    )
    result = run_pass(ArraySource(X, width=16), spec, scheduler="sync")
    r, pv = reference(X, y)
    # scipy.stats.pearsonr on the mean-imputed array
    np.testing.assert_allclose(result.stats["correlation"], r, rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(result.stats["p_value"], pv, rtol=1e-7, atol=1e-300)
    assert result.topk.index[0] == np.argmax(np.abs(r))
    # numpy: the kept top-k values are the imputed, centred columns
    x = imputed(X)[:, result.topk.index]
    np.testing.assert_allclose(result.topk.values, x - x.mean(axis=0), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("dtype", ["int8", "float64"])
def test_covariate_adjusted_t_equals_ols(rng, route, dtype):
    n, p = 90, 10
    Z = np.column_stack([rng.standard_normal(n), rng.integers(0, 2, n)])
    if dtype == "int8":
        X = dosages(rng, n, p)
    else:
        X = rng.standard_normal((n, p)) + 0.5 * Z[:, :1]
    x = X.astype(np.float64)
    y = 0.7 * x[:, 1] + Z @ np.array([1.0, -2.0]) + rng.standard_normal(n)
    out = linear_statistics(prepare_block(X, 0), prepare_linear(y, covariates=Z))
    t_ref, p_ref = [], []
    for j in range(p):
        # statsmodels OLS of y ~ 1 + Z + x_j: the t value and two-sided p of x_j
        fit = sm.OLS(y, sm.add_constant(np.column_stack([Z, x[:, j]]))).fit()
        t_ref.append(fit.tvalues[-1])
        p_ref.append(fit.pvalues[-1])
    np.testing.assert_allclose(out["t"], t_ref, rtol=1e-9)
    np.testing.assert_allclose(out["p_value"], p_ref, rtol=1e-7)


@pytest.mark.parametrize("n_perm", [2, 12])
def test_permuted_copies(rng, route, n_perm):
    # 1 + 2 responses use the fused loop, 1 + 12 the tiled BLAS route.
    n, p = 70, 20
    X = dosages(rng, n, p, missing=0.03)
    y = rng.standard_normal(n)
    perms = [rng.permutation(n) for _ in range(n_perm)]
    Y = np.column_stack([y] + [y[q] for q in perms])
    out = linear_statistics(prepare_block(X, 0), prepare_linear(Y))
    assert out["null_score"].shape == (p, n_perm)
    for k, q in enumerate(perms):
        # scipy.stats.pearsonr with the permuted response
        r, _ = reference(X, y[q])
        np.testing.assert_allclose(out["null_score"][:, k], np.abs(r), rtol=1e-10, atol=1e-13)
    r, _ = reference(X, y)
    np.testing.assert_allclose(out["correlation"], r, rtol=1e-10, atol=1e-13)


def test_routes_agree(rng):
    if not _accel.HAVE_NUMBA:
        pytest.skip("numba is not installed")
    X = dosages(rng, 300, 64, missing=0.01)
    y = rng.standard_normal(300)
    state = prepare_linear(y, covariates=rng.standard_normal((300, 1)))
    got = {}
    for flag in (True, False):
        _accel.use_numba = flag
        try:
            got[flag] = linear_statistics(prepare_block(X, 0), state)
        finally:
            _accel.use_numba = _accel.HAVE_NUMBA
    # Two summation orders of the same float64 sums: equal to rounding.
    np.testing.assert_allclose(got[True]["correlation"], got[False]["correlation"], atol=1e-14)
