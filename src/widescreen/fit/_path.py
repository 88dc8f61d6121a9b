"""Penalised fits along a decreasing lambda path with warm starts.

The objective at each lambda, on standardised columns, is

    deviance(y, offset + C g + Xs b) / (2 n) + sum_j p_lambda(|b_j|)

with ``C`` the intercept and unpenalised covariates. For the Gaussian loss the working problem is fixed
and computed once; for the others each outer iteration is one IRLS step. For SCAD and MCP the outer
iteration is also one step of the local linear approximation (LLA; Zou & Li 2008): the weights
``p'_lambda(|b|) / lambda`` come from the current estimate, starting from the solution at the previous
lambda (at lambda_max that is b = 0, so the first step is a lasso). Both iterations share one loop,
whose fixed point is a stationary point of the penalised likelihood.
"""

from __future__ import annotations

import contextlib

import numpy as np
from threadpoolctl import threadpool_limits

from ._concave import concave_path
from ._criteria import bic
from ._dantzig import dantzig_selector
from ._losses import Loss, make_loss
from ._penalties import AdaptiveLasso, Dantzig, Lasso, Penalty, make_penalty
from ._problem import Problem
from ._quadratic import WorkingProblem, ridge_gcv, weighted_lasso, working_problem
from ._results import PathResult, SolverOptions


def fit_path(
    X,
    y,
    *,
    penalty: str | Penalty = "scad",
    loss: str | Loss = "gaussian",
    unpenalized=None,
    offset=None,
    n_lambda: int = 100,
    lambda_min_ratio: float | None = None,
    lambdas=None,
    options: SolverOptions | None = None,
    **penalty_params,
) -> PathResult:
    """Fit a penalised model along a decreasing path of penalty levels.

    Parameters
    ----------
    X : array_like of shape (n, d)
        Features (the shortlist). Standardised internally (mean 0, variance 1 with divisor n); the
        penalty acts on the standardised coefficients and results come back on the original scale.
    y : array_like of shape (n,), or (n, 2) for ``loss="cox"`` (time, event)
        Response.
    penalty : {"lasso", "enet", "adaptive_lasso", "scad", "mcp", "dantzig"} or Penalty
        Penalty; its parameters can be given as keywords (``l1_ratio`` for "enet", ``a`` for "scad",
        ``gamma`` for "mcp" and "adaptive_lasso", ``init`` for "adaptive_lasso") or through an object.
    loss : {"gaussian", "binomial", "poisson", "cox"} or Loss
    unpenalized : array_like of shape (n, q), optional
        Covariates always in the model without penalty (besides the intercept).
    offset : array_like of shape (n,), optional
        Known part of the linear predictor.
    n_lambda : int
        Number of penalty levels, log-spaced from ``lambda_max`` (the smallest level at which every
        penalised coefficient is zero) down to ``lambda_min_ratio * lambda_max``.
    lambda_min_ratio : float, optional
        Default 1e-3 when n > d, else 1e-2 (common practice; scikit-learn's ``eps`` is 1e-3).
    lambdas : array_like of shape (L,), optional
        Explicit penalty levels (standardised scale); sorted decreasing. Overrides the grid.
    options : SolverOptions, optional
        Tolerances and iteration limits.

    Returns
    -------
    PathResult
    """
    loss_obj = make_loss(loss)
    try:
        pen = make_penalty(penalty, **penalty_params)
    except TypeError as exc:
        raise ValueError(f"Unknown parameter for the {penalty!r} penalty: {exc}") from None
    problem = Problem.build(X, y, loss_obj, unpenalized, offset)
    return path_on_problem(
        problem,
        pen,
        n_lambda=n_lambda,
        lambda_min_ratio=lambda_min_ratio,
        lambdas=lambdas,
        options=options,
    )


