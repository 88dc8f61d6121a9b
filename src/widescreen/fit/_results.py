"""Configuration and result records of the penalised fits (frozen dataclasses)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from ._losses import Loss
from ._mle import Refit
from ._penalties import Penalty
from ._problem import Problem


@dataclass(frozen=True)
class SolverOptions:
    """Numerical settings of the path solver.

    Attributes
    ----------
    tol : float
        Coordinate descent tolerance on the duality gap, relative to ``||y||^2`` (scikit-learn's meaning).
    max_iter : int
        Coordinate descent sweeps per solve.
    outer_max_iter : int
        IRLS iterations per lambda (GLM / Cox losses); with ``concave_solver="lla"`` local linear
        approximation steps are interleaved in the same loop.
    concave_solver : {"cd", "lla"}
        How SCAD and MCP are solved: ``"cd"`` (default) by coordinate descent with the penalty's own
        thresholding along the path (Breheny & Huang 2011, see `_concave`); ``"lla"`` by the local linear
        approximation started from the lasso path (Zou & Li 2008), kept for comparison: it inherits the
        lasso's order of entry.
    lla_max_iter : int
        With ``concave_solver="lla"``: local linear approximation steps per lambda (SCAD, MCP). Zou & Li (2008) show one step from a
        good initial estimate is enough for the oracle property, and Fan, Xue & Zou (2014, Ann. Statist.
        42:819) two from the lasso; here each lambda starts from the previous lambda's solution, so the
        steps accumulate along the path. Past this count the weights are frozen (a GLM still iterates
        IRLS to convergence) and the point is flagged not converged unless the LLA had converged.
    outer_tol : float
        The outer loop stops when no standardised coefficient moves by more than
        ``outer_tol * max(1, max |b|)`` and, for IRLS, the deviance changes by less than
        ``irls_tol * (|deviance| + 0.1)`` (R's ``glm.control`` rule).
    irls_tol : float
    max_deviance_ratio : float
        For non-Gaussian losses the path stops once this share of the null deviance is explained
        (glmnet's rule, common practice): beyond it the fit is saturated and may diverge.
    kkt_tol : float
        A SCAD / MCP path point is flagged converged when the optimality (KKT) conditions hold to
        ``kkt_tol * lambda_max`` on the scale of ``x_j^T s / n`` (standardised columns, score ``s``).
    blas_threads : int or None
        BLAS threads in the per-lambda loop (SCAD, MCP, GLM and Cox paths; the Gram matrix of a
        Gaussian fit is computed before it with the process setting). That loop is many small products,
        which lose more to thread hand-offs than they gain (badly so on a busy machine); None leaves
        the process setting alone.
    """

    tol: float = 1e-7
    max_iter: int = 10_000
    outer_max_iter: int = 100
    concave_solver: str = "cd"
    lla_max_iter: int = 10
    outer_tol: float = 1e-6
    irls_tol: float = 1e-8
    max_deviance_ratio: float = 0.999
    kkt_tol: float = 1e-4
    blas_threads: int | None = 1

    def __post_init__(self):
        for name in ("tol", "outer_tol", "irls_tol", "kkt_tol"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value > 0):
                raise ValueError(
                    f"The solver option '{name}' must be a positive number; got {value}."
                )
        for name in ("max_iter", "outer_max_iter", "lla_max_iter"):
            value = getattr(self, name)
            if not (isinstance(value, int | np.integer) and value >= 1):
                raise ValueError(
                    f"The solver option '{name}' must be a positive int; got {value!r}."
                )
        if self.blas_threads is not None and not (
            isinstance(self.blas_threads, int | np.integer) and self.blas_threads >= 1
        ):
            raise ValueError(
                f"The solver option 'blas_threads' must be a positive int or None; got {self.blas_threads!r}."
            )
        if self.concave_solver not in ("cd", "lla"):
            raise ValueError(
                f"The solver option 'concave_solver' must be 'cd' or 'lla'; got {self.concave_solver!r}."
            )
        if not 0.0 < self.max_deviance_ratio <= 1.0:
            raise ValueError(
                f"The solver option 'max_deviance_ratio' must be in (0, 1]; got {self.max_deviance_ratio}."
            )

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> SolverOptions:
        return cls(**data)


def _linear_predictor(
    problem: Problem, coef, intercept, zcoef, X, unpenalized, offset
) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != problem.d:
        raise ValueError(f"'X' must have shape (n, {problem.d}); got {X.shape}.")
    n = X.shape[0]
    eta = X @ coef + intercept
    q = problem.Z.shape[1]
    if q:
        if unpenalized is None:
            raise ValueError(
                f"The model has {q} unpenalised covariates; pass 'unpenalized' of shape ({n}, {q})."
            )
        Z = np.asarray(unpenalized, dtype=np.float64).reshape(n, -1)
        if Z.shape[1] != q:
            raise ValueError(f"'unpenalized' must have {q} columns; got {Z.shape[1]}.")
        eta = eta + Z @ zcoef
    if offset is not None:
        eta = eta + np.asarray(offset, dtype=np.float64)
    return eta


@dataclass(frozen=True, eq=False)
class PathResult:
    """Solutions along a decreasing lambda path, on the original scale of the columns.

    Attributes
    ----------
    lambdas : ndarray of shape (L,)
        Penalty levels (standardised scale), decreasing. L may be below the requested number when a
        non-Gaussian path stopped at saturation (see `SolverOptions.max_deviance_ratio`).
    coefs : ndarray of shape (L, d)
        Feature coefficients on the original scale of ``X``.
    intercepts : ndarray of shape (L,)
        Intercepts (0 for the Cox loss, which has none).
    unpenalized_coefs : ndarray of shape (L, q)
        Coefficients of the unpenalised covariates.
    coefs_standardized : ndarray of shape (L, d)
        Feature coefficients on the standardised scale, where the penalty acts.
    df : ndarray of int of shape (L,)
        Number of non-zero feature coefficients.
    log_likelihood, deviance : ndarray of shape (L,)
        Of the fitted model (Gaussian: variance profiled out; deviance = residual sum of squares).
    null_deviance : float
        Deviance of the model with the unpenalised columns only.
    converged : ndarray of bool of shape (L,)
    feature_weights : ndarray of shape (d,)
        Fixed per-feature penalty weights on the standardised scale (adaptive lasso; ones otherwise,
        inf for constant columns).
    penalty : Penalty
    loss : Loss
    options : SolverOptions
    problem : Problem
        The validated data, kept for cross-validation and prediction.
    """

    lambdas: np.ndarray
    coefs: np.ndarray
    intercepts: np.ndarray
    unpenalized_coefs: np.ndarray
    coefs_standardized: np.ndarray
    df: np.ndarray
    log_likelihood: np.ndarray
    deviance: np.ndarray
    null_deviance: float
    converged: np.ndarray
    feature_weights: np.ndarray
    penalty: Penalty
    loss: Loss
    options: SolverOptions
    problem: Problem = field(repr=False)

    @property
    def n_samples(self) -> int:
        return self.problem.n

    @property
    def n_features(self) -> int:
        return self.problem.d

    def linear_predictor(self, X, index: int, unpenalized=None, offset=None) -> np.ndarray:
        """Linear predictor of shape (m,) for new samples ``X`` of shape (m, d) at path point ``index``."""
        return _linear_predictor(
            self.problem,
            self.coefs[index],
            self.intercepts[index],
            self.unpenalized_coefs[index],
            X,
            unpenalized,
            offset,
        )


@dataclass(frozen=True, eq=False)
class FitResult:
    """One model chosen from a path.

    Attributes
    ----------
    coef : ndarray of shape (d,)
        Feature coefficients on the original scale.
    intercept : float
    unpenalized_coef : ndarray of shape (q,)
    support : ndarray of int of shape (k,)
        Indices of the non-zero feature coefficients, increasing.
    lambda_ : float
        The chosen penalty level.
    index : int or None
        Its position on the path; None for a support found by the stepwise search (see
        `select_model`; ``lambda_`` is then NaN and ``coef`` the refit).
    criterion : str
        ``"bic"``, ``"ebic"`` or ``"cv"``.
    criterion_value : float
        The criterion of the chosen model.
    criterion_values : ndarray of shape (L,)
        The criterion at every lambda (for ``"cv"`` the mean held-out deviance); smaller is better.
    lambdas : ndarray of shape (L,)
    coefs : ndarray of shape (L, d)
        The whole path, original scale.
    ebic_gamma : float or None
        The EBIC gamma used.
    n_candidates : int or None
        Number of candidate features the EBIC counted models over.
    cv_std_error : ndarray of shape (L,) or None
        Standard error of the cross-validation mean over folds.
    path : PathResult
    tuning : {"refit", "path"}
        Whether the criterion scored each support's unpenalised refit or the penalised estimates.
    refit : Refit, optional
        The unpenalised maximum likelihood fit on the selected features (and the intercept and
        covariates).
    refit_coef : ndarray of shape (d,), optional
        Its coefficients on the original scale (0 off the support).
    refit_se : ndarray of shape (d,), optional
        Their standard errors (NaN off the support). After selection these are not valid for
        inference: they ignore that the support was chosen from the same data.
    """

    coef: np.ndarray
    intercept: float
    unpenalized_coef: np.ndarray
    support: np.ndarray
    lambda_: float
    index: int | None
    criterion: str
    criterion_value: float
    criterion_values: np.ndarray
    lambdas: np.ndarray
    coefs: np.ndarray
    ebic_gamma: float | None
    n_candidates: int | None
    cv_std_error: np.ndarray | None
    path: PathResult = field(repr=False)
    tuning: str = "path"
    refit: Refit | None = field(default=None, repr=False)
    refit_coef: np.ndarray | None = None
    refit_se: np.ndarray | None = None

    def linear_predictor(self, X, unpenalized=None, offset=None) -> np.ndarray:
        """Linear predictor of shape (m,) for new samples ``X`` of shape (m, d)."""
        return _linear_predictor(
            self.path.problem,
            self.coef,
            self.intercept,
            self.unpenalized_coef,
            X,
            unpenalized,
            offset,
        )

    def predict(self, X, unpenalized=None, offset=None) -> np.ndarray:
        """Mean response of shape (m,) (Cox: relative risk ``exp(eta)``)."""
        return self.path.loss.mean(self.linear_predictor(X, unpenalized, offset))
