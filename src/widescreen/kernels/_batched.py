"""Batched Newton-Raphson for many small independent likelihood fits (one per feature of a block).

Every fit has the same layout of parameters: nuisance parameters first (the intercept and covariate
coefficients, or none) and the feature's coefficient ``b`` last. A Newton step solves the system by its
Schur complement on ``b``: ``s = H_bb - h' A^-1 h`` with ``A`` the nuisance block and ``h`` the cross
column. ``1 / s`` is then also the variance of ``b`` (the last diagonal element of ``H^-1``), and ``s``
near zero is exactly the direction that fades under separation, where the step is damped.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..store import _accel


def _nuisance_solve(A: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``A^-1 rhs`` for a stack A (m, k, k) and rhs (m, k, r); a singular member gets a ridge."""
    k = A.shape[1]
    if k == 1:
        return rhs / A[:, :, :1]
    try:
        return np.linalg.solve(A, rhs)
    except np.linalg.LinAlgError:
        # Some member lost its nuisance information (weights collapsed under separation): a ridge of
        # 1e-10 of its trace keeps the batch solvable; its step is then checked by the caller's halving.
        ridge = 1e-10 * np.trace(A, axis1=1, axis2=2) + 1e-300
        return np.linalg.solve(A + ridge[:, None, None] * np.eye(k), rhs)


def schur(H: np.ndarray, g: np.ndarray | None = None):
    """Schur complement of the last parameter, and the pieces of a Newton step.

    Returns ``s`` (m,) and, when ``g`` is given, ``(Ainv_g, Ainv_h)`` of shapes (m, k) for the step.
    """
    k = H.shape[1] - 1
    hbb = H[:, k, k]
    if k == 0:
        return hbb, (None, None)
    A, h = H[:, :k, :k], H[:, :k, k]
    rhs = h[:, :, None] if g is None else np.stack([h, g[:, :k]], axis=2)
    sol = _nuisance_solve(A, rhs)
    Ainv_h = sol[:, :, 0]
    s = hbb - np.einsum("ij,ij->i", h, Ainv_h)
    return s, (None if g is None else sol[:, :, 1], Ainv_h)


@_accel._jit
def _cholesky_schur(H, r, L, U, ridge):  # pragma: no cover - compiled
    """Cholesky factor L of ``H[r]``'s nuisance block (+ ridge I) and ``U[:, 0] = A^-1 h``; False if
    the block is not positive definite."""
    k = H.shape[1] - 1
    for a in range(k):
        for b in range(a + 1):
            v = H[r, a, b]
            if a == b:
                v += ridge
            for c in range(b):
                v -= L[a, c] * L[b, c]
            if a == b:
                if not v > 0.0:
                    return False
                L[a, a] = np.sqrt(v)
            else:
                L[a, b] = v / L[b, b]
    return True


@_accel._jit
def _chol_solve(L, U, col):  # pragma: no cover - compiled
    """``U[:, col] = (L L')^-1 U[:, col]`` in place."""
    k = L.shape[0]
    for a in range(k):
        v = U[a, col]
        for c in range(a):
            v -= L[a, c] * U[c, col]
        U[a, col] = v / L[a, a]
    for a in range(k - 1, -1, -1):
        v = U[a, col]
        for c in range(a + 1, k):
            v -= L[c, a] * U[c, col]
        U[a, col] = v / L[a, a]


@_accel._jit
def _factor(H, r, L, U):  # pragma: no cover - compiled
    """Factor the nuisance block of ``H[r]`` (a ridge of 1e-10 of its trace if it is singular)."""
    k = H.shape[1] - 1
    if _cholesky_schur(H, r, L, U, 0.0):
        return True
    tr = 0.0
    for a in range(k):
        tr += H[r, a, a]
    return _cholesky_schur(H, r, L, U, 1e-10 * tr + 1e-300)


