"""A stepwise search for sparse models, whose supports tuning considers beside those the path visits.

Warm starts make a path follow one branch of a non-convex problem. When several features can stand in for
one another (the marginally hidden feature of Fan & Lv 2008, Section 4.2.2, and its GLM version, where the
noise features share the hidden feature's common factor), the branch the path follows may hold a few
stand-ins instead of the feature itself, and then never reach the sparse model.

A stepwise search on the tuning criterion itself (Efroymson 1960, in Ralston & Wilf, Mathematical Methods
for Digital Computers; with the criterion in place of F-tests) visits further supports: each step adds
the feature with the largest score statistic given the refit of the current support (Rao's score test,
vectorised over the candidates) and then drops features while that lowers the criterion. On the
logistic hidden design a forward selection by unpenalised likelihood stopped by EBIC finds the model
where the warm-started SCAD path alone does not; the drop steps let a stand-in that entered early
leave again.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import linalg

from ._mle import refit_columns
from ._problem import Problem

__all__ = ["stepwise_supports"]


def _design(problem: Problem, support: np.ndarray) -> np.ndarray:
    return np.hstack([problem.C, problem.Xs[:, support]])


class _Scorer:
    """Refits of supports, cached: the criterion value and what the next addition needs."""

    def __init__(self, problem: Problem, penalty_of_size: Callable[[int], float]):
        self.p = problem
        self.pen = penalty_of_size
        self.cache: dict[bytes, tuple[float, np.ndarray | None]] = {}

    def value(self, support: np.ndarray) -> float:
        return self.fit(support)[0]

    def fit(self, support: np.ndarray) -> tuple[float, np.ndarray | None]:
        key = support.tobytes()
        if key not in self.cache:
            D = _design(self.p, support)
            coef, _, loglik, exists, _ = refit_columns(
                D, self.p.y, self.p.loss, self.p.offset, with_se=False
            )
            value = -2.0 * loglik + self.pen(support.size) if exists else np.inf
            self.cache[key] = (value, coef if exists else None)
        return self.cache[key]

    def best_addition(self, support: np.ndarray) -> int | None:
        """The feature outside ``support`` with the largest score statistic ``U_j^2 / V_j``.

        ``U_j = x_j^T s`` at the refit of ``support`` and ``V_j`` the information of ``x_j`` given
        the support's columns (working weights), vectorised over the candidates (Rao's score test).
        """
        pr = self.p
        _, coef = self.fit(support)
        if coef is None:
            return None
        D = _design(pr, support)
        eta = pr.offset + D @ coef
        z, w = pr.loss.working(pr.y, eta)
        Xs = pr.Xs
        U = Xs.T @ (w * (z - eta))
        V = w @ (Xs * Xs)
        if D.shape[1]:
            A = (D.T * w) @ Xs  # (m, d)
            try:
                MA = linalg.solve((D.T * w) @ D, A, assume_a="pos", check_finite=False)
            except (linalg.LinAlgError, ValueError):
                return None
            V = V - np.einsum("md,md->d", A, MA)
        ok = ~pr.constant & (V > 1e-10 * pr.n)
        ok[support] = False
        if not ok.any():
            return None
        stat = np.where(ok, U**2 / np.where(ok, V, 1.0), -np.inf)
        return int(np.argmax(stat))


def stepwise_supports(
    problem: Problem,
    penalty_of_size: Callable[[int], float],
    max_size: int,
    stop_below: Callable[[int, float], bool] | None = None,
    patience: int = 5,
) -> dict[bytes, tuple[np.ndarray, float]]:
    """Supports visited by a stepwise search on the criterion ``-2 log L(refit) + penalty_of_size(k)``.

    Each step adds the feature with the largest score statistic (`_Scorer.best_addition`), then drops
    features one at a time while a drop lowers the criterion (Efroymson's stepwise regression, with the
    criterion in place of F-tests). Stops after ``patience`` steps without a better value, at
    ``max_size``, on a cycle, when no feature can be added (or the refit does not exist), or when
    ``stop_below(k, best)`` says no support of size k + 1 can beat ``best``.

    Returns
    -------
    dict
        ``support bytes -> (support, criterion value)`` for every support refitted.
    """
    sc = _Scorer(problem, penalty_of_size)
    support = np.empty(0, dtype=np.int64)
    best = sc.value(support)
    stale = 0
    states = {support.tobytes()}
    while support.size < max_size:
        j = sc.best_addition(support)
        if j is None:
            break
        support = np.sort(np.append(support, j))
        value = sc.value(support)
        while support.size > 1:
            drops = [np.delete(support, i) for i in range(support.size) if support[i] != j]
            vals = [sc.value(s) for s in drops]
            if not vals or min(vals) >= value:
                break
            k = int(np.argmin(vals))
            support, value = drops[k], vals[k]
        key = support.tobytes()
        if key in states:
            break  # a cycle: this state was reached before
        states.add(key)
        if value < best:
            best, stale = value, 0
        else:
            stale += 1
        if stale >= patience or (stop_below is not None and stop_below(support.size, best)):
            break
    out = {}
    for key, (value, _) in sc.cache.items():
        s = np.frombuffer(key, dtype=np.int64).copy()
        out[key] = (s, value)
    return out
