"""A scikit-learn style estimator around `fit_path` and `select_model`."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted, validate_data

from ._path import fit_path
from ._results import SolverOptions
from ._select import select_model


class PenalizedRegression(BaseEstimator):
    """Penalised regression tuned along its lambda path.

    Parameters
    ----------
    penalty : {"lasso", "enet", "adaptive_lasso", "scad", "mcp", "dantzig"} or Penalty
    loss : {"gaussian", "binomial", "poisson", "cox"} or Loss
    criterion : {"ebic", "bic", "cv"}
    n_candidates : int, optional
        Number of candidate features for the EBIC; default the number of columns of ``X`` (right when
        no screening preceded the fit).
    ebic_gamma : float, optional
        Default `default_ebic_gamma`.
    n_lambda : int
    lambda_min_ratio : float, optional
    cv : int
        Folds for ``criterion="cv"``.
    random_state : int
        Seed of the fold assignment.
    penalty_params : dict, optional
        Parameters of a penalty given by name (e.g. ``{"l1_ratio": 0.3}``).
    options : SolverOptions, optional

    Attributes
    ----------
    coef_ : ndarray of shape (d,)
    intercept_ : float
    unpenalized_coef_ : ndarray of shape (q,)
    support_ : ndarray of int of shape (k,)
    lambda_ : float
    result_ : FitResult
    path_ : PathResult
    n_features_in_ : int
    """

    def __init__(
        self,
        penalty="scad",
        loss="gaussian",
        criterion="ebic",
        n_candidates=None,
        ebic_gamma=None,
        n_lambda=100,
        lambda_min_ratio=None,
        cv=5,
        random_state=0,
        penalty_params=None,
        options=None,
    ):
        self.penalty = penalty
        self.loss = loss
        self.criterion = criterion
        self.n_candidates = n_candidates
        self.ebic_gamma = ebic_gamma
        self.n_lambda = n_lambda
        self.lambda_min_ratio = lambda_min_ratio
        self.cv = cv
        self.random_state = random_state
        self.penalty_params = penalty_params
        self.options = options

    def fit(self, X, y, unpenalized=None, offset=None):
        """Fit the path and choose lambda.

        Parameters
        ----------
        X : array_like of shape (n, d)
        y : array_like of shape (n,) or (n, 2) for the Cox loss
        unpenalized : array_like of shape (n, q), optional
        offset : array_like of shape (n,), optional

        Returns
        -------
        self
        """
        if self.options is not None and not isinstance(self.options, SolverOptions):
            raise ValueError(
                f"The 'options' must be a SolverOptions; got {type(self.options).__name__}."
            )
        # scikit-learn's own checks (dense, finite, 2-D; records n_features_in_), then ours in fit_path.
        cox = getattr(self.loss, "name", self.loss) == "cox"
        X, y = validate_data(self, X, y, dtype=np.float64, y_numeric=True, multi_output=cox)
        path = fit_path(
            X,
            y,
            penalty=self.penalty,
            loss=self.loss,
            unpenalized=unpenalized,
            offset=offset,
            n_lambda=self.n_lambda,
            lambda_min_ratio=self.lambda_min_ratio,
            options=self.options,
            **(self.penalty_params or {}),
        )
        p = path.n_features if self.n_candidates is None else self.n_candidates
        result = select_model(
            path,
            self.criterion,
            n_candidates=p,
            gamma=self.ebic_gamma,
            cv=self.cv,
            seed=self.random_state,
        )
        self.path_ = path
        self.result_ = result
        self.coef_ = result.coef
        self.intercept_ = result.intercept
        self.unpenalized_coef_ = result.unpenalized_coef
        self.support_ = result.support
        self.lambda_ = result.lambda_
        return self

    def decision_function(self, X, unpenalized=None, offset=None) -> np.ndarray:
        """Linear predictor of shape (m,)."""
        check_is_fitted(self, "result_")
        X = validate_data(self, X, dtype=np.float64, reset=False)
        return self.result_.linear_predictor(X, unpenalized, offset)

    def predict(self, X, unpenalized=None, offset=None) -> np.ndarray:
        """Mean response of shape (m,) (probability, expected count; Cox: relative risk)."""
        check_is_fitted(self, "result_")
        return self.result_.path.loss.mean(self.decision_function(X, unpenalized, offset))
