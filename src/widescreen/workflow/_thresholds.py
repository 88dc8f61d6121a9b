"""Thresholds that cut a pass's shortlist: a size budget, a permutation threshold, Bonferroni and BH.

Every threshold here is a plain function of statistics already computed by a pass; none reads the data.
The size budget d (a fixed number or floor(n / log n), see `shortlist_size`) bounds the shortlist; a
data-driven threshold then keeps only the budgeted features that pass it.

Benjamini-Hochberg needs every tested feature's p-value. `bh_cutoff_blocks` finds the exact BH cutoff
from p-values streamed in blocks (from a pass's statistics in the run folder), holding a histogram and at
most ``max_hold`` p-values in memory instead of all p of them (8 bytes each: 80 MB at p = 10^7). It reads
the p-values twice in the usual case, more often only when very many p-values crowd the crossing point.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np

from .._config import ConfigError, check_choice, check_int, check_number

THRESHOLDS = ("none", "permutation", "bonferroni", "bh")


@dataclass(frozen=True)
class ThresholdRule:
    """A data-driven cut applied within the size budget.

    Attributes
    ----------
    kind : {"none", "permutation", "bonferroni", "bh"}
        ``"none"``: keep the whole budget. ``"permutation"``: keep features whose score beats the null
        maximum of permuted responses at level ``alpha`` (family-wise). ``"bonferroni"``: p <= alpha / m.
        ``"bh"``: the Benjamini-Hochberg step-up rule at false discovery rate ``alpha``.
    alpha : float
        Level in (0, 1).
    n_permutations : int
        Permuted responses scored in the same pass (``"permutation"`` only).
    """

    kind: str = "none"
    alpha: float = 0.05
    n_permutations: int = 100

    def __post_init__(self) -> None:
        check_choice("threshold", self.kind, THRESHOLDS)
        check_number("alpha", self.alpha, 0.0, 1.0, open_low=True, open_high=True)
        check_int("n_permutations", self.n_permutations, 1)
        k = self.n_permutations
        if self.kind == "permutation" and math.floor(self.alpha * (k + 1)) < 1:
            need = math.ceil(1 / self.alpha) - 1
            raise ConfigError(
                "n_permutations",
                f"at least {need} to reach level alpha = {self.alpha}",
                k,
                f"{k} permutations cannot reach level alpha = {self.alpha}: need at least {need}.",
            )

    @property
    def permutations(self) -> int:
        """Permuted responses a pass must score: ``n_permutations`` for the permutation rule, else 0."""
        return int(self.n_permutations) if self.kind == "permutation" else 0

    @property
    def needs_p_values(self) -> bool:
        return self.kind in ("bonferroni", "bh")


def permutation_cutoff(null_max: np.ndarray, alpha: float) -> float:
    """Score a feature must exceed to be kept by the permutation threshold.

    With K permuted responses scored in the same pass, ``null_max[k]`` is the largest score over all
    features for permutation k. A feature with score s gets the permutation p-value
    ``(1 + #{k : null_max[k] >= s}) / (K + 1)``; keeping those with p-value <= alpha controls the
    family-wise error at alpha when the real response is exchangeable with its permutations (no
    feature matters). That is the same as ``s > c`` with c the (floor(alpha (K + 1)))-th largest null
    maximum: the finite-sample form of "above the (1 - alpha) quantile of the null maxima".

    Parameters
    ----------
    null_max : ndarray of shape (K,)
    alpha : float

    Returns
    -------
    float
        ``inf`` when K is too small for the level (nothing can be kept).
    """
    null_max = np.asarray(null_max, dtype=np.float64).ravel()
    if null_max.size == 0:
        raise ValueError(
            "the permutation threshold needs the null maxima of at least one permutation"
        )
    r = math.floor(alpha * (null_max.size + 1))
    if r < 1:
        return math.inf
    return float(np.sort(null_max)[::-1][r - 1])


def bonferroni_cutoff(n_tests: int, alpha: float) -> float:
    """Largest p-value kept by Bonferroni: ``alpha / m`` (reject p <= alpha / m)."""
    if n_tests < 1:
        return -math.inf
    return alpha / n_tests


def bh_cutoff(p_values: np.ndarray, alpha: float) -> float:
    """The Benjamini-Hochberg step-up cutoff for p-values in memory.

    With sorted p-values p_(1) <= ... <= p_(m), the rule rejects every p <= p_(i*) where
    i* = max{i : p_(i) <= alpha i / m} (Benjamini & Hochberg 1995).

    Parameters
    ----------
    p_values : ndarray of shape (m,)
        NaN entries are not counted as tests.

    Returns
    -------
    float
        ``p_(i*)``, or ``-inf`` when nothing is rejected; reject ``p <= cutoff``.
    """
    p = np.asarray(p_values, dtype=np.float64).ravel()
    p = np.sort(p[~np.isnan(p)])
    m = p.size
    if m == 0:
        return -math.inf
    ok = np.flatnonzero(p <= alpha * np.arange(1, m + 1) / m)
    return float(p[ok[-1]]) if ok.size else -math.inf


def bh_cutoff_blocks(
    blocks: Callable[[], Iterable[np.ndarray]],
    alpha: float,
    *,
    n_bins: int = 2048,
    max_hold: int = 1 << 20,
) -> tuple[float, int]:
    """The exact Benjamini-Hochberg cutoff of p-values streamed in blocks.

    A first read builds a histogram of the p-values (log-spaced bins, with each bin's count, smallest
    and largest value). Scanning the bins from the top, a bin whose largest value ``v`` satisfies
    ``v <= alpha C / m`` (C = number of p-values <= v) settles the answer from below; a bin whose
    smallest value exceeds ``alpha C / m`` holds no rejected rank; the bins in between are read again
    and solved exactly (a bin too full to hold is refined by a finer histogram of its own range).

    Parameters
    ----------
    blocks : callable returning an iterable of ndarray
        Each call starts a fresh read of all p-values, block by block; NaN entries are not tests.
    alpha : float
    n_bins : int
        Bins of each histogram.
    max_hold : int
        Most p-values held in memory at once.

    Returns
    -------
    cutoff : float
        Reject ``p <= cutoff``; ``-inf`` when nothing is rejected.
    m : int
        Number of tests.
    """
    edges = np.concatenate([[-1.0, 0.0], np.logspace(-300, 0, n_bins)])
    hist = _histogram(blocks, edges, -math.inf, math.inf)
    m = int(hist[0].sum())
    if m == 0:
        return -math.inf, 0
    found = _search(blocks, alpha, m, edges, hist, 0, n_bins, max_hold, depth=0)
    return (found if found is not None else -math.inf), m


def _histogram(blocks, edges, lo, hi):
    """Counts, minima and maxima of the p-values in (lo, hi] over bins (edges[b], edges[b + 1]]."""
    nb = edges.size - 1
    count = np.zeros(nb, dtype=np.int64)
    vmin = np.full(nb, np.inf)
    vmax = np.full(nb, -np.inf)
    for block in blocks():
        p = _clean(block)
        p = p[(p > lo) & (p <= hi)]
        if not p.size:
            continue
        b = np.clip(np.searchsorted(edges, p, side="left") - 1, 0, nb - 1)
        count += np.bincount(b, minlength=nb)
        np.minimum.at(vmin, b, p)
        np.maximum.at(vmax, b, p)
    return count, vmin, vmax


def _clean(block) -> np.ndarray:
    p = np.asarray(block, dtype=np.float64).ravel()
    return np.clip(p[~np.isnan(p)], 0.0, 1.0)


def _collect(blocks, ranges: list[tuple[float, float]]) -> list[np.ndarray]:
    """The p-values inside each closed range [lo, hi], sorted, in one read."""
    out: list[list[np.ndarray]] = [[] for _ in ranges]
    for block in blocks():
        p = _clean(block)
        for i, (lo, hi) in enumerate(ranges):
            sel = p[(p >= lo) & (p <= hi)]
            if sel.size:
                out[i].append(sel)
    return [np.sort(np.concatenate(v)) if v else np.empty(0) for v in out]


def _search(blocks, alpha, m, edges, hist, below, n_bins, max_hold, depth) -> float | None:
    """Largest rejected p-value among the histogram's values; ``below`` = p-values under its range."""
    count, vmin, vmax = hist
    cum = below + np.cumsum(count)  # number of p-values <= each bin's largest value
    pending: list[int] = []  # undecided bins above the first settled one, highest first
    settled = None
    for b in range(count.size - 1, -1, -1):
        if count[b] == 0 or vmin[b] > alpha * cum[b] / m:
            continue  # every value here exceeds alpha * (its rank) / m
        if vmax[b] <= alpha * cum[b] / m:
            settled = float(vmax[b])  # the bin's largest value is rejected: a lower bound
            break
        pending.append(b)
    # Undecided bins above `settled` may hold a larger rejected value; take them in groups that fit.
    i = 0
    while i < len(pending):
        group, held = [], 0
        while i < len(pending) and (not group or held + count[pending[i]] <= max_hold):
            group.append(pending[i])
            held += int(count[pending[i]])
            i += 1
        if held > max_hold and depth < 40:
            b = group[0]  # a single bin too full to hold: refine its range
            lo = float(edges[b])
            sub = (
                np.geomspace(vmin[b], vmax[b], n_bins + 1)
                if vmin[b] > 0
                else np.linspace(vmin[b], vmax[b], n_bins + 1)
            )
            sub[0], sub[-1] = lo, vmax[b]
            sub = np.maximum.accumulate(sub)
            inner = _histogram(blocks, sub, lo, float(vmax[b]))
            found = _search(
                blocks, alpha, m, sub, inner, int(cum[b] - count[b]), n_bins, max_hold, depth + 1
            )
            if found is not None:
                return found
            continue
        values = _collect(blocks, [(float(vmin[b]), float(vmax[b])) for b in group])
        for b, v in zip(group, values, strict=True):
            ranks = cum[b] - count[b] + 1 + np.arange(v.size)
            ok = np.flatnonzero(v <= alpha * ranks / m)
            if ok.size:
                return float(v[ok[-1]])
    return settled


__all__ = [
    "THRESHOLDS",
    "ThresholdRule",
    "bh_cutoff",
    "bh_cutoff_blocks",
    "bonferroni_cutoff",
    "permutation_cutoff",
]
