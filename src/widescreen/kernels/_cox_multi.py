"""Cox score test of K responses in one pass: the same times and events, each on its own samples.

The responses of a Cox response matrix share the survival times and events and differ in their samples
(the NaN mask: half-samples, training folds). For response k with samples ``S_k`` the Rao score test of
``b_j = 0`` in the Breslow partial likelihood, at the null fit (covariates only) on ``S_k``:

    U_kj = sum_{events i in S_k} (x_ij - S1_kj(t_i) / S0_k(t_i)),
    I_kj = sum_g d_kg [S2_kj(t_g) / S0_k(t_g) - (S1_kj(t_g) / S0_k(t_g))^2] - |I_xz|^2,

risk-set sums ``S_p = sum_{l in S_k, t_l >= t} w_kl x_l^p`` with ``w_k = exp(eta0_k)``, and ``I_xz`` the
cross information of the feature with the whitened covariates (their information is the identity), so
the last term projects out the covariates' score (the efficient information). The feature's missing
values are imputed by its mean over ``S_k``, as a one-response pass over ``S_k`` does.

The samples are sorted once by decreasing time, so every risk set is a prefix of that order restricted
to the mask; one compiled walk down the rows per response accumulates all of the sums for every column
of the block (a loop over the K responses and the rows, vectorised over the features; no Python loop
over responses or features in the block task).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..store import Block, _accel
from ._cox import _tie_groups, prepare_cox
from ._multi import (
    _as_matrix,
    _shift,
    _squares,
    _summaries,
    _with_missing,
    missing_indicator,
    response_masks,
    score_test_columns,
)


@dataclass(frozen=True)
class MultiCoxState:
    """Response state of a Cox score pass over K responses sharing times and events.

    Attributes
    ----------
    order : ndarray of int of shape (n,)
        Samples by decreasing time (stable); the arrays below indexed by row are in this order.
    mask : ndarray of shape (n, K), float 0/1
        Each response's samples (original sample order).
    weight : ndarray of shape (K, n)
        ``exp(eta0_k)`` at each response's null fit on its samples, 0 outside them (time order).
    event : ndarray of shape (K, n)
        1 for an event of a sample of response k (time order).
    ends : ndarray of int of shape (G,)
        Last row of each tie group with an event among all samples.
    deaths : ndarray of shape (K, G)
        Events of response k at each of those times (0: not an event time of response k).
    inv_s0 : ndarray of shape (K, G)
        ``1 / S0_k`` at each time (0 where response k has no event).
    design : ndarray of shape (K, n, c)
        Each response's whitened covariates at its null fit (0 outside its samples; c = 0 without
        covariates), time order.
    mean_z : ndarray of shape (K, G, c)
        ``S1_z / S0`` of the whitened covariates at each time.
    n_obs : ndarray of shape (K,)
    """

    order: np.ndarray
    mask: np.ndarray
    weight: np.ndarray
    event: np.ndarray
    ends: np.ndarray
    deaths: np.ndarray
    inv_s0: np.ndarray
    design: np.ndarray
    mean_z: np.ndarray
    n_obs: np.ndarray

    @property
    def n_responses(self) -> int:
        return self.mask.shape[1]

    @property
    def n_nulls(self) -> int:
        return 0


def prepare_cox_multi(Y, event: np.ndarray, covariates: np.ndarray | None = None) -> MultiCoxState:
    """Null fits of the K responses of ``Y`` (times; NaN: sample not in response k), each on its samples.

    Parameters
    ----------
    Y : ndarray of shape (n, K)
        The same follow-up time in every finite entry of a row.
    event : ndarray of shape (n,)
        1 (or True) for an event, 0 for right censoring; shared by the responses.
    covariates : ndarray of shape (n, q), optional

    Raises
    ------
    ValueError
        Responses whose finite times differ for a sample, or a response its null fit refuses (named).
    """
    Y = _as_matrix(Y)
    n, K = Y.shape
    mask = response_masks(Y)
    time = np.nanmax(np.where(mask, Y, -np.inf), axis=1)
    differ = mask & (Y != time[:, None])
    if differ.any():
        i, k = np.argwhere(differ)[0]
        raise ValueError(
            f"the Cox response matrix needs the same time in every response of a sample; sample "
            f"{int(i)} differs in response {int(k)}"
        )
    time = np.where(np.isfinite(time), time, 0.0)
    ev = np.asarray(event, dtype=np.float64).reshape(-1)
    if ev.shape != (n,):
        raise ValueError(f"'event' must have shape ({n},); got {ev.shape}")
    Z = None if covariates is None else np.asarray(covariates, dtype=np.float64).reshape(n, -1)
    c = 0 if Z is None else Z.shape[1]
    order = np.argsort(-time, kind="stable")
    rank = np.empty(n, dtype=np.intp)
    rank[order] = np.arange(n)
    ends, _ = _tie_groups(time[order], ev[order])
    G = ends.size
    weight, evk = np.zeros((K, n)), np.zeros((K, n))
    deaths, inv_s0 = np.zeros((K, G)), np.zeros((K, G))
    design, mean_z = np.zeros((K, n, c)), np.zeros((K, G, c))
    n_obs = mask.sum(axis=0).astype(np.float64)
    for k in range(K):  # once per pass: each response's null fit on its own samples
        rows = np.flatnonzero(mask[:, k])
        try:
            st = prepare_cox(time[rows], ev[rows], None if Z is None else Z[rows])
        except ValueError as exc:
            raise ValueError(f"response {k}: {exc}") from None
        pos = rank[rows[st.order]]  # the subset's rows in its own time order -> global time order
        weight[k, pos] = np.exp(st.eta0)
        evk[k, pos] = st.event
        design[k][pos] = st.design
        cw = np.cumsum(weight[k])[ends]
        deaths[k] = np.add.reduceat(evk[k], np.concatenate([[0], ends[:-1] + 1])) if G else 0.0
        has = deaths[k] > 0
        inv_s0[k] = np.where(has, 1.0 / np.where(has, cw, 1.0), 0.0)
        if c:
            mean_z[k] = np.cumsum(weight[k][:, None] * design[k], axis=0)[ends] * inv_s0[k][:, None]
    return MultiCoxState(
        order=order,
        mask=mask.astype(np.float64),
        weight=weight,
        event=evk,
        ends=ends,
        deaths=deaths,
        inv_s0=inv_s0,
        design=design,
        mean_z=mean_z,
        n_obs=n_obs,
    )


@_accel._jit
def _cox_score_walk(
    x, miss, order, shift, weight, event, ends, deaths, inv_s0, design, mean_z, out
):  # pragma: no cover - compiled
    # For each response k, walk the rows in decreasing time keeping the risk-set sums of w x, w x^2 and
    # w x z_c per column (x = the feature with its missing values at the response's mean: v + shift M),
    # and at the last row of each event time add their event-weighted means. out[k] rows: U, I
    # (before the covariates' projection), then the cross information with each covariate.
    K, n = weight.shape
    w = x.shape[1]
    G = ends.shape[0]
    c = design.shape[2]
    s1 = np.zeros(w)
    s2 = np.zeros(w)
    sz = np.zeros((c, w))
    for k in range(K):
        s1[:] = 0.0
        s2[:] = 0.0
        sz[:, :] = 0.0
        u = out[k, 0]
        info = out[k, 1]
        g = 0
        for i in range(n):
            wi = weight[k, i]
            if wi != 0.0:
                row = order[i]
                ei = event[k, i]
                for j in range(w):
                    xv = x[row, j] + shift[k, j] * miss[row, j]
                    a = wi * xv
                    s1[j] += a
                    s2[j] += a * xv
                    if ei != 0.0:
                        u[j] += xv
                    for q in range(c):
                        sz[q, j] += a * design[k, i, q]
            while g < G and ends[g] == i:
                d = deaths[k, g]
                if d != 0.0:
                    inv = inv_s0[k, g]
                    for j in range(w):
                        m1 = s1[j] * inv
                        u[j] -= d * m1
                        info[j] += d * (s2[j] * inv - m1 * m1)
                        for q in range(c):
                            out[k, 2 + q, j] += d * (sz[q, j] * inv - m1 * mean_z[k, g, q])
                g += 1


def cox_multi_statistics(block: Block, state: MultiCoxState) -> dict[str, np.ndarray]:
    """Rao score test of ``b_j = 0`` in the Cox model of every response for every feature of a block.

    Returns
    -------
    dict of ndarray of shape (width, K)
        The columns of the logistic score-test pass (`score_multi_statistics`): ``score`` =
        score_chi2 / 2, ``score_chi2``, ``z``, ``p_value``, ``beta`` (one-step, U / I), ``std_error``,
        ``std_beta``, ``degenerate``; ``mean``, ``missing_rate``, ``constant`` as in
        `linear_multi_statistics`.
    """
    K = state.n_responses
    c = state.design.shape[2]
    mask_t = np.ascontiguousarray(state.mask.T)
    P = block.cross(mask_t)
    ML = _with_missing(block, mask_t, P)
    nob, d = _shift(P, ML, slice(0, K), state.n_obs)
    msq = _squares(block, mask_t)
    sumsq = msq - nob * d * d
    constant = (nob < 2) | (sumsq <= 1e-12 * np.maximum(msq, 1e-300))
    x = np.ascontiguousarray(block.values, dtype=np.float64)
    miss = np.zeros_like(x)
    got = missing_indicator(block)
    if got is not None:
        miss[:, got[0]] = got[1]
    out = np.zeros((K, 2 + c, block.width))
    _cox_score_walk(
        x, miss, state.order, np.ascontiguousarray(d), state.weight, state.event, state.ends,
        state.deaths, state.inv_s0, state.design, state.mean_z, out,
    )  # fmt: skip
    u, info_raw = out[:, 0], out[:, 1]
    info = info_raw - np.einsum("kcw,kcw->kw", out[:, 2:], out[:, 2:])
    # No information left: constant within every risk set that matters, or explained by the covariates.
    dead = constant | ~(info > 1e-10 * np.maximum(np.abs(info_raw), 1e-300)) | ~(info_raw > 0)
    info = np.where(dead, 1.0, info)
    mean, missing = _summaries(block, P[:K], nob, state.n_obs)
    return score_test_columns(
        block, state.n_obs, u, info, info, 1.0 / np.sqrt(info), dead, constant, sumsq, mean, missing
    )


__all__ = ["MultiCoxState", "cox_multi_statistics", "prepare_cox_multi"]