@_accel._jit
def _solve_compiled(H, g, step, lam, ok):  # pragma: no cover - compiled
    m, p, _ = H.shape
    k = p - 1
    L = np.empty((max(k, 1), max(k, 1)))
    U = np.empty((max(k, 1), 2))
    for r in range(m):
        good = True
        tr = 0.0
        for a in range(p):
            tr += H[r, a, a]
            if not np.isfinite(g[r, a]):
                good = False
            for b in range(p):
                if not np.isfinite(H[r, a, b]):
                    good = False
        hbb = H[r, k, k]
        if not (hbb > 0.0 and tr > 0.0):
            good = False
        for a in range(k):
            if not H[r, a, a] > 0.0:
                good = False
        if good and k:
            good = _factor(H, r, L, U)
        if not good:
            step[r, :] = 0.0
            lam[r] = 0.0
            ok[r] = False
            continue
        s = hbb
        hg = 0.0
        if k:
            for a in range(k):
                U[a, 0] = H[r, a, k]
                U[a, 1] = g[r, a]
            _chol_solve(L, U, 0)
            _chol_solve(L, U, 1)
            for a in range(k):
                s -= H[r, a, k] * U[a, 0]
                hg += H[r, a, k] * U[a, 1]
        if not s > 1e-12 * hbb:
            s = max(s, 0.0) + 1e-6 * tr
        sb = (g[r, k] - hg) / s
        step[r, k] = sb
        total = g[r, k] * sb
        for a in range(k):
            step[r, a] = U[a, 1] - U[a, 0] * sb
            total += g[r, a] * step[r, a]
        if np.isfinite(total):
            lam[r] = total
            ok[r] = True
        else:
            step[r, :] = 0.0
            lam[r] = 0.0
            ok[r] = False


@_accel._jit
def _last_variance_compiled(H, out):  # pragma: no cover - compiled
    m, p, _ = H.shape
    k = p - 1
    L = np.empty((max(k, 1), max(k, 1)))
    U = np.empty((max(k, 1), 2))
    for r in range(m):
        good = True
        for a in range(p):
            for b in range(p):
                if not np.isfinite(H[r, a, b]):
                    good = False
        if not good:
            out[r] = np.nan
            continue
        s = H[r, k, k]
        if k:
            if not _factor(H, r, L, U):
                out[r] = np.nan
                continue
            for a in range(k):
                U[a, 0] = H[r, a, k]
            _chol_solve(L, U, 0)
            for a in range(k):
                s -= H[r, a, k] * U[a, 0]
        out[r] = 1.0 / s if s != 0.0 else np.inf


