"""What the estimators accept as X and as covariates, and how values are matched to X's samples.

X carries sample ids when it is a store (path, `Dataset`, `StoreView`) or a pandas DataFrame (its
index). A y or covariates given as a pandas object is then matched to X's samples **by id**; ids that do
not match are refused with the first of them named. Everything else is matched by position: plain
arrays on either side carry no ids.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
from sklearn.utils.validation import check_array, validate_data

from ..engine import ArraySource, BlockSource, StoreSource, as_source
from ..engine import read_columns as engine_read_columns
from ..store import Dataset, code_covariate_frame
from ._view import StoreView, _positions


@dataclass(frozen=True)
class Design:
    """X as the estimators see it.

    Attributes
    ----------
    source : BlockSource
        Where blocks of features are read (the whole store for a store view).
    rows : ndarray of int or None
        Store rows of X's samples, in X's order; None when they are all the source's rows in order.
    ids : ndarray of str or None
        Sample ids of X's rows; None when X carries none (numpy and Dask arrays).
    dataset : Dataset or None
        The store, when X is one (feature ids come from it).
    """

    source: BlockSource
    rows: np.ndarray | None
    ids: np.ndarray | None
    dataset: Dataset | None

    @property
    def n(self) -> int:
        return self.source.n_samples if self.rows is None else int(self.rows.size)

    @property
    def n_features(self) -> int:
        return self.source.n_features

    def columns(self, index: np.ndarray) -> np.ndarray:
        """Raw values (NaN for missing) of the given features at X's rows, shape (n, k)."""
        index = np.asarray(index, dtype=np.int64)
        if isinstance(self.source, ArraySource) and isinstance(self.source.array, np.ndarray):
            return self.source.array[:, index]  # validated float64 already
        out = read_columns(self.source, index)
        return out if self.rows is None else out[self.rows]

    def feature_ids(self, index: np.ndarray, names_in: np.ndarray | None = None) -> np.ndarray:
        """Ids of the given features: the store's, X's column names, or ``x<index>``."""
        index = np.asarray(index, dtype=np.int64)
        if self.dataset is not None:
            return np.asarray(self.dataset.feature_ids_at(index), dtype=object)
        if names_in is not None:
            return np.asarray(names_in, dtype=object)[index]
        return np.array([f"x{i}" for i in index.tolist()], dtype=object)


def is_out_of_core(X) -> bool:
    """A store (path, Dataset, view, block source) or a Dask array: read block by block."""
    return isinstance(X, str | os.PathLike | Dataset | BlockSource | StoreView) or (
        hasattr(X, "dask") and hasattr(X, "chunks")
    )


def _is_pandas(obj) -> bool:
    return hasattr(obj, "iloc") and hasattr(obj, "index")


def read_design(estimator, X, *, reset: bool) -> Design:
    """Validate X; at fit (``reset``) record its width, later check it.

    In-memory arrays and DataFrames go through scikit-learn's `validate_data` (which also records
    ``feature_names_in_``); stores and Dask arrays are checked by shape only and read block by block.
    """
    if is_out_of_core(X):
        if isinstance(X, StoreView):
            source: BlockSource = StoreSource(X.dataset)
            rows = X.rows
            if rows.size == source.n_samples and np.array_equal(rows, np.arange(rows.size)):
                rows = None
            design = Design(source, rows, X.sample_ids, X.dataset)
        else:
            source = as_source(X)
            ds = getattr(source, "dataset", None)
            design = Design(source, None, None if ds is None else ds.sample_ids(), ds)
        if reset:
            estimator.n_features_in_ = source.n_features
            if hasattr(estimator, "feature_names_in_"):
                del estimator.feature_names_in_
        elif source.n_features != estimator.n_features_in_:
            raise ValueError(
                f"X has {source.n_features} features, but {type(estimator).__name__} is "
                f"expecting {estimator.n_features_in_} features as input."
            )
        return design
    ids = np.asarray(X.index).astype(str) if _is_pandas(X) and hasattr(X, "columns") else None
    arr = validate_data(estimator, X, reset=reset, ensure_all_finite="allow-nan", dtype=np.float64)
    return Design(ArraySource(arr), None, ids, None)


