"""Distance-correlation kernel against the `dcor` library and the values in CHECKS.md."""

from __future__ import annotations

import dcor
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from widescreen.kernels._dcor import dcor_statistics, prepare_dcor
from widescreen.store._reader import prepare_block


def _reference(X, y):
    """Per-column statistics from dcor (V-statistics and the bias-corrected U-statistics)."""
    cols = range(X.shape[1])
    return {
        "dcor_sqr": [dcor.distance_correlation_sqr(X[:, k], y) for k in cols],
        "dcov_sqr": [dcor.distance_covariance_sqr(X[:, k], y) for k in cols],
        "u_dcov_sqr": [dcor.u_distance_covariance_sqr(X[:, k], y) for k in cols],
        "u_dcor_sqr": [dcor.u_distance_correlation_sqr(X[:, k], y) for k in cols],
    }


def test_checks_md_values():
    # CHECKS.md [derived, agrees with the dcor documentation]: x = 1..6, y = [1,7,5,5,6,2].
    # The dCor^2 value there is given to 5 decimals (-0.41613); the exact value is -0.8888889 /
    # sqrt(1.5555556 * 2.9333333) = -0.4161252, so it is checked to 5 decimals.
    x = np.arange(1.0, 7.0)[:, None]
    out = dcor_statistics(prepare_block(x, start=0), prepare_dcor(np.array([1, 7, 5, 5, 6, 2.0])))
    assert out["u_dcov_sqr"][0] == pytest.approx(-0.888889, abs=5e-7)
    assert out["u_dcor_sqr"][0] == pytest.approx(-0.41613, abs=5e-6)


@pytest.mark.parametrize("n", [10, 31, 64, 65, 200])
@pytest.mark.parametrize("ties", [False, True])
def test_equals_dcor_library(rng, n, ties):
    X = rng.standard_normal((n, 6))
    X[:, 1] = rng.integers(0, 3, n)  # dosage-like: heavy ties
    X[:, 2] = rng.integers(0, 2, n)
    X[:, 3] = X[:, 0] ** 2 + 0.1 * rng.standard_normal(n)
    y = np.sin(X[:, 0]) + rng.standard_normal(n)
    if ties:
        X[:, 0] = np.round(X[:, 0])
        y = np.round(y)
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(y))
    ref = _reference(X, y)  # dcor library
    for key, values in ref.items():
        np.testing.assert_allclose(out[key], values, rtol=1e-9, atol=1e-12, err_msg=key)
    assert np.array_equal(out["score"], out["dcor_sqr"])


@settings(max_examples=40, deadline=None)
@given(
    n=st.integers(4, 40),
    levels=st.integers(2, 6),
    seed=st.integers(0, 2**31 - 1),
)
def test_equals_dcor_library_on_small_discrete_data(n, levels, seed):
    # Small n and few levels exercise the padding and every tie pattern; reference: dcor.
    rng = np.random.default_rng(seed)
    X = rng.integers(0, levels, (n, 3)).astype(float)
    X[:, 2] = rng.standard_normal(n)
    y = rng.integers(0, levels, n).astype(float)
    if np.ptp(y) == 0:
        y[0] += 1.0
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(y))
    ref = _reference(X, y)
    for k in range(3):
        if np.ptp(X[:, k]) == 0:
            assert out["score"][k] == 0
            continue
        assert out["dcor_sqr"][k] == pytest.approx(ref["dcor_sqr"][k], rel=1e-9, abs=1e-12)
        assert out["u_dcov_sqr"][k] == pytest.approx(ref["u_dcov_sqr"][k], rel=1e-9, abs=1e-12)


def test_scale_and_offset(rng):
    # dCor is invariant to shifts and scalings of x (Szekely, Rizzo & Bakirov 2007); dcor as reference.
    n = 50
    base = rng.standard_normal(n)
    X = np.column_stack([base, 1e8 + base, 1e-6 * base, -3e5 * base])
    y = base**2 + rng.standard_normal(n)
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(y))
    expected = dcor.distance_correlation_sqr(base, y)
    np.testing.assert_allclose(out["dcor_sqr"], expected, rtol=1e-7)


def test_constant_feature_scores_zero_without_nan(rng):
    n = 30
    X = np.column_stack([rng.standard_normal(n), np.full(n, 4.0), np.zeros(n)])
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(rng.standard_normal(n)))
    assert list(out["score"][1:]) == [0, 0] and out["degenerate"][1:].all()
    assert list(out["p_value"][1:]) == [1, 1]
    for v in out.values():
        assert np.all(np.isfinite(np.asarray(v, dtype=float)))


def test_permuted_copies_match_dcor(rng):
    n = 40
    X = rng.standard_normal((n, 5))
    y = X[:, 0] + rng.standard_normal(n)
    perms = [rng.permutation(n) for _ in range(2)]
    out = dcor_statistics(
        prepare_block(X, start=0), prepare_dcor(np.column_stack([y] + [y[p] for p in perms]))
    )
    assert out["null_score"].shape == (5, 2)
    for c, p in enumerate(perms):
        ref = [dcor.distance_correlation_sqr(X[:, k], y[p]) for k in range(5)]  # dcor
        np.testing.assert_allclose(out["null_score"][:, c], ref, rtol=1e-9)


def test_planted_nonlinear_signal_ranks_first(rng):
    # y depends on x_5 only through x_5^2: invisible to Pearson, visible to dCor (Li, Zhong & Zhu 2012).
    n, p = 200, 400
    X = rng.standard_normal((n, p))
    y = X[:, 5] ** 2 + 0.5 * rng.standard_normal(n)
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(y))
    assert np.argmax(out["score"]) == 5
    assert out["p_value"][5] < 1e-3  # the conservative bound still flags it
    assert abs(np.corrcoef(X[:, 5], y)[0, 1]) < 0.2


def test_p_value_is_conservative_under_independence(rng):
    # Szekely, Rizzo & Bakirov (2007, Theorem 6) [from memory]: n dCov^2_n / S2 -> Q with
    # P(Q >= chi2_1(0.95)) <= 0.05, so at most about 5% of independent features reach p < 0.05.
    n, p = 150, 2000
    X = rng.standard_normal((n, p))
    X[:, ::2] = rng.integers(0, 3, (n, p // 2))
    out = dcor_statistics(prepare_block(X, start=0), prepare_dcor(rng.standard_normal(n)))
    assert np.mean(out["p_value"] < 0.05) <= 0.05
    assert np.all((out["p_value"] >= 0) & (out["p_value"] <= 1))


def test_refusals():
    with pytest.raises(ValueError, match="covariates"):
        prepare_dcor(np.arange(5.0), covariates=np.ones((5, 1)))
    with pytest.raises(ValueError, match="constant"):
        prepare_dcor(np.ones(6))
    state = prepare_dcor(np.arange(6.0))
    with pytest.raises(ValueError, match="samples"):
        dcor_statistics(prepare_block(np.ones((5, 2)), start=0), state)
