"""The outcome table: read it, and join it to the store's samples by sample id.

The table is TSV (or CSV by extension) with a header row; its first column holds sample ids, the others
the response(s) and covariates. Rows may come in any order. Samples lacking a needed value are dropped and
counted; ids the store does not know, and store samples the table lacks, are reported.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

MISSING_TOKENS = frozenset({"", "NA", "NaN", "nan", "N/A", "."})


class OutcomeError(ValueError):
    """The outcome table or one of its columns cannot be used; the message says where."""


@dataclass(frozen=True)
class OutcomeTable:
    """The raw text of an outcome table.

    Attributes
    ----------
    path : Path
    ids : ndarray of str, shape (n_rows,)
    columns : dict of str -> ndarray of str, each of shape (n_rows,)
    """

    path: Path
    ids: np.ndarray
    columns: dict[str, np.ndarray]

    def column(self, name: str) -> np.ndarray:
        if name not in self.columns:
            known = ", ".join(self.columns) or "(none)"
            raise OutcomeError(f"{self.path}: no column {name!r}; the table has: {known}")
        return self.columns[name]


def read_outcome_table(path: str | os.PathLike) -> OutcomeTable:
    """Read an outcome table; errors name the file and line."""
    path = Path(path)
    if not path.is_file():
        raise OutcomeError(f"{path}: no such outcome table")
    delimiter = "," if path.suffix.lower() == ".csv" else "\t"
    data = path.read_bytes()
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        col = data[data.rfind(b"\n", 0, exc.start) + 1 : exc.start].count(delimiter.encode()) + 1
        raise OutcomeError(
            f"{path}: line {line}, column {col}: not UTF-8 text (byte 0x{data[exc.start]:02x}); "
            "save the table as UTF-8"
        ) from None
    nul = text.find("\x00")
    if nul >= 0:  # a NUL byte would vanish in the numeric conversion ("1\0" read as 1)
        line = text.count("\n", 0, nul) + 1
        col = text[text.rfind("\n", 0, nul) + 1 : nul].count(delimiter) + 1
        raise OutcomeError(f"{path}: line {line}, column {col}: a NUL byte in the cell")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        rows = list(reader)
    except csv.Error as exc:  # a NUL byte, an unterminated quote
        raise OutcomeError(f"{path}: line {reader.line_num}: {exc}") from None
    rows = [r for r in rows if r and any(c.strip() for c in r)]
    if not rows:
        raise OutcomeError(f"{path}: empty file")
    header = [h.strip() for h in rows[0]]
    if len(header) < 2:
        raise OutcomeError(
            f"{path}: line 1: need a sample id column and at least one outcome column "
            f"(is the file {'comma' if delimiter == ',' else 'tab'}-separated?)"
        )
    dup = [h for h in header if header.count(h) > 1]
    if dup:
        raise OutcomeError(f"{path}: line 1: column {dup[0]!r} appears twice")
    body = rows[1:]
    if not body:
        raise OutcomeError(f"{path}: header only, no samples")
    for i, r in enumerate(body, start=2):
        if len(r) != len(header):
            raise OutcomeError(f"{path}: line {i}: {len(r)} fields, the header has {len(header)}")
    cells = np.array([[c.strip() for c in r] for r in body], dtype=str)
    ids = cells[:, 0]
    uniq, _first, counts = np.unique(ids, return_index=True, return_counts=True)
    if (counts > 1).any():
        d = str(uniq[counts > 1][0])
        lines = np.flatnonzero(ids == d)[:2] + 2
        raise OutcomeError(
            f"{path}: sample id {d!r} appears twice (lines {lines[0]} and {lines[1]})"
        )
    return OutcomeTable(
        path=path, ids=ids, columns={h: cells[:, j] for j, h in enumerate(header) if j}
    )


def is_missing(values: np.ndarray) -> np.ndarray:
    return np.isin(values, list(MISSING_TOKENS))


def numeric_columns(table: OutcomeTable, exclude=()) -> list[str]:
    """Columns of ``table`` (in file order, ``exclude`` left out) whose every cell that is not a missing
    token is a number, with at least one such cell: the candidates for a response."""
    found = []
    for name, values in table.columns.items():
        if name in exclude:
            continue
        present = values[~is_missing(values)]
        if present.size and _is_numeric(present):
            found.append(name)
    return found


def parse_numeric(
    table: OutcomeTable, name: str, values: np.ndarray | None = None, lines=None
) -> np.ndarray:
    """A column as float64 (missing tokens -> NaN); a clear error at the first non-numeric cell."""
    raw = table.column(name) if values is None else values
    out = np.full(raw.shape, np.nan)
    ok = ~is_missing(raw)
    try:
        out[ok] = raw[ok].astype(np.float64)
    except ValueError:
        for i in np.flatnonzero(ok):
            try:
                float(raw[i])
            except ValueError:
                line = lines[i] if lines is not None else i + 2
                raise OutcomeError(
                    f"{table.path}: column {name!r}, line {line}: {str(raw[i])!r} is not a number"
                ) from None
    bad = np.flatnonzero(np.isinf(out))
    if bad.size:
        i = int(bad[0])
        line = lines[i] if lines is not None else i + 2
        raise OutcomeError(
            f"{table.path}: column {name!r}, line {line}: {str(raw[i])!r} is not a finite number"
        )
    return out


@dataclass(frozen=True)
class JoinedOutcome:
    """The outcome table aligned with the store's samples.

    Attributes
    ----------
    rows : ndarray of int64, shape (n,)
        Store row of each analysed sample (the order of every array below).
    sample_ids : ndarray of str, shape (n,)
    values : dict of str -> ndarray of str, shape (n,)
        The needed columns' text, for the family and the covariate parser.
    lines : ndarray of int64, shape (n,)
        Line of each analysed sample in the table (for error messages).
    n_table, n_store : int
    n_dropped : int
        Samples in both, dropped for a missing needed value.
    unknown_ids : tuple of str
        Table ids not in the store (all of them).
    n_store_only : int
        Store samples absent from the table.
    """

    table: OutcomeTable
    rows: np.ndarray
    sample_ids: np.ndarray
    values: dict[str, np.ndarray]
    lines: np.ndarray
    n_table: int
    n_store: int
    n_dropped: int
    unknown_ids: tuple[str, ...] = field(default=())
    n_store_only: int = 0

    @property
    def n(self) -> int:
        return int(self.rows.size)

    def numeric(self, name: str) -> np.ndarray:
        return parse_numeric(self.table, name, self.values[name], self.lines)

    def digest(self) -> dict[str, str]:
        """Hashes of what a pass reads from the table: the analysed samples (in store order) and each
        needed column's text for them. Reordering rows or editing other columns changes nothing."""

        def h(values: np.ndarray) -> str:
            return hashlib.sha256("\x1f".join(map(str, values)).encode()).hexdigest()[:16]

        out = {"samples": h(self.sample_ids)}
        out.update({f"column {name!r}": h(v) for name, v in sorted(self.values.items())})
        return out

    def report(self) -> dict:
        return {
            "n_table": self.n_table,
            "n_store": self.n_store,
            "n_analysed": self.n,
            "n_dropped_missing": self.n_dropped,
            "n_unknown_ids": len(self.unknown_ids),
            "unknown_ids_first": list(self.unknown_ids[:5]),
            "n_store_without_outcome": self.n_store_only,
        }


