"""Dantzig selector as a linear programme (Candes & Tao 2007, Ann. Statist. 35:2313).

On the standardised, projected working problem (Gram ``G``, ``c = Xt^T zt``):

    min ||b||_1   subject to   || c - G b ||_inf / n <= lam.

With ``b = u - v``, ``u, v >= 0`` this is the LP ``min 1^T (u + v)`` under
``G (u - v) / n <= lam + c / n`` and ``-G (u - v) / n <= lam - c / n``, solved by HiGHS through
``scipy.optimize.linprog``. LPs have no warm start, so each lambda is solved from scratch.
"""

from __future__ import annotations

import numpy as np

from ._quadratic import WorkingProblem


def dantzig_selector(prob: WorkingProblem, lam: float, active: np.ndarray) -> np.ndarray:
    """Solve the Dantzig selector at level ``lam`` over the features flagged in ``active``.

    Parameters
    ----------
    prob : WorkingProblem
    lam : float
        Bound on ``max_j |x_j^T (y - X b)| / n`` (standardised columns).
    active : ndarray of bool of shape (d,)
        Features that may enter (constant columns are left out).

    Returns
    -------
    ndarray of shape (d,)
    """
    d = prob.d
    idx = np.flatnonzero(active)
    b = np.zeros(d)
    p = idx.size
    if p == 0:
        return b
    G = prob.gram[np.ix_(idx, idx)] / prob.n
    c = prob.xty[idx] / prob.n
    if np.abs(c).max() <= lam:
        return b  # b = 0 is feasible, hence optimal
    from scipy.optimize import linprog  # here: scipy.optimize is slow to import

    A = np.block([[G, -G], [-G, G]])
    rhs = np.concatenate([lam + c, lam - c])
    res = linprog(np.ones(2 * p), A_ub=A, b_ub=rhs, bounds=(0, None), method="highs")
    if res.status != 0:
        raise RuntimeError(f"The Dantzig selector LP at lambda = {lam:.6g} failed: {res.message}")
    b[idx] = res.x[:p] - res.x[p:]
    return b
