"""The penalised refit of one iteration: fit on the union of the selected set and the new candidates.

The fit sees the union's imputed, centred values (kept by the passes), the covariates unpenalised and the
family's loss; the penalty level is tuned by the chosen criterion over the supports the path visits, each
scored at its unpenalised refit (`widescreen.fit.select_model`). The final model is also refitted without
penalty on the features as stored (`final_refit`), for the coefficients and standard errors that
``model.tsv`` reports beside the penalised ones. A fitted model is
recorded in the manifest as plain numbers (floats round-trip exactly through JSON), so a resumed run
reuses it bit for bit instead of refitting.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
from dask.base import tokenize

from .._config import check_choice, check_int, check_number
from ..fit import Refit, fit_path, make_penalty, refit, select_model
from ..schema import FitRecord, PathRecord
from ._problem import REFIT_COPIES, Problem

CRITERIA = ("ebic", "bic", "cv")


def check_refit_memory(n: int, u: int, memory_budget: int | str | None) -> None:
    """Refuse a refit whose values cannot fit the memory budget, naming the numbers.

    The refit is in memory (coordinate descent on the n x u values); a budget that cannot hold
    `REFIT_COPIES` copies of them beside the process itself is refused before the fit starts, with the
    remedies, rather than let the process run out of memory.

    Raises
    ------
    MemoryBudgetError
    """
    from ..engine import BASELINE_BYTES, MemoryBudgetError, parse_budget

    budget = parse_budget(memory_budget)
    need = REFIT_COPIES * 8 * int(n) * int(u)
    if budget is None or need + BASELINE_BYTES <= budget:
        return
    raise MemoryBudgetError(
        f"the refit of {u} features on {n} samples needs about {need / 2**30:.2f} GiB "
        f"({REFIT_COPIES} copies of the n x u float64 values) beside the process's own "
        f"{BASELINE_BYTES / 2**20:.0f} MiB, more than the memory budget of {budget / 2**30:.2f} GiB; "
        "give a larger --memory-budget or a smaller --shortlist"
    )


@dataclass(frozen=True)
class FitSettings:
    """How the refit is done.

    Attributes
    ----------
    penalty : str
        ``"scad"``, ``"mcp"``, ``"lasso"``, ``"enet"``, ``"adaptive_lasso"`` or ``"dantzig"``.
    criterion : {"ebic", "bic", "cv"}
    ebic_gamma : float, optional
    cv : int
        Folds for ``"cv"``.
    n_lambda : int
    seed : int
        Seed of the fold assignment.
    """

    penalty: str = "scad"
    criterion: str = "ebic"
    ebic_gamma: float | None = None
    cv: int = 5
    n_lambda: int = 100
    seed: int = 0

    def __post_init__(self) -> None:
        make_penalty(self.penalty)  # its own error names the known penalties
        check_choice("criterion", self.criterion, CRITERIA)
        check_number("ebic_gamma", self.ebic_gamma, 0.0, 1.0, optional=True)
        check_int("cv", self.cv, 2)
        check_int("n_lambda", self.n_lambda, 1)
        check_int("seed", self.seed, 0)


@dataclass(frozen=True)
class FittedModel:
    """One iteration's fitted model.

    Attributes
    ----------
    union : ndarray of int of shape (u,)
        Store indices of the features fitted (increasing).
    index : ndarray of int of shape (k,)
        Store indices of the selected features (non-zero coefficients), increasing.
    coef : ndarray of shape (k,)
        Their coefficients (original scale: per unit of the feature).
    intercept : float
        Intercept for the centred features (see `IterativeResult.intercept` for raw features).
    covariate_coef : ndarray of shape (q,)
    lambda_ : float or None
        The chosen penalty level (None for the empty model).
    criterion_value : float
        The tuning criterion at that level.
    seconds : float
    path : dict, optional
        The tuning path of the fit, for the report: ``lambdas``, ``coefs`` (L x u), ``features``,
        ``criterion``, ``criterion_values`` and the chosen ``lambda``.
    """

    union: np.ndarray
    index: np.ndarray
    coef: np.ndarray
    intercept: float
    covariate_coef: np.ndarray
    lambda_: float | None
    criterion_value: float
    seconds: float = 0.0
    path: dict | None = None

    def linear_predictor(self, values: np.ndarray, covariates: np.ndarray | None) -> np.ndarray:
        """Linear predictor of shape (n,) from the selected features' centred values (n, k)."""
        eta = self.intercept + values @ self.coef
        if covariates is not None and self.covariate_coef.size:
            eta = eta + covariates @ self.covariate_coef
        return eta

    def record(self) -> dict:
        """The manifest's record of the fit (`widescreen.schema.FitRecord`)."""
        return FitRecord(
            union=self.union,
            index=self.index,
            coef=self.coef,
            intercept=self.intercept,
            covariate_coef=self.covariate_coef,
            lambda_=self.lambda_,
            criterion_value=self.criterion_value,
            seconds=self.seconds,
            path=None if self.path is None else PathRecord.from_dict(self.path),
        ).to_dict()

    @classmethod
    def from_record(cls, r: dict) -> FittedModel:
        rec = FitRecord.from_dict(r)
        return cls(
            union=rec.union,
            index=rec.index,
            coef=rec.coef,
            intercept=rec.intercept,
            covariate_coef=rec.covariate_coef,
            lambda_=rec.lambda_,
            criterion_value=rec.criterion_value,
            seconds=rec.seconds,
            path=r.get("path"),
        )


