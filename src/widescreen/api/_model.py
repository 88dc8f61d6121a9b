"""A scikit-learn estimator for the whole iterative workflow: screen, fit, condition, refit."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.feature_selection import SelectorMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from ..engine._source import ArraySource, as_source
from ..fit import make_loss
from ..workflow._iterate import IterateConfig, iterate
from ..workflow._problem import problem_from_arrays
from ._selector import _is_out_of_core, _read_columns, read_selected


class IterativeScreeningModel(SelectorMixin, RegressorMixin, BaseEstimator):
    """Iterative sure independence screening with a penalised refit (ISIS; Fan & Lv 2008, FSW 2009).

    Screens every feature, fits a penalised model on the shortlist, ranks the remaining features
    conditionally on the selected ones, refits on the union, and repeats until the selected set stops
    changing or reaches the size budget. Works on numpy arrays, Dask arrays and dataset stores (read
    block by block); missing values (NaN) are replaced by each feature's mean.

    Parameters
    ----------
    family : str, default="linear"
        Outcome family (see `widescreen.families.FAMILIES`).
    shortlist : int or "auto", default="auto"
        Size budget d of the selected set; "auto" = floor(n / log n).
    penalty : str, default="scad"
        "scad", "mcp", "lasso", "enet", "adaptive_lasso" or "dantzig".
    criterion : {"ebic", "bic", "cv"}, default="ebic"
    max_iter : int, default=5
        Conditional passes at most; 0 gives plain SIS followed by one fit.
    threshold : {"none", "permutation", "bonferroni", "bh"}, default="none"
        Data-driven cut of each pass's shortlist, within the budget.
    alpha : float, default=0.05
        Level of the threshold.
    n_permutations : int, default=100
        Permuted responses scored in each pass (``threshold="permutation"``).
    split : bool, default=False
        Screen two random halves and keep the features in both top lists.
    n_lambda : int, default=100
    ebic_gamma : float, optional
    cv : int, default=5
    random_state : int, default=0
        Seeds the halves, the permutations and the folds.
    scheduler : optional
        Where passes run (see `widescreen.engine.execute`); threads by default.

    Attributes
    ----------
    coef_ : ndarray of shape (n_features,)
        Coefficients per unit of each feature; zero outside the selected set.
    intercept_ : float
        For features as given, with missing values at their training mean.
    selected_ : ndarray of int of shape (k,)
        Indices of the selected features, increasing.
    covariate_coef_ : ndarray of shape (q,)
    mean_ : ndarray of shape (k,)
        Training means of the selected features (used for missing values in `predict`).
    entered_ : ndarray of int of shape (k,)
        Iteration in which each selected feature entered (0 = the first screen).
    iterations_ : list of dict
        One record per iteration.
    stop_reason_ : str
    budget_ : int
    n_iter_ : int
        Number of fits done.
    n_features_in_ : int

    Examples
    --------
    >>> import numpy as np
    >>> from widescreen.api import IterativeScreeningModel
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(120, 400)); y = 2 * X[:, 5] - 2 * X[:, 9] + rng.normal(size=120)
    >>> IterativeScreeningModel(n_lambda=30).fit(X, y).selected_
    array([5, 9])
    """

    def __init__(
        self,
        family="linear",
        shortlist="auto",
        penalty="scad",
        criterion="ebic",
        max_iter=5,
        threshold="none",
        alpha=0.05,
        n_permutations=100,
        split=False,
        n_lambda=100,
        ebic_gamma=None,
        cv=5,
        random_state=0,
        scheduler=None,
    ):
        self.family = family
        self.shortlist = shortlist
        self.penalty = penalty
        self.criterion = criterion
        self.max_iter = max_iter
        self.threshold = threshold
        self.alpha = alpha
        self.n_permutations = n_permutations
        self.split = split
        self.n_lambda = n_lambda
        self.ebic_gamma = ebic_gamma
        self.cv = cv
        self.random_state = random_state
        self.scheduler = scheduler

    def _config(self) -> IterateConfig:
        return IterateConfig(
            family=self.family,
            shortlist=self.shortlist,
            penalty=self.penalty,
            criterion=self.criterion,
            ebic_gamma=self.ebic_gamma,
            cv=self.cv,
            n_lambda=self.n_lambda,
            max_iter=self.max_iter,
            threshold=self.threshold,
            alpha=self.alpha,
            n_permutations=self.n_permutations,
            split=bool(self.split),
            seed=self.random_state,
        )

    def fit(self, X, y, covariates=None):
        """Run the iterative workflow.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features), Dask array, or a store path / Dataset
        y : array-like of shape (n_samples,)
            Aligned with the rows of X (for a store: its sample order).
        covariates : array-like of shape (n_samples, q), optional
            Adjusted for in every pass and unpenalised in every fit.

        Returns
        -------
        self
        """
        config = self._config()
        if _is_out_of_core(X):
            source = as_source(X)
            y = np.asarray(y, dtype=np.float64).ravel()
            if y.shape[0] != source.n_samples:
                raise ValueError(f"y has {y.shape[0]} values but X has {source.n_samples} samples")
            self.n_features_in_ = source.n_features
        else:
            X, y = validate_data(
                self, X, y, ensure_all_finite="allow-nan", dtype=np.float64, y_numeric=True
            )
            source = ArraySource(X)
        n = source.n_samples
        if n < 4:
            raise ValueError(f"need at least 4 samples to screen; got n_samples = {n}")
        if config.split and n < 8:
            raise ValueError(f"sample splitting needs at least 8 samples; got n_samples = {n}")
        Z = None
        if covariates is not None:
            Z = np.asarray(covariates, dtype=np.float64).reshape(n, -1)
        problem = problem_from_arrays(source, y, config.family, Z)
        result = iterate(problem, config, scheduler=self.scheduler)
        coef = np.zeros(source.n_features)
        coef[result.index] = result.coef
        self.coef_ = coef
        self.intercept_ = result.intercept
        self.selected_ = result.index
        self.covariate_coef_ = result.covariate_coef
        self.mean_ = result.mean
        self.entered_ = result.entered
        self.iterations_ = result.iterations
        self.stop_reason_ = result.stop_reason
        self.budget_ = result.budget
        self.n_iter_ = len(result.iterations)
        self.loss_ = result.problem.family.loss
        return self

    def _selected_columns(self, X) -> np.ndarray:
        """The selected features' values of X, shape (m, k), missing values at the training mean."""
        if _is_out_of_core(X):
            source = as_source(X)
            if source.n_features != self.n_features_in_:
                raise ValueError(
                    f"X has {source.n_features} features; fitted on {self.n_features_in_}"
                )
            cols = _read_columns(source, self.selected_)
        else:
            X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
            cols = X[:, self.selected_]
        return np.where(np.isnan(cols), self.mean_, cols)

    def linear_predictor(self, X, covariates=None) -> np.ndarray:
        """Linear predictor of shape (n_samples,) (a regressor has no ``decision_function``)."""
        check_is_fitted(self, "coef_")
        eta = self.intercept_ + self._selected_columns(X) @ self.coef_[self.selected_]
        if self.covariate_coef_.size:
            if covariates is None:
                raise ValueError(
                    f"the model adjusts for {self.covariate_coef_.size} covariates; pass them"
                )
            Z = np.asarray(covariates, dtype=np.float64).reshape(eta.shape[0], -1)
            eta = eta + Z @ self.covariate_coef_
        return eta

    def predict(self, X, covariates=None) -> np.ndarray:
        """Mean response of shape (n_samples,) (probability, expected count; Cox: relative risk)."""
        check_is_fitted(self, "coef_")
        return make_loss(self.loss_).mean(self.linear_predictor(X, covariates))

    def _get_support_mask(self):
        check_is_fitted(self, "coef_")
        mask = np.zeros(self.n_features_in_, dtype=bool)
        mask[self.selected_] = True
        return mask

    def transform(self, X):
        """Reduce X to the selected features (for a store: their raw values, read once)."""
        if _is_out_of_core(X):
            check_is_fitted(self, "coef_")
            return read_selected(X, self.n_features_in_, self.selected_)
        return super().transform(X)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.target_tags.required = True
        return tags


__all__ = ["IterativeScreeningModel"]
