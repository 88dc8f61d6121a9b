"""Marginal Cox screening: the partial-likelihood fit of one feature at a time, batched over a block.

For feature j the kernel maximises the Breslow partial likelihood of ``eta_i = eta0_i + b_j x_ij`` under
right censoring, where ``eta0`` is the explicit ``offset`` plus the covariate part of a covariates-only Cox
fit done once in `prepare_cox` (the covariate coefficients are then held fixed: the offset approach of the
logistic and Poisson kernels). With Breslow's rule a tie group of d events at time t contributes
``sum(eta of its events) - d log S0(t)``, every sample with time >= t in the risk set.

Risk-set sums for all features at once: samples are sorted by decreasing time once in `prepare_cox`, so the
risk set of a time is a prefix of that order and its sums ``S_p = sum exp(eta) x^p`` (p = 0, 1, 2) are
cumulative sums down the rows of an (n, width) array, read at the last row of each tie group (the first
row of the group in increasing-time order: ties share the whole group in their risk set). Each Newton step
is a handful of whole-tile array operations and a (width,)-vector update, never a loop over features; with
numba installed (the store's switch ``_accel.use_numba``) the risk-set sums and their event-time
reductions are one compiled walk down the rows instead. Newton iterations, step halving and convergence
are those of `widescreen.kernels._glm` (a feature starts at b = 0, where S0 is shared by all features).

Statistics: ``beta`` (log hazard ratio per unit of the feature), ``std_error`` and ``z`` (Wald, observed
information), ``lr_chi2`` (partial-likelihood ratio), ``p_value`` (chi-square, 1 df, of ``lr_chi2``),
``score`` = ``lr_chi2 / 2`` (the partial-likelihood reduction, Fan & Song's utility for this family),
``std_beta`` (per standard deviation of the feature), ``converged``, ``n_iter``, ``degenerate``.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np
from scipy import special

from ..store import _accel
from ..store._reader import Block
from . import _tiles
from ._batched import newton
from ._cox_joint import joint_fit_tile
from ._glm_loops import linear_predictor
from ._glm_state import check_rank
from ._newton import damped_newton
from ._tiles import sum_log


@dataclass(frozen=True)
class CoxState:
    """Response state of a Cox pass, built once and shared by every block.

    Attributes
    ----------
    order : ndarray of shape (n,), int
        Samples by decreasing time (stable); every per-sample array below is in this order.
    eta0 : ndarray of shape (n,)
        Offset plus fitted covariate part, shifted so its maximum is 0 (the partial likelihood ignores
        shifts; this keeps exp(eta) in range).
    event : ndarray of shape (n,), float
        1 for an event, 0 for a censored time.
    ends : ndarray of shape (G,), int
        For each distinct event time, the last row of its tie group: its risk set is rows 0..ends[g].
    deaths : ndarray of shape (G,)
        Number of events at each distinct event time.
    deviance0 : float
        -2 log partial likelihood of the null (offset and covariates only).
    design : ndarray of shape (n, q)
        The covariates, centred and whitened in the null fit's information (``design`` refitted with every
        feature: the full model ``eta = offset + design gamma + b x``); q may be 0.
    max_iter : int
    tol : float
        Convergence when the predicted deviance decrease of the next Newton step is below ``tol``.
    """

    order: np.ndarray
    eta0: np.ndarray
    event: np.ndarray
    ends: np.ndarray
    deaths: np.ndarray
    deviance0: float
    design: np.ndarray
    max_iter: int
    tol: float

    @property
    def n_samples(self) -> int:
        return self.order.shape[0]

    @property
    def parts(self) -> int:
        """Arrays whose risk-set sums one evaluation needs: exp(eta), exp(eta) v, exp(eta) v v'."""
        k = self.design.shape[1] + 1
        return 1 + k + k * (k + 1) // 2


