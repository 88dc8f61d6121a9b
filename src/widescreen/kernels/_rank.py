"""Rank-based screening: Spearman's rank correlation and the rank utility of Zhu, Li, Li & Zhu (2011).

Spearman
--------
Each feature and the response are replaced by their ranks (ties get the average rank) and correlated as in
the linear kernel (whose response state is reused): ``rho``, its t statistic rho sqrt(df / (1 - rho^2)) with df = n - 2 (the usual large-sample
approximation) and the two-sided ``p_value``. With covariates Z, ``rho`` is the partial correlation of the
ranks given [1, Z] (Z as given, not ranked) and df = n - 2 - rank(Z). Imputed entries of a feature share one
tied rank, that of its observed mean.

Rank utility
------------
omega_k = n^-1 sum_j (n^-1 sum_i x_ik 1(y_i < y_j))^2 for the standardised feature (mean 0 and variance 1,
dividing by n), the model-free utility of Zhu et al. Sorting y once, the inner sum for sample j is the sum
of x over the samples before the first tie of y_j in sorted order, so with C(t) the cumulative sums of x in
y order and g running over the tie groups of y (first position t_g, size w_g):
omega_k = n^-3 sum_g w_g C(t_g)^2. One gather and one cumulative sum per block, no n x n indicator.
No test comes with the utility, so there is no ``p_value``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ..store import Block
from ._linear import LinearState, prepare_linear

#: Features per tile: keeps the work arrays of the ranking sort and of the cumulative sums in cache.
TILE = 128


def average_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n of each column, ties sharing their average rank.

    Parameters
    ----------
    x : ndarray of shape (n, width)

    Returns
    -------
    ndarray of shape (n, width), float64
        Equal to ``scipy.stats.rankdata(x, axis=0)`` (method "average").
    """
    x = np.asarray(x, dtype=np.float64)
    n, width = x.shape
    out = np.empty((n, width))
    pos = np.arange(n)
    for c0 in range(0, width, TILE):
        c1 = min(c0 + TILE, width)
        rows = np.ascontiguousarray(x[:, c0:c1].T)
        order = np.argsort(rows, axis=1)
        s = np.take_along_axis(rows, order, axis=1)
        new = np.ones_like(s, dtype=bool)
        new[:, 1:] = s[:, 1:] != s[:, :-1]
        if new.all():
            sorted_ranks = np.broadcast_to(pos + 1.0, s.shape)
        else:
            last = np.ones_like(new)
            last[:, :-1] = new[:, 1:]
            # First and last sorted position of each element's tie group.
            first = np.maximum.accumulate(np.where(new, pos, 0), axis=1)
            end = np.minimum.accumulate(np.where(last, pos, n - 1)[:, ::-1], axis=1)[:, ::-1]
            sorted_ranks = 0.5 * (first + end) + 1.0
        r = np.empty_like(s)
        np.put_along_axis(r, order, sorted_ranks, axis=1)
        out[:, c0:c1] = r.T
    return out


@dataclass(frozen=True)
class SpearmanState:
    """Response state of a Spearman pass: the linear state of the ranked response(s)."""

    linear: LinearState

    @property
    def n_nulls(self) -> int:
        return self.linear.n_nulls


def prepare_spearman(y: np.ndarray, covariates: np.ndarray | None = None) -> SpearmanState:
    """Build the response state of a Spearman pass.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies; each column is ranked.
    covariates : ndarray of shape (n, q), optional
        Adjustment variables, projected out of the ranks.
    """
    y = np.asarray(y, dtype=np.float64)
    if y.ndim not in (1, 2):
        raise ValueError(f"y must have shape (n,) or (n, m); got {y.shape}")
    ranked = average_ranks(y.reshape(y.shape[0], -1))
    return SpearmanState(linear=prepare_linear(ranked, covariates))


