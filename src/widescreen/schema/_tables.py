"""Column specs of every table a run folder holds, and their writing and reading.

Each table has one schema: an ordered tuple of `Column` (name, dtype, meaning), the same in every
family and store kind, with named slots where a family's statistics (or later additions) go. The
writers format each value by its column's dtype (integers as integers, missing values as ``NA``,
booleans as ``true``/``false``); `read_table` gives a pandas DataFrame with the documented dtypes.

Dtypes are pandas names: ``string`` (text), ``int64`` (never missing), ``Int64`` (integer that may be
``NA``), ``float64`` and ``bool``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

DTYPES = ("string", "int64", "Int64", "float64", "bool")


@dataclass(frozen=True)
class Column:
    """One column of a table: its name, pandas dtype and what it means."""

    name: str
    dtype: str
    meaning: str

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(
                f"column {self.name!r}: dtype must be one of {DTYPES}; got {self.dtype!r}"
            )


@dataclass(frozen=True)
class Slot:
    """A named place in a table where a variable set of columns goes (see `TableSpec.resolve`)."""

    name: str
    meaning: str


@dataclass(frozen=True)
class TableSpec:
    """The schema of one table: file name, meaning, and its columns and slots in order."""

    file: str
    meaning: str
    parts: tuple[Column | Slot, ...]

    @property
    def fixed(self) -> tuple[Column, ...]:
        return tuple(p for p in self.parts if isinstance(p, Column))

    def resolve(self, **slots: tuple[Column, ...]) -> tuple[Column, ...]:
        """The table's columns with each slot filled (an unfilled slot is left empty)."""
        names = {p.name for p in self.parts if isinstance(p, Slot)}
        unknown = set(slots) - names
        if unknown:
            raise KeyError(
                f"{self.file} has no slot {sorted(unknown)[0]!r}; it has {sorted(names)}"
            )
        out: list[Column] = []
        for p in self.parts:
            out.extend(slots.get(p.name, ()) if isinstance(p, Slot) else (p,))
        return tuple(out)

    def column(self, name: str) -> Column:
        """The spec of a column by name: a fixed one, a known statistic, or a float statistic."""
        for c in self.fixed:
            if c.name == name:
                return c
        return statistic_column(name)


# --------------------------------------------------------------------------------------------
# Statistics of the families (the slot "statistics" of ranking.tsv and model.tsv)

#: Meaning of every statistic a family's kernel records; one name means one thing in every family.
STATISTICS: dict[str, str] = {
    "score": "screening utility of the family; larger is stronger, 0 for untested features",
    "correlation": "Pearson correlation with the response (partial, given covariates and the selected set)",
    "rho": "Spearman rank correlation with the response",
    "t": "t statistic of the correlation (linear, rank)",
    "p_value": "p-value of the family's marginal test, not adjusted for multiple testing",
    "beta": "marginal coefficient per unit of the feature (GLM/Cox: ML fit of covariates + feature; score tests: one-step estimate U / I; holp: HOLP estimate)",
    "std_error": "standard error of the marginal coefficient",
    "z": "Wald z statistic of the marginal coefficient",
    "lr_chi2": "likelihood-ratio chi-square statistic (1 df)",
    "score_chi2": "efficient score chi-square statistic (1 df): Poisson (variance from the data) and conditional passes of GLMs",
    "converged": "1 when the marginal fit converged, else 0",
    "omega": "rank utility omega of Zhu et al. (2011)",
    "dcor_sqr": "squared distance correlation",
    "u_dcor_sqr": "unbiased squared distance correlation",
    "dcov_sqr": "squared distance covariance",
    "r2": "R^2 of the feature's B-spline fit",
    "f": "F statistic of the feature's B-spline fit",
}


def statistic_column(name: str) -> Column:
    """The column spec of a family statistic (float64; a name not listed is a kernel's own statistic)."""
    return Column(name, "float64", STATISTICS.get(name, "a statistic of the family's kernel"))


def statistic_columns(names) -> tuple[Column, ...]:
    return tuple(statistic_column(n) for n in names if n != "score")


# --------------------------------------------------------------------------------------------
# The columns shared by several tables