def align(obj, design: Design, what: str, *, lookup: bool = False):
    """``obj`` reordered to X's samples: by id when both carry ids, by position otherwise.

    A pandas object must have exactly X's sample ids (in any order), or, with ``lookup`` (a table
    such as the covariates, consulted for whichever samples X holds), at least them. ``obj`` is
    returned as given when it is matched by position.
    """
    if not _is_pandas(obj) or design.ids is None:
        return obj
    index = np.asarray(obj.index).astype(str)
    uniq, counts = np.unique(index, return_counts=True)
    if (counts > 1).any():
        raise ValueError(f"{what}: sample id {str(uniq[counts > 1][0])!r} appears twice")
    extra = index[:0] if lookup else index[_positions(design.ids, index) < 0]
    if extra.size:
        raise ValueError(
            f"{what}: {extra.size} of its {index.size} sample ids are not samples of X "
            f"(first: {str(extra[0])!r}); select the samples first, e.g. StoreView(store).select(ids)"
        )
    pos = _positions(index, design.ids)
    if (pos < 0).any():
        lack = design.ids[pos < 0]
        raise ValueError(
            f"{what}: no value for {lack.size} of the {design.n} samples of X "
            f"(first: {str(lack[0])!r})"
        )
    return obj.iloc[pos]


def read_covariates(
    covariates, design: Design, levels: dict[str, list[str]] | None = None
) -> tuple[np.ndarray | None, tuple[str, ...], dict[str, list[str]]]:
    """Covariates as a float (n, q) design aligned with X's samples, their names and their coding.

    A pandas table (or Series) may hold text or categorical columns: each becomes one 0/1 column per
    level but the first (sorted order, the reference), as for the outcome table's covariates
    (`widescreen.store.code_covariate_frame`). ``levels`` is a fitted model's coding: new data get the
    same columns, a level outside it is refused. An array is taken as numbers, by position.

    A pandas table indexed by sample id may hold more samples than X (each fold of a cross-validation
    looks up its own); every sample of X must be in it.

    At fit, the workflow's problem refuses a constant covariate (it duplicates the intercept).

    Returns
    -------
    Z : ndarray of shape (n, q) or None
    names : tuple of str
        ``NAME`` for a numeric column, ``NAME:LEVEL`` for a dummy.
    levels : dict of str -> list of str
        Each categorical covariate's levels, the first the reference.
    """
    if covariates is None:
        return None, (), {}
    covariates = align(covariates, design, "covariates", lookup=True)
    if _is_pandas(covariates):
        frame = (
            covariates
            if hasattr(covariates, "columns")
            else covariates.to_frame(
                name=str(covariates.name if covariates.name is not None else "z0")
            )
        )
        coding = code_covariate_frame(frame, where="covariates", levels=levels)
        Z, names, found = coding.matrix, coding.names, coding.levels
    else:
        Z = check_array(
            covariates,
            ensure_2d=False,
            dtype=np.float64,
            input_name="covariates",
            ensure_min_samples=0,
        )
        Z = Z.reshape(Z.shape[0], -1)
        names, found = tuple(f"z{j}" for j in range(Z.shape[1])), {}
    if Z.shape[0] != design.n:
        raise ValueError(f"covariates have {Z.shape[0]} rows but X has {design.n} samples")
    return Z, names, found


def read_columns(source: BlockSource, cols: np.ndarray) -> np.ndarray:
    """Raw values (NaN for missing) of the given columns at every source row, each block read once."""
    return engine_read_columns(source, np.asarray(cols, dtype=np.int64), kind="float")


__all__ = ["Design", "align", "is_out_of_core", "read_columns", "read_covariates", "read_design"]
