"""Thresholds: Bonferroni and Benjamini-Hochberg against statsmodels, the permutation threshold on null data."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats as st
from hypothesis import given, settings
from hypothesis import strategies as hs
from statsmodels.stats.multitest import multipletests

from widescreen.engine import ArraySource
from widescreen.workflow import (
    IterateConfig,
    ThresholdRule,
    bh_cutoff,
    bh_cutoff_blocks,
    bonferroni_cutoff,
    iterate,
    permutation_cutoff,
    problem_from_arrays,
)


def _p_values(rng, m, n_signal, ties=True):
    p = rng.random(m)
    p[:n_signal] = rng.random(n_signal) * 1e-4
    if ties:
        p[n_signal : n_signal + 20] = p[n_signal]  # a run of tied values
        p[-3:] = 0.0  # underflowed p-values
        p[-6:-3] = 1.0
    return rng.permutation(p)


def _blocks(p, sizes):
    def gen():
        start = 0
        for s in sizes:
            yield p[start : start + s]
            start += s
        yield p[start:]

    return gen


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.2])
@pytest.mark.parametrize("n_signal", [0, 5, 300])
def test_bh_matches_statsmodels(rng, alpha, n_signal):
    p = _p_values(rng, 4000, n_signal)
    # Reference: statsmodels multipletests(method="fdr_bh"), the Benjamini-Hochberg step-up rule.
    ref = multipletests(p, alpha=alpha, method="fdr_bh")[0]
    np.testing.assert_array_equal(p <= bh_cutoff(p, alpha), ref)
    # Streamed in uneven blocks, with histograms coarse and memory small enough to force the
    # refinement and grouping paths.
    for n_bins, max_hold in [(2048, 1 << 20), (8, 50), (3, 7)]:
        cut, m = bh_cutoff_blocks(
            _blocks(p, [1, 999, 1500]), alpha, n_bins=n_bins, max_hold=max_hold
        )
        assert m == p.size
        np.testing.assert_array_equal(p <= cut, ref)


@settings(max_examples=60, deadline=None)
@given(
    hs.lists(hs.floats(0.0, 1.0), min_size=1, max_size=300),
    hs.sampled_from([0.01, 0.1, 0.5]),
)
def test_bh_streamed_equals_statsmodels_on_any_values(values, alpha):
    p = np.asarray(values)
    # Reference: statsmodels multipletests(method="fdr_bh").
    ref = multipletests(p, alpha=alpha, method="fdr_bh")[0]
    cut, _ = bh_cutoff_blocks(_blocks(p, [7, 50]), alpha, n_bins=4, max_hold=5)
    np.testing.assert_array_equal(p <= cut, ref)
    np.testing.assert_array_equal(p <= bh_cutoff(p, alpha), ref)


def test_bh_ignores_nan_and_handles_empty():
    p = np.array([np.nan, 0.001, 0.5, np.nan, 0.02])
    ok = ~np.isnan(p)
    ref = multipletests(p[ok], alpha=0.05, method="fdr_bh")[0]  # reference: statsmodels
    cut, m = bh_cutoff_blocks(_blocks(p, [2]), 0.05)
    assert m == 3
    np.testing.assert_array_equal(p[ok] <= cut, ref)
    assert bh_cutoff_blocks(_blocks(np.array([np.nan]), []), 0.05) == (-math.inf, 0)
    assert bh_cutoff(np.empty(0), 0.05) == -math.inf


@pytest.mark.parametrize("alpha", [0.01, 0.05])
def test_bonferroni_matches_statsmodels(rng, alpha):
    p = _p_values(rng, 2000, 10)
    # Reference: statsmodels multipletests(method="bonferroni").
    ref = multipletests(p, alpha=alpha, method="bonferroni")[0]
    np.testing.assert_array_equal(p <= bonferroni_cutoff(p.size, alpha), ref)


@settings(max_examples=80, deadline=None)
@given(
    hs.lists(hs.floats(0.0, 5.0), min_size=1, max_size=60),
    hs.floats(0.0, 5.0),
    hs.sampled_from([0.05, 0.1, 0.2, 0.5]),
)
def test_permutation_cutoff_is_the_permutation_p_value_rule(null_max, score, alpha):
    null_max = np.asarray(null_max)
    K = null_max.size
    # The permutation p-value (1 + #{null >= observed}) / (K + 1) (Phipson & Smyth 2010, Stat. Appl.
    # Genet. Mol. Biol. 9:39); keeping the feature iff it is <= alpha is the rule the cutoff encodes.
    p_perm = (1 + np.sum(null_max >= score)) / (K + 1)
    assert (score > permutation_cutoff(null_max, alpha)) == (p_perm <= alpha)


def test_rule_validation():
    with pytest.raises(ValueError, match="'threshold' must be one of"):
        ThresholdRule("fdr")
    with pytest.raises(ValueError, match="'alpha' must be a number in"):
        ThresholdRule("bh", alpha=1.5)
    with pytest.raises(ValueError, match=r"cannot reach level alpha = 0\.01: need at least 99"):
        ThresholdRule("permutation", alpha=0.01, n_permutations=20)
    assert ThresholdRule("bh").permutations == 0
    assert ThresholdRule("permutation", 0.2, 19).permutations == 19


def _run(X, y, **kw):
    cfg = IterateConfig(penalty="lasso", n_lambda=20, **kw)
    return iterate(problem_from_arrays(ArraySource(X, width=100), y), cfg)


def test_permutation_threshold_on_null_data_keeps_nothing_at_rate_alpha():
    # y independent of X: the real response is exchangeable with its permutations, so the screen keeps
    # some feature with probability floor(alpha (K + 1)) / (K + 1) = 0.2 exactly (the permutation
    # test's level; Phipson & Smyth 2010). 40 replicates: the count of replicates keeping anything is
    # Binomial(40, 0.2); accept the central 99.8% range.
    R, alpha, K = 40, 0.2, 19
    kept = 0
    for r in range(R):
        rng = np.random.default_rng(1000 + r)
        X = rng.standard_normal((60, 300))
        y = rng.standard_normal(60)
        res = _run(
            X,
            y,
            shortlist=10,
            max_iter=0,
            threshold="permutation",
            alpha=alpha,
            n_permutations=K,
            seed=r,
        )
        kept += res.iterations[0]["n_candidates"] > 0
    lo, hi = st.binom.ppf([0.001, 0.999], R, alpha)
    assert lo <= kept <= hi, kept


def test_permutation_threshold_in_the_conditional_pass():
    # y = 1.5 x0 + eps: the screen keeps x0 in every replicate (power), and in the conditional pass
    # the permuted residual given x0 makes the noise features' null, so that pass keeps a noise
    # feature in at most about alpha of the replicates (Binomial(40, 0.2) upper 99.9% point).
    R, alpha, K = 40, 0.2, 19
    found, noise = 0, 0
    for r in range(R):
        rng = np.random.default_rng(5000 + r)
        X = rng.standard_normal((80, 300))
        y = 1.5 * X[:, 0] + rng.standard_normal(80)
        res = _run(
            X,
            y,
            shortlist=10,
            max_iter=1,
            threshold="permutation",
            alpha=alpha,
            n_permutations=K,
            seed=r,
        )
        found += 0 in res.iterations[0]["candidates"]
        if len(res.iterations) > 1:
            noise += res.iterations[1]["n_candidates"] > 0
    assert found == R
    assert noise <= st.binom.ppf(0.999, R, alpha), noise


def test_bh_and_bonferroni_thresholds_cut_the_screen(rng):
    X = rng.standard_normal((100, 500))
    y = X[:, :3] @ np.array([1.0, -1.0, 0.8]) + rng.standard_normal(100)
    from widescreen.engine import PassSpec, run_pass
    from widescreen.families import get_family

    fam = get_family("linear")
    src = ArraySource(X, width=100)
    spec = PassSpec(
        "m",
        fam.kernel,
        fam.prepare(problem_from_arrays(src, y).response, None),
        fam.columns,
        keep=500,
    )
    p = run_pass(src, spec).stats["p_value"]
    for kind, method in [("bh", "fdr_bh"), ("bonferroni", "bonferroni")]:
        res = _run(X, y, shortlist=30, max_iter=0, threshold=kind, alpha=0.05)
        # Reference: statsmodels multipletests on every feature's marginal p-value, within the budget.
        ref = np.flatnonzero(multipletests(p, alpha=0.05, method=method)[0])
        top30 = np.argsort(p, kind="stable")[:30]
        assert set(res.iterations[0]["candidates"]) == set(np.intersect1d(ref, top30).tolist())
