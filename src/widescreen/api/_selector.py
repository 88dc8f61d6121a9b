"""A scikit-learn selector for sure independence screening over arrays, Dask arrays or stores."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.feature_selection import SelectorMixin
from sklearn.utils import ClassifierTags
from sklearn.utils.validation import check_is_fitted

from ._base import fill_missing, fit_inputs
from ._core import screen_once
from ._inputs import read_design


class ScreeningSelector(SelectorMixin, BaseEstimator):
    """Keep the features most associated with the response (sure independence screening).

    Works on numpy arrays, pandas DataFrames, Dask arrays and dataset stores (a path, a `Dataset`, or
    a `StoreView` of some of its samples, which scikit-learn's model selection can split by row).
    Missing values (NaN, or the store's missing code) are replaced by each feature's mean over the
    training samples, in ``fit`` and in ``transform`` alike.

    Parameters
    ----------
    family : str, default="linear"
        Outcome family (see `widescreen.families.FAMILIES`); decides what y must be (see ``fit``).
    shortlist : int or "auto", default="auto"
        Number of features kept; "auto" = floor(n / log n) (Fan & Lv 2008).
    covariates : array-like or pandas DataFrame, optional
        Adjusted for in the screen. Text or categorical columns of a DataFrame are dummy-coded (one
        0/1 column per level but the first). A DataFrame indexed by sample id is matched to X's samples by id
        (for a store or a `StoreView`, so each cross-validation fold finds its own rows); an array is
        matched by position. A ``covariates`` argument to ``fit`` replaces it.
    scheduler : optional
        Where passes over out-of-core inputs run (see `widescreen.engine.execute`); threads by default.

    Attributes
    ----------
    scores_ : ndarray of shape (n_features,)
        Screening utility of every feature (larger is stronger).
    pvalues_ : ndarray of shape (n_features,) or None
        Marginal p-values, where the family has a test.
    statistics_ : dict of str -> ndarray of shape (n_features,)
        Every statistic the family's kernel computed.
    ranking_ : ndarray of shape (k,)
        Indices of the kept features, strongest first.
    feature_ids_ : ndarray of str of shape (k,)
        Ids of the kept features in column order of ``transform`` (increasing index): the store's
        feature ids, a DataFrame's column names, or ``x<index>``.
    means_ : ndarray of shape (k,)
        Training means of the kept features (what ``transform`` puts in place of a missing value).
    missing_rate_ : ndarray of shape (n_features,)
    covariate_names_ : ndarray of str of shape (q,)
        The covariate design columns adjusted for: ``NAME``, or ``NAME:LEVEL`` for a dummy.
    covariate_levels_ : dict of str -> list of str
        Levels of each categorical covariate, sorted; the first is the reference.
    n_features_in_ : int

    Notes
    -----
    scikit-learn's ``check_estimator`` passes for every family except ``cox`` (its y is (time,
    event), which the generic checks cannot draw) and ``holp`` (X X' must be invertible, which
    needs more features than samples; the checks draw fewer); the test suite states this per family.

    Examples
    --------
    >>> import numpy as np
    >>> from widescreen.api import ScreeningSelector
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(100, 500)); y = 3 * X[:, 7] + rng.normal(size=100)
    >>> ScreeningSelector(shortlist=5).fit(X, y).ranking_[0]
    np.int64(7)
    """

    def __init__(
        self, family: str = "linear", shortlist: int | str = "auto", covariates=None, scheduler=None
    ) -> None:
        self.family = family
        self.shortlist = shortlist
        self.covariates = covariates
        self.scheduler = scheduler

    def fit(self, X, y, covariates=None):
        """Screen every feature of X against y.

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
        design, problem, _, levels = fit_inputs(self, X, y, covariates)
        result, k = screen_once(problem, self.shortlist, scheduler=self.scheduler)
        self.statistics_ = result.stats
        self.scores_ = result.stats["score"]
        self.pvalues_ = result.stats.get("p_value")
        self.missing_rate_ = result.stats["missing_rate"]
        self.ranking_ = result.topk.index
        self.k_ = k
        self.covariate_names_ = np.asarray(problem.covariate_names, dtype=object)
        self.covariate_levels_ = levels
        support = np.sort(self.ranking_)
        means = np.asarray(result.stats["mean"], dtype=np.float64)[support]
        self.means_ = np.where(np.isfinite(means), means, 0.0)  # a wholly missing column -> 0
        self.feature_ids_ = design.feature_ids(support, getattr(self, "feature_names_in_", None))
        return self

    def _get_support_mask(self):
        check_is_fitted(self, "ranking_")
        mask = np.zeros(self.n_features_in_, dtype=bool)
        mask[self.ranking_] = True
        return mask

    def transform(self, X):
        """The kept features of X, in increasing index order, missing values at the training means.

        Parameters
        ----------
        X : array-like, Dask array, store path, Dataset or StoreView with the features seen in fit

        Returns
        -------
        ndarray of shape (n_samples, k)
        """
        check_is_fitted(self, "ranking_")
        design = read_design(self, X, reset=False)
        return fill_missing(design.columns(np.sort(self.ranking_)), self.means_)

    def get_feature_names_out(self, input_features=None):
        """Ids of the kept features (the store's feature ids when fitted on a store)."""
        check_is_fitted(self, "ranking_")
        if input_features is None:
            return np.asarray(self.feature_ids_, dtype=object)
        return super().get_feature_names_out(input_features)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.target_tags.required = True
        if self.family == "logistic":
            # Binary targets only: lets scikit-learn's checks draw two classes (the selector stays
            # a transformer, not a classifier).
            tags.classifier_tags = ClassifierTags(multi_class=False)
        return tags


__all__ = ["ScreeningSelector"]