FEATURE = Column("feature", "string", "feature id in the store")
INDEX = Column("index", "int64", "position of the feature in the store (0-based)")
SCORE = Column("score", "float64", STATISTICS["score"])
MISSING_RATE = Column("missing_rate", "float64", "fraction of analysed samples missing the feature")
MEAN = Column(
    "mean",
    "float64",
    "mean of the stored values over the analysed samples that have one; missing values are imputed "
    "with it",
)
ALLELE_FREQ = Column(
    "allele_freq",
    "float64",
    "dosage stores: mean / 2, the frequency of the counted allele; else NA",
)
CHROM = Column("chrom", "string", "chromosome from the store's annotations; NA without them")
POS = Column("pos", "Int64", "position from the store's annotations; NA without them")
SELECTION_FREQUENCY = Column(
    "selection_frequency",
    "float64",
    "share of the 2B half-samples whose screen and refit selected the feature (`run --stability "
    "B`); NA without stability selection",
)

#: Where a family's statistics go (all float64; see `STATISTICS`).
STATISTICS_SLOT = Slot("statistics", "the family's statistics other than score, in its order")

RANKING = TableSpec(
    "ranking.tsv",
    "The strongest features of the marginal screen in rank order: the shortlist, or --list rows.",
    (
        FEATURE,
        Column("rank", "int64", "1 = strongest"),
        SCORE,
        STATISTICS_SLOT,
        MISSING_RATE,
        MEAN,
        ALLELE_FREQ,
        CHROM,
        POS,
        INDEX,
        Column(
            "shortlisted",
            "bool",
            "on the shortlist: among the top d and, in `run` with --threshold, kept by the threshold",
        ),
        SELECTION_FREQUENCY,
    ),
)

#: Extension point: further columns of the fit in model.tsv (after the refit's), filled by the
#: workflow through ``fit=`` (see `widescreen.workflow._tables.MODEL_FIT_COLUMNS`).
FIT_SLOT = Slot("fit", "further columns of the fit")

MODEL = TableSpec(
    "model.tsv",
    "The final model: intercept and covariate rows, then the selected features (earliest entry "
    "first, then strongest).",
    (
        Column(
            "feature", "string", "feature id; (intercept) and covariate:NAME for the other rows"
        ),
        Column("term", "string", "intercept, covariate or feature"),
        Column(
            "coefficient",
            "float64",
            "penalised coefficient per unit (of the feature as stored, missing values at its mean)",
        ),
        Column(
            "refit_coefficient",
            "float64",
            "unpenalised maximum-likelihood refit on the selected features and covariates; NA "
            "where the run made no refit",
        ),
        Column(
            "refit_se",
            "float64",
            "model-based standard error of the refit coefficient; after selection not valid for "
            "inference (the same data chose the features)",
        ),
        FIT_SLOT,
        Column(
            "selection_frequency",
            "float64",
            SELECTION_FREQUENCY.meaning + "; NA for the intercept and covariate rows",
        ),
        Column(
            "entered",
            "Int64",
            "iteration the feature (last) entered, 0 = the screen; NA for other rows",
        ),
        Column(
            "score",
            "float64",
            "marginal screening score on all analysed samples; NA for other rows",
        ),
        STATISTICS_SLOT,
        MISSING_RATE,
        MEAN,
        ALLELE_FREQ,
        CHROM,
        POS,
        Column("index", "Int64", INDEX.meaning + "; NA for the intercept and covariate rows"),
    ),
)

#: Extension point: further per-iteration columns (for example a dispersion estimate).
ITERATION_SLOT = Slot("extra", "further per-iteration columns")

ITERATIONS = TableSpec(
    "iterations.tsv",
    "One row per iteration (0 = the marginal screen); the features that moved are in entries.tsv.",
    (
        Column("iteration", "int64", "0 = the marginal screen, k = the k-th conditional pass"),
        Column(
            "passes", "string", "the pass(es) of the iteration, comma-separated (two after --split)"
        ),
        Column("candidates", "int64", "new candidates the pass(es) kept"),
        Column("entered", "int64", "features that entered the selected set"),
        Column("left", "int64", "features that left it"),
        Column("selected", "int64", "size of the selected set after the iteration"),
        Column("refit", "bool", "whether the iteration refitted (false: no new candidate)"),
        Column("criterion", "string", "tuning criterion (ebic, bic, cv); NA without a refit"),
        Column("criterion_value", "float64", "its value at the chosen lambda"),
        Column("lambda", "float64", "the chosen penalty level; NA for an empty model"),
        Column("pass_seconds", "float64", "wall time of the pass(es) in the session that ran them"),
        Column("fit_seconds", "float64", "wall time of the refit"),
        ITERATION_SLOT,
    ),
)