def join_outcome(
    store_ids: np.ndarray, table: OutcomeTable, needed: list[str], any_of: list[str] = ()
) -> JoinedOutcome:
    """Join the table to the store's sample ids, keeping samples with every needed column present
    (and, with ``any_of``, at least one of those columns: several traits, each with its own gaps)."""
    for name in [*needed, *any_of]:
        table.column(name)
    store_ids = np.asarray(store_ids, dtype=str)
    order = np.argsort(store_ids)
    pos = np.searchsorted(store_ids[order], table.ids)
    pos = np.minimum(pos, store_ids.size - 1)
    found = store_ids[order][pos] == table.ids
    store_row = np.where(found, order[pos], -1)
    present = np.ones(table.ids.size, dtype=bool)
    for name in needed:
        present &= ~is_missing(table.columns[name])
    if any_of:
        present &= np.any([~is_missing(table.columns[name]) for name in any_of], axis=0)
    keep = found & present
    if not keep.any():
        if not found.any():
            raise OutcomeError(
                f"{table.path}: none of its {table.ids.size} sample ids are in the store "
                f"(first table id {table.ids[0]!r}, first store id {store_ids[0]!r})"
            )
        what = needed if not any_of else f"{needed} or all of {list(any_of)}"
        raise OutcomeError(f"{table.path}: every matched sample lacks one of {what}")
    # Analyse samples in store order: reads stay sequential and results do not depend on table order.
    idx = np.flatnonzero(keep)
    idx = idx[np.argsort(store_row[idx], kind="stable")]
    return JoinedOutcome(
        table=table,
        rows=store_row[idx].astype(np.int64),
        sample_ids=table.ids[idx],
        values={name: table.columns[name][idx] for name in [*needed, *any_of]},
        lines=idx + 2,
        n_table=int(table.ids.size),
        n_store=int(store_ids.size),
        n_dropped=int((found & ~present).sum()),
        unknown_ids=tuple(table.ids[~found].tolist()),
        n_store_only=int(store_ids.size - found.sum()),
    )


