"""Running top-k of feature scores, merged across blocks without sorting all features.

Ties are broken by feature index (lower first) so that every merge order gives the same list.

A pass's blocks share a running floor (`raise_floor`, `floor_of`): the k-th largest score among the
lists of the blocks finished so far is a lower bound of the pass's final k-th score, so no later block
needs to keep a feature scoring below it (late blocks keep almost nothing). Ties stay (a tie may enter by its lower index), so the merged list is the same
whatever the order the blocks ran in; only the blocks' own lists (and their markers) get shorter.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

_FLOORS: dict[str, np.ndarray] = {}
_FLOORS_LOCK = threading.Lock()


def floor_of(key: str, k: int) -> float:
    """The running floor of the pass ``key`` in this process: the k-th largest score among the lists
    of its finished blocks (-inf until k scores were seen)."""
    scores = _FLOORS.get(key) if key else None
    return float(scores[k - 1]) if scores is not None and scores.size >= k else -np.inf


def raise_floor(key: str, scores: np.ndarray, k: int) -> None:
    """Add a finished block's list scores to the pass's k largest scores seen (the floor's source)."""
    if not key or not np.size(scores):
        return
    with _FLOORS_LOCK:
        cur = np.concatenate([_FLOORS.get(key, np.empty(0)), np.asarray(scores, np.float64)])
        if cur.size > k:
            cur = np.partition(cur, cur.size - k)[cur.size - k :]
        _FLOORS[key] = np.sort(cur)[::-1].copy()


@dataclass(frozen=True)
class TopK:
    """The k strongest features seen so far, strongest first.

    Attributes
    ----------
    index : ndarray of int64, shape (m,), m <= k
        Store indices of the features.
    score : ndarray of float64, shape (m,)
    values : ndarray of float64, shape (n_samples, m) or None
        The features' imputed, centred values, kept so the refit needs no second read.
    null_max : ndarray of float64, shape (n_nulls,)
        Largest null (permuted-response) score over all features seen, per permutation.
    raw : ndarray of shape (n_samples, m) or None
        The features' stored values (int8 with the missing sentinel, or floats with NaN) on the
        analysed rows: what a pass keeps while it runs (a byte a value for int8), made into ``values``
        once, for the final list only.
    mean : ndarray of float64, shape (m,) or None
        Their observed means (with ``raw``).
    """

    k: int
    index: np.ndarray
    score: np.ndarray
    values: np.ndarray | None
    null_max: np.ndarray
    raw: np.ndarray | None = None
    mean: np.ndarray | None = None

    @property
    def kth(self) -> float:
        """The k-th score when the list is full (a lower bound of any merged list's), else -inf."""
        return float(self.score[self.k - 1]) if self.score.size >= self.k else -np.inf

    @classmethod
    def empty(cls, k: int, n_nulls: int = 0) -> TopK:
        return cls(
            k=k,
            index=np.empty(0, np.int64),
            score=np.empty(0, np.float64),
            values=None,
            null_max=np.full(n_nulls, -np.inf),
        )


def _order(score: np.ndarray, index: np.ndarray) -> np.ndarray:
    # Strongest first; equal scores by ascending feature index.
    return np.lexsort((index, -score))


def block_topk(
    k: int,
    start: int,
    score: np.ndarray,
    values: np.ndarray | None,
    eligible: np.ndarray,
    null_score: np.ndarray | None = None,
    floor: float = -np.inf,
) -> TopK:
    """Top-k of one block.

    Parameters
    ----------
    k : int
    start : int
        Store index of the block's first feature.
    score : ndarray of shape (width,)
    values : ndarray of shape (n, width) or None
        Block values; the kept columns are copied (the block buffer is reused by the reader).
    eligible : ndarray of bool, shape (width,)
        Features allowed into the list (not filtered, not excluded, not constant).
    null_score : ndarray of shape (width, n_nulls), optional
    floor : float
        Features scoring below it cannot enter the final list (`raise_floor`): left out.
    """
    n_nulls = 0 if null_score is None else null_score.shape[1]
    null_max = np.full(n_nulls, -np.inf)
    if null_score is not None and eligible.any():
        null_max = null_score[eligible].max(axis=0)
    cand = (
        np.flatnonzero(eligible & (score >= floor)) if floor > -np.inf else np.flatnonzero(eligible)
    )
    if cand.size > k:
        # Partition first, then widen the cut to keep every tie at the boundary: exact and deterministic.
        part = np.argpartition(-score[cand], k - 1)[:k]
        cut = score[cand][part].min()
        cand = cand[score[cand] >= cut]
    idx = cand + start
    order = _order(score[cand], idx)[:k]
    cand = cand[order]
    kept = None if values is None else np.array(values[:, cand], dtype=np.float64, order="F")
    return TopK(
        k=k, index=idx[order], score=score[cand].astype(np.float64), values=kept, null_max=null_max
    )


def merge_topk(a: TopK, b: TopK) -> TopK:
    """Merge two top-k lists into one of the same k."""
    k = max(a.k, b.k)
    index = np.concatenate([a.index, b.index])
    score = np.concatenate([a.score, b.score])
    order = _order(score, index)[:k]
    values = None
    if a.values is not None or b.values is not None:
        parts = [v for v in (a.values, b.values) if v is not None]
        allv = np.hstack(parts) if len(parts) > 1 else parts[0]
        values = allv[:, order] if allv.shape[1] == index.size else None
    raw = mean = None
    if a.raw is not None or b.raw is not None:
        parts = [t for t in (a, b) if t.raw is not None and t.index.size]
        if sum(t.index.size for t in parts) == index.size:
            if len(parts) == 1:
                raw, mean = parts[0].raw[:, order], parts[0].mean[order]
            elif parts:
                raw = np.hstack([t.raw for t in parts])[:, order]
                mean = np.concatenate([t.mean for t in parts])[order]
    if a.null_max.size and b.null_max.size:
        null_max = np.maximum(a.null_max, b.null_max)
    else:
        null_max = a.null_max if a.null_max.size else b.null_max
    return TopK(
        k=k,
        index=index[order],
        score=score[order],
        values=values,
        null_max=null_max,
        raw=raw,
        mean=mean,
    )


def merge_all(parts: list[TopK], k: int, n_nulls: int = 0) -> TopK:
    """Merge any number of top-k lists (a tree would do the same; the result is order-independent)."""
    out = TopK.empty(k, n_nulls)
    for p in parts:
        out = merge_topk(out, p)
    return out


# --------------------------------------------------------------------------------------------
# K responses at once


@dataclass(frozen=True)
class MultiTopK:
    """The k strongest features of each of K responses, strongest first, in one (K, k) array.

    Rows shorter than k (fewer eligible features) are padded with index -1 and score -inf. Ties are
    broken by feature index, as in `TopK`, so row r is the `TopK` a pass over response r alone keeps.

    Attributes
    ----------
    k : int
    index : ndarray of int64, shape (K, k)
    score : ndarray of float64, shape (K, k)
    """

    k: int
    index: np.ndarray
    score: np.ndarray

    @classmethod
    def empty(cls, k: int, n_responses: int) -> MultiTopK:
        return cls(
            k=k,
            index=np.full((n_responses, k), -1, np.int64),
            score=np.full((n_responses, k), -np.inf),
        )

    @property
    def n_responses(self) -> int:
        return self.index.shape[0]

    def row(self, r: int) -> TopK:
        """Response r's list as a `TopK` (padding dropped)."""
        ok = self.index[r] >= 0
        return TopK(
            k=self.k,
            index=self.index[r][ok].copy(),
            score=self.score[r][ok].copy(),
            values=None,
            null_max=np.empty(0),
        )


def _rows_topk(k: int, index: np.ndarray, score: np.ndarray) -> MultiTopK:
    """Each row's k strongest of (K, m) candidates (score -inf: not a candidate), vectorised over rows.

    A partition per row finds its k-th largest score; every candidate at or above it (ties included)
    is sorted by (row, -score, index) and the first k of each row kept: exact and deterministic.
    """
    K, m = score.shape
    keep = score > -np.inf
    if m > k:
        kth = np.partition(score, m - k, axis=1)[:, m - k]
        keep &= score >= kth[:, None]
    rows, cols = np.nonzero(keep)
    s, ix = score[rows, cols], index[rows, cols]
    order = np.lexsort((ix, -s, rows))
    rows, s, ix = rows[order], s[order], ix[order]
    rank = np.arange(rows.size) - np.searchsorted(rows, np.arange(K))[rows]
    sel = rank < k
    out = MultiTopK.empty(k, K)
    out.index[rows[sel], rank[sel]] = ix[sel]
    out.score[rows[sel], rank[sel]] = s[sel]
    return out


def block_topk_multi(k: int, start: int, score: np.ndarray, eligible: np.ndarray) -> MultiTopK:
    """Per-response top-k of one block.

    Parameters
    ----------
    k : int
    start : int
        Store index of the block's first feature.
    score, eligible : ndarray of shape (width, K)
    """
    s = np.where(eligible, score, -np.inf).T
    index = np.broadcast_to(np.arange(start, start + score.shape[0], dtype=np.int64), s.shape)
    return _rows_topk(k, index, s)


def merge_multi(parts: list[MultiTopK], k: int, n_responses: int) -> MultiTopK:
    """Merge per-response top-k lists (order-independent)."""
    if not parts:
        return MultiTopK.empty(k, n_responses)
    index = np.concatenate([p.index for p in parts], axis=1)
    score = np.concatenate([p.score for p in parts], axis=1)
    return _rows_topk(k, index, score)
