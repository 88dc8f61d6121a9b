"""Marginal GLM screening (logistic, Poisson): one maximum-likelihood fit per feature, batched over a block.

For feature j the kernel fits the full model ``g(E y_i) = offset_i + gamma' C_i + b_j x_ij`` with
``C = [1, covariates]`` by maximum likelihood, and tests ``b_j = 0``: the standard covariate-adjusted test,
every nuisance coefficient refitted with the feature (the marginal utility of Fan & Song 2010 when there
are no covariates). The null fit (``b_j = 0``) is done once in `prepare_logistic` / `prepare_poisson`
(module `_glm_state`); every feature starts there, where score and information are matrix products, so the
first trial point is the one-step estimate (with covariates, its third-order refinement, `_taylor_start`).
All features of a block take their Newton steps together (module `_batched`): each step is a few
whole-array operations and matrix products with the nuisance columns (module `_glm_evaluate`) and a batch
of small solves, never a loop over features.

Statistics (``test="lr"``, the default)
----------------------------------------
``beta`` (per unit of the feature), ``std_error`` and ``z`` (Wald, from the observed information),
``lr_chi2`` (twice the log-likelihood gain over the null), ``p_value`` (chi-square, 1 df, of ``lr_chi2``),
``score`` = ``lr_chi2 / 2`` (the likelihood reduction R_j of Fan & Song), ``std_beta`` (``beta`` per standard
deviation of the feature; ``|std_beta|`` is the other utility of Fan & Song), ``converged``, ``separated``
(logistic only), ``n_iter`` and ``degenerate`` (constant, or no information left after the adjustment).
With the quasi-Poisson dispersion (``dispersion="pearson"``) ``lr_chi2`` is the likelihood ratio divided
by the scale and ``std_error`` the model-based one times its square root.

``test="score"``: the Rao score test of ``b_j = 0`` in the same full model, from one matrix product per
block: ``score_chi2``, ``z``, ``p_value``, ``beta`` and ``std_error`` (the one-step estimate U / I and
1 / sqrt(I)), ``std_beta``, ``score`` = ``score_chi2 / 2`` (the quadratic approximation of the likelihood
reduction).

Newton iterations
-----------------
A step that raises the deviance is halved; a feature stops when the predicted deviance decrease
``g' H^-1 g`` of its next step is at most ``tol`` (default 1e-10), and that step is then taken without
another evaluation. Null features typically need two evaluations (one with covariates, from the
third-order start). Under (quasi-)separation the maximum likelihood estimate does not exist: the steps
(damped where the information has become singular) run until the deviance stops falling or ``max_iter``;
``separated`` flags the feature, ``beta`` is the large value reached, ``lr_chi2`` approaches its supremum
and ``std_error`` may be infinite. A block is worked on in tiles of columns (module `_tiles`), and a
tile's working columns shrink as features converge.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..store import _accel
from ..store._reader import Block
from ._batched import last_variance, newton
from ._glm_evaluate import (
    design_pairs,
    evaluate_joint,
    evaluate_logistic,
    evaluate_poisson_profile,
)
from ._glm_loops import taylor_terms, weighted_sumsq
from ._glm_state import (
    GLMState,
    LogisticState,
    PoissonState,
    check_rank,
    prepare_logistic,
    prepare_poisson,
)
from ._tiles import Workspace, tiles

__all__ = [
    "GLMState",
    "LogisticState",
    "PoissonState",
    "check_rank",
    "logistic_statistics",
    "poisson_statistics",
    "prepare_logistic",
    "prepare_poisson",
]

#: A fitted feature term whose range on the linear-predictor scale exceeds this is reported as (quasi-)
#: separated: an odds ratio above e^20 across the observed values means fitted probabilities at 0 or 1.
SEPARATION_ETA_RANGE = 20.0


def _fit_tile(st: GLMState, ws: Workspace, tile: np.ndarray, sumsq, dead, pairs):
    """Marginal fits of the columns of one tile (n, c) of a block; ``dead`` columns are not fitted."""
    n, c = tile.shape
    D, k = st.design, st.design.shape[1]
    # x^2 is kept for the numpy route of the intercept-only logistic model.
    x = ws.load(tile, square=st.family == "logistic" and k == 1 and not _accel.use_numba)
    if st.eta0_constant and k == 1:
        # No covariates nor offset: mu0 and w0 are constant, so x' mu0, x' w0 and x' W0 x follow from
        # the column sums and `sumsq`.
        yx, sx = np.vstack([st.y, np.ones(n)]) @ x
        mu0x, Dw0x, w0xx = st.mu0[0] * sx, st.w0[0] * sx[None], st.w0[0] * sumsq
    else:
        # (n, c)' @ (n, r): the transposed product is the faster layout for a narrow right-hand side.
        cross = (x.T @ np.column_stack([st.y, st.mu0, np.ones(n), D * st.w0[:, None]])).T
        yx, mu0x, sx, Dw0x = cross[0], cross[1], cross[2], cross[3:]
        w0xx = st.w0 @ ws.xx if ws.xx.shape[1] else weighted_sumsq(x, st.w0)
    profile = st.family == "poisson" and k == 1
    if profile:
        H0 = (w0xx - mu0x**2 / st.y.sum())[:, None, None]
        g0 = (yx - mu0x)[:, None]
    else:
        H0 = np.empty((c, k + 1, k + 1))
        H0[:, :k, :k] = D.T @ (D * st.w0[:, None])
        H0[:, :k, k] = H0[:, k, :k] = Dw0x.T
        H0[:, k, k] = w0xx
        g0 = np.zeros((c, k + 1))
        g0[:, k] = yx - mu0x
    # No information left at the null (constant, or explained by the covariates): not fitted.
    with np.errstate(invalid="ignore", divide="ignore"):
        dead = dead | ~(1.0 / last_variance(H0) > 1e-10 * w0xx)
    H0[dead] = np.nan  # never stepped, never evaluated
    if profile:

        def evaluate(idx, params):
            return evaluate_poisson_profile(st, ws, yx, idx, params)

    elif k == 1 and st.family == "logistic":

        def evaluate(idx, params):
            return evaluate_logistic(st, ws, yx, sx, idx, params)

    else:

        def evaluate(idx, params):
            return evaluate_joint(st, ws, pairs, yx, sx, idx, params)

    p = H0.shape[1]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        first = (lambda d: _taylor_start(st, ws, H0, g0, d)) if pairs is not None else None
        res = newton(
            evaluate,
            np.zeros((c, p)),
            np.full(c, st.deviance0),
            g0,
            H0,
            max_iter=st.max_iter,
            tol=st.tol,
            first=first,
        )
        var = last_variance(res.hessian)
    beta = res.params[:, -1]
    out = {
        "beta": beta,
        "var": var,
        "lr_chi2": st.deviance0 - res.deviance,
        "converged": res.converged,
        "n_iter": res.n_iter,
        "dead": dead,
    }
    if st.family == "logistic":
        # The range of a centred column is at most 2 sqrt(sumsq): only a few columns need the exact one.
        cand = np.flatnonzero(~dead & (np.abs(beta) * 2.0 * np.sqrt(sumsq) > SEPARATION_ETA_RANGE))
        sep = np.zeros(c, dtype=bool)
        if cand.size:
            xc = tile[:, cand]
            sep[cand] = (
                np.abs(beta[cand]) * (xc.max(axis=0) - xc.min(axis=0)) > SEPARATION_ETA_RANGE
            )
        out["separated"] = sep
    return out


def _null_steps(H0: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``H0^-1 rhs`` for the information at the null fit, whose nuisance block is every feature's.

    One inverse of that (k, k) block serves the whole tile: the solves are products, by the Schur
    complement on ``b``. Features not fitted (NaN rows) get zero steps.
    """
    k = H0.shape[1] - 1
    ok = np.isfinite(H0[:, k, k])
    if not ok.any():
        return np.zeros_like(rhs)
    Ainv = np.linalg.inv(H0[np.argmax(ok), :k, :k])
    h = np.where(ok[:, None], H0[:, :k, k], 0.0)
    U, V = h @ Ainv, rhs[:, :k] @ Ainv
    s = np.where(ok, H0[:, k, k] - np.einsum("ij,ij->i", h, U), 1.0)
    out = np.empty_like(rhs)
    out[:, k] = (rhs[:, k] - np.einsum("ij,ij->i", h, V)) / s
    out[:, :k] = V - U * out[:, k, None]
    return np.where(ok[:, None] & np.isfinite(out), out, 0.0)


