"""High-dimensional ordinary least-squares projection, HOLP (Wang & Leng 2016), in two passes.

beta = X' (X X' + r I)^-1 y: the minimum-norm least-squares solution for r = 0 (when p > n), its ridge
form for r > 0; ``score`` = |beta_j|.

Pass 1 sums the n x n Gram matrix over blocks, ``holp_gram(block)`` returning one block's part X_b X_b'.
`prepare_holp` then solves (X X' + r I) alpha = y once, and pass 2 maps each block to beta_b = X_b' alpha
(`holp_statistics`).

Centring: block values are centred per column, so HOLP runs on centred X, and y is centred too; this is
least squares with an unpenalised intercept. Centred columns sum to zero, so X X' is singular along the ones
vector whatever p: the solve adds s 1 1'/n (any s > 0 gives the same beta, since y and the columns of X are
orthogonal to 1) and for r = 0 the result is pinv(X) y, with X beta = y when rank(X) = n - 1. Covariates Z are
projected out of X and y the same way (the Gram is projected once, in `prepare_holp`).

Memory: the pass holds the running Gram sum, one block's part and, in `prepare_holp`, a factorisation:
``holp_memory(n)`` = 3 * 8 n^2 bytes. Both functions refuse when that exceeds ``memory_budget``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from ..store import Block
from ._linear import _orthonormal_basis

#: Default memory allowed for the n x n matrices of a HOLP pass (bytes).
DEFAULT_MEMORY_BUDGET = 2 * 2**30


def holp_memory(n: int) -> int:
    """Bytes a HOLP pass needs for its n x n float64 matrices (three of them)."""
    return 3 * 8 * int(n) ** 2


def check_holp_size(n: int, memory_budget: int = DEFAULT_MEMORY_BUDGET) -> None:
    """Raise ValueError when the n x n matrices of HOLP do not fit within ``memory_budget`` bytes."""
    need = holp_memory(n)
    if need > memory_budget:
        raise ValueError(
            f"HOLP needs n x n matrices: with n = {n} samples that is {need / 2**30:.2f} GiB "
            f"(3 x 8 n^2 bytes), above the memory budget of {memory_budget / 2**30:.2f} GiB; "
            "raise memory_budget or use a marginal screening kernel"
        )


def _add_outer(
    A: np.ndarray, U: np.ndarray, V: np.ndarray, factor: float, rows: int = 1024
) -> None:
    """A += factor U V' in place, a band of rows at a time (no second n x n temporary)."""
    for r0 in range(0, A.shape[0], rows):
        A[r0 : r0 + rows] += factor * (U[r0 : r0 + rows] @ V.T)


def holp_gram(block: Block, memory_budget: int = DEFAULT_MEMORY_BUDGET) -> np.ndarray:
    """One block's part of the Gram matrix, X_b X_b'.

    Returns
    -------
    ndarray of shape (n, n)
        A new array (not tied to the block's buffer); the pass sums these over blocks.
    """
    x = block.values
    check_holp_size(x.shape[0], memory_budget)
    return x @ x.T


@dataclass(frozen=True)
class HolpState:
    """Response state of the second HOLP pass.

    Attributes
    ----------
    alpha : ndarray of shape (n, m)
        (X X' + r I)^-1 y for the centred (and covariate-adjusted) responses, the real one first, then
        permuted copies; beta_b = X_b' alpha.
    ridge : float
    """

    alpha: np.ndarray
    ridge: float

    @property
    def n_nulls(self) -> int:
        return self.alpha.shape[1] - 1


def prepare_holp(
    y: np.ndarray,
    gram: np.ndarray,
    covariates: np.ndarray | None = None,
    *,
    ridge: float = 0.0,
    memory_budget: int = DEFAULT_MEMORY_BUDGET,
) -> HolpState:
    """Solve (X X' + r I) alpha = y once.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies.
    gram : ndarray of shape (n, n)
        X X' of the centred features, the sum of `holp_gram` over all blocks. Not modified.
    covariates : ndarray of shape (n, q), optional
        Adjustment variables, projected out of X and y.
    ridge : float
        r >= 0, in the units of X X' (sums of squares over features).
    memory_budget : int
        Bytes allowed for the n x n matrices.

    Raises
    ------
    ValueError
        On shapes that do not match, a negative ridge, n too large for the budget, or a Gram matrix that is
        singular beyond the centring (fewer informative features than samples) with ``ridge`` = 0.
    """
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    n = y.shape[0]
    check_holp_size(n, memory_budget)
    gram = np.asarray(gram, dtype=np.float64)
    if gram.shape != (n, n):
        raise ValueError(f"gram must have shape ({n}, {n}) to match y; got {gram.shape}")
    if not np.isfinite(ridge) or ridge < 0:
        raise ValueError(f"ridge must be a finite number >= 0; got {ridge!r}")
    Z = (
        np.empty((n, 0))
        if covariates is None
        else np.asarray(covariates, dtype=np.float64).reshape(n, -1)
    )
    C = _orthonormal_basis(Z)  # centred, so orthogonal to the ones vector
    Q = np.hstack([np.full((n, 1), 1.0 / np.sqrt(n)), C])
    yr = y - Q @ (Q.T @ y)
    scale = max(float(np.trace(gram)) / n, 1e-300)
    A = gram.copy()
    if C.shape[1]:
        # (I - P) G (I - P) with P = C C': G - C (G C)' - (G C) C' + C (C' G C) C'.
        GC = gram @ C
        _add_outer(A, C, GC, -1.0)
        _add_outer(A, GC, C, -1.0)
        _add_outer(A, C, C @ (C.T @ GC), 1.0)
    # Fill the null directions of the projection (the ones vector, the covariates) with a typical scale:
    # the right-hand side has no component there, so the solution has none either.
    _add_outer(A, Q, Q, scale)
    A[np.diag_indices(n)] += ridge
    singular = (
        f"X X' is singular beyond the centring and covariates (rank below n - 1 - q = {n - Q.shape[1]}: "
        f"fewer informative features than samples); use ridge > 0"
    )
    try:
        factor = linalg.cho_factor(A, overwrite_a=True, check_finite=False)
    except linalg.LinAlgError:
        raise ValueError(singular) from None
    del A
    alpha = linalg.cho_solve(factor, yr, check_finite=False)
    del factor
    # A factorisation of a nearly singular matrix can pass and still be useless: check the equations
    # (X X' + r I) alpha = y on the projected Gram.
    lhs = gram @ alpha
    lhs -= Q @ (Q.T @ lhs)
    lhs += ridge * alpha
    if not np.all(np.isfinite(alpha)) or np.linalg.norm(lhs - yr) > 1e-6 * max(
        np.linalg.norm(yr), 1e-300
    ):
        raise ValueError(singular)
    return HolpState(alpha=alpha, ridge=float(ridge))


def holp_statistics(block: Block, state: HolpState) -> dict[str, np.ndarray]:
    """Per-feature HOLP coefficients of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``beta`` (per unit of the centred feature), ``score`` = |beta|, ``degenerate``; and ``null_score``
        of shape (width, m - 1) when permuted copies were given.
    """
    x = block.values
    if x.shape[0] != state.alpha.shape[0]:
        raise ValueError(
            f"the block has {x.shape[0]} samples but the response state {state.alpha.shape[0]}"
        )
    beta = (x.T @ state.alpha).T  # (m, width)
    degenerate = block.constant.copy()
    beta[:, degenerate] = 0.0
    out = {"beta": beta[0], "score": np.abs(beta[0]), "degenerate": degenerate}
    if state.alpha.shape[1] > 1:
        out["null_score"] = np.abs(beta[1:]).T
    return out