#: A categorical covariate needs at least this many samples per level on average (common practice: a
#: level seen a handful of times gives a dummy coefficient with no information and invites separation).
MIN_SAMPLES_PER_LEVEL = 10


@dataclass(frozen=True)
class CovariateCoding:
    """Covariates as model columns: numeric columns as they are, categorical ones dummy-coded.

    Attributes
    ----------
    matrix : ndarray of shape (n, q)
        The design columns, float64, in the order of `names`.
    names : tuple of str
        One per column: the covariate's name, or ``NAME:LEVEL`` for a dummy (1 where the sample has
        LEVEL); the first level in sorted order is the reference and has no column.
    levels : dict of str -> list of str
        Each categorical covariate's levels in sorted order (the first is the reference).
    """

    matrix: np.ndarray
    names: tuple[str, ...]
    levels: dict[str, list[str]]

    def record(self) -> dict:
        """What a manifest records: the columns and the coding of each categorical covariate."""
        return {
            "columns": list(self.names),
            "categorical": {k: {"levels": v, "reference": v[0]} for k, v in self.levels.items()},
        }


def _is_numeric(values: np.ndarray) -> bool:
    try:
        values.astype(np.float64)
    except (TypeError, ValueError):
        return False
    return True


def code_covariates(
    columns: dict[str, np.ndarray],
    *,
    where: str = "covariates",
    levels: dict[str, list[str]] | None = None,
) -> CovariateCoding:
    """Code covariate columns (text or numbers, no missing values) as a design matrix.

    A column whose every value parses as a number is numeric; any other column is categorical and
    becomes one 0/1 column per level but the first (sorted order), the reference.

    Parameters
    ----------
    columns : dict of str -> ndarray of shape (n,)
        Covariate values per name, aligned on the analysed samples.
    where : str
        Where the values come from (a file path), for error messages.
    levels : dict of str -> list of str, optional
        The coding of a fitted model (`CovariateCoding.levels`): categorical columns are coded with
        these levels, so new data (a prediction, a fold) get the same columns; a value outside them is
        refused, and a numeric column may then be constant.

    Raises
    ------
    OutcomeError
        A constant numeric covariate, a categorical one with a single level, or one with more levels
        than ``n / MIN_SAMPLES_PER_LEVEL``.
    """
    cols: list[np.ndarray] = []
    names: list[str] = []
    found: dict[str, list[str]] = {}
    for name, raw in columns.items():
        raw = np.asarray(raw)
        n = raw.shape[0]
        if levels is not None and name in levels:
            text = raw.astype(str)
            lv = np.asarray(levels[name], dtype=str)
            unknown = np.setdiff1d(text, lv)
            if unknown.size:
                raise OutcomeError(
                    f"{where}: covariate {name!r} has level {str(unknown[0])!r}, not among the "
                    f"fitted levels {levels[name]}"
                )
            found[name] = list(levels[name])
            for level in lv[1:]:
                cols.append((text == level).astype(np.float64))
                names.append(f"{name}:{level}")
            continue
        if raw.dtype.kind in "biuf" or (raw.dtype.kind in "UO" and _is_numeric(raw)):
            v = raw.astype(np.float64)
            if not np.all(np.isfinite(v)):
                raise OutcomeError(f"{where}: covariate {name!r} has values that are not finite")
            # New data coded with a fitted coding (a prediction) may be one sample: no constancy rule.
            if levels is None and n and np.all(v == v[0]):
                raise OutcomeError(
                    f"{where}: covariate {name!r} is constant over the analysed samples"
                )
            cols.append(v)
            names.append(name)
            continue
        text = raw.astype(str)
        lv = np.unique(text)
        if lv.size < 2:
            shown = repr(str(lv[0])) if lv.size else "none"
            raise OutcomeError(
                f"{where}: categorical covariate {name!r} has a single level ({shown}) over the "
                "analysed samples"
            )
        most = max(2, n // MIN_SAMPLES_PER_LEVEL)
        if lv.size > most:
            raise OutcomeError(
                f"{where}: categorical covariate {name!r} has {lv.size} levels for {n} samples; at "
                f"most {most} (at least {MIN_SAMPLES_PER_LEVEL} samples per level on average) "
                "- is it an identifier, or a number column with a stray text value?"
            )
        found[name] = [str(x) for x in lv]
        for level in lv[1:]:
            cols.append((text == level).astype(np.float64))
            names.append(f"{name}:{level}")
    n_rows = next(iter(columns.values())).shape[0] if columns else 0
    matrix = np.column_stack(cols) if cols else np.empty((n_rows, 0))
    return CovariateCoding(matrix=matrix, names=tuple(names), levels=found)


def code_covariate_frame(
    frame, *, where: str = "covariates", levels: dict[str, list[str]] | None = None
) -> CovariateCoding:
    """`code_covariates` for an in-memory table: a pandas DataFrame (numeric, object, category or
    string columns), a dict of columns, or a plain numeric array of shape (n, q) (names ``z0, z1, ...``).

    This is the Python API's route: a DataFrame with text or categorical columns is dummy-coded like a
    covariate column of the outcome table; ``levels`` (a fitted coding's) codes new data the same way.
    """
    if hasattr(frame, "columns") and hasattr(frame, "__getitem__") and not isinstance(frame, dict):
        columns = {}
        for c in frame.columns:
            s = frame[c]
            if getattr(s, "isna", None) is not None and bool(s.isna().any()):
                raise OutcomeError(f"{where}: covariate {str(c)!r} has missing values")
            kind = getattr(s.dtype, "kind", "O")
            columns[str(c)] = (
                s.to_numpy(dtype=np.float64) if kind in "biuf" else s.astype(str).to_numpy()
            )
        return code_covariates(columns, where=where, levels=levels)
    if isinstance(frame, dict):
        return code_covariates(
            {str(k): np.asarray(v) for k, v in frame.items()}, where=where, levels=levels
        )
    a = np.asarray(frame)
    a = a.reshape(a.shape[0], -1) if a.ndim == 1 else a
    return code_covariates({f"z{j}": a[:, j] for j in range(a.shape[1])}, where=where)