def _taylor_start(st: GLMState, ws: Workspace, H0: np.ndarray, g0: np.ndarray, d: np.ndarray):
    """First trial step from the null fit to third order, from the Newton steps ``d = H0^-1 g0``.

    Near the null the score along a step ``s`` is ``g0 - H0 s - X'(w0' e^2) / 2 - X'(w0'' e^3) / 6`` up
    to fourth order, ``e = X s`` (X = [D, x]; w0', w0'' the derivatives of the weight at the null). Two
    fixed-point rounds on that expansion (the second-order step, then the third-order one from it) land
    a feature at distance O(|d|^4) of its maximum instead of the O(|d|^2) of the Newton step ``d``, for
    two products with ``D`` each: most features then converge at their first evaluation. A feature
    whose expansion moves its step by more than half (in the H0 norm) keeps the Newton step.
    """
    x, D, k = ws.x, st.design, st.design.shape[1]
    if st.family == "logistic":
        dw = st.w0 * (1.0 - 2.0 * st.mu0)
        dw2 = st.w0 * (1.0 - 6.0 * st.w0)
    else:
        dw = dw2 = st.w0
    e = ws.scratch(1)
    newton_step = d
    for third in (0.0, 1.0):
        np.matmul(D, d[:, :k].T, out=e)
        t = np.zeros_like(g0)
        if _accel.use_numba:
            taylor_terms(e, x, np.ascontiguousarray(d[:, k]), dw, third * dw2, t[:, k])
        else:
            e += np.multiply(x, d[:, k], out=ws.scratch(2))
            v2 = np.square(e, out=ws.scratch(2))
            e *= (third * dw2 / 3.0)[:, None]
            e += dw[:, None]
            e *= v2
            t[:, k] = np.einsum("ij,ij->j", e, x)
        t[:, :k] = e.T @ D
        d = _null_steps(H0, g0 - 0.5 * t)
    # Far from the null (strong features) the expansion is no guide: there the Newton step stays.
    change = d - newton_step
    far = np.einsum("ij,ijk,ik->i", change, H0, change) > 0.25 * np.einsum(
        "ij,ijk,ik->i", newton_step, H0, newton_step
    )
    return np.where(far[:, None], newton_step, d)


