"""In-memory penalised fits on the shortlist: penalties, losses, lambda paths and tuning.

Pure numpy / scipy / scikit-learn; no I/O. The usual call is::

    path = fit_path(X, y, penalty="scad", loss="gaussian", unpenalized=Z)
    best = select_model(path, "ebic", n_candidates=p)

``best.coef``, ``best.intercept``, ``best.unpenalized_coef`` and ``best.support`` describe the chosen
model (penalised estimates), ``best.refit_coef`` and ``best.refit_se`` its unpenalised refit; ``best.lambdas``, ``best.coefs`` and ``best.criterion_values`` the whole path.
"""

from ._criteria import bic, default_ebic_gamma, ebic, log_binomial
from ._losses import BinomialLoss, CoxLoss, GaussianLoss, Loss, PoissonLoss, make_loss
from ._mle import Refit, refit
from ._path import fit_path
from ._penalties import (
    MCP,
    SCAD,
    AdaptiveLasso,
    Dantzig,
    ElasticNet,
    Lasso,
    Penalty,
    elastic_net_penalty,
    lasso_penalty,
    make_penalty,
    mcp_derivative,
    mcp_penalty,
    mcp_threshold,
    scad_derivative,
    scad_penalty,
    scad_threshold,
    soft_threshold,
)
from ._results import FitResult, PathResult, SolverOptions
from ._select import cross_validate, cross_validate_supports, refit_support, select_model

__all__ = [
    "MCP",
    "SCAD",
    "AdaptiveLasso",
    "BinomialLoss",
    "CoxLoss",
    "Dantzig",
    "ElasticNet",
    "FitResult",
    "GaussianLoss",
    "Lasso",
    "Loss",
    "PathResult",
    "PenalizedRegression",
    "Penalty",
    "PoissonLoss",
    "Refit",
    "SolverOptions",
    "bic",
    "cross_validate",
    "cross_validate_supports",
    "default_ebic_gamma",
    "ebic",
    "elastic_net_penalty",
    "fit_path",
    "lasso_penalty",
    "log_binomial",
    "make_loss",
    "make_penalty",
    "mcp_derivative",
    "mcp_penalty",
    "mcp_threshold",
    "refit",
    "refit_support",
    "scad_derivative",
    "scad_penalty",
    "scad_threshold",
    "select_model",
    "soft_threshold",
]


def __getattr__(name: str):
    # The scikit-learn estimator shell loads on first use: importing scikit-learn costs a second.
    if name == "PenalizedRegression":
        from ._estimator import PenalizedRegression

        return PenalizedRegression
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
