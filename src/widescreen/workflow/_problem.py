"""Loading a screening problem: the store, the outcome join, the family's response and the covariates."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from ..engine._source import BlockSource, as_source
from ..families import Family, Response, get_family
from ..store._outcome import JoinedOutcome, OutcomeError, join_outcome, read_outcome_table


def shortlist_size(shortlist: int | str, n: int, n_features: int | None = None) -> int:
    """Shortlist size: an int, or ``"auto"`` = floor(n / log n) (Fan & Lv 2008), capped at the features."""
    if isinstance(shortlist, str):
        if shortlist != "auto":
            try:
                shortlist = int(shortlist)
            except ValueError:
                raise ValueError(
                    f"The 'shortlist' must be a positive integer or 'auto'; got {shortlist!r}."
                ) from None
        else:
            shortlist = max(1, math.floor(n / math.log(n))) if n > 2 else 1
    if isinstance(shortlist, bool) or not isinstance(shortlist, int | np.integer) or shortlist < 1:
        raise ValueError(
            f"The 'shortlist' must be a positive integer or 'auto'; got {shortlist!r}."
        )
    return int(min(shortlist, n_features)) if n_features else int(shortlist)


@dataclass(frozen=True)
class Problem:
    """Inputs of every pass of a run, aligned on the analysed samples.

    Attributes
    ----------
    source : BlockSource
    joined : JoinedOutcome
    family : Family
    response : Response
    covariates : ndarray of shape (n, q) or None
    covariate_names : tuple of str
    rows : ndarray of int or None
        Store rows of the analysed samples; None when they are all the store's rows in order.
    """

    source: BlockSource
    joined: JoinedOutcome
    family: Family
    response: Response
    covariates: np.ndarray | None
    covariate_names: tuple[str, ...]
    rows: np.ndarray | None

    @property
    def n(self) -> int:
        return self.joined.n

    def feature_ids(self, index: np.ndarray) -> np.ndarray:
        ds = getattr(self.source, "dataset", None)
        index = np.asarray(index, dtype=np.int64)
        if ds is None:
            return np.array([f"x{i}" for i in index], dtype=str)
        return ds.feature_ids_at(index)


def load_problem(
    store: str | os.PathLike | BlockSource,
    outcome: str | os.PathLike,
    *,
    response: str,
    family: str = "linear",
    covariates: tuple[str, ...] = (),
    event: str | None = None,
) -> Problem:
    """Open the store, read and join the outcome table, validate the response and covariates."""
    source = as_source(store)
    fam = get_family(family)
    table = read_outcome_table(outcome)
    needed = fam.response_columns(response, event) + list(covariates)
    dataset = getattr(source, "dataset", None)
    if dataset is None:
        raise ValueError("an outcome table can only be joined to a dataset store")
    joined = join_outcome(dataset.sample_ids(), table, needed)
    resp = fam.response(joined, response, event)
    Z = None
    if covariates:
        cols = []
        for c in covariates:
            v = joined.numeric(c)
            if np.nanstd(v) == 0:
                raise OutcomeError(
                    f"{table.path}: covariate {c!r} is constant over the analysed samples"
                )
            cols.append(v)
        Z = np.column_stack(cols)
    rows = joined.rows
    if rows.size == source.n_samples and np.array_equal(rows, np.arange(rows.size)):
        rows = None
    min_n = len(covariates) + 4
    if joined.n < min_n:
        raise OutcomeError(
            f"{table.path}: only {joined.n} analysable samples; need at least {min_n}"
        )
    return Problem(source, joined, fam, resp, Z, tuple(covariates), rows)


def problem_from_arrays(X, y, family: str | Family = "linear", covariates=None) -> Problem:
    """A problem over an in-memory array (the scikit-learn estimators' route); y aligned with X's rows."""
    from ..store._outcome import OutcomeTable

    source = as_source(X)
    fam = get_family(family) if isinstance(family, str) else family
    y = np.asarray(y)
    n = source.n_samples
    ids = np.array([str(i) for i in range(n)])
    table = OutcomeTable(path="<array>", ids=ids, columns={"y": np.asarray(y, dtype=str)})  # type: ignore[arg-type]
    joined = JoinedOutcome(
        table, np.arange(n), ids, {"y": table.columns["y"]}, np.arange(n) + 1, n, n, 0
    )
    resp = Response(y=np.asarray(y, dtype=np.float64))
    Z = None if covariates is None else np.asarray(covariates, dtype=np.float64).reshape(n, -1)
    return Problem(source, joined, fam, resp, Z, (), None)
