"""Pure numerics behind the pictures: genomic inflation, point thinning, QQ quantiles.

Arrays in, arrays out; no I/O. The blockwise versions over a run folder live in `_scan.py`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

#: Smallest p-value shown: a p-value of exactly 0 (underflow) is drawn at -log10 of this.
P_FLOOR = np.finfo(np.float64).tiny

#: Genome-wide significance level for common-variant association studies (common practice).
GENOME_WIDE = 5e-8


def chi2_1_median() -> float:
    """Median of the chi-square distribution with 1 degree of freedom (about 0.4549)."""
    return float(stats.chi2.median(1))


def neg_log10(p: np.ndarray) -> np.ndarray:
    """-log10 p of shape like ``p``; p = 0 is floored at `P_FLOOR` so the value stays finite."""
    return -np.log10(np.maximum(np.asarray(p, dtype=np.float64), P_FLOOR))


def chi2_from_p(p: np.ndarray) -> np.ndarray:
    """The 1-df chi-square statistic whose upper tail probability is ``p`` (shape like ``p``)."""
    return stats.chi2.isf(np.asarray(p, dtype=np.float64), 1)


def lambda_gc(p: np.ndarray) -> float:
    """Genomic inflation factor of in-memory p-values.

    lambda_GC = median(chi2 statistics) / median(chi2_1) (common practice), with the statistics
    recovered from the p-values as ``chi2.isf(p, 1)``. About 1 without inflation.

    Parameters
    ----------
    p : ndarray of shape (m,)
        p-values; non-finite entries are ignored.

    Returns
    -------
    float
        NaN when no finite p-value is given.
    """
    p = np.asarray(p, dtype=np.float64).ravel()
    p = p[np.isfinite(p)]
    if p.size == 0:
        return float("nan")
    # chi2.isf is decreasing, so only the middle p-values need transforming (see lambda_from_middle).
    lo, hi = (p.size - 1) // 2, p.size // 2
    part = np.partition(p, [lo, hi])
    return lambda_from_middle(part[lo], part[hi])


def lambda_from_middle(p_low: float, p_high: float) -> float:
    """lambda_GC from the two middle order statistics of the p-values (equal when m is odd).

    chi2.isf is decreasing, so the middle chi-square statistics are those of the middle p-values and
    their mean is the median of the statistics, exactly as `numpy.median` would compute it.
    """
    chi = chi2_from_p(np.array([p_low, p_high]))
    return float(chi.mean() / chi2_1_median())


def thin_mask(
    neglogp: np.ndarray, threshold: float, fraction: float, rng: np.random.Generator
) -> np.ndarray:
    """Which points of a Manhattan plot to draw.

    Every point at or above ``threshold`` t (in -log10 p) is kept. A point below it at height y is
    kept with probability f + (1 - f) 10^(y - t), f = ``fraction``: the probability rises to 1 at t,
    and under the null (where the density of y falls like 10^-y) the ramp makes the density of drawn
    points continuous at t, so the picture shows no step there. NaN points are never kept.

    Parameters
    ----------
    neglogp : ndarray of shape (b,)
    threshold : float
    fraction : float in [0, 1]
    rng : numpy Generator

    Returns
    -------
    ndarray of bool of shape (b,)
    """
    if not 0.0 <= fraction <= 1.0:
        raise ValueError(f"the thinning fraction must be in [0, 1]; got {fraction}")
    y = np.asarray(neglogp, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        above = y >= threshold
        below = y < threshold
    if fraction >= 1.0:
        return above | below
    prob = fraction + (1.0 - fraction) * np.power(10.0, np.where(below, y - threshold, 0.0))
    return above | (below & (rng.random(y.shape) < prob))


def thinning_plan(m: int, threshold: float, budget: int) -> tuple[float, float]:
    """Threshold and base fraction for `thin_mask` so that about ``budget`` null points are drawn.

    Under the null the ramp of `thin_mask` draws about m ln(10) t 10^-t points below t; the
    threshold is raised (in steps of 0.25) until that is at most half the budget, and the base
    fraction spends the rest. All points are drawn when m <= budget.

    Returns
    -------
    threshold, fraction : float
    """
    if m <= budget:
        return float(threshold), 1.0
    t = float(threshold)

    def ramp(t: float) -> float:
        return m * np.log(10.0) * t * 10.0**-t

    while ramp(t) > budget / 2:
        t += 0.25
    return t, float(np.clip((budget - ramp(t)) / m, 0.0, 1.0))


def expected_neglog10(ranks: np.ndarray, m: int) -> np.ndarray:
    """Expected -log10 p of the given ranks (1 = smallest p) among m uniform p-values.

    Uses the plotting positions (i - 0.5) / m (common practice).
    """
    return -np.log10((np.asarray(ranks, dtype=np.float64) - 0.5) / m)


def order_band(ranks: np.ndarray, m: int, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Pointwise band of -log10 of the i-th smallest of m uniform p-values.

    The i-th order statistic of m independent Uniform(0, 1) variables is Beta(i, m - i + 1).

    Returns
    -------
    lower, upper : ndarray of shape like ``ranks``, in -log10 p
    """
    i = np.asarray(ranks, dtype=np.float64)
    a = (1.0 - level) / 2.0
    hi_p = stats.beta.ppf(1.0 - a, i, m - i + 1)
    lo_p = stats.beta.ppf(a, i, m - i + 1)
    return neg_log10(hi_p), neg_log10(lo_p)