def _lambda_grid(
    lam_max: float, n: int, d: int, n_lambda: int, ratio: float | None, lambdas
) -> np.ndarray:
    if lambdas is not None:
        lam = np.asarray(lambdas, dtype=np.float64).ravel()
        if lam.size == 0 or not np.all(np.isfinite(lam)) or np.any(lam <= 0):
            raise ValueError("The 'lambdas' must be a non-empty array of positive finite numbers.")
        return np.sort(lam)[::-1]
    if not (isinstance(n_lambda, int | np.integer) and n_lambda >= 1):
        raise ValueError(f"The 'n_lambda' must be a positive int; got {n_lambda!r}.")
    if ratio is None:
        ratio = 1e-3 if n > d else 1e-2
    if not 0.0 < ratio < 1.0:
        raise ValueError(f"The 'lambda_min_ratio' must be in (0, 1); got {ratio}.")
    return lam_max * np.logspace(0.0, np.log10(ratio), n_lambda)


def _null_fit(problem: Problem, opts: SolverOptions) -> np.ndarray:
    """Linear predictor of shape (n,) of the unpenalised fit on ``C`` alone (IRLS with step halving)."""
    loss, C, off, y = problem.loss, problem.C, problem.offset, problem.y
    if C.shape[1] == 0:
        return off.copy()
    eta = loss.initial_eta(y) if not loss.quadratic else off.copy()
    dev = np.inf
    for _ in range(opts.outer_max_iter):
        z, w = loss.working(y, eta)
        sw = np.sqrt(w)
        g = np.linalg.lstsq(C * sw[:, None], (z - off) * sw, rcond=None)[0]
        new = off + C @ g
        new_dev = loss.deviance(y, new)
        for _ in range(30):
            if new_dev <= dev * (1 + 1e-12) or not np.isfinite(dev):
                break
            new = 0.5 * (new + eta)
            new_dev = loss.deviance(y, new)
        done = abs(new_dev - dev) <= opts.irls_tol * (abs(new_dev) + 0.1)
        eta, dev = new, new_dev
        if loss.quadratic or done:
            break
    return eta


def _adaptive_weights(
    problem: Problem, pen: AdaptiveLasso, wp0: WorkingProblem, eta0, opts
) -> np.ndarray:
    """Weights ``1 / |b_init|^gamma`` of shape (d,) on the standardised scale (inf where b_init = 0)."""
    loss = problem.loss
    if isinstance(pen.init, tuple):
        b = np.asarray(pen.init) * problem.scale
        if b.shape != (problem.d,):
            raise ValueError(
                f"The adaptive lasso 'init' has {b.size} values; 'X' has {problem.d} columns."
            )
    elif pen.init == "ridge":
        b = ridge_gcv(wp0, problem.C.shape[1])
        if not loss.quadratic:
            # Ridge IRLS, re-choosing the ridge level on each working problem.
            eta, dev = eta0, np.inf
            for _ in range(opts.outer_max_iter):
                eta = problem.offset + problem.C @ wp0.unpenalized(b) + problem.Xs @ b
                new_dev = loss.deviance(problem.y, eta)
                if abs(new_dev - dev) <= opts.irls_tol * (abs(new_dev) + 0.1):
                    break
                dev = new_dev
                z, w = loss.working(problem.y, eta)
                wp0 = working_problem(problem.Xs, problem.C, z - problem.offset, w)
                b = ridge_gcv(wp0, problem.C.shape[1])
    else:
        lasso = path_on_problem(
            problem, Lasso(), n_lambda=100, lambda_min_ratio=None, lambdas=None, options=opts
        )
        best = int(np.argmin(bic(lasso.log_likelihood, lasso.df, problem.n)))
        b = lasso.coefs_standardized[best]
    with np.errstate(divide="ignore"):
        v = 1.0 / np.abs(b) ** pen.gamma
    v[problem.constant | (b == 0)] = np.inf
    return v


