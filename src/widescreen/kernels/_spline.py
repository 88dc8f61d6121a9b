"""Nonparametric (B-spline) screening of Fan, Feng & Song (2011), batched over a block.

For each feature x_j the kernel fits the centred response by least squares on a cubic B-spline basis of
x_j (``n_basis`` functions, 5 by default) and reports the marginal utility ``score`` = mean of the squared
fitted values. The basis spans the constants (the functions sum to one on the data), so this is the fit with
an intercept. With covariates Z the fit is y ~ 1 + Z + spline(x_j) and the utility is the extra fitted sum
of squares over y ~ 1 + Z, divided by n.

Basis
-----
The ``n_basis - degree + 1`` base knots are quantiles of the feature at equally spaced levels (its minimum,
interior quantiles, its maximum); ``degree`` further knots on each side continue the spacing of the two
outermost base knots, the layout of scikit-learn's SplineTransformer, so with distinct knots the basis equals
``SplineTransformer(knots=<those quantiles>, degree=degree)``. Every feature of a tile is evaluated at once by
the Cox-de Boor recursion (0/0 taken as 0), then the per-feature normal equations, of size n_basis - 1 after
centring the basis and dropping one function, are solved together.

Ties
----
Features with few distinct values (dosages 0/1/2, binary features) have colliding quantile knots. Repeated
knots are kept, which is a valid B-spline basis with lower smoothness at that value; the outer spacing is
taken from the first distinct neighbour of the boundary knot. Such a basis is (nearly) rank deficient on the
data: the per-feature system is solved through its eigendecomposition, dropping directions with eigenvalue
below ``RANK_TOL`` times the largest, and its rank is the fit's degrees of freedom ``df``. A feature with k
distinct values thus gets df <= k - 1; for k <= n_basis the fit is the one-way analysis of variance on
those values. Never NaN: a constant feature has df = 0 and score 0.

Statistics: ``score``, ``r2`` (share of the (residual) response sum of squares explained), ``f`` and
``p_value`` of the F test against the fit without the feature, with ``df`` and n - 1 - q - df degrees of
freedom.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ..store import Block
from ._linear import _orthonormal_basis

#: Features per tile: the basis of a tile, (n_basis + degree) arrays of shape (n, TILE), stays small.
TILE = 128
#: Relative eigenvalue below which a direction of the per-feature normal equations counts as absent.
RANK_TOL = 1e-10


@dataclass(frozen=True)
class SplineState:
    """Response state of a spline pass.

    Attributes
    ----------
    y : ndarray of shape (n, m)
        Centred responses (the real one first, then permuted copies), residualised on the covariates.
    basis : ndarray of shape (n, q)
        Orthonormal basis of the centred covariates.
    tss : ndarray of shape (m,)
        Sum of squares of each column of ``y``.
    n_basis, degree : int
    """

    y: np.ndarray
    basis: np.ndarray
    tss: np.ndarray
    n_basis: int
    degree: int

    @property
    def n_knots(self) -> int:
        return self.n_basis - self.degree + 1

    @property
    def n_nulls(self) -> int:
        return self.y.shape[1] - 1


def prepare_spline(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    *,
    n_basis: int = 5,
    degree: int = 3,
) -> SplineState:
    """Build the response state of a spline pass.

    Parameters
    ----------
    y : ndarray of shape (n,) or (n, m)
        The response, or the response followed by permuted copies.
    covariates : ndarray of shape (n, q), optional
        Adjustment variables, fitted alongside each feature's spline.
    n_basis : int
        B-spline functions per feature (degrees of freedom of the fit with its intercept).
    degree : int
        Polynomial degree of the splines (3: cubic), at least 1.
    """
    if not isinstance(degree, int | np.integer) or degree < 1:
        # Degree 0 has no knot beyond the maximum, so the half-open spans would miss it.
        raise ValueError(f"degree must be an int >= 1; got {degree!r}")
    if not isinstance(n_basis, int | np.integer) or n_basis < degree + 1:
        raise ValueError(f"n_basis must be an int >= degree + 1 = {degree + 1}; got {n_basis!r}")
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2:
        raise ValueError(f"y must have shape (n,) or (n, m); got {y.shape}")
    n = y.shape[0]
    Z = (
        np.empty((n, 0))
        if covariates is None
        else np.asarray(covariates, dtype=np.float64).reshape(n, -1)
    )
    basis = _orthonormal_basis(Z)
    yr = y - y.mean(axis=0)
    if basis.shape[1]:
        yr = yr - basis @ (basis.T @ yr)
    tss = np.einsum("ij,ij->j", yr, yr)
    if tss[0] <= 1e-24 * max(float(np.dot(y[:, 0], y[:, 0])), 1.0):
        raise ValueError(
            "the response has no variation left after removing the intercept and covariates"
        )
    if n - 1 - basis.shape[1] - 1 < 1:
        raise ValueError(f"too few samples ({n}) for {basis.shape[1]} adjustment columns")
    return SplineState(y=yr, basis=basis, tss=tss, n_basis=int(n_basis), degree=int(degree))


def quantile_knots(x: np.ndarray, n_knots: int, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Base and full knot vectors of each column.

    Parameters
    ----------
    x : ndarray of shape (n, width)
    n_knots : int
        Base knots: quantiles at levels linspace(0, 1, n_knots) (linear interpolation).
    degree : int

    Returns
    -------
    base : ndarray of shape (n_knots, width)
    knots : ndarray of shape (n_knots + 2 degree, width)
        ``base`` with ``degree`` knots added on each side at the spacing of the outermost distinct base knots.
    """
    base = np.quantile(x, np.linspace(0.0, 1.0, n_knots), axis=0)
    with np.errstate(invalid="ignore"):
        lo = np.where(base > base[0], base - base[0], np.inf).min(axis=0)
        hi = np.where(base < base[-1], base[-1] - base, np.inf).min(axis=0)
    # A constant column has no spacing at all; any positive one keeps the recursion finite.
    lo = np.where(np.isfinite(lo), lo, 1.0)
    hi = np.where(np.isfinite(hi), hi, 1.0)
    steps = np.arange(1, degree + 1)[:, None]
    knots = np.concatenate([base[0] - steps[::-1] * lo, base, base[-1] + steps * hi])
    return base, knots


