"""A scikit-learn selector for sure independence screening over arrays, Dask arrays or stores."""

from __future__ import annotations

import os

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.feature_selection import SelectorMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from ..engine._pass import PassSpec, run_pass
from ..engine._source import ArraySource, BlockSource, as_source
from ..families import get_family
from ..workflow._problem import problem_from_arrays, shortlist_size


def _is_out_of_core(X) -> bool:
    from ..store._format import Dataset

    return isinstance(X, str | os.PathLike | Dataset | BlockSource) or (
        hasattr(X, "dask") and hasattr(X, "chunks")
    )


class ScreeningSelector(SelectorMixin, BaseEstimator):
    """Keep the features most associated with the response (sure independence screening).

    Parameters
    ----------
    family : str, default="linear"
        Outcome family (see `widescreen.families.FAMILIES`).
    shortlist : int or "auto", default="auto"
        Number of features kept; "auto" = floor(n / log n) (Fan & Lv 2008).
    scheduler : optional
        Where passes over out-of-core inputs run (see `widescreen.engine.execute`); threads by default.

    Attributes
    ----------
    scores_ : ndarray of shape (n_features,)
        Screening utility of every feature (larger is stronger).
    pvalues_ : ndarray of shape (n_features,)
        Marginal p-values, where the family has a test.
    statistics_ : dict of str -> ndarray of shape (n_features,)
        Every statistic the family's kernel computed.
    ranking_ : ndarray of shape (k,)
        Indices of the kept features, strongest first.
    missing_rate_ : ndarray of shape (n_features,)
    n_features_in_ : int

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
        self, family: str = "linear", shortlist: int | str = "auto", scheduler=None
    ) -> None:
        self.family = family
        self.shortlist = shortlist
        self.scheduler = scheduler

    def fit(self, X, y):
        """Screen every feature of X against y.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features), Dask array, or a store path / Dataset
            Missing values (NaN) are mean-imputed per feature.
        y : array-like of shape (n_samples,)
            Aligned with the rows of X (for a store: its sample order).

        Returns
        -------
        self
        """
        fam = get_family(self.family)
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
        if source.n_samples < 4:
            raise ValueError(
                f"need at least 4 samples to screen; got n_samples = {source.n_samples}"
            )
        k = shortlist_size(self.shortlist, source.n_samples, source.n_features)
        problem = problem_from_arrays(source, y, fam)
        state = fam.prepare(problem.response, None)
        spec = PassSpec(
            name="screen",
            kernel=fam.kernel,
            state=state,
            columns=fam.columns,
            keep=k,
            keep_values=False,
        )
        result = run_pass(source, spec, None, scheduler=self.scheduler)
        self.statistics_ = result.stats
        self.scores_ = result.stats["score"]
        self.pvalues_ = result.stats.get("p_value")
        self.missing_rate_ = result.stats["missing_rate"]
        self.ranking_ = result.topk.index
        self.k_ = k
        return self

    def _get_support_mask(self):
        check_is_fitted(self, "ranking_")
        mask = np.zeros(self.n_features_in_, dtype=bool)
        mask[self.ranking_] = True
        return mask

    def transform(self, X):
        """Reduce X to the kept features (for a store: their raw values, read once)."""
        if _is_out_of_core(X):
            check_is_fitted(self, "ranking_")
            return read_selected(X, self.n_features_in_, np.sort(self.ranking_))
        return super().transform(X)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.target_tags.required = True
        return tags


def read_selected(X, n_features_in: int, cols: np.ndarray) -> np.ndarray:
    """Raw values of the selected columns of an out-of-core X, after checking its width."""
    source = as_source(X)
    if source.n_features != n_features_in:
        raise ValueError(f"X has {source.n_features} features; fitted on {n_features_in}")
    return _read_columns(source, cols)


def _read_columns(source: BlockSource, cols: np.ndarray) -> np.ndarray:
    """Raw values (NaN for missing) of the given columns, each block read once."""
    from ..store._format import MISSING_INT8

    out = np.empty((source.n_samples, cols.size), dtype=np.float64)
    blocks = cols // source.block_width
    for b in np.unique(blocks):
        start, _ = source.bounds(int(b))
        sel = np.flatnonzero(blocks == b)
        raw = source.read(int(b))[:, cols[sel] - start]
        vals = raw.astype(np.float64)
        if raw.dtype == np.int8:
            vals[raw == MISSING_INT8] = np.nan
        out[:, sel] = vals
    return out
