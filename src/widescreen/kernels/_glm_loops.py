"""Compiled loops of the GLM kernels: the sums over samples of one Newton evaluation in one pass.

With numba (optional, the store's switch `_accel.use_numba`) the sums over samples of a Newton step are
one fused pass over the tile instead of a dozen numpy passes; exp() stays with numpy, whose vectorised
version is several times faster than numba's scalar one. The numpy route computes the same sums.
"""

from __future__ import annotations

import numpy as np

from ..store import _accel


@_accel._jit
def linear_predictor(x, b, a, eta0, sign, out):  # pragma: no cover - compiled
    """``out = sign * (eta0_i + a_j + b_j x_ij)`` for a tile x (n, c)."""
    n, c = x.shape
    for i in range(n):
        e = eta0[i]
        for j in range(c):
            out[i, j] = sign * (e + a[j] + b[j] * x[i, j])


@_accel._jit
def logistic_sums(t, x, out):  # pragma: no cover - compiled
    # t = exp(-eta). Rows of out: sum log(1 + t), sum mu, sum mu x, sum w, sum w x, sum w x^2 with
    # mu = 1 / (1 + t), w = mu (1 - mu). Accumulators are separate vectors (faster than rows of out).
    n, c = t.shape
    s0 = np.zeros(c)
    s1 = np.zeros(c)
    h0 = np.zeros(c)
    h1 = np.zeros(c)
    h2 = np.zeros(c)
    logs = np.zeros(c)
    prod = np.ones(c)
    for i0 in range(0, n, 16):
        i1 = min(i0 + 16, n)
        for i in range(i0, i1):
            ti = t[i]
            xi = x[i]
            for j in range(c):
                den = 1.0 + ti[j]
                prod[j] *= den
                mu = 1.0 / den
                w = mu - mu * mu
                v = xi[j]
                wv = w * v
                s0[j] += mu
                s1[j] += mu * v
                h0[j] += w
                h1[j] += wv
                h2[j] += wv * v
        for j in range(c):
            # One log per 16 factors >= 1; the product only overflows past |eta| ~ 44.
            if prod[j] < 1e300:
                logs[j] += np.log(prod[j])
            else:
                for i in range(i0, i1):
                    logs[j] += np.log(1.0 + t[i, j])
            prod[j] = 1.0
    for j in range(c):
        out[0, j] = logs[j]
        out[1, j] = s0[j]
        out[2, j] = s1[j]
        out[3, j] = h0[j]
        out[4, j] = h1[j]
        out[5, j] = h2[j]


@_accel._jit
def weighted_moments(e, x, w, out):  # pragma: no cover - compiled
    # Rows of out: sum_i w_i e_ij x_ij^p, p = 0, 1, 2.
    n, c = e.shape
    m0 = np.zeros(c)
    m1 = np.zeros(c)
    m2 = np.zeros(c)
    for i in range(n):
        wi = w[i]
        ei = e[i]
        xi = x[i]
        for j in range(c):
            u = wi * ei[j]
            uv = u * xi[j]
            m0[j] += u
            m1[j] += uv
            m2[j] += uv * xi[j]
    for j in range(c):
        out[0, j] = m0[j]
        out[1, j] = m1[j]
        out[2, j] = m2[j]


@_accel._jit
def _weighted_sumsq(x, w, out):  # pragma: no cover - compiled
    # out_j = sum_i w_i x_ij^2
    n, c = x.shape
    for i in range(n):
        wi = w[i]
        xi = x[i]
        for j in range(c):
            v = xi[j]
            out[j] += wi * v * v


def weighted_sumsq(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """``sum_i w_i x_ij^2`` of shape (c,) for x (n, c)."""
    if _accel.use_numba:
        out = np.zeros(x.shape[1])
        _weighted_sumsq(x, w, out)
        return out
    return np.einsum("i,ij,ij->j", w, x, x)


@_accel._jit
def shift_predictor(e, x, b, eta0, sign):  # pragma: no cover - compiled
    """``e = sign * (e_ij + eta0_i + b_j x_ij)`` in place (e holds the nuisance part ``D gamma``)."""
    n, c = e.shape
    for i in range(n):
        e0 = eta0[i]
        for j in range(c):
            e[i, j] = sign * (e[i, j] + e0 + b[j] * x[i, j])


@_accel._jit
def logistic_joint_sums(t, x, w, wx, out):  # pragma: no cover - compiled
    # t = exp(-eta) in, mu = 1 / (1 + t) out (in place); w = mu (1 - mu) and w x into their buffers.
    # Rows of out: sum log(1 + t), sum mu x, sum w x^2 (the sums with D are matrix products).
    n, c = t.shape
    s1 = np.zeros(c)
    h2 = np.zeros(c)
    logs = np.zeros(c)
    prod = np.ones(c)
    for i0 in range(0, n, 16):
        i1 = min(i0 + 16, n)
        for i in range(i0, i1):
            ti = t[i]
            xi = x[i]
            wi = w[i]
            wxi = wx[i]
            for j in range(c):
                den = 1.0 + ti[j]
                prod[j] *= den
                mu = 1.0 / den
                ti[j] = mu
                v = xi[j]
                ww = mu - mu * mu
                wi[j] = ww
                wv = ww * v
                wxi[j] = wv
                s1[j] += mu * v
                h2[j] += wv * v
        for j in range(c):
            # One log per 16 factors >= 1; the product only overflows past |eta| ~ 44.
            if prod[j] < 1e300:
                logs[j] += np.log(prod[j])
            else:
                for i in range(i0, i1):
                    logs[j] += np.log(1.0 / t[i, j])
            prod[j] = 1.0
    for j in range(c):
        out[0, j] = logs[j]
        out[1, j] = s1[j]
        out[2, j] = h2[j]


@_accel._jit
def poisson_joint_sums(mu, x, wx, out):  # pragma: no cover - compiled
    # w = mu; w x into its buffer. Rows of out: sum mu, sum mu x, sum mu x^2.
    n, c = mu.shape
    s0 = np.zeros(c)
    s1 = np.zeros(c)
    s2 = np.zeros(c)
    for i in range(n):
        mi = mu[i]
        xi = x[i]
        wxi = wx[i]
        for j in range(c):
            m = mi[j]
            mv = m * xi[j]
            wxi[j] = mv
            s0[j] += m
            s1[j] += mv
            s2[j] += mv * xi[j]
    for j in range(c):
        out[0, j] = s0[j]
        out[1, j] = s1[j]
        out[2, j] = s2[j]


@_accel._jit
def taylor_terms(e, x, b, dw, dw2, out):  # pragma: no cover - compiled
    """With v = e_ij + b_j x_ij: ``e_ij = dw_i v^2 + dw2_i v^3 / 3`` in place, ``out_j += sum_i e_ij x_ij``."""
    n, c = e.shape
    for i in range(n):
        w1 = dw[i]
        w2 = dw2[i] / 3.0
        ei = e[i]
        xi = x[i]
        for j in range(c):
            v = ei[j] + b[j] * xi[j]
            u = v * v * (w1 + w2 * v)
            ei[j] = u
            out[j] += u * xi[j]
