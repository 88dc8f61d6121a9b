"""Sample splitting for screening (Fan, Samworth & Wu 2009, JMLR 10:2013, the "var" variants).

The samples are split at random (seeded) into two halves; each half is screened on its own (one pass per
half, with the pass's rows restricted to that half), and only features in the top k of both halves go on.
Under exchangeability of the noise features, P(r or more noise features survive) <= C(k, r)^2 / C(p - s, r).

The kept columns of a half pass cover that half's rows only, so the features that survive are read again
on all analysed rows (`widescreen.engine.read_columns`: one read of at most k columns, each prepared
exactly as a pass prepares it).
"""

from __future__ import annotations

import numpy as np


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


__all__ = ["intersect_ranked", "split_halves"]
