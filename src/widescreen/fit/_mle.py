"""Unpenalised maximum likelihood refits on a chosen support, with standard errors.

Newton-Raphson with the full information matrix (for the canonical-link GLMs that is Fisher scoring, the
IRLS of McCullagh & Nelder 1989, Section 2.5; for the Cox partial likelihood with Breslow's ties the
Newton iteration of Cox 1972 on the exact Hessian), with step halving on the deviance. Standard errors are
the square roots of the diagonal of the inverse information at the estimate; for the Gaussian loss the
variance is estimated by ``RSS / (n - number of coefficients)``, the usual unbiased estimate (the
convention of statsmodels' OLS and GLM Gaussian fits, which the tests compare against).

A refit reports ``exists = False`` when the maximum likelihood estimate does not exist or cannot be
trusted: the iteration did not settle (separation: coefficients growing without bound), the linear
predictor spread past ``MAX_ETA`` (fitted probabilities or rates at 0 / 1 to machine precision), or the
information matrix is singular. Tuning then gives that support an infinite criterion.

Standard errors after selection are not valid for inference: they ignore that the support was chosen
from the same data (Berk et al. 2013, Ann. Statist. 41:802), so they are too small and their intervals
cover too rarely.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from ._losses import Loss, make_loss

__all__ = ["MAX_ETA", "Refit", "refit", "refit_columns"]

#: Largest |eta - median(eta)| of a refit taken as a maximum likelihood estimate (logistic: fitted
#: probabilities within 1e-17 of 0 or 1); past it the fit is separated or saturated.
MAX_ETA = 40.0


@dataclass(frozen=True)
class Refit:
    """An unpenalised fit on given columns.

    Attributes
    ----------
    coef : ndarray of shape (k,)
        Coefficients of the columns, in their given order and scale.
    se : ndarray of shape (k,)
        Their standard errors (NaN when the estimate does not exist).
    intercept : float
        0 for the Cox loss, which has none.
    intercept_se : float
    unpenalized_coef, unpenalized_se : ndarray of shape (q,)
        Covariates' coefficients and standard errors.
    log_likelihood : float
        At the estimate (Gaussian: variance profiled out, as the path reports it); ``-inf`` when the
        estimate does not exist.
    deviance : float
    exists : bool
        False when the estimate does not exist (separation, saturation, singular information).
    n_iter : int
    """

    coef: np.ndarray
    se: np.ndarray
    intercept: float
    intercept_se: float
    unpenalized_coef: np.ndarray
    unpenalized_se: np.ndarray
    log_likelihood: float
    deviance: float
    exists: bool
    n_iter: int


def _cox_grad_hess(y: np.ndarray, eta: np.ndarray, D: np.ndarray):
    """Score and information of the Breslow partial likelihood in the coefficients of ``D`` (n, m)."""
    order = np.argsort(-y[:, 0], kind="stable")  # decreasing time: risk sets are prefixes
    t, d = y[order, 0], y[order, 1]
    e = eta[order]
    r = np.exp(e - e.max())
    X = D[order]
    # The risk set of row i is every row with t_j >= t_i: in decreasing order, the prefix up to the
    # last row tied with it (Breslow's handling of ties).
    idx = np.searchsorted(-t, -t, side="right") - 1
    S0 = np.cumsum(r)[idx]
    S1 = np.cumsum(r[:, None] * X, axis=0)[idx]
    xbar = S1 / S0[:, None]
    grad = (d[:, None] * (X - xbar)).sum(axis=0)
    # sum_i d_i S2_i / S0_i = X^T diag(r a) X with a_k = sum of d_i / S0_i over the events whose risk
    # set holds k (t_i <= t_k): a suffix sum from the first row tied with k. O(n m^2), no (n, m, m) array.
    first = np.searchsorted(-t, -t, side="left")
    a = np.cumsum((d / S0)[::-1])[::-1][first]
    ev = d > 0
    info = (X.T * (r * a)) @ X - xbar[ev].T @ xbar[ev]
    return grad, info


def _score_info(loss: Loss, y, eta, D):
    if loss.name == "cox":
        return _cox_grad_hess(y, eta, D)
    mu = loss.mean(eta)
    var = mu * (1.0 - mu) if loss.name == "binomial" else mu
    return D.T @ (y - mu), (D.T * var) @ D


# A column whose share of its squared norm left after projecting out the columns before it falls below
# this is a linear combination of them (1 - R^2 < 1e-10): the design has no unique refit.
_COLLINEAR = 1e-10


def _least_squares(D: np.ndarray, y: np.ndarray, loss: Loss, offset: np.ndarray, with_se: bool):
    """Ordinary least squares through one Cholesky factor of the Gram matrix.

    The Gram matrix costs n m^2 and its factor m^3 / 3: a third of a QR or SVD of D, which matters when
    tuning refits one support per point of a path. Its diagonal detects a collinear column (see
    `_COLLINEAR`): then the refit does not exist.
    """
    n, m = D.shape
    gram = D.T @ D
    target = y - offset
    try:
        factor = linalg.cholesky(gram, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return np.zeros(m), np.full(m, np.nan), -np.inf, False, 1
    pivots = np.diag(factor) ** 2
    if not np.all(pivots > _COLLINEAR * np.maximum(np.diag(gram), np.finfo(float).tiny)):
        return np.zeros(m), np.full(m, np.nan), -np.inf, False, 1
    coef = linalg.cho_solve((factor, True), D.T @ target, check_finite=False)
    eta = offset + D @ coef
    rss = loss.deviance(y, eta)
    se = np.full(m, np.nan)
    if with_se:
        # diag((D'D)^-1) = column sums of squares of L^-1
        inv_factor = linalg.solve_triangular(factor, np.eye(m), lower=True, check_finite=False)
        scale = rss / (n - m) if n > m else np.nan
        se = np.sqrt(np.einsum("ij,ij->j", inv_factor, inv_factor) * scale)
    return coef, se, loss.log_likelihood(y, eta), bool(n > m and rss > 0), 1


def refit_columns(
    D: np.ndarray,
    y: np.ndarray,
    loss: Loss,
    offset: np.ndarray,
    *,
    max_iter: int = 100,
    tol: float = 1e-10,
    with_se: bool = True,
) -> tuple[np.ndarray, np.ndarray, float, bool, int]:
    """Maximum likelihood coefficients of the full design ``D`` (n, m) (intercept column included).

    Returns ``(coef, se, log_likelihood, exists, n_iter)``. With ``with_se=False`` (tuning, which needs
    only the likelihood) the standard errors are NaN and their m^3 inverse is skipped; whether the fit
    exists is decided the same way (a GLM's information is still factorised).
    """
    n, m = D.shape
    if m == 0:  # Cox without features: nothing to fit
        return np.zeros(0), np.zeros(0), loss.log_likelihood(y, offset), True, 0
    if loss.quadratic:
        return _least_squares(D, y, loss, offset, with_se)
    coef = np.zeros(m)
    if loss.has_intercept:
        # Start at the null fit's intercept: a Newton step from there is well scaled.
        coef[0] = float(loss.initial_eta(y).mean()) if loss.name != "binomial" else 0.0
    eta = offset + D @ coef
    dev = loss.deviance(y, eta)
    converged = False
    it = 0
    for it in range(1, max_iter + 1):  # noqa: B007 (the count is reported)
        grad, info = _score_info(loss, y, eta, D)
        try:
            step = linalg.solve(info, grad, assume_a="pos", check_finite=False)
        except (linalg.LinAlgError, ValueError):
            break
        if not np.all(np.isfinite(step)):
            break
        new, new_dev = coef + step, np.inf
        for _ in range(30):
            new_eta = offset + D @ new
            new_dev = loss.deviance(y, new_eta)
            if np.isfinite(new_dev) and new_dev <= dev * (1 + 1e-12) + 1e-12:
                break
            step = 0.5 * step
            new = coef + step
        moved = np.max(np.abs(new - coef)) / (1.0 + np.max(np.abs(new)))
        coef, eta, dev = new, offset + D @ new, new_dev
        if moved <= tol or abs(grad @ step) <= tol * (abs(dev) + 0.1):
            converged = True
            break
    spread = np.max(np.abs(eta - np.median(eta))) if n else 0.0
    grad, info = _score_info(loss, y, eta, D)
    try:
        if with_se:
            inv = linalg.inv(info, check_finite=False)
            se = np.sqrt(np.maximum(np.diag(inv), 0.0))
            ok = bool(np.all(np.isfinite(se)))
        else:
            se = np.full(m, np.nan)
            ok = bool(np.all(np.isfinite(linalg.cho_factor(info, check_finite=False)[0])))
    except (linalg.LinAlgError, ValueError):
        se, ok = np.full(m, np.nan), False
    exists = converged and ok and spread <= MAX_ETA
    loglik = loss.log_likelihood(y, eta) if exists else -np.inf
    return coef, se if exists else np.full(m, np.nan), loglik, exists, it


def refit(
    X, y, loss: str | Loss = "gaussian", unpenalized=None, offset=None, *, with_se: bool = True
) -> Refit:
    """Unpenalised maximum likelihood fit of ``y`` on the columns of ``X``, the intercept and covariates.

    Parameters
    ----------
    X : array_like of shape (n, k)
        The selected features (k may be 0).
    y : array_like of shape (n,), or (n, 2) (time, event) for ``loss="cox"``
    loss : {"gaussian", "binomial", "poisson", "cox"} or Loss
    unpenalized : array_like of shape (n, q), optional
        Covariates.
    offset : array_like of shape (n,), optional
    with_se : bool, default=True
        False skips the standard errors (NaN), as tuning does.

    Returns
    -------
    Refit
    """
    loss_obj = make_loss(loss)
    y = loss_obj.check_response(y)
    n = y.shape[0]
    X = np.asarray(X, dtype=np.float64).reshape(n, -1)
    Z = np.empty((n, 0)) if unpenalized is None else np.asarray(unpenalized, dtype=np.float64)
    Z = Z.reshape(n, -1)
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64)
    lead = [np.ones((n, 1))] if loss_obj.has_intercept else []
    D = np.hstack([*lead, Z, X])
    coef, se, loglik, exists, it = refit_columns(D, y, loss_obj, off, with_se=with_se)
    h = 1 if loss_obj.has_intercept else 0
    q = Z.shape[1]
    return Refit(
        coef=coef[h + q :],
        se=se[h + q :],
        intercept=float(coef[0]) if h else 0.0,
        intercept_se=float(se[0]) if h else 0.0,
        unpenalized_coef=coef[h : h + q],
        unpenalized_se=se[h : h + q],
        log_likelihood=float(loglik),
        deviance=float(loss_obj.deviance(y, off + D @ coef)),
        exists=bool(exists),
        n_iter=int(it),
    )