def _check_block(block: Block, st: GLMState) -> None:
    if block.n_samples != st.n_samples:
        raise ValueError(
            f"block at feature {block.start} has {block.n_samples} samples; "
            f"the {st.family} state was built for {st.n_samples}"
        )


def _lr_statistics(block: Block, st: GLMState) -> dict[str, np.ndarray]:
    _check_block(block, st)
    x, width = block.values, block.width
    ranges = tiles(x.shape[0], width)
    ws = Workspace.get(x.shape[0], max(1, ranges[0].stop - ranges[0].start))
    pairs = design_pairs(st.design) if st.design.shape[1] > 1 else None
    try:
        parts = [
            _fit_tile(st, ws, x[:, sl], block.sumsq[sl], block.constant[sl], pairs) for sl in ranges
        ]
    finally:
        ws.release()
    fit = {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}
    dead = fit["dead"]
    # A fit stopped where the information is no longer positive (separation) keeps its estimate and
    # likelihood ratio but gets no finite standard error.
    var = np.where(dead | ~(fit["var"] > 0) | ~np.isfinite(fit["var"]), np.inf, fit["var"])
    beta = np.where(dead, 0.0, fit["beta"])
    # Quasi-likelihood (dispersion phi): the deviance difference over phi is the test statistic, and the
    # variance is phi times the model-based one (McCullagh & Nelder 1989, sec. 9.2); phi = 1 otherwise.
    se = np.sqrt(var * st.dispersion)
    lr = np.where(dead, 0.0, np.maximum(fit["lr_chi2"], 0.0)) / st.dispersion
    out = {
        "score": 0.5 * lr,
        "beta": beta,
        "std_error": se,
        "z": np.where(dead, 0.0, beta / se),
        "lr_chi2": lr,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, lr)),
        "std_beta": beta * np.sqrt(block.sumsq / x.shape[0]),
        "converged": fit["converged"] | dead,
        "n_iter": fit["n_iter"],
        "degenerate": dead,
    }
    if "separated" in fit:
        out["separated"] = fit["separated"] & ~dead
    return out


