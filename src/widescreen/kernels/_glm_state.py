"""Response state of a marginal GLM pass (logistic, Poisson): input checks and the null fit, done once.

The null model ``g(E y) = offset + C gamma`` with ``C = [1, covariates]`` is fitted by damped Newton. Its
fit gives every feature's starting point (``b_j = 0``, where the score and information are matrix
products) and the nuisance columns the kernel refits with each feature, whitened in the null weight
metric (``design' W0 design = I``) so the per-feature systems are well conditioned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ._newton import damped_newton

FAMILIES = ("logistic", "poisson")
TESTS = ("lr", "score")
#: Reweighting rounds of the count variance fit (`_quadratic_variance`) at most; it stops once the
#: fitted variances change by less than 1e-12 (relative), typically within ten.
ITER_VARIANCE = 50
DISPERSIONS = ("fixed", "pearson", "quadratic", "sandwich")


@dataclass(frozen=True)
class GLMState:
    """Response state of a marginal GLM pass, built once and shared by every block.

    Attributes
    ----------
    family : {"logistic", "poisson"}
    y : ndarray of shape (n,)
    eta0 : ndarray of shape (n,)
        Linear predictor of the null fit (offset, intercept and covariates).
    mu0, w0 : ndarray of shape (n,)
        Fitted means and working weights of the null fit.
    design : ndarray of shape (n, k)
        Nuisance columns refitted with each feature: the intercept alone (a column of ones) when there
        are no covariates, else ``C L^-T`` with ``L L' = C' W0 C`` for ``C = [1, covariates]``.
    score_basis : ndarray of shape (n, k)
        ``W0 C L^-T``: ``|score_basis' x|^2`` is the part of ``x' W0 x`` the nuisance parameters explain.
    deviance0 : float
        -2 log-likelihood of the null fit, without the saturated-model constant (it cancels in ratios).
    dispersion : float
        Scale dividing the likelihood-ratio and score statistics and multiplying the variance: 1 for the
        plain model, the null fit's Pearson X2 / (n - k) for the quasi-Poisson test.
    dispersion_rule : {"fixed", "pearson", "quadratic", "sandwich"}
        Score test only for the last two: the variance of the score ``sum_i x~_i^2 v_i`` with ``v`` the
        fitted variance function ``a mu0 + b mu0^2`` (``"quadratic"``) or the squared residuals
        ``(y - mu0)^2`` (``"sandwich"``).
    variance : ndarray of shape (n,)
        The per-sample variance ``v`` of those two rules (``mu0`` otherwise).
    test : {"lr", "score"}
    max_iter : int
        Cap on Newton evaluations per feature (step halvings included).
    tol : float
        Convergence when the predicted deviance decrease of the next Newton step is below ``tol``.
    """

    family: str
    y: np.ndarray
    eta0: np.ndarray
    mu0: np.ndarray
    w0: np.ndarray
    design: np.ndarray
    score_basis: np.ndarray
    deviance0: float
    dispersion: float
    dispersion_rule: str
    variance: np.ndarray
    test: str
    max_iter: int
    tol: float

    @property
    def n_samples(self) -> int:
        return self.y.shape[0]

    @property
    def intercept_only(self) -> bool:
        return self.design.shape[1] == 1

    @property
    def eta0_constant(self) -> bool:
        return bool(np.all(self.eta0 == self.eta0[0]))


@dataclass(frozen=True)
class LogisticState(GLMState):
    """`GLMState` of a logistic pass (y in [0, 1])."""


@dataclass(frozen=True)
class PoissonState(GLMState):
    """`GLMState` of a Poisson pass (y >= 0, log link)."""


def mean_weight(family: str, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and working weight of the canonical link at ``eta`` (small arrays: the null fit)."""
    if family == "logistic":
        mu = special.expit(eta)
        return mu, mu * (1.0 - mu)
    mu = np.exp(np.minimum(eta, 700.0))
    return mu, mu


def deviance(family: str, y: np.ndarray, eta: np.ndarray) -> float:
    """-2 log-likelihood without the saturated constant (small arrays: the null fit)."""
    if family == "logistic":
        # -l = sum (1 - y) eta + log(1 + e^-eta): exact for large |eta| of either sign.
        return float(2.0 * (np.dot(1.0 - y, eta) + np.logaddexp(0.0, -eta).sum()))
    return float(-2.0 * (np.dot(y, eta) - np.exp(np.minimum(eta, 700.0)).sum()))


