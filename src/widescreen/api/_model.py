"""A scikit-learn estimator for the whole iterative workflow: screen, fit, condition, refit."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.feature_selection import SelectorMixin
from sklearn.metrics import accuracy_score, r2_score
from sklearn.utils import ClassifierTags
from sklearn.utils._available_if import available_if
from sklearn.utils.validation import check_is_fitted

from ..fit import make_loss
from ..workflow import IterateConfig
from ._base import fill_missing, fit_inputs, predict_covariates
from ._core import iterate_once
from ._inputs import Design, align, read_design
from ._target import concordance_index, survival_target


def _is_binary(est) -> bool:
    return est.family == "logistic"


class IterativeScreeningModel(SelectorMixin, RegressorMixin, BaseEstimator):
    """Iterative sure independence screening with a penalised refit (ISIS; Fan & Lv 2008, FSW 2009).

    Screens every feature, fits a penalised model on the shortlist, ranks the remaining features
    conditionally on the selected ones, refits on the union, and repeats until the selected set stops
    changing or reaches the size budget. Works on numpy arrays, pandas DataFrames, Dask arrays and
    dataset stores (a path, a `Dataset`, or a `StoreView` of some of its samples, which
    scikit-learn's model selection can split by row); missing values are replaced by each feature's
    training mean, in ``fit``, ``predict`` and ``transform`` alike.

    With ``family="logistic"`` the estimator is a binary classifier: ``predict`` gives labels,
    ``predict_proba`` the two class probabilities, ``score`` the accuracy. With ``family="cox"``,
    ``predict`` gives the relative risk exp(eta) and ``score`` Harrell's concordance index. Otherwise
    it is a regressor (``predict`` the mean response, ``score`` R^2).

    Parameters
    ----------
    family : str, default="linear"
        Outcome family (see `widescreen.families.FAMILIES`); decides what y must be (see ``fit``).
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
    covariates : array-like or pandas DataFrame, optional
        Adjusted for in every pass and unpenalised in every fit. Text or categorical columns of a
        DataFrame are dummy-coded (one 0/1 column per level but the first, the reference; the levels
        are kept in ``covariate_levels_`` and new data are coded with them). A DataFrame indexed by sample id is
        matched to X's samples by id in ``fit``, ``predict`` and ``score`` (so each cross-validation
        fold of a `StoreView` finds its own rows); an array by position. A ``covariates`` argument
        to a method replaces it for that call.
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
    feature_ids_ : ndarray of str of shape (k,)
        Ids of the selected features: the store's, a DataFrame's column names, or ``x<index>``.
    covariate_coef_ : ndarray of shape (q,)
        Coefficients of the covariate design columns, in the order of ``covariate_names_``.
    covariate_names_ : ndarray of str of shape (q,)
        ``NAME`` for a numeric covariate, ``NAME:LEVEL`` for a dummy of a categorical one.
    covariate_levels_ : dict of str -> list of str
        Levels of each categorical covariate, sorted; the first is the reference.
    mean_ : ndarray of shape (k,)
        Training means of the selected features (used for missing values).
    classes_ : ndarray of shape (2,)
        ``logistic`` only: the two labels, sorted; the second is the "1" of the model.
    entered_ : ndarray of int of shape (k,)
        Iteration in which each selected feature entered (0 = the first screen).
    iterations_ : list of dict
        One record per iteration.
    stop_reason_ : str
    budget_ : int
    n_iter_ : int
        Number of fits done.
    n_features_in_ : int

    Notes
    -----
    scikit-learn's ``check_estimator`` passes for every family except ``cox`` (its y is (time,
    event), which the generic checks cannot draw), ``poisson`` (y must be integer counts; the checks
    draw real-valued targets) and ``holp`` (X X' must be invertible, which needs more features than
    samples; the checks draw fewer); the test suite states this per family.

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
        covariates=None,
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
        self.covariates = covariates
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
        X : array-like of shape (n_samples, n_features), Dask array, store path, Dataset or StoreView
        y : array-like or pandas object
            One value per sample of X: a pandas Series (or DataFrame) indexed by sample id is matched
            to X's samples by id when X carries ids (a store, a `StoreView`, a DataFrame); a plain
            array by position. ``logistic``: two labels, numbers or text; ``poisson``: non-negative
            integer counts; ``cox``: a structured array (boolean event field, float time field) or
            two columns (time, event).
        covariates : array-like or pandas DataFrame, optional
            As the ``covariates`` parameter, for this fit.

        Returns
        -------
        self
        """
        config = self._config()
        design, problem, classes, levels = fit_inputs(self, X, y, covariates)
        if config.split and problem.n < 8:
            raise ValueError(
                f"sample splitting needs at least 8 samples; got n_samples = {problem.n}"
            )
        result = iterate_once(problem, config, scheduler=self.scheduler)
        coef = np.zeros(design.n_features)
        coef[result.index] = result.coef
        self.coef_ = coef
        self.intercept_ = result.intercept
        self.selected_ = result.index
        self.feature_ids_ = design.feature_ids(
            result.index, getattr(self, "feature_names_in_", None)
        )
        self.covariate_coef_ = result.covariate_coef
        self.covariate_names_ = np.asarray(problem.covariate_names, dtype=object)
        self.covariate_levels_ = levels
        self.mean_ = result.mean
        self.entered_ = result.entered
        self.iterations_ = result.iterations
        self.stop_reason_ = result.stop_reason
        self.budget_ = result.budget
        self.n_iter_ = len(result.iterations)
        self.loss_ = result.problem.family.loss
        if classes is not None:
            self.classes_ = classes
        return self

    def _linear_predictor(self, design: Design, covariates) -> np.ndarray:
        cols = fill_missing(design.columns(self.selected_), self.mean_)
        eta = self.intercept_ + cols @ self.coef_[self.selected_]
        Z = predict_covariates(self, design, covariates, self.covariate_coef_.size)
        return eta if Z is None else eta + Z @ self.covariate_coef_

    def linear_predictor(self, X, covariates=None) -> np.ndarray:
        """Linear predictor eta of shape (n_samples,) (log relative risk for ``cox``)."""
        check_is_fitted(self, "coef_")
        return self._linear_predictor(read_design(self, X, reset=False), covariates)

    @available_if(_is_binary)
    def decision_function(self, X, covariates=None) -> np.ndarray:
        """``logistic``: log odds of the second class, shape (n_samples,)."""
        return self.linear_predictor(X, covariates)

    @available_if(_is_binary)
    def predict_proba(self, X, covariates=None) -> np.ndarray:
        """``logistic``: probabilities of ``classes_``, shape (n_samples, 2)."""
        check_is_fitted(self, "coef_")
        p = make_loss(self.loss_).mean(self.linear_predictor(X, covariates))
        return np.column_stack([1.0 - p, p])

    def predict(self, X, covariates=None) -> np.ndarray:
        """``logistic``: labels; ``cox``: relative risk exp(eta); otherwise the mean response."""
        check_is_fitted(self, "coef_")
        eta = self.linear_predictor(X, covariates)
        if _is_binary(self):
            return self.classes_[(eta > 0).astype(np.intp)]
        return make_loss(self.loss_).mean(eta)

    def score(self, X, y, sample_weight=None, covariates=None) -> float:
        """Accuracy (``logistic``), Harrell's concordance index (``cox``) or R^2 (otherwise).

        ``y`` is matched to X's samples as in ``fit`` (by id for pandas objects when X carries ids).
        """
        check_is_fitted(self, "coef_")
        design = read_design(self, X, reset=False)
        y = align(y, design, "y")
        eta = self._linear_predictor(design, covariates)
        if _is_binary(self):
            labels = np.asarray(y).ravel()
            return float(
                accuracy_score(
                    labels, self.classes_[(eta > 0).astype(np.intp)], sample_weight=sample_weight
                )
            )
        if self.loss_ == "cox":
            if sample_weight is not None:
                raise ValueError("the concordance index takes no sample weights")
            time, event = survival_target(y)
            return concordance_index(time, event, eta)
        y = np.asarray(y, dtype=np.float64).ravel()
        return float(r2_score(y, make_loss(self.loss_).mean(eta), sample_weight=sample_weight))

    def _get_support_mask(self):
        check_is_fitted(self, "coef_")
        mask = np.zeros(self.n_features_in_, dtype=bool)
        mask[self.selected_] = True
        return mask

    def transform(self, X):
        """The selected features of X (increasing index), missing values at the training means."""
        check_is_fitted(self, "coef_")
        design = read_design(self, X, reset=False)
        return fill_missing(design.columns(self.selected_), self.mean_)

    def get_feature_names_out(self, input_features=None):
        """Ids of the selected features (the store's feature ids when fitted on a store)."""
        check_is_fitted(self, "coef_")
        if input_features is None:
            return np.asarray(self.feature_ids_, dtype=object)
        return super().get_feature_names_out(input_features)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.target_tags.required = True
        if _is_binary(self):
            tags.estimator_type = "classifier"
            tags.classifier_tags = ClassifierTags(multi_class=False)
            tags.regressor_tags = None
        return tags


__all__ = ["IterativeScreeningModel"]
