"""B-spline (nonparametric) screening kernel against scikit-learn, statsmodels and scipy."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as ss
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.preprocessing import SplineTransformer

from widescreen.kernels._spline import (
    bspline_basis,
    prepare_spline,
    quantile_knots,
    spline_statistics,
)
from widescreen.store._reader import prepare_block


def _continuous(rng, n, p):
    X = rng.standard_normal((n, p))
    X[:, 1] = rng.uniform(size=n)
    X[:, 2] = rng.exponential(size=n) * 1e3  # skewed, large scale
    return X


@pytest.mark.parametrize(("n_basis", "degree"), [(5, 3), (7, 3), (4, 2)])
def test_basis_equals_spline_transformer_with_the_same_knots(rng, n_basis, degree):
    n = 120
    x = prepare_block(_continuous(rng, n, 4), start=0).values
    base, knots = quantile_knots(x, n_basis - degree + 1, degree)
    B = bspline_basis(x, knots, degree)
    assert B.shape == (n_basis, n, 4)
    for k in range(4):
        # scikit-learn SplineTransformer with the quantile knots passed explicitly, same degree
        ref = SplineTransformer(knots=base[:, [k]], degree=degree).fit_transform(x[:, [k]])
        np.testing.assert_allclose(B[:, :, k].T, ref, atol=1e-12)
    # The quantile knots are those SplineTransformer(knots="quantile") would place (numpy percentiles).
    ref_base = np.percentile(x, 100 * np.linspace(0, 1, n_basis - degree + 1), axis=0)
    np.testing.assert_allclose(base, ref_base)


def test_utility_equals_least_squares_on_spline_transformer_basis(rng):
    n, p = 150, 5
    X = _continuous(rng, n, p)
    y = np.sin(2 * X[:, 0]) + (2 * X[:, 1] - 1) ** 2 + rng.standard_normal(n)
    block = prepare_block(X, start=0)
    out = spline_statistics(block, prepare_spline(y))
    base, _ = quantile_knots(block.values, 3, 3)
    yc = y - y.mean()
    for k in range(p):
        # SplineTransformer basis (cubic, 5 functions) + numpy least squares with an intercept
        B = SplineTransformer(knots=base[:, [k]], degree=3).fit_transform(block.values[:, [k]])
        A = np.column_stack([np.ones(n), B])
        fitted = A @ np.linalg.lstsq(A, yc, rcond=None)[0]
        assert out["score"][k] == pytest.approx(np.mean(fitted**2), rel=1e-9)
        # statsmodels OLS: R^2 and the overall F test (against the intercept-only model), df1 = 4
        ols = sm.OLS(yc, np.column_stack([np.ones(n), B[:, :-1]])).fit()
        assert out["r2"][k] == pytest.approx(ols.rsquared, rel=1e-9)
        assert out["f"][k] == pytest.approx(ols.fvalue, rel=1e-8)
        assert out["p_value"][k] == pytest.approx(ols.f_pvalue, rel=1e-7)
        assert out["df"][k] == 4


@pytest.mark.parametrize("levels", [2, 3])
def test_tied_features_give_the_one_way_anova(rng, levels):
    # With k <= n_basis distinct values the spline fit is the fit of the group means:
    # scipy.stats.f_oneway gives the same F and p-value, with df = k - 1.
    n = 90
    X = rng.integers(0, levels, (n, 6)).astype(np.int8)
    X[:5, 0] = 0  # keep every level present
    X[5:10, 0] = levels - 1
    y = X[:, 0] * 0.7 + rng.standard_normal(n)
    out = spline_statistics(prepare_block(X, start=0), prepare_spline(y))
    for k in range(6):
        vals = np.unique(X[:, k])
        ref = ss.f_oneway(*[y[X[:, k] == v] for v in vals])
        assert out["df"][k] == len(vals) - 1
        assert out["f"][k] == pytest.approx(ref.statistic, rel=1e-8)
        assert out["p_value"][k] == pytest.approx(ref.pvalue, rel=1e-7)
    assert np.argmax(out["score"]) == 0


@settings(max_examples=30, deadline=None)
@given(
    n=st.integers(8, 60),
    levels=st.integers(1, 8),
    skew=st.floats(0.0, 0.95),
    seed=st.integers(0, 2**31 - 1),
)
def test_heavy_ties_never_give_nan_and_fit_at_most_the_group_means(n, levels, skew, seed):
    # Colliding quantile knots (mass points, skewed levels): finite statistics, and the fit can never
    # explain more than the group means of the distinct values (one-way ANOVA between sum of squares).
    rng = np.random.default_rng(seed)
    x = rng.integers(0, levels, n).astype(float)
    x[rng.uniform(size=n) < skew] = 0.0
    X = np.column_stack([x, np.full(n, 3.0), rng.standard_normal(n)])
    y = rng.standard_normal(n)
    out = spline_statistics(prepare_block(X, start=0), prepare_spline(y))
    for v in out.values():
        assert np.all(np.isfinite(np.asarray(v, dtype=float)))
    assert out["score"][1] == 0 and out["df"][1] == 0 and out["p_value"][1] == 1
    yc = y - y.mean()
    between = sum(yc[x == v].sum() ** 2 / np.sum(x == v) for v in np.unique(x))
    assert out["score"][0] * n <= between * (1 + 1e-9) + 1e-12
    assert out["df"][0] <= max(len(np.unique(x)) - 1, 0)


def test_covariates_give_the_nested_f_test(rng):
    n = 120
    X = _continuous(rng, n, 3)
    Z = np.column_stack([rng.standard_normal(n), rng.integers(0, 2, n)])
    y = Z @ [1.0, -2.0] + np.cos(2 * X[:, 0]) + rng.standard_normal(n)
    block = prepare_block(X, start=0)
    out = spline_statistics(block, prepare_spline(y, covariates=Z))
    base, _ = quantile_knots(block.values, 3, 3)
    for k in range(3):
        B = SplineTransformer(knots=base[:, [k]], degree=3).fit_transform(block.values[:, [k]])
        small = sm.OLS(y, np.column_stack([np.ones(n), Z])).fit()
        big = sm.OLS(y, np.column_stack([np.ones(n), Z, B[:, :-1]])).fit()
        # statsmodels nested F test (compare_f_test) and the extra fitted sum of squares
        f, p, df = big.compare_f_test(small)
        assert out["f"][k] == pytest.approx(f, rel=1e-8)
        assert out["p_value"][k] == pytest.approx(p, rel=1e-7)
        assert out["df"][k] == df
        assert out["score"][k] == pytest.approx((small.ssr - big.ssr) / n, rel=1e-8)


def test_permuted_copies_match_separate_runs(rng):
    n = 70
    X = _continuous(rng, n, 4)
    y = X[:, 0] ** 2 + rng.standard_normal(n)
    p = rng.permutation(n)
    block = prepare_block(X, start=0)
    both = spline_statistics(block, prepare_spline(np.column_stack([y, y[p]])))
    alone = spline_statistics(block, prepare_spline(y[p]))
    np.testing.assert_allclose(both["null_score"][:, 0], alone["score"], rtol=1e-12)


def test_planted_additive_signals_rank_first(rng):
    # Additive model of Fan, Feng & Song (2011) [from memory], t = 0 (independent uniforms), n = 400.
    # The three strong components lead; the weak symmetric g2 = 3 (2x - 1)^2, which has no linear trend,
    # still lands in the top 10 of 300 (a minimum model size of 10 at most).
    n, p = 400, 300
    X = rng.uniform(size=(n, p))
    s = np.sin(2 * np.pi * X[:, 2])
    g3 = s / (2 - s)
    a = 2 * np.pi * X[:, 3]
    g4 = (
        0.1 * np.sin(a)
        + 0.2 * np.cos(a)
        + 0.3 * np.sin(a) ** 2
        + 0.4 * np.cos(a) ** 3
        + 0.5 * np.sin(a) ** 3
    )
    y = (
        5 * X[:, 0]
        + 3 * (2 * X[:, 1] - 1) ** 2
        + 4 * g3
        + 6 * g4
        + np.sqrt(1.74) * rng.standard_normal(n)
    )
    out = spline_statistics(prepare_block(X, start=0), prepare_spline(y))
    order = np.argsort(-out["score"])
    assert set(order[:3]) == {0, 2, 3}
    assert 1 in order[:10]


def test_bad_parameters_are_refused():
    with pytest.raises(ValueError, match="n_basis"):
        prepare_spline(np.arange(10.0), n_basis=3, degree=3)
    with pytest.raises(ValueError, match="variation"):
        prepare_spline(np.ones(10))
    with pytest.raises(ValueError, match="samples"):
        spline_statistics(prepare_block(np.ones((5, 2)), start=0), prepare_spline(np.arange(6.0)))
