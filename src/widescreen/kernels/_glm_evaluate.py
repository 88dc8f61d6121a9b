"""One Newton evaluation of many marginal GLM fits: deviance, score and information per column.

Each evaluator takes the columns still iterating (``idx``) at their parameters and returns, for them,
the deviance (-2 log-likelihood without the saturated constant), the gradient of the log-likelihood and
the information (negative Hessian), nuisance parameters first and the feature's ``b`` last.

* `evaluate_joint`: ``eta0 + D gamma + b x`` with the whitened nuisance columns ``D`` (intercept and
  covariates): the full model ``y ~ 1 + covariates + x`` refitted per feature. The sums over samples are
  matrix products of ``D`` (and its column products) with the tile's means and weights.
* `evaluate_logistic`: no covariates, ``eta0 + a + b x``: six sums per column, fused when numba is on.
* `evaluate_poisson_profile`: no covariates, Poisson: the intercept has a closed form given ``b``.
"""

from __future__ import annotations

import numpy as np

from ..store import _accel
from ._glm_loops import (
    linear_predictor,
    logistic_joint_sums,
    logistic_sums,
    poisson_joint_sums,
    shift_predictor,
    weighted_moments,
)
from ._glm_state import GLMState
from ._tiles import Workspace, sum_log


def design_pairs(D: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Products ``D_a * D_b`` (a <= b) of shape (n, k(k+1)/2) and their row and column indices.

    ``pairs' w`` gives the upper triangle of ``D' diag(w) D`` for every column of ``w`` in one product.
    """
    rows, cols = np.triu_indices(D.shape[1])
    return np.ascontiguousarray(D[:, rows] * D[:, cols]), rows, cols


def evaluate_joint(st: GLMState, ws: Workspace, pairs, yx: np.ndarray, sx: np.ndarray, idx, params):
    """Deviance, score and information of ``eta0 + D gamma + b x`` at ``params`` = [gamma, b]."""
    pos = ws.take(idx)
    x = ws.x
    D, k = st.design, st.design.shape[1]
    P = np.zeros((x.shape[1], k + 1))
    P[pos] = params
    gam, b = P[:, :k], P[:, k]
    yx, sx = yx[ws.idx], sx[ws.idx]
    eta = ws.scratch(1)
    np.matmul(D, gam.T, out=eta)
    w, wx = ws.scratch(2), ws.scratch(3)
    yD = st.y @ D
    logistic = st.family == "logistic"
    if _accel.use_numba:
        shift_predictor(eta, x, b, st.eta0, -1.0 if logistic else 1.0)
        np.exp(eta, out=eta)
        sums = np.empty((3, x.shape[1]))
        if logistic:
            logistic_joint_sums(eta, x, w, wx, sums)
            log_den, xmu, xwx = sums
        else:
            poisson_joint_sums(eta, x, wx, sums)
            mu_sum, xmu, xwx = sums
            w = eta
        mu = eta
    else:
        eta += st.eta0[:, None]
        eta += np.multiply(x, b, out=w)
        if logistic:
            np.negative(eta, out=eta)
            np.exp(eta, out=eta)
            eta += 1.0
            log_den = sum_log(eta)  # sum log(1 + e^-eta)
            mu = np.reciprocal(eta, out=eta)
            np.multiply(mu, mu, out=w)
            np.subtract(mu, w, out=w)
        else:
            mu = w = np.exp(eta, out=eta)
            mu_sum = mu.sum(axis=0)
        np.multiply(w, x, out=wx)
        xmu, xwx = np.einsum("ij,ij->j", mu, x), np.einsum("ij,ij->j", wx, x)
    if logistic:
        v = 1.0 - st.y  # l = -sum (1 - y) eta - sum log(1 + e^-eta)
        ell = -(v @ st.eta0 + gam @ (v @ D) + b * (sx - yx)) - log_den
    else:
        ell = st.y @ st.eta0 + gam @ yD + b * yx - mu_sum
    prod, rows, cols = pairs
    # (n, c)' @ (n, k): the transposed product is the faster layout for a narrow D.
    g = np.empty((pos.size, k + 1))
    g[:, :k] = yD[None] - (mu.T @ D)[pos]
    g[:, k] = (yx - xmu)[pos]
    H = np.empty((pos.size, k + 1, k + 1))
    H[:, :k, k] = H[:, k, :k] = (wx.T @ D)[pos]
    H[:, k, k] = xwx[pos]
    H[:, rows, cols] = (w.T @ prod)[pos]
    H[:, cols, rows] = H[:, rows, cols]
    return -2.0 * ell[pos], g, H


def evaluate_logistic(st: GLMState, ws: Workspace, yx: np.ndarray, sx: np.ndarray, idx, params):
    """The logistic model with the intercept alone (no covariates), in fewer passes over the tile.

    numpy route: with m = mu and m2 = mu^2 the information needs sums of (m - m2) x^p, p = 0, 1, 2: six
    reductions that only read (x^2 is kept from the start), instead of forming the weights and products.
    """
    pos = ws.take(idx)
    x = ws.x
    a, b = np.zeros(x.shape[1]), np.zeros(x.shape[1])
    a[pos], b[pos] = params[:, 0], params[:, 1]
    t = ws.scratch(1)
    if _accel.use_numba:
        linear_predictor(x, b, a, st.eta0, -1.0, t)
        np.exp(t, out=t)
        sums = np.empty((6, x.shape[1]))
        logistic_sums(t, x, sums)
        log_den, s0, s1, h00, h01, h11 = sums
    else:
        xx = ws.xx
        np.multiply(x, -b, out=t)
        if st.eta0_constant:  # no covariates nor offset: eta0 folds into the intercepts
            t -= a + st.eta0[0]
        else:
            t -= a
            t -= st.eta0[:, None]
        np.exp(t, out=t)
        t += 1.0
        log_den = sum_log(t)  # sum log(1 + e^-eta)
        mu = np.reciprocal(t, out=t)
        m2 = np.multiply(mu, mu, out=ws.scratch(2))
        s0, s1, s2 = mu.sum(axis=0), np.einsum("ij,ij->j", mu, x), np.einsum("ij,ij->j", mu, xx)
        q0, q1, q2 = m2.sum(axis=0), np.einsum("ij,ij->j", m2, x), np.einsum("ij,ij->j", m2, xx)
        h00, h01, h11 = s0 - q0, s1 - q1, s2 - q2
    v = 1.0 - st.y  # l = -sum (1 - y) eta - sum log(1 + e^-eta)
    yx, sx = yx[ws.idx], sx[ws.idx]
    ell = -(v @ st.eta0 + a * v.sum() + b * (sx - yx)) - log_den
    g = np.stack([st.y.sum() - s0, yx - s1], axis=1)
    H = np.empty((x.shape[1], 2, 2))
    H[:, 0, 0], H[:, 0, 1], H[:, 1, 1] = h00, h01, h11
    H[:, 1, 0] = H[:, 0, 1]
    return -2.0 * ell[pos], g[pos], H[pos]


def evaluate_poisson_profile(st: GLMState, ws: Workspace, yx: np.ndarray, idx, params):
    """Poisson fit of ``eta0 + a + b x`` with ``a`` profiled out: exp(a) = sum(y) / sum(mu0 e^{b x})."""
    pos = ws.take(idx)
    x = ws.x
    b = np.zeros(x.shape[1])
    b[pos] = params[:, 0]
    e = ws.scratch(1)
    if _accel.use_numba:
        linear_predictor(x, b, np.zeros_like(b), np.zeros(x.shape[0]), 1.0, e)
        np.exp(e, out=e)
        s0, s1, s2 = sums = np.empty((3, x.shape[1]))
        weighted_moments(e, x, st.mu0, sums)
    else:
        np.multiply(x, b, out=e)
        np.exp(e, out=e)
        s0 = st.mu0 @ e
        e *= x
        s1 = st.mu0 @ e
        e *= x
        s2 = st.mu0 @ e
    total = st.y.sum()
    m1 = s1 / s0
    # Log-likelihood gain over the null (where s0 = sum(y) and a = 0): sum(y) a + b y'x.
    gain = total * np.log(total / s0) + b * yx[ws.idx]
    dev = st.deviance0 - 2.0 * gain
    g = yx[ws.idx] - total * m1
    H = total * (s2 / s0 - m1 * m1)
    return dev[pos], g[pos, None], H[pos, None, None]