ENTRIES = TableSpec(
    "entries.tsv",
    "A long table of the selected set's changes: one row per feature that entered or left, per "
    "iteration.",
    (
        Column("iteration", "int64", "the iteration (as in iterations.tsv)"),
        Column("event", "string", "entered or left"),
        FEATURE,
        INDEX,
        Column(
            "coefficient", "float64", "its coefficient after the iteration's fit (0 when it left)"
        ),
    ),
)

STATS = TableSpec(
    "passes/NAME/stats/",
    "Zarr v3 group, one float64 array of shape (n_features,) per statistic, in store order: "
    "element j belongs to the store's features/id[j].",
    (
        SCORE,
        STATISTICS_SLOT,
        MISSING_RATE,
        MEAN,
        Column(
            "filtered",
            "float64",
            "1 when a feature filter (allele frequency, missing rate) excluded it, else 0",
        ),
    ),
)

STABILITY = TableSpec(
    "stability.tsv",
    "`run --stability B`: every feature selected in at least one of the 2B half-samples, most "
    "frequent first.",
    (
        FEATURE,
        Column("rank", "int64", "1 = most frequently selected (ties by store position)"),
        Column(
            "selection_frequency",
            "float64",
            "share of the 2B half-samples whose screen and refit selected the feature",
        ),
        Column("stable", "bool", "selection frequency at or above --stability-threshold"),
        Column("in_model", "bool", "in the final model of the run (model.tsv)"),
        INDEX,
    ),
)

CV = TableSpec(
    "cv.tsv",
    "`run --cv-folds K`: the held-out accuracy of the screen -> refit pipeline, one row per fold "
    "(screening done on the training folds only).",
    (
        Column("fold", "int64", "fold number, 1..K"),
        Column("n_train", "int64", "samples the fold's screen and refit saw"),
        Column("n_test", "int64", "held-out samples the model predicted"),
        Column(
            "selected",
            "Int64",
            "features in the fold's model; NA for a fold that could not be screened or refitted",
        ),
        Column("r2", "float64", "held-out R^2 (linear and model-free families); else NA"),
        Column("auc", "float64", "held-out area under the ROC curve (logistic); else NA"),
        Column(
            "deviance",
            "float64",
            "held-out mean deviance per sample (logistic: binomial, poisson: Poisson); else NA",
        ),
        Column(
            "concordance",
            "float64",
            "held-out Harrell's concordance index of the linear predictor (cox); else NA",
        ),
    ),
)

TRAITS = TableSpec(
    "traits.tsv",
    "Several traits in one run: one row per trait, in the order of --response; each trait's own "
    "tables are in traits/NAME/.",
    (
        Column("trait", "string", "the trait (its column in the outcome table)"),
        Column("n", "int64", "analysed samples of the trait (those with a value)"),
        Column("shortlist_size", "int64", "its shortlist size d"),
        Column("selected_size", "Int64", "features in its final model (run); NA for screen"),
        Column("top_feature", "string", "its strongest feature of the screen; NA when none"),
        Column("top_score", "float64", "that feature's score"),
        Column(
            "lambda_gc",
            "float64",
            "genomic inflation factor of its screen's p-values; NA without p-values",
        ),
    ),
)

TABLES: dict[str, TableSpec] = {
    t.file: t for t in (RANKING, MODEL, ITERATIONS, ENTRIES, STABILITY, CV, TRAITS)
}


# --------------------------------------------------------------------------------------------
# Writing


def format_value(v) -> str:
    """Numbers with 10 significant digits (enough to re-rank and to compare runs), NaN as 'NA'."""
    if isinstance(v, str):
        return v
    if v is None:
        return "NA"
    if isinstance(v, bool | np.bool_):
        return "1" if v else "0"
    if isinstance(v, int | np.integer):
        return str(int(v))
    f = float(v)
    if not np.isfinite(f):
        return "NA" if np.isnan(f) else ("inf" if f > 0 else "-inf")
    return f"{f:.10g}"


def _missing(v) -> bool:
    """None, NaN, or pandas' NA (recognised by type name, so pandas need not be imported)."""
    if v is None or type(v).__name__ == "NAType":
        return True
    return isinstance(v, float | np.floating) and bool(np.isnan(v))


def _cell(dtype: str, v) -> str:
    if _missing(v):
        return "NA"
    if dtype == "bool":
        return "true" if bool(v) else "false"
    if dtype in ("int64", "Int64"):
        if isinstance(v, float | np.floating) and not float(v).is_integer():
            raise ValueError(f"not an integer: {v!r}")
        return str(int(v))
    if dtype == "string":
        s = str(v)
        if "\t" in s or "\n" in s:
            raise ValueError(f"text with a tab or line break: {s!r}")
        return s
    return format_value(float(v))


