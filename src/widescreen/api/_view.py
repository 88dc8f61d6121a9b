"""A dataset store seen as rows of samples, so scikit-learn's model selection can split it.

scikit-learn splits X with ``X[indices]`` (`sklearn.utils._safe_indexing`) after asking its length from
``X.shape``. A store path has neither, so `StoreView` supplies both: indexing selects store rows and
returns another view; no feature value is read until an estimator screens the view.
"""

from __future__ import annotations

import os
from numbers import Integral

import numpy as np

from ..store import Dataset, open_dataset


class StoreView:
    """Some samples (rows) of a dataset store, indexable by row like an array.

    Parameters
    ----------
    store : str, path-like or Dataset
    rows : array-like of int, optional
        Store rows in the order wanted (repeats allowed, for a bootstrap); all rows by default.

    Attributes
    ----------
    dataset : Dataset
    rows : ndarray of int64 of shape (n_rows,)
    shape : tuple of (n_rows, n_features)

    Examples
    --------
    ``cross_val_score(make_pipeline(ScreeningSelector(shortlist=50), Ridge()), StoreView("x.zarr"), y)``
    with ``y`` a pandas Series indexed by sample id: each fold's rows and ``y`` values travel
    together and the estimators check that their sample ids agree.
    """

    def __init__(self, store: str | os.PathLike | Dataset, rows=None) -> None:
        self.dataset = store if isinstance(store, Dataset) else open_dataset(store)
        n = self.dataset.n_samples
        if rows is None:
            rows = np.arange(n, dtype=np.int64)
        rows = np.asarray(rows)
        if rows.ndim != 1 or (rows.size and rows.dtype.kind not in "iu"):
            raise ValueError(
                f"{self.dataset.path}: rows must be a 1-d array of integers; got {rows.dtype} "
                f"of shape {rows.shape}"
            )
        rows = rows.astype(np.int64)
        if rows.size and (rows.min() < 0 or rows.max() >= n):
            bad = int(rows[(rows < 0) | (rows >= n)][0])
            raise IndexError(f"{self.dataset.path}: row {bad} is outside 0..{n - 1}")
        self.rows = rows
        self._ids: np.ndarray | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return int(self.rows.size), int(self.dataset.n_features)

    def __len__(self) -> int:
        return int(self.rows.size)

    @property
    def sample_ids(self) -> np.ndarray:
        """Sample ids of the view's rows, in its order."""
        if self._ids is None:
            self._ids = self.dataset.sample_ids()
        return self._ids[self.rows]

    @property
    def feature_ids(self) -> np.ndarray:
        """Ids of every feature of the store (reads the whole id column; see `feature_ids_at`)."""
        return self.dataset.feature_ids()

    def feature_ids_at(self, index) -> np.ndarray:
        """Ids of the given features (e.g. a selector's ``ranking_``), reading only their entries.

        Parameters
        ----------
        index : array-like of int
            Feature positions, in any order.

        Returns
        -------
        ndarray of str of shape (len(index),)
        """
        return self.dataset.feature_ids_at(index)

    def __getitem__(self, key) -> StoreView:
        # scikit-learn indexes rows as X[key, ...] (sklearn.utils._indexing._array_indexing).
        if isinstance(key, tuple):
            if len(key) == 2 and (key[1] is Ellipsis or key[1] == slice(None)):
                key = key[0]
            elif len(key) == 1:
                key = key[0]
            else:
                raise IndexError(
                    "a StoreView selects rows (samples) only; screen the features with an estimator"
                )
        if isinstance(key, Integral):
            key = [int(key)]
        if isinstance(key, list | tuple) and len(key) == 0:
            return StoreView(self.dataset, self.rows[:0])
        key = key if isinstance(key, slice) else np.asarray(key)
        if isinstance(key, np.ndarray) and key.dtype == bool and key.shape != self.rows.shape:
            raise IndexError(
                f"boolean row mask of length {key.size} for a view of {self.rows.size} rows"
            )
        view = StoreView(self.dataset, self.rows[key])
        view._ids = self._ids
        return view

    def select(self, ids) -> StoreView:
        """The rows of the given sample ids, in their order; an error names the first unknown id."""
        want = np.asarray(ids).astype(str)
        have = self.sample_ids
        pos = _positions(have, want)
        if (pos < 0).any():
            bad = want[pos < 0]
            raise KeyError(
                f"{self.dataset.path}: {bad.size} sample ids are not in the view "
                f"(first: {str(bad[0])!r})"
            )
        return self[pos]

    def __repr__(self) -> str:
        return f"StoreView({str(self.dataset.path)!r}, {self.rows.size} of {self.dataset.n_samples} rows)"


def _positions(have: np.ndarray, want: np.ndarray) -> np.ndarray:
    """Position in ``have`` (unique) of each id of ``want``; -1 where absent."""
    out = np.full(want.size, -1, dtype=np.int64)
    if have.size == 0 or want.size == 0:
        return out
    order = np.argsort(have, kind="stable")
    pos = np.minimum(np.searchsorted(have[order], want), have.size - 1)
    hit = have[order][pos] == want
    out[hit] = order[pos[hit]]
    return out


__all__ = ["StoreView"]