def _empirical_score_variance(block: Block, st: GLMState, gx: np.ndarray) -> np.ndarray:
    """``sum_i x~_i^2 v_i`` with x~ = x - D D' W0 x (x net of the nuisance columns), v = `state.variance`.

    The variance of the score U = x~' (y - mu0) when Var(y_i) = v_i: with v the squared residuals it
    is the robust (sandwich) variance (Boos 1992). Expanded as ``x' V x - 2 g' D' V x + g' D' V D g``
    with g = D' W0 x, so it costs one product.
    """
    r2 = st.variance
    D = st.score_basis / st.w0[:, None]  # whitened nuisance columns, D' W0 D = I
    x = block.values
    DR2x = (D * r2[:, None]).T @ x
    DR2D = D.T @ (D * r2[:, None])
    return (
        weighted_sumsq(x, r2)
        - 2.0 * np.einsum("ij,ij->j", gx, DR2x)
        + np.einsum("ij,ik,kj->j", gx, DR2D, gx)
    )


def _score_statistics(block: Block, st: GLMState) -> dict[str, np.ndarray]:
    """Rao score test of b_j = 0: U = x'(y - mu0), I = x'W0 x - |G'x|^2, from one matrix product."""
    _check_block(block, st)
    lhs_t = np.vstack([st.y - st.mu0, st.score_basis.T])
    if st.eta0_constant:
        # Constant weights (no covariates nor offset): x' W0 x = w0 sumsq, and the block gives the
        # cross-products straight from its stored values, without writing out the float64 block.
        cross = block.cross(lhs_t)
        w0xx = st.w0[0] * block.sumsq
    else:
        x = block.values
        cross = lhs_t @ x
        w0xx = weighted_sumsq(x, st.w0)
    u, gx = cross[0], cross[1:]
    info = w0xx - np.einsum("ij,ij->j", gx, gx)
    dead = block.constant | ~(info > 1e-10 * w0xx)
    info = np.where(dead, 1.0, info)
    if st.dispersion_rule in ("sandwich", "quadratic"):
        var_u = np.where(dead, 1.0, _empirical_score_variance(block, st, gx))
        dead = dead | ~(var_u > 0)
        var_u = np.where(dead, 1.0, var_u)
    else:
        # model-based (phi = 1) or quasi-score test: U^2 / (phi I) (McCullagh & Nelder 1989, sec. 9.2)
        var_u = st.dispersion * info
    chi2 = np.where(dead, 0.0, u * u / var_u)
    z = np.where(dead, 0.0, u / np.sqrt(var_u))
    beta = np.where(dead, 0.0, u / info)
    return {
        "score": 0.5 * chi2,
        "score_chi2": chi2,
        "z": z,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, chi2)),
        "beta": beta,
        "std_error": np.where(dead, np.inf, np.sqrt(var_u) / info),
        "std_beta": beta * np.sqrt(block.sumsq / st.n_samples),
        "degenerate": dead,
    }


def logistic_statistics(block: Block, state: LogisticState) -> dict[str, np.ndarray]:
    """Marginal logistic statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        With ``state.test == "lr"``: ``score`` (= lr_chi2 / 2), ``beta``, ``std_error``, ``z``, ``lr_chi2``,
        ``p_value``, ``std_beta``, ``converged``, ``separated``, ``n_iter``, ``degenerate``; with
        ``"score"``: ``score``, ``score_chi2``, ``z``, ``p_value``, ``beta``, ``std_error``, ``std_beta``,
        ``degenerate``. A constant feature has score 0, beta 0, p-value 1 and an infinite standard error.
    """
    if state.family != "logistic":
        raise ValueError(f"logistic_statistics needs a logistic state; got a {state.family} one")
    return (
        _score_statistics(block, state) if state.test == "score" else _lr_statistics(block, state)
    )


def poisson_statistics(block: Block, state: PoissonState) -> dict[str, np.ndarray]:
    """Marginal Poisson statistics of one block; the columns of `logistic_statistics` but ``separated``."""
    if state.family != "poisson":
        raise ValueError(f"poisson_statistics needs a Poisson state; got a {state.family} one")
    return (
        _score_statistics(block, state) if state.test == "score" else _lr_statistics(block, state)
    )
