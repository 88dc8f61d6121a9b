"""Cox fits with covariates: the full model ``eta = eta0 + design gamma + b x`` refitted per feature.

With q covariates each feature has k = q + 1 parameters. One evaluation needs, at every event time, the
risk-set sums ``S0 = sum exp(eta)``, ``S1_a = sum exp(eta) v_a`` and ``S2_ab = sum exp(eta) v_a v_b`` over
the columns ``v = (design, x)``: ``1 + k + k (k + 1) / 2`` arrays of shape (n, c) whose cumulative sums
down the rows (samples by decreasing time) are read at the tie groups' last rows (Breslow's rule, as in
`widescreen.kernels._cox`). Then

* log partial likelihood ``sum_i event_i eta_i - sum_g d_g log S0_g``;
* score ``sum_i event_i v_ia - sum_g d_g S1_a / S0``;
* information ``sum_g d_g (S2_ab / S0 - S1_a S1_b / S0^2)``,

all whole-tile array operations, never a loop over features. The numpy route serves both switches of
``_accel.use_numba``: the covariate case is not the common one, and its sums are cumulative sums already.
"""

from __future__ import annotations

import numpy as np

from ._batched import last_variance, newton
from ._tiles import sum_log


def joint_evaluate(st, ws, idx, params):
    """Deviance, score (c, k) and information (c, k, k) of the working columns at ``params`` (c, k)."""
    pos = ws.take(idx)
    x, n = ws.x, st.n_samples
    Zd, q = st.design, st.design.shape[1]
    k = q + 1
    c = x.shape[1]
    P = np.zeros((c, k))
    P[pos] = params
    gam, b = P[:, :q], P[:, q]
    R = ws.stacked(st.parts)
    r = R[0]
    np.multiply(x, b, out=r)
    r[:n] += st.eta0[:, None] + Zd @ gam.T
    ex_eta = st.event @ r[:n]  # sum of eta over the events, before exp() overwrites it
    np.exp(r, out=r)
    r[n:] = 0.0
    rows, cols = np.triu_indices(k)
    for a in range(k):
        va = x if a == q else Zd[:, a, None]
        if a == q:
            np.multiply(r, va, out=R[1 + a])
        else:
            R[1 + a, :n] = r[:n] * va
            R[1 + a, n:] = 0.0
    for p, (a, bb) in enumerate(zip(rows, cols, strict=True)):
        vb = x if bb == q else np.vstack([Zd[:, bb, None], np.zeros((ws.n_pad - n, 1))])
        np.multiply(R[1 + a], vb, out=R[1 + k + p])
    ws.cumsum_rows(R)
    S = ws.at_times(R, st.ends)
    d = st.deaths
    s0 = S[0]
    log_s0 = sum_log(s0)
    tied = d > 1
    if tied.any():  # sum_g d_g log S0_g: the extra d_g - 1 copies of the (few) tied groups
        log_s0 += (d[tied] - 1.0) @ np.log(s0[tied])
    inv = 1.0 / s0
    M1 = S[1 : 1 + k] * inv  # (k, G, c)
    M2 = S[1 + k :] * inv  # (pairs, G, c)
    ell = ex_eta - log_s0
    ev_v = np.empty((k, c))
    ev_v[:q] = (st.event @ Zd)[:, None]
    ev_v[q] = st.event @ x[:n]
    g = (ev_v - np.einsum("g,agc->ac", d, M1)).T
    hp = np.einsum("g,pgc->pc", d, M2) - np.einsum("g,pgc,pgc->pc", d, M1[rows], M1[cols])
    H = np.empty((c, k, k))
    H[:, rows, cols] = hp.T
    H[:, cols, rows] = hp.T
    return -2.0 * ell[pos], g[pos], H[pos]


def joint_fit_tile(st, ws, tile: np.ndarray, dead: np.ndarray) -> dict[str, np.ndarray]:
    """Full-model fits of one tile's columns, from the null (gamma = 0, b = 0)."""
    c = tile.shape[1]
    k = st.design.shape[1] + 1
    ws.load(tile, st.order)
    _, g0, H0 = joint_evaluate(st, ws, np.arange(c), np.zeros((c, k)))
    with np.errstate(invalid="ignore", divide="ignore"):
        # No information left after the covariates: constant within every risk set that matters.
        dead = dead | ~(1.0 / last_variance(H0) > 1e-10 * H0[:, -1, -1])
    H0[dead] = np.nan
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        res = newton(
            lambda idx, params: joint_evaluate(st, ws, idx, params),
            np.zeros((c, k)),
            np.full(c, st.deviance0),
            g0,
            H0,
            max_iter=st.max_iter,
            tol=st.tol,
        )
        var = last_variance(res.hessian)
    return {
        "beta": res.params[:, -1],
        "var": var,
        "lr_chi2": st.deviance0 - res.deviance,
        "converged": res.converged,
        "n_iter": res.n_iter,
        "dead": dead,
    }
