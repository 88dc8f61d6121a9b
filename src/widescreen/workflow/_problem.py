"""The problem every workflow runs on, built from arrays; the file route is an adapter that builds it.

`Problem.from_arrays` is the core: X as a numpy array, a Dask array or a store (path, `Dataset` or
block source), y (and the event indicator for survival), covariates and, optionally, sample ids. With a
store and sample ids, y is matched to the store's samples by id (in any order, a subset allowed); with
a store and no ids, by position. `load_problem` reads an outcome table, joins it to the store by sample
id and builds the same `Problem`, so screen, run and the estimators share everything after that.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._config import ConfigError, check_choice, check_int, check_names, check_text
from ..engine import BlockSource, as_source
from ..families import FAMILY_NAMES, Family, Response, get_family
from ..store import (
    JoinedOutcome,
    OutcomeError,
    code_covariate_frame,
    code_covariates,
    join_outcome,
    read_outcome_table,
)


def check_problem_fields(config) -> None:
    """Validate the fields every workflow configuration shares (called from their ``__post_init__``).

    ``response``, ``family``, ``covariates``, ``event``, ``drop_missing``, ``drop_rare``, ``sub_block``;
    ``covariates`` given as a list becomes a tuple.
    """
    check_text("response", config.response)
    trait_names(config.response)
    check_choice("family", config.family, FAMILY_NAMES)
    object.__setattr__(config, "covariates", check_names("covariates", config.covariates))
    check_text("event", config.event, optional=True)
    check_int("sub_block", config.sub_block, 1)
    _ = config.filters  # validates drop_missing and drop_rare (`FeatureFilter`)


def trait_names(response: str) -> tuple[str, ...]:
    """The response column(s) named by ``response``: one name, or several separated by commas (many
    traits in one run, `widescreen.workflow.screen_traits`); each stripped of spaces, distinct, and
    usable as a folder name (each trait gets ``traits/NAME/``)."""
    from ..schema import check_trait_name

    names = tuple(v.strip() for v in str(response).split(","))
    if len(names) > 1:
        if not all(names) or len(set(names)) < len(names):
            raise ConfigError(
                "response", "one column, or distinct columns separated by commas", response
            )
        for v in names:
            try:
                check_trait_name(v)
            except ValueError as exc:
                raise ConfigError("response", str(exc), response) from None
    return names


#: ``--response`` value naming every numeric column of the outcome table but the covariates and event.
ALL_NUMERIC = "*"


def expand_response(
    response: str, outcome, covariates: tuple[str, ...] = (), event: str | None = None
) -> str:
    """``response`` as the run records it: ``"*"`` becomes every numeric column of the outcome table
    (file order) that is not a covariate or the event, joined by commas; anything else is returned as
    given. The manifest then holds the explicit list, so a changed table is refused on resume."""
    if response.strip() != ALL_NUMERIC:
        return response
    from ..store import numeric_columns, read_outcome_table

    table = read_outcome_table(outcome)
    names = numeric_columns(table, exclude={*covariates, *([event] if event else [])})
    if not names:
        raise OutcomeError(
            f"{table.path}: --response '*': no numeric column besides the covariates"
        )
    return ",".join(names)


#: Largest shortlist ``"auto"`` gives, whatever n: floor(n / log n) reaches it at n of about 20,000,
#: where a penalised path over 2000 columns already takes minutes per iteration on a few cores.
MAX_AUTO_SHORTLIST = 2000
#: Copies of the shortlist's n x d float64 values the refit holds at its peak: the values and about
#: 6.3 working copies of the path and its tuning (measured with tracemalloc on SCAD paths, Gaussian
#: and binomial, EBIC and 5-fold CV, n = 3000, d = 300), rounded up. (At large n x d the passes keep
#: no values: the candidates' columns are read after the pass, one copy.)
REFIT_COPIES = 8


def shortlist_cap(n: int, memory_budget: int | str | None = None) -> tuple[int, str]:
    """The largest automatic shortlist at n samples and why: the fixed maximum, or the budget.

    With a memory budget B, the refit's copies of the shortlist's values (8 n d bytes each,
    `REFIT_COPIES` = 8 of them) may take half of it: d <= B / (2 x 8 n x 8). Without a budget only the
    fixed maximum applies (the cap must not depend on the machine, so a run resumes to the same size
    anywhere).
    """
    from ..engine import parse_budget

    cap, why = MAX_AUTO_SHORTLIST, f"the fixed maximum of {MAX_AUTO_SHORTLIST}"
    budget = parse_budget(memory_budget)
    if budget is not None:
        by_budget = max(1, budget // (2 * 8 * max(n, 1) * REFIT_COPIES))
        if by_budget < cap:
            cap = int(by_budget)
            why = (
                f"half of the memory budget ({budget / 2**30:.3g} GiB) holds the refit's "
                f"{REFIT_COPIES} copies of {n} x {cap} float64 values"
            )
    return cap, why


def shortlist_notice(
    shortlist: int | str, n: int, memory_budget: int | str | None = None
) -> dict | None:
    """The record of a capped ``"auto"`` shortlist (for the manifest and a one-line notice), or None."""
    if shortlist != "auto" or n <= 2:
        return None
    auto = max(1, math.floor(n / math.log(n)))
    cap, why = shortlist_cap(n, memory_budget)
    if auto <= cap:
        return None
    return {
        "auto": auto,
        "size": cap,
        "reason": why,
        "notice": (
            f"shortlist capped at {cap} features (floor(n / log n) = {auto} at n = {n}): {why}; "
            "--shortlist N sets another size"
        ),
    }


def shortlist_size(
    shortlist: int | str,
    n: int,
    n_features: int | None = None,
    memory_budget: int | str | None = None,
) -> int:
    """Shortlist size: an int, or ``"auto"`` = floor(n / log n) (Fan & Lv 2008), capped by
    `shortlist_cap` (a fixed maximum and the memory budget) and at the features."""
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
            shortlist = min(shortlist, shortlist_cap(n, memory_budget)[0])
    if isinstance(shortlist, bool) or not isinstance(shortlist, int | np.integer) or shortlist < 1:
        raise ValueError(
            f"The 'shortlist' must be a positive integer or 'auto'; got {shortlist!r}."
        )
    return int(min(shortlist, n_features)) if n_features else int(shortlist)


@dataclass(frozen=True)
class Problem:
    """Inputs of every pass of a run, aligned on the analysed samples.

    Build one with `Problem.from_arrays` (arrays, or a store with y by position or by sample id) or
    `load_problem` (a store and an outcome table).

    Attributes
    ----------
    source : BlockSource
        Where the passes read X.
    family : Family
    response : Response
        The validated response of the analysed samples (in the order of ``rows``).
    covariates : ndarray of shape (n, q) or None
    covariate_names : tuple of str
        One per column of ``covariates``: a numeric covariate's name, or ``NAME:LEVEL`` for a dummy.
    rows : ndarray of int or None
        Rows of X of the analysed samples; None when they are all of X's rows in order.
    sample_ids : ndarray of str of shape (n,), optional
    samples : dict
        How the samples were matched (recorded in the manifest as ``samples``).
    joined : JoinedOutcome, optional
        The file route's join (its table, lines and counts).
    covariate_coding : dict
        `widescreen.store.CovariateCoding.record`: the columns and each text covariate's levels (the
        first, in sorted order, is the reference); recorded in the manifest as ``covariates``.
    """

    source: BlockSource
    family: Family
    response: Response
    covariates: np.ndarray | None = None
    covariate_names: tuple[str, ...] = ()
    rows: np.ndarray | None = None
    sample_ids: np.ndarray | None = None
    samples: dict[str, Any] = field(default_factory=dict)
    joined: JoinedOutcome | None = None
    covariate_coding: dict[str, Any] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return self.response.n

    @property
    def n_features(self) -> int:
        return self.source.n_features

    def feature_ids(self, index: np.ndarray) -> np.ndarray:
        """Ids of the features at the given indices (the store's ids; ``x<i>`` for arrays)."""
        ds = getattr(self.source, "dataset", None)
        index = np.asarray(index, dtype=np.int64)
        if ds is None:
            return np.array([f"x{i}" for i in index], dtype=str)
        return ds.feature_ids_at(index)

    @classmethod
    def from_arrays(
        cls,
        X,
        y,
        *,
        family: str | Family = "linear",
        event=None,
        covariates=None,
        covariate_names: tuple[str, ...] | None = None,
        sample_ids=None,
    ) -> Problem:
        """Validate arrays and build a problem (the route of the estimators).

        Parameters
        ----------
        X : ndarray, Dask array, store path, `Dataset` or `BlockSource`, of shape (n_rows, p)
        y : array-like of shape (n,)
            The response (survival: the time). Numbers, or two labels for a binary family.
        family : str or Family
        event : array-like of shape (n,), optional
            Survival only: 1 event, 0 censored.
        covariates : array-like of shape (n, q), optional
        covariate_names : tuple of str, optional
            Default ``z0, z1, ...``.
        sample_ids : array-like of str of shape (n,), optional
            Ids of y's samples. With a store, y is matched to the store's samples by these ids (any
            order; a subset of the store is analysed); ids the store lacks, or repeated ids, are
            refused. Without ids y follows X's rows by position, and must have one value per row.

        Raises
        ------
        OutcomeError (a ValueError)
            Naming the position or sample id of the first bad value.
        """
        source = as_source(X)
        fam = get_family(family) if isinstance(family, str) else family
        y = np.asarray(y)
        n = y.shape[0] if y.ndim else 0
        Z = None
        coding = None
        if covariates is not None and (
            hasattr(covariates, "columns") or isinstance(covariates, dict)
        ):
            # A table (DataFrame, dict of columns): text or category columns are dummy-coded.
            coding = code_covariate_frame(covariates)
            Z = coding.matrix
            covariate_names = covariate_names or coding.names
            if Z.shape[0] != n:
                raise OutcomeError(
                    f"covariates must have shape (n_samples, q) = ({n}, q); got {Z.shape}"
                )
        elif covariates is not None:
            Z = np.asarray(covariates, dtype=np.float64)
            Z = Z.reshape(-1, 1) if Z.ndim == 1 else Z
            if Z.ndim != 2 or Z.shape[0] != n:
                raise OutcomeError(
                    f"covariates must have shape (n_samples, q) = ({n}, q); got {Z.shape}"
                )
        ev = None if event is None else np.asarray(event)
        ids = None if sample_ids is None else np.asarray(sample_ids).astype(str)
        rows = None
        if ids is not None:
            if ids.shape != (n,):
                raise OutcomeError(
                    f"sample_ids must have one id per value of y ({n}); got {ids.shape}"
                )
            rows = _rows_by_id(source, ids)
            if rows is not None:
                # Analyse in store order (reads stay sequential; results do not depend on y's order).
                order = np.argsort(rows, kind="stable")
                rows, ids, y = rows[order], ids[order], y[order]
                ev = None if ev is None else ev[order]
                Z = None if Z is None else Z[order]
        elif n != source.n_samples:
            raise OutcomeError(f"y has {n} values but X has {source.n_samples} samples")
        rows = None if rows is None else analysed_rows(rows, source.n_samples)
        check_sample_size(n, 0 if Z is None else Z.shape[1], "")
        resp = fam.response_from_arrays(y, ev, ids)
        names = tuple(covariate_names) if covariate_names is not None else ()
        if Z is not None and not names:
            names = tuple(f"z{j}" for j in range(Z.shape[1]))
        if Z is not None:
            if len(names) != Z.shape[1]:
                raise OutcomeError(f"{len(names)} covariate names for {Z.shape[1]} covariates")
            check_covariates(Z, names, "")
        return cls(
            source=source,
            family=fam,
            response=resp,
            covariates=Z,
            covariate_names=names,
            rows=rows,
            sample_ids=ids,
            samples={"n_analysed": n, "n_store": source.n_samples},
            covariate_coding={} if coding is None else coding.record(),
        )


def analysed_rows(rows: np.ndarray, n_samples: int) -> np.ndarray | None:
    """Store rows of the analysed samples, or None when they are all of the store's rows in order."""
    if rows.size == n_samples and np.array_equal(rows, np.arange(rows.size)):
        return None
    return rows


def _rows_by_id(source: BlockSource, ids: np.ndarray) -> np.ndarray | None:
    """Rows of the store's samples with the given ids (None for arrays, which have no ids)."""
    uniq, counts = np.unique(ids, return_counts=True)
    if (counts > 1).any():
        raise OutcomeError(f"sample id {str(uniq[counts > 1][0])!r} appears twice")
    ds = getattr(source, "dataset", None)
    if ds is None:
        if ids.size != source.n_samples:
            raise OutcomeError(f"y has {ids.size} values but X has {source.n_samples} samples")
        return None
    store_ids = np.asarray(ds.sample_ids(), dtype=str)
    order = np.argsort(store_ids)
    pos = np.minimum(np.searchsorted(store_ids[order], ids), store_ids.size - 1)
    found = store_ids[order][pos] == ids
    if not found.all():
        missing = ids[~found]
        shown = ", ".join(repr(str(s)) for s in missing[:3])
        raise OutcomeError(
            f"{int(missing.size)} sample id(s) of y are not in the store {ds.path} ({shown}"
            f"{', ...' if missing.size > 3 else ''})"
        )
    return order[pos].astype(np.int64)


def check_covariates(Z: np.ndarray, names: tuple[str, ...], where: str) -> None:
    """Finite, non-constant covariates; ``where`` prefixes the message (the table's path)."""
    for j, name in enumerate(names):
        v = Z[:, j]
        if not np.all(np.isfinite(v)):
            i = int(np.flatnonzero(~np.isfinite(v))[0])
            raise OutcomeError(f"{where}covariate {name!r}, sample {i}: value is not finite")
        if np.std(v) == 0:
            raise OutcomeError(f"{where}covariate {name!r} is constant over the analysed samples")


def check_sample_size(n: int, q: int, where: str) -> None:
    """At least q + 4 samples (an intercept, q covariates, a feature and a residual degree)."""
    min_n = q + 4
    if n < min_n:
        raise OutcomeError(f"{where}need at least {min_n} samples; got n_samples = {n}")


def load_problem(
    store: str | os.PathLike | BlockSource,
    outcome: str | os.PathLike,
    *,
    response: str,
    family: str = "linear",
    covariates: tuple[str, ...] = (),
    event: str | None = None,
) -> Problem:
    """The file route: open the store, read the outcome table, join it by sample id, build the problem."""
    source = as_source(store)
    fam = get_family(family)
    table = read_outcome_table(outcome)
    needed = fam.response_columns(response, event) + list(covariates)
    dataset = getattr(source, "dataset", None)
    if dataset is None:
        raise ValueError("an outcome table can only be joined to a dataset store")
    joined = join_outcome(dataset.sample_ids(), table, needed)
    resp = fam.response(joined, response, event)
    Z, names, coding = table_covariates(joined, covariates, table.path)
    if Z is not None:
        check_covariates(Z, names, f"{table.path}: ")
    _check_response_varies(table.path, response, np.asarray(resp.y, dtype=np.float64), Z)
    check_sample_size(joined.n, len(names), f"{table.path}: ")
    return Problem(
        source=source,
        family=fam,
        response=resp,
        covariates=Z,
        covariate_names=names,
        rows=analysed_rows(joined.rows, source.n_samples),
        sample_ids=joined.sample_ids,
        samples=joined.report(),
        joined=joined,
        covariate_coding=coding,
    )


def table_covariates(
    joined: JoinedOutcome, covariates: tuple[str, ...], path
) -> tuple[np.ndarray | None, tuple[str, ...], dict[str, Any]]:
    """The outcome table's covariates of the joined samples as a design: (Z or None, names, coding).

    Numeric columns as they are; text columns dummy-coded (first sorted level the reference); a
    numeric column with stray text cells is refused. Not checked for constant columns (the caller
    knows on which samples).
    """
    if not covariates:
        return None, (), {}
    for c in covariates:
        _refuse_stray_text(joined, c)
    coded = code_covariates({c: joined.values[c] for c in covariates}, where=str(path))
    return coded.matrix, coded.names, coded.record()


def _refuse_stray_text(joined: JoinedOutcome, column: str) -> None:
    """A column mostly of numbers with a few text cells is a numeric column with typos, not a category:
    refuse it at its first text cell (file, column, line) instead of dummy-coding every number."""
    raw = joined.values[column]
    is_number = np.array([_parses(v) for v in raw.tolist()], dtype=bool)
    if 0 < (~is_number).sum() and is_number.mean() >= 0.5:
        joined.numeric(column)  # raises, naming the line of the first text cell


def _parses(v: str) -> bool:
    try:
        float(v)
    except ValueError:
        return False
    return True


def _check_response_varies(path, name: str, y: np.ndarray, Z: np.ndarray | None) -> None:
    """Refuse a response with nothing to explain, naming the file and column, before any run folder
    is made: constant, or fully explained by the intercept and the covariates."""
    y = y[np.isfinite(y)]
    if y.size and np.ptp(y) == 0:
        raise OutcomeError(
            f"{path}: column {name!r} is constant over the {y.size} analysed samples (every value "
            f"is {y[0]:g}); there is nothing to screen against"
        )
    if Z is None or y.size != Z.shape[0]:
        return
    A = np.column_stack([np.ones(y.size), Z])
    resid = y - A @ np.linalg.lstsq(A, y, rcond=None)[0]
    if np.linalg.norm(resid) <= 1e-10 * max(np.linalg.norm(y - y.mean()), 1e-300):
        raise OutcomeError(
            f"{path}: column {name!r} is fully explained by the covariates; there is nothing left "
            "to screen against"
        )


def problem_from_arrays(X, y, family: str | Family = "linear", covariates=None, **kw) -> Problem:
    """`Problem.from_arrays` with the family and covariates by position."""
    return Problem.from_arrays(X, y, family=family, covariates=covariates, **kw)


__all__ = [
    "Problem",
    "analysed_rows",
    "check_covariates",
    "check_problem_fields",
    "check_sample_size",
    "expand_response",
    "load_problem",
    "problem_from_arrays",
    "shortlist_size",
    "table_covariates",
    "trait_names",
]