def fit_response(problem: Problem) -> np.ndarray:
    """The response as the family's refit takes it (see `Family.refit_response`)."""
    return problem.family.refit_response(problem.response)


def fit_token(problem: Problem, union: np.ndarray, settings: FitSettings, n_candidates: int) -> str:
    """Deterministic name of a refit from its inputs (the data, the union, the settings)."""
    resp = problem.response
    return tokenize(
        problem.source.token(),
        problem.rows,
        resp.y,
        resp.event,
        problem.covariates,
        problem.family.loss,
        np.asarray(union, dtype=np.int64),
        settings,
        int(n_candidates),
    )


def fit_union(
    problem: Problem,
    union: np.ndarray,
    values: np.ndarray,
    settings: FitSettings,
    n_candidates: int,
) -> FittedModel:
    """Fit the penalised model on the union and choose the penalty level.

    Parameters
    ----------
    problem : Problem
    union : ndarray of int of shape (u,)
        Store indices, increasing.
    values : ndarray of shape (n, u)
        Their imputed, centred values on the analysed samples.
    settings : FitSettings
    n_candidates : int
        Features the model was chosen from (those screened), for the EBIC.
    """
    t0 = time.perf_counter()
    y = fit_response(problem)
    n = problem.n
    Z = problem.covariates
    empty = union.size == 0
    # An empty union still needs the intercept and covariates: one constant column never enters.
    X = np.zeros((n, 1)) if empty else values
    # The fit validates its own inputs; scikit-learn's per-call parameter checks in its inner solver
    # would otherwise cost about as much as the solves on a shortlist this small.
    from sklearn import config_context  # here: a resumed run that reuses its fits never needs it

    with config_context(skip_parameter_validation=True):
        path = fit_path(
            X,
            y,
            penalty="lasso" if empty else settings.penalty,
            loss=problem.family.loss,
            unpenalized=Z,
            n_lambda=1 if empty else settings.n_lambda,
        )
        best = select_model(
            path,
            settings.criterion if not empty or settings.criterion != "cv" else "bic",
            n_candidates=max(int(n_candidates), X.shape[1]),
            gamma=settings.ebic_gamma,
            cv=settings.cv,
            seed=settings.seed,
        )
    support = np.empty(0, dtype=np.int64) if empty else best.support
    return FittedModel(
        union=np.asarray(union, dtype=np.int64),
        index=np.asarray(union, dtype=np.int64)[support],
        coef=np.asarray(best.coef[support], dtype=np.float64),
        intercept=float(best.intercept),
        covariate_coef=np.asarray(best.unpenalized_coef, dtype=np.float64),
        # NaN: a support found by the stepwise search, off the path (JSON has no NaN).
        lambda_=None if empty or not np.isfinite(best.lambda_) else float(best.lambda_),
        criterion_value=float(best.criterion_value),
        seconds=time.perf_counter() - t0,
        path=None
        if empty
        else {
            "criterion": best.criterion,
            "lambda": float(best.lambda_) if np.isfinite(best.lambda_) else None,
            "lambdas": _plain(best.lambdas),
            "criterion_values": _plain(best.criterion_values),
            "coefs": [_plain(row) for row in best.coefs],
            "features": [str(f) for f in problem.feature_ids(union)],
        },
    )


def final_refit(problem: Problem, values: np.ndarray) -> Refit:
    """Unpenalised refit of the selected features ``values`` (n, k; imputed, as stored) with covariates.

    Its standard errors are the model-based ones of that fit; after selection they are not valid for
    inference (they ignore that the features were chosen from the same data).
    """
    y = fit_response(problem)
    with np.errstate(all="ignore"):
        return refit(values, y, problem.family.loss, problem.covariates)


#: Penalties whose refits tend to keep every candidate offered (lasso-type bias towards large models).
_LASSO_TYPE = ("lasso", "enet", "adaptive_lasso", "dantzig")


def budget_warning(settings: FitSettings, size: int, budget: int) -> str | None:
    """The warning for a final model that fills the size budget, or None."""
    if budget <= 0 or size < budget:
        return None
    msg = f"the {settings.penalty} refit tuned by {settings.criterion} selected {size} of {budget} features, filling the size budget"
    if settings.penalty in _LASSO_TYPE or settings.criterion in ("bic", "cv"):
        return (
            msg + ": lasso-type refits and BIC / CV tuning are biased towards large models; "
            "SCAD or MCP tuned by EBIC recommended"
        )
    return msg + ": the model may be larger than the budget allows; consider a larger --shortlist"


def _plain(a) -> list:
    """Floats for JSON (which has no inf or NaN: those become None)."""
    return [float(v) if np.isfinite(v) else None for v in np.asarray(a, dtype=np.float64)]


__all__ = [
    "FitSettings",
    "FittedModel",
    "budget_warning",
    "final_refit",
    "fit_response",
    "fit_token",
    "fit_union",
]
