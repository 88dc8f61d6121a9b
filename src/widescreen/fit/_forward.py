"""A forward search for sparse stationary points of SCAD and MCP, to add to those the path visits.

Warm starts make a path follow one branch of a non-convex problem. When several features can stand in for
one another (the marginally hidden feature of Fan & Lv 2008, Section 4.2.2, and its GLM version, where the
noise features share the hidden feature's common factor), the branch the path follows may hold a few
stand-ins instead of the feature itself, and then never reach the sparse model.

The unpenalised refit on a support ``S`` is itself a stationary point of the SCAD (MCP) objective at
every lambda with ``max_{j not in S} |x_j^T s| / n <= lambda <= min_{j in S} |b_j| / a`` (``a`` the
concavity; standardised columns, ``s`` the score at the refit): the refit's score vanishes on ``S`` and
``p'_lambda`` is zero past ``a lambda`` (Fan & Li 2001, Section 3.1; Zhang 2010 for MCP). So the supports
of a forward search, each feature added by the largest score statistic given the refit of the previous
support (Rao's score test, vectorised over the candidates), are candidates of the same kind as the path's
own points whenever that interval is not empty, and tuning may choose among both.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from scipy import linalg

from ._mle import refit_columns
from ._penalties import MCP, SCAD, Penalty
from ._problem import Problem

__all__ = ["forward_supports", "stationary_interval"]


def _design(problem: Problem, support: np.ndarray) -> np.ndarray:
    return np.hstack([problem.C, problem.Xs[:, support]])


def forward_supports(problem: Problem, max_size: int) -> Iterator[tuple[np.ndarray, float]]:
    """Supports of a forward search by score statistics, sizes 1, 2, ..., ``max_size``, lazily.

    Each step refits the current support without penalty and adds the feature outside it with the
    largest score statistic ``U_j^2 / V_j`` (``U_j = x_j^T s``, ``V_j`` the information of ``x_j``
    given the support, from the working weights). Yields ``(support, log-likelihood of its refit)``;
    stops when the refit does not exist (separation) or no feature can be added. The caller stops
    consuming when larger supports cannot help.
    """
    loss = problem.loss
    ok = ~problem.constant
    support = np.empty(0, dtype=np.int64)
    Xs = problem.Xs
    xx = None
    for _ in range(max_size + 1):
        D = _design(problem, support)
        coef, _, loglik, exists, _ = refit_columns(D, problem.y, loss, problem.offset)
        if not exists:
            return
        if support.size:
            yield support, float(loglik)
        if support.size >= max_size:
            return
        eta = problem.offset + D @ coef
        z, w = loss.working(problem.y, eta)
        U = Xs.T @ (w * (z - eta))
        if D.shape[1]:
            A = (D.T * w) @ Xs  # (m, d)
            M = (D.T * w) @ D
            try:
                MA = linalg.solve(M, A, assume_a="pos", check_finite=False)
            except (linalg.LinAlgError, ValueError):
                return
            adj = np.einsum("md,md->d", A, MA)
        else:
            adj = 0.0
        if loss.quadratic:
            xx = Xs.shape[0] * np.ones(Xs.shape[1]) if xx is None else xx
            V = xx - adj
        else:
            V = w @ (Xs * Xs) - adj
        stat = np.where(ok & (V > 1e-10 * problem.n), U**2 / np.maximum(V, 1e-300), -np.inf)
        stat[support] = -np.inf
        j = int(np.argmax(stat))
        if not np.isfinite(stat[j]):
            return
        support = np.sort(np.append(support, j))


def stationary_interval(
    problem: Problem, pen: Penalty, support: np.ndarray
) -> tuple[float, float, np.ndarray] | None:
    """Levels at which the refit on ``support`` is a stationary point of ``pen``, and that refit.

    Returns ``(low, high, beta)`` with ``beta`` of shape (d + q,): the refit's standardised feature
    coefficients, then those of the unpenalised columns ``C``; None when the interval is empty or the
    refit does not exist.
    """
    if isinstance(pen, SCAD):
        conc = pen.a
    elif isinstance(pen, MCP):
        conc = pen.gamma
    else:
        return None
    D = _design(problem, support)
    coef, _, _, exists, _ = refit_columns(D, problem.y, problem.loss, problem.offset)
    if not exists:
        return None
    q = problem.C.shape[1]
    eta = problem.offset + D @ coef
    z, w = problem.loss.working(problem.y, eta)
    grad = np.abs(problem.Xs.T @ (w * (z - eta))) / problem.n
    out = np.ones(problem.d, dtype=bool)
    out[support] = False
    out &= ~problem.constant
    low = float(grad[out].max()) if out.any() else 0.0
    high = float(np.abs(coef[q:]).min()) / conc if support.size else np.inf
    if not low < high:
        return None
    b = np.zeros(problem.d)
    b[support] = coef[q:]
    return low, high, np.concatenate([b, coef[:q]])