def _solve_lambda(problem, pen, wp, b, eta, lam, v, opts):
    """Outer loop at one lambda. Returns (b, g, eta, wp, converged)."""
    loss = problem.loss
    n = problem.n
    weighted = pen.concave or isinstance(pen, AdaptiveLasso)
    weights = v
    lla_steps = 0
    converged = False
    g = None
    dev = 0.0
    if not loss.quadratic:
        dev = loss.deviance(problem.y, eta)
        # Unpenalised coefficients of the incoming eta (the previous solution), for step halving.
        resid = eta - problem.offset - problem.Xs @ b
        g = np.linalg.lstsq(problem.C, resid, rcond=None)[0] if problem.C.shape[1] else np.zeros(0)

    def objective(dev_, b_):
        # The convex surrogate being minimised: weighted l1 at the current weights (for LLA it
        # majorises the concave penalty, so decreasing it decreases the penalised likelihood too).
        if weighted:
            finite = np.isfinite(weights)
            return dev_ / (2 * n) + lam * float(weights[finite] @ np.abs(b_[finite]))
        return dev_ / (2 * n) + float(np.sum(pen.value(b_, lam)))

    lla_settled = not pen.concave  # did an LLA step leave the estimate (nearly) unchanged?
    for _ in range(opts.outer_max_iter):
        if not loss.quadratic:
            z, w = loss.working(problem.y, eta)
            wp = working_problem(problem.Xs, problem.C, z - problem.offset, w)
        lla_active = pen.concave and not lla_settled and lla_steps < opts.lla_max_iter
        if lla_active:
            weights = np.where(np.isinf(v), np.inf, pen.lla_weights(np.abs(b), lam))
            lla_steps += 1
        coefs, cd_ok = weighted_lasso(
            wp,
            np.array([lam]),
            weights,
            b,
            l1_ratio=pen.l1_ratio,
            tol=opts.tol,
            max_iter=opts.max_iter,
        )
        b_new = coefs[:, 0]
        g_new = wp.unpenalized(b_new)
        if not loss.quadratic:
            obj = objective(dev, b)
            eta_new = problem.offset + problem.C @ g_new + problem.Xs @ b_new
            dev_new = loss.deviance(problem.y, eta_new)
            b_old, g_old = b, g
            for _ in range(30):  # step halving keeps the objective from increasing
                if np.isfinite(dev_new) and objective(dev_new, b_new) <= obj + 1e-12 * abs(obj):
                    break
                b_new, g_new = 0.5 * (b_new + b_old), 0.5 * (g_new + g_old)
                eta_new = problem.offset + problem.C @ g_new + problem.Xs @ b_new
                dev_new = loss.deviance(problem.y, eta_new)
            irls_done = abs(objective(dev_new, b_new) - obj) <= opts.irls_tol * (abs(obj) + 0.1)
            eta, dev = eta_new, dev_new
        else:
            irls_done = True
        small = np.abs(b_new - b).max() <= opts.outer_tol * max(1.0, np.abs(b_new).max())
        b, g = b_new, g_new
        if lla_active and small:
            lla_settled = True
        frozen = not pen.concave or lla_settled or lla_steps >= opts.lla_max_iter
        if irls_done and frozen and (small or loss.quadratic):
            converged = bool(cd_ok[0]) and lla_settled
            break
    if g is None:
        g = wp.unpenalized(b)
    return b, g, eta, wp, converged


def path_on_problem(
    problem: Problem,
    pen: Penalty,
    *,
    n_lambda: int = 100,
    lambda_min_ratio: float | None = None,
    lambdas=None,
    options: SolverOptions | None = None,
) -> PathResult:
    """`fit_path` on an already validated `Problem` (used again by cross-validation)."""
    from sklearn import config_context  # here, not at import: a resumed run may never fit

    opts = options or SolverOptions()
    # The solver calls enet_path hundreds of times with arguments it built itself: skip
    # scikit-learn's per-call parameter validation.
    with config_context(skip_parameter_validation=True):
        return _path(problem, pen, n_lambda, lambda_min_ratio, lambdas, opts)


def blas_limit(opts: SolverOptions):
    """The BLAS thread limit of ``opts`` as a context (no change when it is None)."""
    if opts.blas_threads is None:
        return contextlib.nullcontext()
    return threadpool_limits(limits=opts.blas_threads, user_api="blas")