@dataclass(frozen=True)
class QQPoints:
    """Points of a QQ plot, strongest first.

    Attributes
    ----------
    ranks : ndarray of int of shape (k,)
        Rank of each point among the m p-values (1 = smallest p).
    expected, observed : ndarray of shape (k,)
        -log10 p expected under uniformity and observed.
    m : int
        Number of p-values.
    exact_above : float
        Observed values at or above this are exact; below it they are read from a histogram of
        bin width ``bin_width`` (0 when every point is exact).
    bin_width : float
    """

    ranks: np.ndarray
    expected: np.ndarray
    observed: np.ndarray
    m: int
    exact_above: float
    bin_width: float


def qq_points(p: np.ndarray, max_points: int = 5000) -> QQPoints:
    """Exact QQ points of in-memory p-values (thinned to about ``max_points`` log-spaced ranks)."""
    p = np.asarray(p, dtype=np.float64).ravel()
    obs = np.sort(neg_log10(p[np.isfinite(p)]))[::-1]
    m = obs.size
    ranks = _plot_ranks(1, m, max_points)
    return QQPoints(ranks, expected_neglog10(ranks, m), obs[ranks - 1], m, 0.0, 0.0)


def qq_from_histogram(
    top_values: np.ndarray,
    edges: np.ndarray,
    counts: np.ndarray,
    max_points: int = 2000,
) -> QQPoints:
    """QQ points from exact strong values and a histogram of the rest, without holding all p-values.

    Parameters
    ----------
    top_values : ndarray of shape (t,)
        Exact -log10 p of every value at or above ``edges[-1]``.
    edges : ndarray of shape (B + 1,)
        Increasing histogram edges in -log10 p, from 0 to the threshold.
    counts : ndarray of int of shape (B,)
        Number of values in each bin ``[edges[b], edges[b + 1])``.
    max_points : int
        Ranks drawn from the histogram part (log-spaced).

    Notes
    -----
    Below the threshold the observed quantile of rank i is read from the cumulative counts with
    linear interpolation inside a bin, so it is off by at most one bin width.
    """
    top = np.sort(np.asarray(top_values, dtype=np.float64))[::-1]
    counts = np.asarray(counts, dtype=np.int64)
    t = top.size
    m = t + int(counts.sum())
    if m == 0:
        empty = np.empty(0)
        return QQPoints(np.empty(0, np.int64), empty, empty, 0, float(edges[-1]), 0.0)
    # n_ge[k] = number of values >= edges[k] (the top values plus the bins from k upwards).
    n_ge = t + np.concatenate([np.cumsum(counts[::-1])[::-1], [0]])
    ranks_low = _plot_ranks(t + 1, m, max_points) if m > t else np.empty(0, np.int64)
    # Rank i sits at the value v where n_ge(v) crosses i; n_ge decreases with the edge.
    obs_low = np.interp(ranks_low - 0.5, n_ge[::-1], edges[::-1])
    ranks = np.concatenate([np.arange(1, t + 1), ranks_low]).astype(np.int64)
    observed = np.concatenate([top, obs_low])
    width = float(edges[1] - edges[0]) if edges.size > 1 else 0.0
    return QQPoints(ranks, expected_neglog10(ranks, m), observed, m, float(edges[-1]), width)


def _plot_ranks(first: int, last: int, max_points: int) -> np.ndarray:
    """Ranks first..last: all of them when few, else log-spaced (dense at the strong end)."""
    n = last - first + 1
    if n <= max_points:
        return np.arange(first, last + 1, dtype=np.int64)
    r = np.unique(np.geomspace(first, last, max_points).round().astype(np.int64))
    return np.unique(np.concatenate([r, [first, last]]))
