"""Spearman and rank-utility kernels against scipy, statsmodels and the published formula."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as ss
import statsmodels.api as sm

from widescreen.kernels._rank import (
    average_ranks,
    prepare_rank_utility,
    prepare_spearman,
    rank_utility_statistics,
    spearman_statistics,
)
from widescreen.store._reader import prepare_block


def _mixed_block(rng, n=60):
    """Continuous, dosage-like, binary, constant and tied-decimal columns."""
    X = np.column_stack(
        [
            rng.standard_normal(n),
            rng.integers(0, 3, n),
            rng.integers(0, 2, n),
            np.full(n, 2.5),
            np.round(rng.standard_normal(n), 1),
            rng.exponential(size=n) * 1e6,
        ]
    ).astype(np.float64)
    return X


def test_average_ranks_equal_scipy_rankdata(rng):
    X = _mixed_block(rng, 97)
    # scipy.stats.rankdata, method "average" (ties share their mean rank)
    np.testing.assert_array_equal(average_ranks(X), ss.rankdata(X, axis=0))


def test_spearman_equals_scipy_spearmanr_with_ties(rng):
    X = _mixed_block(rng)
    y = np.round(X[:, 0] + rng.standard_normal(len(X)), 1)  # ties in y too
    out = spearman_statistics(prepare_block(X, start=0), prepare_spearman(y))
    for k in range(X.shape[1]):
        if k == 3:
            continue
        ref = ss.spearmanr(X[:, k], y)  # scipy: rho and the t-approximation p-value (df n - 2)
        assert out["rho"][k] == pytest.approx(ref.statistic, abs=1e-12)
        assert out["p_value"][k] == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-15)
        t_ref = ref.statistic * np.sqrt((len(y) - 2) / (1 - ref.statistic**2))
        assert out["t"][k] == pytest.approx(t_ref, rel=1e-9)
    assert out["score"] == pytest.approx(np.abs(out["rho"]))


def test_spearman_constant_feature_scores_zero_without_nan(rng):
    X = _mixed_block(rng)
    out = spearman_statistics(
        prepare_block(X, start=0), prepare_spearman(rng.standard_normal(len(X)))
    )
    assert out["score"][3] == 0 and out["p_value"][3] == 1 and out["degenerate"][3]
    for v in out.values():
        assert np.all(np.isfinite(np.asarray(v, dtype=float)))


def test_spearman_with_covariates_is_t_of_ranks_given_covariates(rng):
    n = 80
    X = _mixed_block(rng, n)
    Z = rng.standard_normal((n, 2))
    y = X[:, 0] + Z[:, 0] + rng.standard_normal(n)
    out = spearman_statistics(prepare_block(X, start=0), prepare_spearman(y, covariates=Z))
    ry = ss.rankdata(y)
    for k in (0, 1, 4):
        rx = ss.rankdata(X[:, k])
        # statsmodels OLS: t value of the ranked feature in rank(y) ~ 1 + Z + rank(x)
        fit = sm.OLS(ry, np.column_stack([np.ones(n), Z, rx])).fit()
        assert out["t"][k] == pytest.approx(fit.tvalues[-1], rel=1e-8)
        assert out["p_value"][k] == pytest.approx(fit.pvalues[-1], rel=1e-7)


def test_spearman_permuted_copies_match_separate_runs(rng):
    n = 50
    X = rng.standard_normal((n, 8))
    y = X[:, 2] + rng.standard_normal(n)
    perms = [rng.permutation(n) for _ in range(3)]
    Y = np.column_stack([y] + [y[p] for p in perms])
    block = prepare_block(X, start=0)
    out = spearman_statistics(block, prepare_spearman(Y))
    assert out["null_score"].shape == (8, 3)
    for c, p in enumerate(perms):
        ref = [abs(ss.spearmanr(X[:, k], y[p]).statistic) for k in range(8)]  # scipy
        np.testing.assert_allclose(out["null_score"][:, c], ref, atol=1e-12)


def _rank_utility_direct(X, y):
    """Zhu, Li, Li & Zhu (2011): omega_k = n^-1 sum_j (n^-1 sum_i x_ik 1(y_i < y_j))^2, x standardised."""
    n = len(y)
    xs = (X - X.mean(axis=0)) / X.std(axis=0)
    ind = (y[:, None] < y[None, :]).astype(float)  # [i, j] = 1(y_i < y_j)
    return np.mean((xs.T @ ind / n) ** 2, axis=1)


@pytest.mark.parametrize("ties_in_y", [False, True])
def test_rank_utility_equals_direct_quadratic_formula(rng, ties_in_y):
    n = 73
    X = np.delete(_mixed_block(rng, n), 3, axis=1)
    y = X[:, 0] ** 2 + rng.standard_normal(n)
    if ties_in_y:
        y = np.round(y)
    out = rank_utility_statistics(prepare_block(X, start=0), prepare_rank_utility(y))
    np.testing.assert_allclose(out["omega"], _rank_utility_direct(X, y), rtol=1e-11)
    assert np.array_equal(out["score"], out["omega"])


def test_rank_utility_constant_feature_and_copies(rng):
    n = 40
    X = _mixed_block(rng, n)
    y = rng.standard_normal(n)
    p = rng.permutation(n)
    out = rank_utility_statistics(
        prepare_block(X, start=0), prepare_rank_utility(np.column_stack([y, y[p]]))
    )
    assert out["score"][3] == 0 and out["degenerate"][3]
    assert np.all(np.isfinite(out["score"])) and np.all(np.isfinite(out["null_score"]))
    keep = [0, 1, 2, 4, 5]
    np.testing.assert_allclose(
        out["null_score"][keep, 0], _rank_utility_direct(X[:, keep], y[p]), rtol=1e-11
    )


def test_rank_utility_refuses_covariates_and_constant_response():
    with pytest.raises(ValueError, match="covariates"):
        prepare_rank_utility(np.arange(5.0), covariates=np.ones((5, 1)))
    with pytest.raises(ValueError, match="constant"):
        prepare_rank_utility(np.ones(5))


def test_planted_monotone_signals_rank_first_under_heavy_tails(rng):
    # A monotone but nonlinear link with Cauchy noise: both rank utilities should find the planted
    # features (the model-free setting of Zhu et al. 2011); common practice check, no table.
    n, p = 200, 300
    X = rng.standard_normal((n, p))
    y = np.exp(X[:, 7]) + 2 * np.tanh(3 * X[:, 42]) + 0.5 * rng.standard_cauchy(n)
    block = prepare_block(X, start=0)
    for stats in (
        spearman_statistics(block, prepare_spearman(y)),
        rank_utility_statistics(block, prepare_rank_utility(y)),
    ):
        assert set(np.argsort(stats["score"])[-2:]) == {7, 42}
