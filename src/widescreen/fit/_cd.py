"""Coordinate descent sweeps of a weighted least-squares problem under SCAD, MCP or the lasso.

One coordinate update minimises, over ``b_j`` alone, the working objective

    (1 / 2n) sum_i w_i (r_i + x_ij (b_j - t))^2 + p_lambda(|t|)

with ``r`` the working residual at the current ``b``; with ``v = sum_i w_i x_ij^2 / n`` and
``u = sum_i w_i x_ij r_i / n + v b_j`` that is ``min_t (v / 2) t^2 - u t + p_lambda(|t|)``, a
one-dimensional piecewise quadratic. For SCAD with ``v > 1 / (a - 1)`` and MCP with ``v > 1 / gamma`` its
minimiser is the closed-form rule of Breheny & Huang (2011, Ann. Appl. Stat. 5:232, eqs. 2.4-2.5), which for
``v = 1`` is the thresholding rule of Fan & Li (2001) / Zhang (2010). A GLM's working weights often give a
smaller ``v`` (logistic: ``w <= 1/4``), where a piece is concave; there we take the exact global minimum of
the one-dimensional problem over its pieces (the minimum of a concave piece lies at an end), so every update
still lowers the working objective and the sweeps converge to a coordinate-wise minimum.

The loops are compiled with numba (a dependency of the package); a sweep visits only the active set, which
is small along a sparse path.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: Penalty kinds of the compiled kernel.
LASSO, SCAD, MCP = 0, 1, 2


@njit(cache=True)
def _piece(v: float, u: float, t: float, lam: float, kind: int, conc: float) -> float:
    """Value of ``(v / 2) t^2 - u t + p_lambda(t)`` at ``t >= 0`` (``u >= 0``)."""
    if kind == LASSO:
        pen = lam * t
    elif kind == SCAD:
        if t <= lam:
            pen = lam * t
        elif t <= conc * lam:
            pen = -(t * t - 2.0 * conc * lam * t + lam * lam) / (2.0 * (conc - 1.0))
        else:
            pen = 0.5 * (conc + 1.0) * lam * lam
    else:
        if t <= conc * lam:
            pen = lam * t - t * t / (2.0 * conc)
        else:
            pen = 0.5 * conc * lam * lam
    return 0.5 * v * t * t - u * t + pen


@njit(cache=True)
def _clip(x: float, lo: float, hi: float) -> float:
    return min(max(x, lo), hi)


@njit(cache=True)
def threshold_scalar(u: float, v: float, lam: float, kind: int, conc: float) -> float:
    """Global minimiser of ``(v / 2) t^2 - u t + p_lambda(|t|)`` over real ``t`` (``v > 0``)."""
    U = abs(u)
    sgn = 1.0 if u >= 0 else -1.0
    if kind == LASSO:
        return sgn * max(U - lam, 0.0) / v
    # Candidates: the clipped stationary point of each convex piece, both ends of a concave piece.
    cands = np.empty(5)
    m = 0
    if kind == SCAD:
        a = conc
        cands[m] = _clip((U - lam) / v, 0.0, lam)
        m += 1
        curv = v - 1.0 / (a - 1.0)
        if curv > 0:
            cands[m] = _clip((U - a * lam / (a - 1.0)) / curv, lam, a * lam)
            m += 1
        else:
            cands[m] = lam
            cands[m + 1] = a * lam
            m += 2
        cands[m] = max(U / v, a * lam)
        m += 1
    else:
        g = conc
        curv = v - 1.0 / g
        if curv > 0:
            cands[m] = _clip((U - lam) / curv, 0.0, g * lam)
            m += 1
        else:
            cands[m] = 0.0
            cands[m + 1] = g * lam
            m += 2
        cands[m] = max(U / v, g * lam)
        m += 1
    best_t = 0.0
    best_f = 0.0  # the value at t = 0
    for k in range(m):
        f = _piece(v, U, cands[k], lam, kind, conc)
        # Strict improvement only: ties keep the smaller |t| (the sparser solution).
        if f < best_f - 1e-15 * (abs(best_f) + 1e-300) and cands[k] != best_t:
            best_f = f
            best_t = cands[k]
    return sgn * best_t


@njit(cache=True)
def threshold_array(u: np.ndarray, v: np.ndarray, lam: float, kind: int, conc: float) -> np.ndarray:
    """`threshold_scalar` elementwise over arrays of equal shape (1-D)."""
    out = np.empty(u.shape[0])
    for k in range(u.shape[0]):
        out[k] = threshold_scalar(u[k], v[k], lam, kind, conc)
    return out


@njit(cache=True, fastmath=True)
def sweeps(
    X: np.ndarray,
    r: np.ndarray,
    w: np.ndarray,
    b: np.ndarray,
    active: np.ndarray,
    xwx: np.ndarray,
    free: np.ndarray,
    lam: float,
    kind: int,
    conc: float,
    max_sweeps: int,
    tol: float,
) -> tuple[int, float]:
    """Cyclic coordinate descent over ``active`` until no update moves ``sqrt(v_j) |db_j|`` by ``tol``.

    Parameters
    ----------
    X : ndarray of shape (n, d + q), Fortran order
        Standardised features, then the unpenalised columns (intercept, covariates).
    r : ndarray of shape (n,)
        Working residual ``z - eta``; updated in place.
    w : ndarray of shape (n,)
        Working weights.
    b : ndarray of shape (d + q,)
        Coefficients; the active ones are updated in place.
    active : ndarray of int64 of shape (m,)
        Columns to visit, in order.
    xwx : ndarray of shape (m,)
        ``sum_i w_i x_ij^2 / n`` of the active columns.
    free : ndarray of bool of shape (m,)
        True for an unpenalised column (its update is the plain least-squares step ``u / v``).

    Returns
    -------
    (sweeps done, largest scaled change of the last sweep)
    """
    n = X.shape[0]
    change = 0.0
    done = 0
    for _ in range(max_sweeps):
        change = 0.0
        done += 1
        for k in range(active.shape[0]):
            j = active[k]
            v = xwx[k]
            if v <= 0.0:
                continue
            s = 0.0
            for i in range(n):
                s += w[i] * X[i, j] * r[i]
            u = s / n + v * b[j]
            new = u / v if free[k] else threshold_scalar(u, v, lam, kind, conc)
            delta = new - b[j]
            if delta != 0.0:
                for i in range(n):
                    r[i] -= delta * X[i, j]
                b[j] = new
                step = abs(delta) * np.sqrt(v)
                if step > change:
                    change = step
        if change < tol:
            break
    return done, change
