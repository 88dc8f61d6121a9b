"""Sample subsets for stability selection and cross-validation, drawn from the run's seed.

Both are stratified by the outcome where it is binary (logistic: the two classes; Cox: event or
censored), so every half and every training fold sees about the same share of cases as all samples,
and a fold is never left without events. The rule is the same for both: the samples are put in order
of (stratum, random key) and dealt out in turn, to the two halves of a pair or to the K folds, so each
stratum is split as evenly as it can be and the sizes differ by at most one. Quantitative outcomes
form one stratum (plain random halves and folds).
"""

from __future__ import annotations

import numpy as np

from ._problem import Problem

#: Salts of the seed sequences (independent of the seeds of `split_halves` and the permutations).
_PAIRS_SALT = 0x57AB
_FOLDS_SALT = 0xCF01


def strata_of(problem: Problem) -> np.ndarray | None:
    """The stratum of each analysed sample: the class (logistic), the event flag (Cox), else None."""
    resp = problem.response
    if problem.family.takes_event and resp.event is not None:
        return np.asarray(resp.event, dtype=np.int64)
    if problem.family.loss == "binomial":
        return np.asarray(resp.y, dtype=np.int64)
    return None


def _deal(n: int, ways: int, rng: np.random.Generator, strata: np.ndarray | None) -> np.ndarray:
    """Assign ``range(n)`` to ``ways`` groups: ordered by (stratum, random key), dealt in turn."""
    key = rng.random(n)
    order = np.lexsort((key, strata)) if strata is not None else np.argsort(key, kind="stable")
    group = np.empty(n, dtype=np.int64)
    group[order] = np.arange(n) % ways
    return group


def complementary_pairs(
    n: int, n_pairs: int, seed: int, strata: np.ndarray | None = None
) -> list[tuple[np.ndarray, np.ndarray]]:
    """``n_pairs`` complementary pairs of half-samples (Shah & Samworth 2013, JRSS-B 75:55).

    Pair b splits ``range(n)`` into two disjoint halves of sizes ceil(n / 2) and floor(n / 2) (each
    sorted), drawn from ``SeedSequence([seed, salt, b])``: pair b is the same whatever the number of
    pairs asked for.

    Parameters
    ----------
    n : int
        Analysed samples.
    n_pairs : int
        B.
    seed : int
    strata : ndarray of int of shape (n,), optional
        Each half gets about half of every stratum.
    """
    if n < 8:
        raise ValueError(f"stability selection needs at least 8 samples; got {n}")
    out = []
    for b in range(n_pairs):
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), _PAIRS_SALT, b]))
        group = _deal(n, 2, rng, strata)
        out.append((np.flatnonzero(group == 0), np.flatnonzero(group == 1)))
    return out


def cv_folds(n: int, k: int, seed: int, strata: np.ndarray | None = None) -> np.ndarray:
    """The fold (0 .. k - 1) of each of ``n`` samples, stratified, from ``SeedSequence([seed, salt])``.

    Raises
    ------
    ValueError
        Fewer than two samples per fold, or a stratum smaller than the number of folds (a fold
        would have no case or no event to be judged on).
    """
    if k < 2 or n < 2 * k:
        raise ValueError(f"{k}-fold cross-validation needs at least {2 * k} samples; got {n}")
    if strata is not None:
        values, counts = np.unique(strata, return_counts=True)
        if values.size > 1 and counts.min() < k:
            raise ValueError(
                f"{k}-fold cross-validation: only {int(counts.min())} samples with outcome "
                f"{int(values[counts.argmin()])}; each fold needs at least one"
            )
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), _FOLDS_SALT]))
    return _deal(n, k, rng, strata)


__all__ = ["complementary_pairs", "cv_folds", "strata_of"]