def _tie_groups(t_sorted: np.ndarray, ev_sorted: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Last row and number of events of every tie group holding at least one event."""
    n = t_sorted.shape[0]
    last = np.flatnonzero(np.append(t_sorted[1:] != t_sorted[:-1], True))
    first = np.concatenate([[0], last[:-1] + 1])
    deaths = np.add.reduceat(ev_sorted, first) if n else np.zeros(0)
    keep = deaths > 0
    return last[keep], deaths[keep].astype(np.float64)


def _cox_null_fit(Z, off, event, ends, deaths, max_iter: int = 100):
    """Newton fit of the covariates-only model with step halving; returns (eta, deviance, design)."""
    Zraw = Z

    def evaluate(gamma):
        eta = off + Z @ gamma
        eta = eta - eta.max()
        r = np.exp(eta)
        s0 = np.cumsum(r)[ends]
        ell = float(event @ eta - deaths @ np.log(s0))
        if Z.shape[1] == 0:
            return ell, None, None
        rz = r[:, None] * Z
        m1 = np.cumsum(rz, axis=0)[ends] / s0[:, None]
        m2 = np.cumsum(rz[:, :, None] * Z[:, None, :], axis=0)[ends] / s0[:, None, None]
        g = event @ Z - deaths @ m1
        H = np.einsum("g,gab->ab", deaths, m2) - np.einsum("g,ga,gb->ab", deaths, m1, m1)
        return ell, g, H

    gamma = np.zeros(Z.shape[1])
    if Z.shape[1] == 0:
        ell = evaluate(gamma)[0]
    else:

        def loss(g0: np.ndarray):
            ell, g, H = evaluate(g0)
            return -ell, g, H

        gamma, (neg_ell, _, info) = damped_newton(
            loss, gamma, max_iter=max_iter, what="Cox null fit on the covariates"
        )
        ell = -neg_ell
        # Whitened covariates (design' info design = I) keep the per-feature systems well conditioned.
        Z = np.linalg.solve(np.linalg.cholesky(info), Z.T).T
    eta = off + Zraw @ gamma
    return eta - eta.max(), -2.0 * ell, np.ascontiguousarray(Z)


def prepare_cox(
    time: np.ndarray,
    event: np.ndarray,
    covariates: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    *,
    max_iter: int = 25,
    tol: float = 1e-10,
) -> CoxState:
    """Build the response state of a Cox pass.

    Parameters
    ----------
    time : ndarray of shape (n,)
        Follow-up times (event or censoring).
    event : ndarray of shape (n,)
        1 (or True) for an event, 0 for right censoring.
    covariates : ndarray of shape (n, q), optional
        Fitted once without any feature; their coefficients are then held fixed.
    offset : ndarray of shape (n,), optional
        Fixed part of the log hazard (the current model of the iterative pass).
    max_iter, tol
        As in `widescreen.kernels.prepare_logistic`.
    """
    time = np.asarray(time, dtype=np.float64)
    if time.ndim != 1 or not np.all(np.isfinite(time)):
        raise ValueError(f"'time' must be a finite 1-D array; got shape {time.shape}")
    n = time.shape[0]
    ev = np.asarray(event)
    if ev.shape != (n,) or not np.all((ev == 0) | (ev == 1)):
        raise ValueError(f"'event' must hold 0/1 (or booleans) with shape ({n},)")
    ev = ev.astype(np.float64)
    if ev.sum() == 0:
        raise ValueError("'event' has no events: the partial likelihood is empty")
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64).reshape(-1)
    if off.shape != (n,) or not np.all(np.isfinite(off)):
        raise ValueError(f"'offset' must be a finite array of shape ({n},); got shape {off.shape}")
    Z = np.empty((n, 0)) if covariates is None else np.asarray(covariates, dtype=np.float64)
    Z = Z.reshape(n, -1) if Z.ndim == 1 else Z
    if Z.shape[0] != n or not np.all(np.isfinite(Z)):
        raise ValueError(f"'covariates' must be finite with {n} rows; got shape {Z.shape}")
    if max_iter < 1 or not tol > 0:
        raise ValueError(f"max_iter must be >= 1 and tol > 0; got {max_iter}, {tol}")
    order = np.argsort(-time, kind="stable")
    ends, deaths = _tie_groups(time[order], ev[order])
    Zs = Z[order] - Z.mean(axis=0)
    check_rank(Zs)  # centred: a constant covariate is a zero column
    eta0, dev0, design = _cox_null_fit(Zs, off[order], ev[order], ends, deaths)
    return CoxState(
        order=order,
        eta0=eta0,
        event=ev[order],
        ends=ends,
        deaths=deaths,
        deviance0=dev0,
        design=design,
        max_iter=int(max_iter),
        tol=float(tol),
    )


# ----------------------------------------------------------------------------------------- workspace
_local = threading.local()


class _CoxWorkspace:
    """Per-thread buffers of one tile: its rows in time order (padded to whole row blocks), the arrays
    ``exp(eta) x^p`` (p = 0, 1, 2) whose cumulative sums are the risk-set sums, and their values at the
    event times. Reused for every step and block: fresh block-sized arrays cost page faults."""

    def __init__(self, n: int, n_times: int, tile: int, parts: int = 3):
        self.n, self.n_times, self.tile, self.parts = n, n_times, tile, parts
        # Cumulative sums run over row blocks of about sqrt(n) rows: some 2 sqrt(n) array operations.
        self.rows = max(1, int(np.sqrt(n)))
        self.n_pad = -(-n // self.rows) * self.rows
        self._x = np.zeros(self.n_pad * tile)
        self._r = np.zeros(parts * self.n_pad * tile)
        self._s = np.zeros(parts * n_times * tile)
        self.idx = np.arange(0)
        self.x = self._x[:0].reshape(self.n_pad, 0)

    @classmethod
    def get(cls, n: int, n_times: int, tile: int, parts: int = 3) -> _CoxWorkspace:
        ws = getattr(_local, "workspace", None)
        if ws is None or (ws.n, ws.n_times) != (n, n_times) or ws.tile < tile or ws.parts < parts:
            ws = _local.workspace = cls(n, n_times, tile, parts)
        return ws

    def load(self, tile: np.ndarray, order: np.ndarray) -> np.ndarray:
        c = tile.shape[1]
        self.idx = np.arange(c)
        self.x = self._x[: self.n_pad * c].reshape(self.n_pad, c)
        if _accel.use_numba:
            _gather_rows(tile, order, self.x[: self.n])
        else:
            np.take(tile, order, axis=0, out=self.x[: self.n])
        self.x[self.n :] = 0.0
        return self.x

    def take(self, cols: np.ndarray) -> np.ndarray:
        if cols.size < _tiles.SHRINK * self.idx.size:
            kept = self.x[:, np.searchsorted(self.idx, cols)]
            self.idx = cols
            self.x = self._x[: self.n_pad * cols.size].reshape(self.n_pad, cols.size)
            np.copyto(self.x, kept)
        return np.searchsorted(self.idx, cols)

    def stacked(self, parts: int) -> np.ndarray:
        """Buffer of shape (parts, n_pad, c) for the current working columns."""
        c = self.x.shape[1]
        return self._r[: parts * self.n_pad * c].reshape(parts, self.n_pad, c)

    def at_times(self, R: np.ndarray, ends: np.ndarray) -> np.ndarray:
        """Rows ``ends`` of each part of ``R``: shape (parts, G, c), in a reused buffer."""
        parts, _, c = R.shape
        out = self._s[: parts * ends.size * c].reshape(parts, ends.size, c)
        np.take(R, ends, axis=1, out=out)
        return out

    def cumsum_rows(self, R: np.ndarray) -> None:
        """In-place cumulative sum down the rows of every part of ``R`` (parts, n_pad, c), blockwise.

        numpy's own cumsum along rows walks each column with a large stride; adding whole rows at a
        time keeps the inner loop contiguous, and blocking the rows cuts the Python-level steps.
        """
        m = self.rows
        blocks = R.reshape(R.shape[0], self.n_pad // m, m, R.shape[2])
        for i in range(1, m):
            blocks[:, :, i] += blocks[:, :, i - 1]
        totals = blocks[:, :, -1].copy()
        for j in range(1, totals.shape[1]):
            totals[:, j] += totals[:, j - 1]
        blocks[:, 1:] += totals[:, :-1, None, :]


# ----------------------------------------------------------------------------------- compiled loops
@_accel._jit
def _gather_rows(x, order, out):  # pragma: no cover - compiled
    # out[i] = x[order[i]] for a tile (a strided view of a block): numpy's take is slower on views.
    for i in range(order.shape[0]):
        src = x[order[i]]
        dst = out[i]
        for j in range(dst.shape[0]):
            dst[j] = src[j]


@_accel._jit
def _risk_sums(r, x, ends, deaths, out):  # pragma: no cover - compiled
    # Rows of r = exp(eta) and x in decreasing time. Walks the rows once, keeping the risk-set sums
    # S0, S1, S2 per column, and at the last row of each event time adds to the rows of out:
    # sum_g d_g log S0_g, sum_g d_g S1_g / S0_g, sum_g d_g S2_g / S0_g, sum_g d_g (S1_g / S0_g)^2.
    n, c = r.shape
    s0 = np.zeros(c)
    s1 = np.zeros(c)
    s2 = np.zeros(c)
    prod = np.ones(c)
    a0 = np.zeros(c)
    a1 = np.zeros(c)
    a2 = np.zeros(c)
    a3 = np.zeros(c)
    g = 0
    for i in range(n):
        ri = r[i]
        xi = x[i]
        for j in range(c):
            u = ri[j]
            v = xi[j]
            s0[j] += u
            s1[j] += u * v
            s2[j] += u * v * v
        if g < ends.shape[0] and ends[g] == i:
            d = deaths[g]
            for j in range(c):
                inv = 1.0 / s0[j]
                m1 = s1[j] * inv
                a1[j] += d * m1
                a2[j] += d * s2[j] * inv
                a3[j] += d * m1 * m1
                if d == 1.0:  # a product of S0 values, logged before it leaves a safe range
                    p = prod[j] * s0[j]
                    if not (1e-200 < p < 1e200):
                        a0[j] += np.log(prod[j])
                        p = s0[j]
                    prod[j] = p
                else:
                    a0[j] += d * np.log(s0[j])
            g += 1
    for j in range(c):
        out[0, j] = a0[j] + np.log(prod[j])
        out[1, j] = a1[j]
        out[2, j] = a2[j]
        out[3, j] = a3[j]


# ------------------------------------------------------------------------------------------- fitting
def _risk_moments(st: CoxState, ws: _CoxWorkspace, b: np.ndarray | None):
    """Risk-set sums over the event times for the working columns at coefficients ``b``.

    Returns four arrays of shape (c,): sum_g d_g log S0_g, sum_g d_g m1_g, sum_g d_g m2_g and
    sum_g d_g m1_g^2, with m_p = S_p / S0. With ``b`` None the columns are at b = 0, where S0 is shared
    and exp() is not needed; the first array is then not computed (the null deviance is known).
    """
    x, n = ws.x, st.n_samples
    d = st.deaths
    if _accel.use_numba:
        r = ws.stacked(1)[0, :n]
        if b is None:
            np.copyto(r, np.exp(st.eta0)[:, None])
        else:
            linear_predictor(x[:n], b, np.zeros_like(b), st.eta0, 1.0, r)
            np.exp(r, out=r)
        out = np.empty((4, x.shape[1]))
        _risk_sums(r, x[:n], st.ends, d, out)
        return out[0] if b is not None else None, out[1], out[2], out[3]
    if b is None:
        R = ws.stacked(2)
        r0 = np.zeros(ws.n_pad)
        r0[:n] = np.exp(st.eta0)
        np.multiply(x, r0[:, None], out=R[0])
        np.multiply(R[0], x, out=R[1])
        ws.cumsum_rows(R)
        S = ws.at_times(R, st.ends)
        S /= np.cumsum(r0)[st.ends][:, None]
        m1, m2 = S[0], S[1]
        return None, d @ m1, d @ m2, np.einsum("g,gj,gj->j", d, m1, m1)
    R = ws.stacked(3)
    r = R[0]
    np.multiply(x, b, out=r)
    r[:n] += st.eta0[:, None]
    np.exp(r, out=r)
    r[n:] = 0.0
    np.multiply(r, x, out=R[1])
    np.multiply(R[1], x, out=R[2])
    ws.cumsum_rows(R)
    S = ws.at_times(R, st.ends)
    s0 = S[0]
    log_s0 = sum_log(s0)
    tied = d > 1
    if tied.any():  # sum_g d_g log S0_g: the extra d_g - 1 copies of the (few) tied groups
        log_s0 += (d[tied] - 1.0) @ np.log(s0[tied])
    np.reciprocal(s0, out=s0)
    S[1:] *= s0
    m1, m2 = S[1], S[2]
    return log_s0, d @ m1, d @ m2, np.einsum("g,gj,gj->j", d, m1, m1)


def _evaluate(st: CoxState, ws: _CoxWorkspace, ex: np.ndarray, idx, params):
    """Deviance, score and information of the working columns at ``b = params[:, 0]``."""
    pos = ws.take(idx)
    b = np.zeros(ws.x.shape[1])
    b[pos] = params[:, 0]
    log_s0, dm1, dm2, dm1sq = _risk_moments(st, ws, b)
    ell = st.event @ st.eta0 + b * ex[ws.idx] - log_s0
    g = ex[ws.idx] - dm1
    H = dm2 - dm1sq
    return -2.0 * ell[pos], g[pos, None], H[pos, None, None]


def _fit_tile(st: CoxState, ws: _CoxWorkspace, tile: np.ndarray, dead: np.ndarray):
    if st.design.shape[1]:
        return joint_fit_tile(st, ws, tile, dead)
    c = tile.shape[1]
    x = ws.load(tile, st.order)
    ex = st.event @ x[: st.n_samples]  # sum of the feature over the events
    _, dm1, second, dm1sq = _risk_moments(st, ws, None)
    g0 = ex - dm1
    H0 = second - dm1sq
    # No information left: constant within every risk set that matters.
    dead = dead | ~(H0 > 1e-10 * second)
    H0 = np.where(dead, np.nan, H0)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        res = newton(
            lambda idx, params: _evaluate(st, ws, ex, idx, params),
            np.zeros((c, 1)),
            np.full(c, st.deviance0),
            g0[:, None],
            H0[:, None, None],
            max_iter=st.max_iter,
            tol=st.tol,
        )
        var = 1.0 / res.hessian[:, 0, 0]
    return {
        "beta": res.params[:, 0],
        "var": var,
        "lr_chi2": st.deviance0 - res.deviance,
        "converged": res.converged,
        "n_iter": res.n_iter,
        "dead": dead,
    }


def cox_statistics(block: Block, state: CoxState) -> dict[str, np.ndarray]:
    """Marginal Cox statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        ``score`` (= lr_chi2 / 2), ``beta``, ``std_error``, ``z``, ``lr_chi2``, ``p_value``, ``std_beta``,
        ``converged``, ``n_iter``, ``degenerate``. A constant feature has score 0, beta 0, p-value 1 and
        an infinite standard error.
    """
    n, width = block.n_samples, block.width
    if n != state.n_samples:
        raise ValueError(
            f"block at feature {block.start} has {n} samples; the Cox state was built for {state.n_samples}"
        )
    x = block.values
    parts = state.parts if state.design.shape[1] else 3
    ranges = _tiles.tiles(n, width, max(1, parts // 3))
    ws = _CoxWorkspace.get(
        n, state.ends.size, max(1, ranges[0].stop - ranges[0].start), max(3, parts)
    )
    parts = [_fit_tile(state, ws, x[:, sl], block.constant[sl]) for sl in ranges]
    fit = {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}
    dead = fit["dead"]
    beta = np.where(dead, 0.0, fit["beta"])
    # A fit stopped where the information is no longer positive (a monotone likelihood) keeps its
    # estimate and likelihood ratio but gets no finite standard error.
    se = np.sqrt(np.where(dead | ~(fit["var"] > 0) | ~np.isfinite(fit["var"]), np.inf, fit["var"]))
    lr = np.where(dead, 0.0, np.maximum(fit["lr_chi2"], 0.0))
    return {
        "score": 0.5 * lr,
        "beta": beta,
        "std_error": se,
        "z": np.where(dead, 0.0, beta / se),
        "lr_chi2": lr,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, lr)),
        "std_beta": beta * np.sqrt(block.sumsq / n),
        "converged": fit["converged"] | dead,
        "n_iter": fit["n_iter"],
        "degenerate": dead,
    }