def bspline_basis(x: np.ndarray, knots: np.ndarray, degree: int) -> np.ndarray:
    """Evaluate every B-spline of each column's knot vector at that column's values.

    Parameters
    ----------
    x : ndarray of shape (n, width)
        Values inside the base interval: knots[degree] <= x <= knots[K - degree - 1] for every column.
    knots : ndarray of shape (K, width)
        Non-decreasing per column; repeated knots allowed.
    degree : int

    Returns
    -------
    ndarray of shape (K - degree - 1, n, width)
        Basis function l of feature j at sample i is ``[l, i, j]``. Half-open spans [t_q, t_q+1).
    """
    K = knots.shape[0]
    n_out = K - degree - 1
    # Only spans inside the base interval (and the one starting at its right end, where the maximum
    # falls) hold data: the others stay None and drop out of the recursion.
    above = [knots[q] <= x for q in range(K)]
    B: list[np.ndarray | None] = [
        (above[q] & ~above[q + 1]).astype(np.float64) if degree <= q <= n_out else None
        for q in range(K - 1)
    ]
    for d in range(1, degree + 1):
        nxt: list[np.ndarray | None] = []
        for q in range(K - 1 - d):
            acc = None
            if B[q] is not None:  # (x - t_q) / (t_q+d - t_q) B_q,d-1
                w1 = knots[q + d] - knots[q]
                acc = np.subtract(x, knots[q])
                acc *= np.divide(1.0, w1, out=np.zeros_like(w1), where=w1 > 0)
                acc *= B[q]
            if B[q + 1] is not None:  # (t_q+d+1 - x) / (t_q+d+1 - t_q+1) B_q+1,d-1
                w2 = knots[q + d + 1] - knots[q + 1]
                term = np.subtract(knots[q + d + 1], x)
                term *= np.divide(1.0, w2, out=np.zeros_like(w2), where=w2 > 0)
                term *= B[q + 1]
                if acc is None:
                    acc = term
                else:
                    acc += term
            nxt.append(acc)
        B = nxt
    return np.stack([b if b is not None else np.zeros_like(x, dtype=np.float64) for b in B])


def _fit_tile(x: np.ndarray, state: SplineState) -> tuple[np.ndarray, np.ndarray]:
    """Fitted sums of squares (width, m) and fit ranks (width,) of one tile of features."""
    _, knots = quantile_knots(x, state.n_knots, state.degree)
    B = bspline_basis(x, knots, state.degree)[:-1]  # the functions sum to 1: one is redundant
    B -= B.mean(axis=1, keepdims=True)
    G = np.einsum("anw,bnw->wab", B, B)
    q = state.basis.shape[1]
    if q:
        QB = np.einsum("nq,anw->aqw", state.basis, B)
        G -= np.einsum("aqw,bqw->wab", QB, QB)
    c = np.einsum("anw,nm->wam", B, state.y)
    lam, U = np.linalg.eigh(G)
    keep = lam > RANK_TOL * np.maximum(lam[:, -1:], 1e-300)
    proj = np.einsum("wab,wam->wbm", U, c)
    inv = np.where(keep, 1.0 / np.where(keep, lam, 1.0), 0.0)
    fitted = np.einsum("wbm,wb->wm", proj**2, inv)
    return fitted, keep.sum(axis=1)


def spline_statistics(block: Block, state: SplineState) -> dict[str, np.ndarray]:
    """Per-feature spline utilities of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``score`` (mean squared fitted value), ``r2``, ``f``, ``df`` (rank of the fit), ``p_value``,
        ``degenerate``; and ``null_score`` of shape (width, m - 1) when permuted copies were given.
    """
    x = block.values
    n, width = x.shape
    if n != state.y.shape[0]:
        raise ValueError(f"the block has {n} samples but the response state {state.y.shape[0]}")
    m = state.y.shape[1]
    fitted = np.empty((width, m))
    rank = np.empty(width, dtype=np.int64)
    for c0 in range(0, width, TILE):
        c1 = min(c0 + TILE, width)
        fitted[c0:c1], rank[c0:c1] = _fit_tile(x[:, c0:c1], state)
    degenerate = block.constant | (rank == 0)
    fitted[degenerate] = 0.0
    rank = np.where(degenerate, 0, rank)
    # Rounding can put the fit a hair past the total.
    fitted = np.minimum(np.maximum(fitted, 0.0), state.tss)
    r2 = fitted[:, 0] / state.tss[0]
    df2 = n - 1 - state.basis.shape[1] - rank
    ok = ~degenerate & (df2 >= 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(ok, (r2 / np.maximum(rank, 1)) / ((1.0 - r2) / np.maximum(df2, 1)), 0.0)
    f = np.where(np.isnan(f), 0.0, f)
    p = np.where(ok, special.fdtrc(np.maximum(rank, 1), np.maximum(df2, 1), f), 1.0)
    out = {
        "score": fitted[:, 0] / n,
        "r2": r2,
        "f": f,
        "df": rank,
        "p_value": p,
        "degenerate": degenerate,
    }
    if m > 1:
        out["null_score"] = fitted[:, 1:] / n
    return out