def newton_steps(H: np.ndarray, g: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Newton steps ``H^-1 g`` of a stack of systems, damped where ``b`` has (almost) no information left.

    Under separation the information along the separating direction fades geometrically while the
    likelihood still rises; there the Schur complement gets ``tau = 1e-6 trace(H)`` added (a
    Levenberg-Marquardt step in ``b``), which keeps the fit moving; a step too long is halved by the
    caller's deviance check.

    Returns ``step`` (m, p), ``lam`` (m,) = g' step (the predicted deviance decrease) and ``ok`` (m,),
    False where no step exists (non-finite or zero information).
    """
    m, p = g.shape
    if _accel.use_numba:
        step, lam, ok = np.empty((m, p)), np.empty(m), np.empty(m, dtype=bool)
        _solve_compiled(np.ascontiguousarray(H), np.ascontiguousarray(g), step, lam, ok)
        return step, lam, ok
    finite = np.all(np.isfinite(H), axis=(1, 2)) & np.all(np.isfinite(g), axis=1)
    H = np.where(finite[:, None, None], H, np.eye(p))
    g = np.where(finite[:, None], g, 0.0)
    trace = np.trace(H, axis1=1, axis2=2)
    hbb = H[:, -1, -1]
    ok = finite & (hbb > 0) & (trace > 0)
    if p > 1:
        ok &= np.all(np.diagonal(H, axis1=1, axis2=2)[:, :-1] > 0, axis=1)
    H = np.where(ok[:, None, None], H, np.eye(p))
    s, (Ainv_g, Ainv_h) = schur(H, g)
    singular = ~(s > 1e-12 * hbb)
    s = np.where(singular, np.maximum(s, 0.0) + 1e-6 * trace, s)
    step = np.empty((m, p))
    if p == 1:
        step[:, 0] = g[:, 0] / s
    else:
        step[:, -1] = (g[:, -1] - np.einsum("ij,ij->i", H[:, :-1, -1], Ainv_g)) / s
        step[:, :-1] = Ainv_g - Ainv_h * step[:, -1:]
    step = np.where(ok[:, None], step, 0.0)
    lam = np.einsum("ij,ij->i", g, step)
    ok &= np.isfinite(lam)
    return np.where(ok[:, None], step, 0.0), np.where(ok, lam, 0.0), ok


def last_variance(H: np.ndarray) -> np.ndarray:
    """The last diagonal element of each ``H^-1`` (the variance of ``b``); NaN where H is not finite."""
    if _accel.use_numba:
        out = np.empty(H.shape[0])
        _last_variance_compiled(np.ascontiguousarray(H), out)
        return out
    ok = np.all(np.isfinite(H), axis=(1, 2))
    s, _ = schur(np.where(ok[:, None, None], H, np.eye(H.shape[1])))
    with np.errstate(divide="ignore"):
        return np.where(ok, 1.0 / s, np.nan)


@dataclass(frozen=True)
class NewtonResult:
    """Outcome of `newton` for m columns with p parameters each.

    Attributes
    ----------
    params : ndarray of shape (m, p)
    deviance : ndarray of shape (m,)
    hessian : ndarray of shape (m, p, p)
        At the last evaluated point.
    converged : ndarray of bool, shape (m,)
    n_iter : ndarray of int, shape (m,)
    """

    params: np.ndarray
    deviance: np.ndarray
    hessian: np.ndarray
    converged: np.ndarray
    n_iter: np.ndarray


def newton(
    evaluate,
    start,
    dev0,
    g0,
    H0,
    *,
    max_iter: int,
    tol: float,
    first=None,
) -> NewtonResult:
    """Batched Newton-Raphson with step halving for m independent smooth convex problems.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(cols, params) -> (deviance (c,), gradient (c, p), hessian (c, p, p))`` for the columns
        ``cols`` (sorted int array) at ``params`` of shape (c, p); gradient of the log-likelihood, Hessian of
        the negative log-likelihood, so the Newton step is ``H^-1 g``.
    start : ndarray of shape (m, p)
        Point where ``dev0`` (m,), ``g0`` (m, p) and ``H0`` (m, p, p) were computed.
    max_iter : int
        Evaluations per column at most; a step whose deviance rises is halved (and counts as one).
    tol : float
        A column converges when ``g' H^-1 g``, the predicted deviance decrease of the next step, is at most
        ``tol``; that step is taken without another evaluation and its predicted decrease subtracted.
    first : callable, optional
        ``first(step) -> step1`` (m, p) from the Newton steps at ``start``: the columns not converged
        there take ``step1`` as their first trial step (a higher-order step from ``start``); the
        convergence test at ``start`` stays ``g0``'s.
    """
    m, _ = start.shape
    acc, acc_dev, acc_H = start.copy(), np.asarray(dev0, dtype=np.float64).copy(), H0.copy()
    step, lam, ok = newton_steps(H0, g0)
    out, out_dev = acc + step, acc_dev - lam
    converged = ok & (lam <= tol)
    active = ok & ~converged
    if first is not None:
        step1 = first(step)
        use = active & np.all(np.isfinite(step1), axis=1)
        step[use] = step1[use]
    scale = np.ones(m)
    n_iter = np.zeros(m, dtype=np.int64)
    while True:
        idx = np.flatnonzero(active & (n_iter < max_iter))
        if idx.size == 0:
            break
        trial = acc[idx] + scale[idx, None] * step[idx]
        dev, g, H = evaluate(idx, trial)
        n_iter[idx] += 1
        base = acc_dev[idx]
        # Slack for rounding in the deviance sums, so a converging step is not mistaken for a rise.
        better = np.isfinite(dev) & (dev <= base + 1e-9 * (1.0 + np.abs(base)))
        worse = idx[~better]
        scale[worse] *= 0.5
        active[worse[scale[worse] < 2.0**-30]] = False
        good = idx[better]
        H, g = H[better], g[better]
        s, lam, okh = newton_steps(H, g)
        acc[good], acc_dev[good], acc_H[good] = trial[better], dev[better], H
        step[good], scale[good] = s, 1.0
        active[good[~okh]] = False
        fin = okh & (lam <= tol)
        done = good[fin]
        converged[done], active[done] = True, False
        out[done], out_dev[done] = acc[done] + s[fin], acc_dev[done] - lam[fin]
    stopped = ~converged
    out[stopped], out_dev[stopped] = acc[stopped], acc_dev[stopped]
    return NewtonResult(out, out_dev, acc_H, converged, n_iter)
