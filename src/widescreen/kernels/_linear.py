"""Linear-model screening statistics: (partial) Pearson correlation, t statistic, p-value.

With covariates Z (and, in the iterative pass, the selected columns), the statistic of feature j is the
partial correlation of x_j and y given [1, Z]: both are projected off the span of [1, Z] and correlated.
Its t statistic, r sqrt(df / (1 - r^2)) with df = n - rank([1, Z]) - 1, equals the t value of x_j in the
least-squares fit y ~ 1 + Z + x_j, which is what the tests check against.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from ..store import Block


@dataclass(frozen=True)
class LinearState:
    """Response state of a linear pass, built once and shared by every block.

    Attributes
    ----------
    basis : ndarray of shape (n, q)
        Orthonormal basis of the centred conditioning columns (covariates and selected features),
        excluding the intercept, which the centred block already removes.
    y : ndarray of shape (n, m)
        Residual responses (the real one first, then permuted copies), each scaled to unit norm.
    df : int
        Residual degrees of freedom of the t statistic.
    lhs_t : ndarray of shape (m + q, n)
        ``[y, basis]`` transposed and C-contiguous: the left factor of the block's one cross-product.
    """

    basis: np.ndarray
    y: np.ndarray
    df: int
    lhs_t: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        if self.lhs_t is None:
            lhs = np.hstack([self.y, self.basis]) if self.basis.shape[1] else self.y
            object.__setattr__(self, "lhs_t", np.ascontiguousarray(lhs.T, dtype=np.float64))

    @property
    def n_nulls(self) -> int:
        return self.y.shape[1] - 1


def _orthonormal_basis(Z: np.ndarray, tol: float = 1e-10) -> np.ndarray:
    """Orthonormal basis of the column span of centred Z, dropping dependent columns."""
    if Z.shape[1] == 0:
        return Z
    Zc = Z - Z.mean(axis=0)
    q, r, _ = _qr_pivoted(Zc)
    diag = np.abs(np.diag(r))
    rank = int(np.sum(diag > tol * max(diag.max(initial=0.0), 1e-300)))
    return q[:, :rank]


def _qr_pivoted(A: np.ndarray):
    from scipy.linalg import qr

    return qr(A, mode="economic", pivoting=True)


def prepare_linear(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    conditioning: np.ndarray | None = None,
) -> LinearState:
    """Build the response state of a linear pass.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies.
    covariates : ndarray of shape (n, q), optional
        Adjustment variables, always projected out.
    conditioning : ndarray of shape (n, s), optional
        Further columns to condition on (the selected features of the iterative pass).
    """
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    n = y.shape[0]
    parts = [a for a in (covariates, conditioning) if a is not None and np.size(a)]
    Z = (
        np.hstack([np.asarray(a, dtype=np.float64).reshape(n, -1) for a in parts])
        if parts
        else np.empty((n, 0))
    )
    basis = _orthonormal_basis(Z)
    yr = y - y.mean(axis=0)
    if basis.shape[1]:
        yr = yr - basis @ (basis.T @ yr)
    norms = np.linalg.norm(yr, axis=0)
    if norms[0] <= 1e-12 * max(np.linalg.norm(y[:, 0]), 1.0):
        raise ValueError(
            "the response has no variation left after removing the intercept and covariates"
        )
    yr = yr / np.where(norms > 0, norms, 1.0)
    df = n - 1 - basis.shape[1] - 1
    if df < 1:
        raise ValueError(f"too few samples ({n}) for {basis.shape[1]} adjustment columns")
    return LinearState(basis=basis, y=yr, df=df)


def linear_statistics(block: Block, state: LinearState) -> dict[str, np.ndarray]:
    """Per-feature statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``correlation`` (partial correlation with the response), ``t``, ``p_value`` (two-sided),
        ``score`` = |correlation|; and ``null_score`` of shape (width, m - 1) when permuted copies
        of the response were given.
    """
    m = state.y.shape[1]
    q = state.basis.shape[1]
    # One product gives the cross-products with the responses and with the basis; the block computes
    # it from its stored values, without writing out the centred float64 block.
    cross = block.cross(state.lhs_t)  # (m + q, width)
    ss = block.sumsq.copy()
    if q:
        ss -= np.einsum("ij,ij->j", cross[m:], cross[m:])
    # Columns (nearly) explained by the adjustment set carry no information of their own.
    degenerate = block.constant | (ss <= 1e-10 * np.maximum(block.sumsq, 1e-300))
    denom = np.sqrt(np.where(degenerate, 1.0, ss))
    r = np.where(degenerate, 0.0, cross[:m] / denom)
    np.clip(r, -1.0, 1.0, out=r)
    corr = r[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = corr * np.sqrt(state.df / np.maximum(1.0 - corr**2, 1e-300))
    # Two-sided p from the t distribution through the regularised incomplete beta (exact, vectorised).
    p = special.betainc(0.5 * state.df, 0.5, state.df / (state.df + t**2))
    p = np.where(degenerate, 1.0, p)
    out = {
        "score": np.abs(corr),
        "correlation": corr,
        "t": np.where(degenerate, 0.0, t),
        "p_value": p,
        "degenerate": degenerate,
    }
    if m > 1:
        out["null_score"] = np.abs(r[1:]).T
    return out
