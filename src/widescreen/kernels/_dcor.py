"""Distance-correlation screening (Li, Zhong & Zhu 2012): exact dCor^2 of each feature with y.

For scalar x and y, with a_ij = |x_i - x_j|, b_ij = |y_i - y_j|, row sums a_i., b_i. and totals a.., b..,

    S1 = sum_ij a_ij b_ij,   S2 = sum_i a_i. b_i.,   S3 = a.. b..,
    dCov^2_n (V-statistic)   = S1 / n^2 - 2 S2 / n^3 + S3 / n^4,
    dCov^2_u (U-statistic)   = S1 / (n(n-3)) - 2 S2 / (n(n-2)(n-3)) + S3 / (n(n-1)(n-2)(n-3))

(Huo & Szekely 2016; the U-statistic is the bias-corrected one of Szekely & Rizzo 2014). Row sums come from
one sort of x and cumulative sums. The cross term S1 needs, in the order of sorted y,

    D = sum_{i < j} y_j (x_j - x_i)_+,

a dominance sum. It is computed exactly in O(n log n) per feature, vectorised over the features of a tile:
the samples (in y order, padded to a power of two) are split into dyadic groups; a top-down pass over the
levels keeps every group sorted by x, so for each element of a group's later half a cumulative sum gives the
count and the x-sum of the earlier half below it. Between levels each group is stably partitioned into its
halves with one scatter. The last few levels, where groups are tiny, are summed directly over pairs.
Then S1 = 8 D + u'x - 2 sum_j y_j a_j., with u fixed by y (see `_cross_term`).

``score`` is the biased (V-statistic) dCor^2, the utility of Li, Zhong & Zhu; it lies in [0, 1].

Test: by Szekely, Rizzo & Bakirov (2007, Ann. Statist. 35:2769, Theorem 6), under independence
n dCov^2_n / (a.. b.. / n^4) converges to a quadratic form Q with E Q = 1 and P(Q >= chi2_1 quantile at 1 - a)
<= a for a <= 0.215. ``p_value`` is therefore the chi-square (1 df) tail of that statistic: a conservative
p-value, meaningful below 0.215 (larger values only say "not significant").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ..store import Block

#: Features per tile: the level arrays of a tile (a few of shape (TILE, 2^ceil(log2 n))) stay in cache.
TILE = 128
#: Levels with groups of at most 2^DIRECT_LEVELS elements are summed over all pairs instead of partitioned.
DIRECT_LEVELS = 3


@dataclass(frozen=True)
class DcorState:
    """Response state of a distance-correlation pass, one row per response (the real one, then copies).

    Attributes
    ----------
    order : ndarray of shape (m, n), int
        Sample indices sorting each response.
    y_sorted : ndarray of shape (m, n)
        Each response centred and sorted.
    b_row : ndarray of shape (m, n)
        Row sums b_i. of |y_i - y_j|, in sorted order.
    u : ndarray of shape (m, n)
        Weights of the linear part of the cross term, in sorted order.
    b_total : ndarray of shape (m,)
    dvar : ndarray of shape (m,)
        V-statistic distance variance dVar^2_n(y).
    u_dvar : ndarray of shape (m,)
        U-statistic distance variance (0 when n < 4).
    """

    order: np.ndarray
    y_sorted: np.ndarray
    b_row: np.ndarray
    u: np.ndarray
    b_total: np.ndarray
    dvar: np.ndarray
    u_dvar: np.ndarray

    @property
    def n(self) -> int:
        return self.order.shape[1]

    @property
    def n_nulls(self) -> int:
        return self.order.shape[0] - 1


def _row_sums_sorted(v: np.ndarray) -> np.ndarray:
    """Row sums sum_j |v_k - v_j| of values sorted along the last axis, shape (..., n)."""
    n = v.shape[-1]
    k = np.arange(n)
    before = np.cumsum(v, axis=-1) - v  # exclusive prefix sums
    return (2 * k - n) * v - 2 * before + v.sum(axis=-1, keepdims=True)


def _u_moments(s1, s2, s3, n: int):
    """Both distance covariances from the three sums (the U-statistic is 0 when n < 4)."""
    v = s1 / n**2 - 2 * s2 / n**3 + s3 / n**4
    if n < 4:
        return v, np.zeros_like(v)
    u = (
        s1 / (n * (n - 3))
        - 2 * s2 / (n * (n - 2) * (n - 3))
        + s3 / (n * (n - 1) * (n - 2) * (n - 3))
    )
    return v, u


def prepare_dcor(y: np.ndarray, covariates: np.ndarray | None = None) -> DcorState:
    """Build the response state of a distance-correlation pass.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies.
    covariates : None
        Distance correlation has no covariate adjustment; pass residuals of y on the covariates as ``y``
        instead. Anything but None is refused.
    """
    if covariates is not None:
        raise ValueError(
            "distance-correlation screening takes no covariates; screen the residuals of y on them instead"
        )
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2 or y.shape[0] < 2:
        raise ValueError(f"y must have shape (n,) or (n, m) with n >= 2; got {y.shape}")
    n = y.shape[0]
    yc = (y - y.mean(axis=0)).T  # (m, n)
    if np.ptp(yc[0]) == 0:
        raise ValueError("the response is constant: distance correlation is undefined")
    order = np.argsort(yc, axis=1, kind="stable")
    ys = np.take_along_axis(yc, order, axis=1)
    b_row = _row_sums_sorted(ys)
    b_total = b_row.sum(axis=1)
    # Linear part of the cross term: 4 sum_i x_i (sum_{j>i} y_j - i y_i), in sorted order (see _cross_term).
    after = ys.sum(axis=1, keepdims=True) - np.cumsum(ys, axis=1)
    u = 4.0 * (after - np.arange(n) * ys)
    s1 = 2 * n * np.einsum("ij,ij->i", ys, ys) - 2 * ys.sum(axis=1) ** 2
    dvar, u_dvar = _u_moments(s1, np.einsum("ij,ij->i", b_row, b_row), b_total**2, n)
    return DcorState(
        order=order, y_sorted=ys, b_row=b_row, u=u, b_total=b_total, dvar=dvar, u_dvar=u_dvar
    )


def _dominance(xp: np.ndarray, order: np.ndarray, yp: np.ndarray) -> np.ndarray:
    """D = sum_{i<j} y_j (x_j - x_i)_+ per row.

    Parameters
    ----------
    xp : ndarray of shape (w, N)
        Rows of x in y order, padded to N = 2^L columns with values above every real one.
    order : ndarray of shape (w, N), int
        ``argsort(xp, axis=1)``; ties in x add 0 to D whichever way they are ordered.
    yp : ndarray of shape (N,)
        Sorted y, padded with zeros. A padded element sits after every real one in y order, so it is only
        ever the later element of a pair with y = 0 and adds nothing.

    Returns
    -------
    ndarray of shape (w,)
    """
    w, N = xp.shape
    L = N.bit_length() - 1
    lmin = min(DIRECT_LEVELS, L)
    D = np.zeros(w)
    if lmin < L:
        rowoff = (np.arange(w, dtype=np.int64) * N)[:, None]
        # x and y values travel together through the partitions as one complex number: one scatter.
        vy = np.empty((w, N), dtype=np.complex128)
        vy.real = np.take_along_axis(xp, order, axis=1)
        vy.imag = yp[order]
        pos = order.astype(np.int32)  # position in y order
        j = np.arange(N, dtype=np.int32)
        cl = np.empty((w, N), dtype=np.int32)
        half = np.empty((w, N), dtype=np.int32)
        idx = np.empty((w, N), dtype=np.int64)
        lsum = np.empty((w, N))
        tmp = np.empty((w, N))
        for level in range(L - 1, lmin - 1, -1):
            s = 1 << level
            groups = N // (2 * s)
            base = ((j // (2 * s)) * s).astype(np.int32)  # earlier-half elements before each group
            v, yv = vy.real, vy.imag
            np.right_shift(pos, level, out=half)
            half &= 1  # 1 for the later half of the group
            np.subtract(1, half, out=cl)
            np.multiply(v, cl, out=tmp)
            np.cumsum(cl, axis=1, out=cl)  # earlier-half elements up to here, counted over the row
            np.cumsum(tmp, axis=1, out=lsum)
            if groups > 1:  # make the x-sums restart at each group
                l3 = lsum.reshape(w, groups, 2 * s)
                l3[:, 1:, :] -= l3[:, :-1, -1:].copy()
            np.subtract(cl, base, out=idx)
            np.multiply(v, idx, out=tmp)
            tmp -= lsum  # sum over earlier-half i below x_j of (x_j - x_i)
            D += np.einsum("ij,ij->i", tmp, yv * half)
            if level > lmin:
                # Stable partition of each group into its halves, both keeping x order.
                np.subtract(j + (s + 1), cl, out=idx)
                idx -= cl
                idx *= half
                idx += cl
                idx += base - 1
                idx += rowoff
                flat = idx.ravel()
                nxt = np.empty_like(vy)
                nxt.ravel()[flat] = vy.ravel()
                vy = nxt
                nxt_pos = np.empty_like(pos)
                nxt_pos.ravel()[flat] = pos.ravel()
                pos = nxt_pos
    for level in range(lmin - 1, -1, -1):
        s = 1 << level
        groups = N // (2 * s)
        x4 = xp.reshape(w, groups, 2, s)
        later_y = yp.reshape(groups, 2, s)[:, 1, :]
        # (w, group, earlier, later): every pair of the two halves of every group
        d = np.maximum(x4[:, :, 1, None, :] - x4[:, :, 0, :, None], 0.0)
        D += np.einsum("wgij,gj->w", d, later_y)
    return D


def _cross_term(xy: np.ndarray, state: DcorState, r: int):
    """S1, S2, a.. and sum a_i.^2 for rows of x already in the order of response ``r``.

    With P_j = sum_{i<j} |x_j - x_i| (y order), S1 = 2 sum_j y_j (2 P_j - a_j.), and
    P_j = 2 sum_{i<j, x_i <= x_j} (x_j - x_i) - j x_j + sum_{i<j} x_i, which gives
    S1 = 8 D + u'x - 2 sum_j y_j a_j. with u_i = 4 (sum_{j>i} y_j - i y_i).
    """
    w, n = xy.shape
    N = 1 << max(1, (n - 1).bit_length())
    xp = np.empty((w, N))
    xp[:, :n] = xy
    top = xy.max(axis=1, keepdims=True)
    xp[:, n:] = top + 1.0 + np.abs(top)  # padding sorts after every real value
    yp = np.zeros(N)
    yp[:n] = state.y_sorted[r]
    full = np.argsort(xp, axis=1)
    D = _dominance(xp, full, yp)
    order = full[:, :n]  # the padding sorts last, so these are the real samples in x order
    xs = np.take_along_axis(xy, order, axis=1)
    a = _row_sums_sorted(xs)
    y_at = state.y_sorted[r][order]
    b_at = state.b_row[r][order]
    s1 = 8.0 * D + xy @ state.u[r] - 2.0 * np.einsum("ij,ij->i", a, y_at)
    s2 = np.einsum("ij,ij->i", a, b_at)
    return s1, s2, a.sum(axis=1), np.einsum("ij,ij->i", a, a)


def dcor_statistics(block: Block, state: DcorState) -> dict[str, np.ndarray]:
    """Per-feature distance statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``dcov_sqr`` and ``dcor_sqr`` (V-statistics), ``u_dcov_sqr`` and ``u_dcor_sqr`` (U-statistics,
        0 when n < 4), ``p_value`` (conservative, see the module notes), ``score`` = ``dcor_sqr``,
        ``degenerate``; and ``null_score`` of shape (width, m - 1) (``dcor_sqr`` with each permuted copy)
        when permuted copies were given. Each copy costs one more pass over the block.
    """
    x = block.values
    n, width = x.shape
    if n != state.n:
        raise ValueError(f"the block has {n} samples but the response state {state.n}")
    m = state.order.shape[0]
    s1 = np.empty((m, width))
    s2 = np.empty((m, width))
    a_tot = np.empty(width)
    a_sq = np.empty(width)
    for r in range(m):
        for c0 in range(0, width, TILE):
            c1 = min(c0 + TILE, width)
            xy = np.ascontiguousarray(x[state.order[r], c0:c1].T)
            s1[r, c0:c1], s2[r, c0:c1], a_tot[c0:c1], a_sq[c0:c1] = _cross_term(xy, state, r)
    colsum = x.sum(axis=0)
    xvar_s1 = 2 * n * block.sumsq - 2 * colsum**2
    dvar_x, u_dvar_x = _u_moments(xvar_s1, a_sq, a_tot**2, n)
    dcov, u_dcov = _u_moments(s1, s2, a_tot * state.b_total[:, None], n)
    degenerate = block.constant | (dvar_x <= 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        dcor = dcov / np.sqrt(dvar_x * state.dvar[:, None])
        u_den = np.sqrt(np.abs(u_dvar_x * state.u_dvar[:, None]))
        u_dcor = np.where(u_den > 0, u_dcov / u_den, 0.0)
        stat = n * dcov[0] * n**4 / (a_tot * state.b_total[0])
    dcor = np.where(degenerate | ~np.isfinite(dcor), 0.0, dcor)
    np.clip(dcor, 0.0, 1.0, out=dcor)  # rounding can leave it a hair outside
    stat = np.where(degenerate | ~np.isfinite(stat), 0.0, np.maximum(stat, 0.0))
    p = np.where(degenerate, 1.0, special.chdtrc(1, stat))
    out = {
        "score": dcor[0],
        "dcor_sqr": dcor[0],
        "dcov_sqr": np.where(degenerate, 0.0, dcov[0]),
        "u_dcov_sqr": np.where(degenerate, 0.0, u_dcov[0]),
        "u_dcor_sqr": np.where(degenerate, 0.0, u_dcor[0]),
        "p_value": p,
        "degenerate": degenerate,
    }
    if m > 1:
        out["null_score"] = dcor[1:].T
    return out