def _path(problem, pen, n_lambda, lambda_min_ratio, lambdas, opts) -> PathResult:
    loss, n, d = problem.loss, problem.n, problem.d
    if isinstance(pen, Dantzig) and not loss.quadratic:
        raise ValueError(
            f"The Dantzig selector is implemented for the Gaussian loss only; got {loss.name!r}."
        )
    eta0 = _null_fit(problem, opts)
    z0, w0 = loss.working(problem.y, eta0)
    wp0 = working_problem(problem.Xs, problem.C, z0 - problem.offset, w0, reusable=loss.quadratic)
    v = np.where(problem.constant, np.inf, 1.0)
    if isinstance(pen, AdaptiveLasso):
        v = _adaptive_weights(problem, pen, wp0, eta0, opts)
    eligible = np.isfinite(v) & (v > 0)
    grad = wp0.gradient()
    lam_max = float(np.max(grad[eligible] / v[eligible])) / pen.l1_ratio if eligible.any() else 0.0
    if not lam_max > 0.0:
        lam_max = 1.0  # nothing can enter: any grid gives the null model
    lam = _lambda_grid(lam_max, n, d, n_lambda, lambda_min_ratio, lambdas)
    L = lam.shape[0]
    B = np.zeros((L, d))
    G = np.zeros((L, problem.C.shape[1]))
    conv = np.ones(L, dtype=bool)
    null_dev = loss.deviance(problem.y, eta0)

    if loss.quadratic and not pen.concave and not isinstance(pen, Dantzig):
        coefs, conv = weighted_lasso(
            wp0, lam, v, None, l1_ratio=pen.l1_ratio, tol=opts.tol, max_iter=opts.max_iter
        )
        B = coefs.T
        G = wp0.unpenalized(coefs).T
    elif isinstance(pen, Dantzig):
        for i, level in enumerate(lam):
            B[i] = dantzig_selector(wp0, level, eligible)
        G = wp0.unpenalized(B.T).T
    elif pen.concave and opts.concave_solver == "cd":
        with blas_limit(opts):
            B, G, conv = concave_path(problem, pen, lam, eta0, opts)
        L = B.shape[0]
        lam = lam[:L]
    else:
        b, eta, wp = np.zeros(d), eta0, wp0
        with blas_limit(opts):
            for i, level in enumerate(lam):
                b, g, eta, wp, conv[i] = _solve_lambda(problem, pen, wp, b, eta, level, v, opts)
                B[i], G[i] = b, g
                if not loss.quadratic:
                    if not np.all(np.isfinite(eta)):
                        L = i  # diverged: drop this point and stop
                        break
                    if 1.0 - loss.deviance(problem.y, eta) / null_dev > opts.max_deviance_ratio:
                        # Saturated (for a binary outcome: separated, coefficients diverging): a
                        # criterion would reward it, so the path ends before it.
                        L = max(i, 1)
                        break
        lam, B, G, conv = lam[:L], B[:L], G[:L], conv[:L]

    eta = problem.offset[:, None] + problem.C @ G.T + problem.Xs @ B.T  # (n, L)
    dev = np.array([loss.deviance(problem.y, eta[:, i]) for i in range(L)])
    loglik = np.array([loss.log_likelihood(problem.y, eta[:, i]) for i in range(L)])
    coefs = B / problem.scale
    has_int = loss.has_intercept
    intercepts = (G[:, 0] - coefs @ problem.mean) if has_int else np.zeros(L)
    return PathResult(
        lambdas=lam,
        coefs=coefs,
        intercepts=intercepts,
        unpenalized_coefs=G[:, 1:] if has_int else G,
        coefs_standardized=B,
        df=np.count_nonzero(B, axis=1),
        log_likelihood=loglik,
        deviance=dev,
        null_deviance=float(null_dev),
        converged=np.asarray(conv, dtype=bool),
        feature_weights=v,
        penalty=pen,
        loss=loss,
        options=opts,
        problem=problem,
    )
