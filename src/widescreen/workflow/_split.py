"""Sample splitting for screening (Fan, Samworth & Wu 2009, JMLR 10:2013, the "var" variants).

The samples are split at random (seeded) into two halves; each half is screened on its own (one pass per
half, with the pass's rows restricted to that half), and only features in the top k of both halves go on.
Under exchangeability of the noise features, P(r or more noise features survive) <= C(k, r)^2 / C(p - s, r).

The kept columns of a half pass cover that half's rows only, so the features that survive are read again
on all analysed rows (`fetch_prepared`: one read of at most k columns, each prepared exactly as a pass
prepares it).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..engine._source import BlockSource
from ..store._reader import prepare_block


def split_halves(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Two disjoint random halves of ``range(n)`` (sizes floor(n/2) and ceil(n/2)), each sorted.

    Sorted halves keep the reads sequential and make each half's analysis independent of the order the
    permutation listed it in.
    """
    if n < 8:
        raise ValueError(f"sample splitting needs at least 8 samples; got {n}")
    perm = np.random.default_rng(np.random.SeedSequence([int(seed), 0x5A17])).permutation(n)
    return np.sort(perm[: n // 2]), np.sort(perm[n // 2 :])


def intersect_ranked(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Features in both ranked lists, ordered by their worse rank of the two (then by index).

    Parameters
    ----------
    a, b : ndarray of int of shape (k_a,), (k_b,)
        Store indices, strongest first.
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    common, ia, ib = np.intersect1d(a, b, assume_unique=True, return_indices=True)
    worse = np.maximum(ia, ib)
    return common[np.lexsort((common, worse))]


@dataclass(frozen=True)
class Prepared:
    """Imputed, centred float64 values of a few features on the analysed rows, with their summaries.

    Attributes
    ----------
    index : ndarray of int of shape (m,)
    values : ndarray of shape (n, m)
    mean, sumsq, missing_rate : ndarray of shape (m,)
    constant : ndarray of bool of shape (m,)
    """

    index: np.ndarray
    values: np.ndarray
    mean: np.ndarray
    sumsq: np.ndarray
    missing_rate: np.ndarray
    constant: np.ndarray


def fetch_prepared(
    source: BlockSource, index: np.ndarray, rows: np.ndarray | None, sub_block: int = 1024
) -> Prepared:
    """Read the given features once and prepare them as a pass does (same sub-blocks, same rows).

    Parameters
    ----------
    source : BlockSource
    index : ndarray of int of shape (m,)
        Store indices, in the order wanted.
    rows : ndarray of int, optional
        Store rows of the analysed samples; all when None.
    sub_block : int
        Sub-block width of the pass (columns are prepared within the same sub-block, so their values
        are bit-identical to those a pass over ``rows`` keeps).
    """
    index = np.asarray(index, dtype=np.int64)
    n = source.n_samples if rows is None else len(rows)
    m = index.size
    values = np.empty((n, m), dtype=np.float64, order="F")
    mean, sumsq, miss = np.empty(m), np.empty(m), np.empty(m)
    constant = np.zeros(m, dtype=bool)
    blocks = index // source.block_width
    for i in np.unique(blocks):
        start, stop = source.bounds(int(i))
        raw = source.read(int(i))
        sel = np.flatnonzero(blocks == i)
        local = index[sel] - start
        for a in np.unique(local // sub_block * sub_block):
            b = min(int(a) + sub_block, stop - start)
            blk = prepare_block(raw[:, a:b], start + int(a), rows)
            here = local >= a
            here &= local < b
            pos, col = sel[here], local[here] - a
            values[:, pos] = blk.values[:, col]
            mean[pos], sumsq[pos] = blk.mean[col], blk.sumsq[col]
            miss[pos], constant[pos] = blk.missing_rate[col], blk.constant[col]
    return Prepared(index, values, mean, sumsq, miss, constant)


def read_raw_columns(source: BlockSource, index: np.ndarray) -> np.ndarray:
    """Stored values (all store rows, the store's dtype) of the given features, each block read once.

    Parameters
    ----------
    source : BlockSource
    index : ndarray of int of shape (m,)

    Returns
    -------
    ndarray of shape (n_store_samples, m)
    """
    index = np.asarray(index, dtype=np.int64)
    out = None
    blocks = index // source.block_width
    for i in np.unique(blocks):
        start, _ = source.bounds(int(i))
        raw = source.read(int(i))
        if out is None:
            out = np.empty((raw.shape[0], index.size), dtype=raw.dtype)
        sel = np.flatnonzero(blocks == i)
        out[:, sel] = raw[:, index[sel] - start]
    if out is None:
        out = np.empty((source.n_samples, 0))
    return out


__all__ = ["Prepared", "fetch_prepared", "intersect_ranked", "read_raw_columns", "split_halves"]