def fit_null(family: str, y: np.ndarray, C: np.ndarray, offset: np.ndarray, max_iter: int = 100):
    """Newton fit of the null model ``eta = offset + C gamma`` with step halving."""
    gamma = np.zeros(C.shape[1])
    if family == "logistic":
        p = np.clip(y.mean(), 1e-12, 1 - 1e-12)
        gamma[0] = np.log(p / (1 - p)) - np.mean(offset)
    else:
        gamma[0] = np.log(max(y.mean(), 1e-300)) - np.log(max(np.exp(offset).mean(), 1e-300))

    def evaluate(g0: np.ndarray):
        eta = offset + C @ g0
        mu, w = mean_weight(family, eta)
        return deviance(family, y, eta), C.T @ (y - mu), C.T @ (C * w[:, None])

    gamma, (dev, _, _) = damped_newton(
        evaluate, gamma, max_iter=max_iter, what=f"{family} null fit on the covariates"
    )
    eta = offset + C @ gamma
    _, w = mean_weight(family, eta)
    if family == "logistic" and C.shape[1] > 1 and np.min(w) < 1e-12:
        raise ValueError("the covariates separate the outcome: fitted probabilities reach 0 or 1")
    return gamma, eta, dev


def check_rank(C: np.ndarray) -> None:
    """Refuse adjustment columns that are constant or collinear (with each other or the intercept)."""
    if C.shape[1] and np.linalg.matrix_rank(C) < C.shape[1]:
        raise ValueError(
            f"the {C.shape[1]} adjustment columns are collinear on these samples "
            "(a covariate is constant or a combination of the others)"
        )


def as_covariates(covariates, n: int) -> np.ndarray:
    """Covariates as a finite float64 array of shape (n, q) (q may be 0)."""
    Z = np.empty((n, 0)) if covariates is None else np.asarray(covariates, dtype=np.float64)
    Z = Z.reshape(n, -1) if Z.ndim == 1 else Z
    if Z.ndim != 2 or Z.shape[0] != n or not np.all(np.isfinite(Z)):
        raise ValueError(f"'covariates' must be finite with {n} rows; got shape {Z.shape}")
    return Z


def as_offset(offset, n: int) -> np.ndarray:
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64).reshape(-1)
    if off.shape != (n,) or not np.all(np.isfinite(off)):
        raise ValueError(f"'offset' must be a finite array of shape ({n},); got shape {off.shape}")
    return off