def spearman_statistics(block: Block, state: SpearmanState) -> dict[str, np.ndarray]:
    """Per-feature rank correlations of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``rho``, ``t``, ``p_value`` (two-sided, t with n - 2 - q df), ``score`` = |rho|, ``degenerate``;
        and ``null_score`` of shape (width, m - 1) when permuted copies were given.
    """
    lin = state.linear
    n = lin.y.shape[0]
    if block.values.shape[0] != n:
        raise ValueError(
            f"the block has {block.values.shape[0]} samples but the response state {n}"
        )
    ranks = average_ranks(block.values)
    ranks -= 0.5 * (n + 1)
    sumsq = np.einsum("ij,ij->j", ranks, ranks)
    m, q = lin.y.shape[1], lin.basis.shape[1]
    # The linear kernel's computation on the ranks: one product with the responses and the basis.
    cross = (np.hstack([lin.y, lin.basis]) if q else lin.y).T @ ranks
    ss = sumsq - np.einsum("ij,ij->j", cross[m:], cross[m:]) if q else sumsq
    degenerate = block.constant | (ss <= 1e-10 * np.maximum(sumsq, 1e-300))
    r = np.where(degenerate, 0.0, cross[:m] / np.sqrt(np.where(degenerate, 1.0, ss)))
    np.clip(r, -1.0, 1.0, out=r)
    rho = r[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = rho * np.sqrt(lin.df / np.maximum(1.0 - rho**2, 1e-300))
    # Two-sided t tail through the regularised incomplete beta function.
    p = np.where(degenerate, 1.0, special.betainc(0.5 * lin.df, 0.5, lin.df / (lin.df + t**2)))
    out = {
        "score": np.abs(rho),
        "rho": rho,
        "t": np.where(degenerate, 0.0, t),
        "p_value": p,
        "degenerate": degenerate,
    }
    if m > 1:
        out["null_score"] = np.abs(r[1:]).T
    return out


@dataclass(frozen=True)
class RankUtilityState:
    """Response state of a rank-utility pass.

    Attributes
    ----------
    order : ndarray of shape (m, n), int
        Sample indices sorting each response (the real one, then permuted copies).
    rows : ndarray of shape (g,), int
        For each tie group of y but the first, the cumulative-sum row (in sorted order) of the samples
        strictly below it. Shared by the copies, which have the same sorted values.
    weights : ndarray of shape (g,)
        Size of each of those tie groups.
    """

    order: np.ndarray
    rows: np.ndarray
    weights: np.ndarray

    @property
    def n(self) -> int:
        return self.order.shape[1]

    @property
    def n_nulls(self) -> int:
        return self.order.shape[0] - 1


def prepare_rank_utility(y: np.ndarray, covariates: np.ndarray | None = None) -> RankUtilityState:
    """Build the response state of a rank-utility pass.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies of it.
    covariates : None
        The utility has no covariate adjustment; anything but None is refused.
    """
    if covariates is not None:
        raise ValueError(
            "rank-utility screening takes no covariates; screen the residuals of y on them instead"
        )
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2 or y.shape[0] < 2:
        raise ValueError(f"y must have shape (n,) or (n, m) with n >= 2; got {y.shape}")
    order = np.argsort(y.T, axis=1, kind="stable")
    ys = np.sort(y[:, 0])
    if ys[0] == ys[-1]:
        raise ValueError("the response is constant: the rank utility is 0 for every feature")
    starts = np.flatnonzero(np.r_[True, ys[1:] != ys[:-1]])
    sizes = np.diff(np.r_[starts, len(ys)])
    # The lowest group has no sample strictly below it: it adds 0 and is left out.
    return RankUtilityState(order=order, rows=starts[1:] - 1, weights=sizes[1:].astype(np.float64))


def rank_utility_statistics(block: Block, state: RankUtilityState) -> dict[str, np.ndarray]:
    """Per-feature rank utility omega_k of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``omega`` and ``score`` = ``omega`` (0 for a constant feature), ``degenerate``; and ``null_score``
        of shape (width, m - 1) when permuted copies were given.
    """
    x = block.values
    n, width = x.shape
    if n != state.n:
        raise ValueError(f"the block has {n} samples but the response state {state.n}")
    m = state.order.shape[0]
    raw = np.empty((m, width))
    for r in range(m):
        for c0 in range(0, width, TILE):
            c1 = min(c0 + TILE, width)
            cs = np.cumsum(x[state.order[r], c0:c1], axis=0)[state.rows]
            raw[r, c0:c1] = state.weights @ (cs * cs)
    degenerate = block.constant.copy()
    var = np.where(degenerate, 1.0, block.sumsq / n)
    omega = np.where(degenerate, 0.0, raw / (n**3 * var))
    out = {"score": omega[0], "omega": omega[0], "degenerate": degenerate}
    if m > 1:
        out["null_score"] = omega[1:].T
    return out
