"""HOLP kernel against the properties in CHECKS.md (Wang & Leng 2016) and numpy linear algebra."""

from __future__ import annotations

import numpy as np
import pytest

from widescreen.kernels._holp import (
    check_holp_size,
    holp_gram,
    holp_memory,
    holp_statistics,
    prepare_holp,
)
from widescreen.store._reader import prepare_block


def _blocks(X, width):
    # One block at a time, as a pass reads them: a block's buffers are reused by the next one.
    for a in range(0, X.shape[1], width):
        yield prepare_block(X[:, a : a + width], start=a)


def _run(X, y, width=7, **kw):
    """Two passes over blocks of ``width`` features (the last one narrower)."""
    gram = sum(holp_gram(b) for b in _blocks(X, width))
    state = prepare_holp(y, gram, **kw)
    parts = [holp_statistics(b, state) for b in _blocks(X, width)]
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}, gram


def test_gram_summed_over_blocks_is_the_centred_gram(rng):
    X = rng.standard_normal((20, 45))
    _, gram = _run(X, rng.standard_normal(20))
    Xc = X - X.mean(axis=0)
    np.testing.assert_allclose(gram, Xc @ Xc.T, atol=1e-12)


def test_minimum_norm_solution_and_interpolation(rng):
    # CHECKS.md (Wang & Leng 2016): with rank(X) = n, beta = pinv(X) @ y and X beta = y. Centred, the
    # rank is n - 1 and the same holds for the centred X and y.
    n, p = 25, 60
    X = rng.standard_normal((n, p))
    y = rng.standard_normal(n)
    out, _ = _run(X, y)
    Xc, yc = X - X.mean(axis=0), y - y.mean()
    assert np.linalg.matrix_rank(Xc) == n - 1
    np.testing.assert_allclose(out["beta"], np.linalg.pinv(Xc) @ yc, atol=1e-10)  # numpy pinv
    np.testing.assert_allclose(Xc @ out["beta"], yc, atol=1e-9)
    np.testing.assert_allclose(out["score"], np.abs(out["beta"]))


def test_ridge_form_and_its_large_ridge_limit(rng):
    n, p = 20, 50
    X = rng.standard_normal((n, p))
    y = rng.standard_normal(n)
    Xc, yc = X - X.mean(axis=0), y - y.mean()
    out, _ = _run(X, y, ridge=3.0)
    # CHECKS.md: ridge form X^T (X X^T + r I)^-1 y (numpy solve as reference)
    np.testing.assert_allclose(
        out["beta"], Xc.T @ np.linalg.solve(Xc @ Xc.T + 3.0 * np.eye(n), yc), atol=1e-12
    )
    # CHECKS.md: r * beta_ridge -> X^T y as r -> infinity (relative error O(||X X^T|| / r))
    errors = []
    for r in (1e3, 1e5, 1e7):
        beta = _run(X, y, ridge=r)[0]["beta"]
        errors.append(np.linalg.norm(r * beta - Xc.T @ yc) / np.linalg.norm(Xc.T @ yc))
    assert errors[2] < 1e-5 and errors[0] > errors[1] > errors[2]


def test_covariates_are_projected_out(rng):
    n, p = 30, 80
    X = rng.standard_normal((n, p))
    Z = rng.standard_normal((n, 2))
    y = Z @ [2.0, -1.0] + X[:, 3] + 0.1 * rng.standard_normal(n)
    out, _ = _run(X, y, covariates=Z)
    W = np.column_stack([np.ones(n), Z])
    P = np.eye(n) - W @ np.linalg.pinv(W)  # residual maker of [1, Z]
    np.testing.assert_allclose(
        out["beta"], np.linalg.pinv(P @ X) @ (P @ y), atol=1e-10
    )  # numpy pinv


def test_permuted_copies_and_constant_feature(rng):
    n, p = 15, 40
    X = rng.standard_normal((n, p))
    X[:, 9] = 7.0
    y = rng.standard_normal(n)
    perm = rng.permutation(n)
    both, _ = _run(X, np.column_stack([y, y[perm]]))
    alone, _ = _run(X, y[perm])
    np.testing.assert_allclose(both["null_score"][:, 0], alone["score"], atol=1e-12)
    assert both["score"][9] == 0 and both["degenerate"][9]
    assert np.all(np.isfinite(both["score"]))


def test_planted_signals_rank_first(rng):
    # Wang & Leng (2016): under a sparse linear model with p >> n, HOLP keeps the true features on top.
    n, p = 200, 2000
    X = rng.standard_normal((n, p))
    y = 3 * X[:, 11] - 3 * X[:, 500] + 3 * X[:, 1999] + rng.standard_normal(n)
    out, _ = _run(X, y, width=512)
    assert set(np.argsort(out["score"])[-3:]) == {11, 500, 1999}


def test_memory_budget_is_enforced_with_a_clear_message(rng):
    assert holp_memory(1000) == 3 * 8 * 1000**2
    with pytest.raises(ValueError, match=r"n = 100000 samples.*GiB"):
        check_holp_size(100_000, memory_budget=2**30)
    block = prepare_block(rng.standard_normal((300, 4)), start=0)
    with pytest.raises(ValueError, match="n = 300"):
        holp_gram(block, memory_budget=1000)
    with pytest.raises(ValueError, match="n = 300"):
        prepare_holp(np.arange(300.0), np.eye(300), memory_budget=1000)


def test_singular_gram_without_ridge_is_refused(rng):
    n = 30
    X = rng.standard_normal((n, 10))  # p < n - 1: X X^T is singular beyond the centring
    y = rng.standard_normal(n)
    gram = holp_gram(prepare_block(X, start=0))
    with pytest.raises(ValueError, match="ridge"):
        prepare_holp(y, gram)
    state = prepare_holp(y, gram, ridge=1.0)
    assert np.all(np.isfinite(state.alpha))
    with pytest.raises(ValueError, match="ridge"):
        prepare_holp(y, gram, ridge=-1.0)
    with pytest.raises(ValueError, match="shape"):
        prepare_holp(y[:-1], gram)