def _quadratic_variance(y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """Variance function ``a mu + b mu^2`` (a, b >= 0) fitted to the squared residuals of the null fit.

    Counts with omitted causes or extra-Poisson noise have a variance that grows like ``mu^2`` (the
    negative binomial form); Poisson data give a = 1, b = 0. Least squares of ``(y - mu)^2`` on
    ``(mu, mu^2)``, the auxiliary regression of Cameron & Trivedi (1990, J. Econometrics 46:347),
    with non-negative coefficients (scipy.optimize.nnls), iteratively reweighted by ``1 / v^2``.
    """
    from scipy.optimize import nnls

    A = np.column_stack([mu, mu * mu])
    r2 = (y - mu) ** 2
    v = mu.copy()  # the Poisson variance as the first weights
    for _ in range(ITER_VARIANCE):
        # Weighted by 1 / v^2 (the squared residuals' variance grows like v^2, as for a gamma
        # quasi-likelihood): unweighted least squares would follow the few largest counts.
        Aw = A / v[:, None]
        scale = np.sqrt((Aw * Aw).sum(axis=0))
        coef, _ = nnls(Aw / scale, r2 / v)
        v_new = A @ (coef / scale)
        if not np.all(v_new > 0):
            break
        change = np.max(np.abs(v_new - v) / v)
        v = v_new
        if change < 1e-12:
            break
    if not np.all(v > 0):
        raise ValueError("the fitted variance of the counts is zero: the counts are fitted exactly")
    return v


def _check_outcome(family: str, y) -> np.ndarray:
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 1:
        raise ValueError(f"the outcome 'y' must be 1-D; got shape {y.shape}")
    if not np.all(np.isfinite(y)):
        raise ValueError("the outcome 'y' has non-finite values")
    if family == "logistic" and (y.min() < 0 or y.max() > 1 or y.min() == y.max()):
        raise ValueError("the logistic outcome 'y' must lie in [0, 1] and take both values")
    if family == "poisson" and (y.min() < 0 or y.max() == 0):
        raise ValueError("the Poisson outcome 'y' must be non-negative and not all zero")
    return y


def prepare_glm(
    family: str, y, covariates, offset, *, test: str, dispersion: str, max_iter: int, tol: float
) -> GLMState:
    """Check the inputs, fit the null model and build the state (see `prepare_logistic`)."""
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {FAMILIES}; got {family!r}")
    y = _check_outcome(family, y)
    n = y.shape[0]
    if test not in TESTS:
        raise ValueError(f"test must be one of {TESTS}; got {test!r}")
    if dispersion not in DISPERSIONS or (family == "logistic" and dispersion != "fixed"):
        raise ValueError(
            f"dispersion must be 'fixed' (or 'pearson', 'sandwich' for Poisson); got {dispersion!r}"
        )
    if dispersion in ("quadratic", "sandwich") and test != "score":
        raise ValueError(f"the {dispersion!r} dispersion is a score test: pass test='score'")
    if max_iter < 1 or not tol > 0:
        raise ValueError(f"max_iter must be >= 1 and tol > 0; got {max_iter}, {tol}")
    off = as_offset(offset, n)
    C = np.hstack([np.ones((n, 1)), as_covariates(covariates, n)])
    check_rank(C)
    _, eta0, dev0 = fit_null(family, y, C, off)
    mu0, w0 = mean_weight(family, eta0)
    # Whitened nuisance columns: design' W0 design = I, and x' W0 x - |score_basis' x|^2 is the
    # efficient information of b_j at the null.
    L = np.linalg.cholesky(C.T @ (C * w0[:, None]))
    white = np.linalg.solve(L, C.T).T
    k = C.shape[1]
    phi = 1.0
    if dispersion == "pearson":
        # Quasi-Poisson scale: Pearson X2 / (n - k) of the null fit (McCullagh & Nelder 1989,
        # Generalized Linear Models, 2nd ed., sec. 4.5.2 and ch. 9; Wedderburn 1974).
        if n <= k:
            raise ValueError(f"the Pearson dispersion needs more than {k} samples; got {n}")
        phi = float(np.sum((y - mu0) ** 2 / mu0) / (n - k))
        if not phi > 0:
            raise ValueError(
                "the Pearson dispersion of the null fit is zero: the counts are fitted exactly"
            )
    variance = w0
    if dispersion == "sandwich":
        variance = (y - mu0) ** 2
    elif dispersion == "quadratic":
        variance = _quadratic_variance(y, mu0)
    cls = LogisticState if family == "logistic" else PoissonState
    return cls(
        family=family,
        y=y,
        eta0=eta0,
        mu0=mu0,
        w0=w0,
        design=np.ones((n, 1)) if k == 1 else np.ascontiguousarray(white),
        score_basis=np.ascontiguousarray(white * w0[:, None]),
        deviance0=dev0,
        dispersion=phi,
        dispersion_rule=dispersion,
        variance=variance,
        test=test,
        max_iter=int(max_iter),
        tol=float(tol),
    )


def prepare_logistic(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    *,
    test: str = "lr",
    max_iter: int = 25,
    tol: float = 1e-10,
) -> LogisticState:
    """Build the response state of a logistic pass.

    Parameters
    ----------
    y : ndarray of shape (n,)
        Outcome in [0, 1] (0/1 in practice).
    covariates : ndarray of shape (n, q), optional
        Adjustment variables, refitted with every feature: the statistic of feature j is the test of
        ``b_j = 0`` in ``y ~ 1 + covariates + x_j``.
    offset : ndarray of shape (n,), optional
        Fixed part of the linear predictor, not refitted.
    test : {"lr", "score"}
        Full Newton fits with Wald and likelihood-ratio statistics, or the one-product score test.
    max_iter : int
        Newton evaluations per feature at most (each step halving counts as one).
    tol : float
        Stop when the predicted deviance decrease of the next Newton step is below ``tol``; that step is
        then taken without a further evaluation.
    """
    return prepare_glm(
        "logistic", y, covariates, offset, test=test, dispersion="fixed", max_iter=max_iter, tol=tol
    )


def prepare_poisson(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    *,
    test: str = "lr",
    dispersion: str = "fixed",
    max_iter: int = 25,
    tol: float = 1e-10,
) -> PoissonState:
    """Build the response state of a Poisson (log link) pass.

    Parameters are those of `prepare_logistic`; ``y`` holds non-negative counts, and ``offset`` is on the
    log scale (log exposure). ``dispersion="pearson"`` gives the quasi-Poisson test, robust to
    overdispersion: the scale ``phi`` = Pearson X2 / (n - 1 - q) of the null fit divides the likelihood
    ratio and score statistics and multiplies the variances (McCullagh & Nelder 1989, sec. 4.5.2).
    ``dispersion="quadratic"`` (with ``test="score"``) gives a score test whose variance uses the
    variance function ``a mu + b mu^2`` fitted to the null residuals (Cameron & Trivedi 1990), for
    overdispersion that grows faster than the mean. ``dispersion="sandwich"`` (with ``test="score"``)
    gives the robust score test, valid whatever the variance of the counts (Boos 1992, Am. Stat.
    46:327; the sandwich of White 1982): the score's variance is its empirical one at the null fit.
    With heavy-tailed counts its self-normalised statistic bunches near 1 (its median is too high and
    its tail too light), so a median-based lambda_GC reads above 1 on null features.
    """
    return prepare_glm(
        "poisson",
        y,
        covariates,
        offset,
        test=test,
        dispersion=dispersion,
        max_iter=max_iter,
        tol=tol,
    )