def tsv(columns: dict[str, np.ndarray | list]) -> str:
    """A TSV text from equal-length columns, in the dict's order (values formatted by their type)."""
    names = list(columns)
    if not names:
        return ""
    cols = [list(columns[c]) for c in names]
    n = len(cols[0])
    if any(len(c) != n for c in cols):
        raise ValueError("table columns differ in length")
    lines = ["\t".join(names)]
    for i in range(n):
        lines.append("\t".join(format_value(c[i]) for c in cols))
    return "\n".join(lines) + "\n"


def format_table(spec: TableSpec, columns: dict[str, np.ndarray | list], **slots) -> str:
    """The TSV text of a table: exactly the spec's columns (slots filled), each value by its dtype.

    Parameters
    ----------
    spec : TableSpec
    columns : dict of str -> sequence
        One entry per column of the resolved spec (in any order; extra names are an error).
    **slots : tuple of Column
        The columns of each slot (see `TableSpec.resolve`).

    Raises
    ------
    ValueError
        A column is missing or unknown, the lengths differ, or a value does not fit its dtype (the
        message names the table, column and row).
    """
    cols = spec.resolve(**slots)
    names = [c.name for c in cols]
    missing = [c for c in names if c not in columns]
    extra = [c for c in columns if c not in names]
    if missing or extra:
        raise ValueError(
            f"{spec.file}: columns do not match its schema"
            + (f"; missing {missing}" if missing else "")
            + (f"; not in the schema {extra}" if extra else "")
        )
    values = [list(columns[c]) for c in names]
    n = len(values[0]) if values else 0
    for c, v in zip(names, values, strict=True):
        if len(v) != n:
            raise ValueError(f"{spec.file}: column {c!r} has {len(v)} rows, not {n}")
    lines = ["\t".join(names)]
    for i in range(n):
        cells = []
        for c, v in zip(cols, values, strict=True):
            try:
                cells.append(_cell(c.dtype, v[i]))
            except (TypeError, ValueError) as exc:
                raise ValueError(f"{spec.file}: column {c.name!r}, row {i + 1}: {exc}") from None
        lines.append("\t".join(cells))
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# Reading


def read_tsv(path) -> dict[str, np.ndarray]:
    """Read a table back into string columns (no types; see `read_table` for typed columns)."""
    with open(path) as f:
        header = f.readline().rstrip("\n").split("\t")
        rows = [line.rstrip("\n").split("\t") for line in f if line.strip()]
    arr = np.array(rows, dtype=str).reshape(len(rows), len(header))
    return {h: arr[:, j] for j, h in enumerate(header)}


def pandas_dtypes(spec: TableSpec, header: list[str]) -> dict[str, str]:
    """The pandas dtype of each column of a table with this header (for ``pandas.read_csv``)."""
    return {name: spec.column(name).dtype for name in header}


def spec_for(path: str | os.PathLike) -> TableSpec:
    name = Path(path).name
    if name not in TABLES:
        raise KeyError(f"{path}: not a table of a run folder; known tables: {sorted(TABLES)}")
    return TABLES[name]


def read_table(path: str | os.PathLike, spec: TableSpec | None = None):
    """A table of a run folder as a pandas DataFrame with the documented dtypes.

    ``NA`` reads as missing in every column except ``feature`` (a feature may be called NA).
    Equivalent to ``pandas.read_csv(path, sep="\\t", dtype=..., keep_default_na=False,
    na_values={column: ["NA"], ...})`` with the dtypes of `pandas_dtypes`.
    """
    import pandas as pd

    spec = spec or spec_for(path)
    with open(path) as f:
        header = f.readline().rstrip("\n").split("\t")
    dtypes = pandas_dtypes(spec, header)
    na = {c: ["NA"] for c in header if c != "feature"}
    return pd.read_csv(
        path, sep="\t", dtype=dtypes, keep_default_na=False, na_values=na, quoting=3
    )  # quoting=3 (QUOTE_NONE): a quote in an id is just a character


__all__ = [
    "CV",
    "ENTRIES",
    "ITERATIONS",
    "MODEL",
    "RANKING",
    "STABILITY",
    "STATISTICS",
    "STATS",
    "TABLES",
    "TRAITS",
    "Column",
    "Slot",
    "TableSpec",
    "format_table",
    "format_value",
    "pandas_dtypes",
    "read_table",
    "read_tsv",
    "statistic_column",
    "statistic_columns",
    "tsv",
]
