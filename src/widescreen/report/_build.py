"""Build the report of a finished run: figures into ``RUN/figures/``, one page ``RUN/report.html``.

Reads only what the run folder holds (the manifest, the tables, the statistics of the marginal pass)
and, when it is still where the manifest says and unchanged, the chromosome and position annotations
of the store. Files of the iterative workflow (``iterations.tsv``, ``model.tsv``, a lambda path in the
manifest) are used when present and skipped when not.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..engine._runfolder import RunFolder, atomic_write
from . import _plots
from ._scan import Counts, PValueScan, RankSelector, ScoreHistogram, scan
from ._stats import lambda_from_middle, order_band, qq_from_histogram
from ._tables import read_tsv

FIGURE_NAMES = (
    "manhattan",
    "qq",
    "score_histogram",
    "iterations",
    "lambda_path",
    "criterion",
)


class ReportError(ValueError):
    """A report cannot be built: the folder is not a finished run, or an argument is invalid."""


@dataclass(frozen=True)
class FigureRecord:
    """One picture of the report: file name stem, title, caption and the PNG bytes."""

    name: str
    title: str
    caption: str
    png: bytes


@dataclass(frozen=True)
class ReportFiles:
    """What `make_report` wrote.

    Attributes
    ----------
    html : Path
        ``RUN/report.html``.
    figures : tuple of Path
        The PNG files under ``RUN/figures/``.
    lambda_gc : float or None
        Genomic inflation factor of the marginal pass (None without p-values).
    """

    html: Path
    figures: tuple[Path, ...]
    lambda_gc: float | None


@dataclass
class RunSummary:
    """Everything the page shows, gathered from the run folder."""

    path: Path
    manifest: dict
    pass_name: str | None
    ranking: dict[str, np.ndarray] | None
    model: dict[str, np.ndarray] | None
    iterations: dict[str, np.ndarray] | None
    top: int
    lambda_gc: float | None = None
    counts: dict[str, int] = field(default_factory=dict)
    figures: list[FigureRecord] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


# --------------------------------------------------------------------------------------------
# Reading the run folder


def open_finished_run(run_dir: str | os.PathLike) -> tuple[RunFolder, dict]:
    """The run folder and its manifest; a `ReportError` unless the run is complete."""
    run = RunFolder(run_dir)
    if not run.path.is_dir():
        raise ReportError(f"{run.path}: no such run folder")
    manifest = run.read_manifest()
    if manifest is None:
        raise ReportError(
            f"{run.path}: no manifest.json; not a run folder, or its run never started"
        )
    status = manifest.get("status")
    if status != "complete":
        raise ReportError(
            f"{run.path}: the run is not complete (status: {status!r}); "
            "finish or resume it before reporting"
        )
    return run, manifest


def _table(path: Path) -> dict[str, np.ndarray] | None:
    return read_tsv(path) if path.is_file() else None


def marginal_pass(run: RunFolder) -> str | None:
    """Name of the marginal screening pass: ``screen``, else ``iter1``, else the first pass found."""
    root = run.path / "passes"
    if not root.is_dir():
        return None
    names = sorted(p.name for p in root.iterdir() if (p / "stats" / "zarr.json").is_file())
    for preferred in ("screen", "iter1"):
        if preferred in names:
            return preferred
    return names[0] if names else None


def _ints(col: np.ndarray) -> np.ndarray:
    try:
        return col.astype(np.int64)
    except ValueError:
        return np.empty(0, np.int64)


def _floats(col: np.ndarray) -> np.ndarray:
    out = np.full(col.shape, np.nan)
    ok = ~np.isin(col, ["", "NA", "nan"])
    try:
        out[ok] = col[ok].astype(np.float64)
    except ValueError:
        return np.full(col.shape, np.nan)
    return out


def shortlist_index(summary: RunSummary) -> np.ndarray:
    r = summary.ranking
    if r is None or "index" not in r:
        return np.empty(0, np.int64)
    d = int(summary.manifest.get("shortlist_size", r["index"].size))
    return _ints(r["index"][:d])


def model_index(summary: RunSummary) -> np.ndarray:
    """Store indices of the model's features: its ``index`` column, or its names looked up in the ranking."""
    m, r = summary.model, summary.ranking
    if m is None:
        return np.empty(0, np.int64)
    if "index" in m:
        return _ints(m["index"])
    if "feature" in m and r is not None and "feature" in r and "index" in r:
        where = dict(zip(r["feature"].tolist(), _ints(r["index"]).tolist(), strict=False))
        return np.array([where[f] for f in m["feature"].tolist() if f in where], dtype=np.int64)
    return np.empty(0, np.int64)


def store_annotations(manifest: dict, n_features: int, notes: list[str]):
    """The store's (chrom, pos) Zarr arrays when the store is where the run found it and unchanged."""
    from ..store._format import StoreError, open_dataset

    rec = manifest.get("dataset", {})
    path = rec.get("path")
    if not path:
        return None
    try:
        ds = open_dataset(path)
    except StoreError:
        notes.append(f"The store {path} is not readable any more; features are drawn by index.")
        return None
    g = ds.group
    if "features/chrom" not in g or "features/pos" not in g:
        return None
    if ds.n_features != n_features or ds.fingerprint() != rec.get("fingerprint"):
        notes.append(f"The store {path} changed after the run; features are drawn by index.")
        return None
    return g["features/chrom"], g["features/pos"]


def find_path_record(obj) -> dict | None:
    """The last record in the manifest that holds a lambda path.

    That is a dict with a ``lambdas`` list and beside it ``coefs`` or ``criterion_values`` (a bare
    list of lambdas, such as a configured grid, is not a path).
    """
    found = None
    if isinstance(obj, dict):
        lam = obj.get("lambdas")
        has_path = any(
            isinstance(obj.get(k), list)
            for k in ("coefs", "coef_path", "criterion_values", "criterion_path")
        )
        if isinstance(lam, list) and len(lam) >= 2 and has_path:
            found = obj
        for v in obj.values():
            found = find_path_record(v) or found
    elif isinstance(obj, list):
        for v in obj:
            found = find_path_record(v) or found
    return found


def _first(d: dict, *keys):
    for k in keys:
        if d.get(k) is not None:
            return d[k]
    return None


def _column(table: dict[str, np.ndarray], *names: str) -> np.ndarray | None:
    norm = {k.lower().replace(" ", "_").replace("-", "_"): k for k in table}
    for n in names:
        if n in norm:
            return table[norm[n]]
    return None


def _count_or_number(col: np.ndarray) -> np.ndarray:
    """Numbers as they are; a list of feature names (comma, semicolon or space separated) as its length."""
    nums = _floats(col)
    if np.all(np.isfinite(nums) | np.isin(col, ["", "NA"])):
        return np.nan_to_num(nums)
    return np.array(
        [
            0
            if s in ("", "NA", "-")
            else len([t for t in s.replace(";", ",").split(",") if t.strip()])
            for s in col.tolist()
        ],
        dtype=float,
    )


# --------------------------------------------------------------------------------------------
# The figures


def _stats_figures(summary: RunSummary, run: RunFolder, *, threshold: float, max_points: int):
    import zarr

    group = zarr.open_group(run.pass_dir(summary.pass_name) / "stats", mode="r")
    names = set(group.array_keys())
    n = int(group["score"].shape[0]) if "score" in names else 0
    shortlist = shortlist_index(summary)
    in_model = model_index(summary)
    counts = Counts()
    accs: list = [counts]
    pscan = rank = hist = None
    if "p_value" in names:
        ann = store_annotations(summary.manifest, n, summary.notes)
        pscan = PValueScan(n, threshold, max_points, np.union1d(shortlist, in_model), ann)
        rank = RankSelector("p_value")
        accs += [pscan, rank]
    if "score" in names:
        hist = ScoreHistogram()
        accs.append(hist)
    scan(group, accs)
    summary.counts.update(
        features=counts.features, filtered=counts.filtered, untested=counts.untested
    )
    if pscan is not None:
        summary.counts["tested"] = pscan.n_tested
        summary.lambda_gc = lambda_from_middle(*rank.values) if rank.count else None
        summary.figures.append(_manhattan(summary, pscan, shortlist, in_model))
        summary.figures.append(_qq(summary, pscan))
    if hist is not None:
        summary.figures.append(_score_histogram(summary, hist, shortlist.size))


def _manhattan(summary, pscan: PValueScan, shortlist, in_model) -> FigureRecord:
    pts = pscan.points()
    n_below = pscan.n_tested - pscan.n_above
    drawn_below = int((~pts["above"]).sum())
    if pscan.fraction >= 1.0:
        how = f"All {pscan.n_tested:,} tested features are drawn."
    else:
        how = (
            f"Every tested feature with -log10 p >= {pscan.threshold:g} is drawn "
            f"({pscan.n_above:,}); of the {n_below:,} below it, a random {drawn_below:,} "
            f"(each with probability {pscan.fraction:.2%} + (1 - {pscan.fraction:.2%}) "
            f"10^(y - {pscan.threshold:g}) at height y, so the density has no step at the "
            "threshold) and the shortlisted ones."
        )
    kw = {}
    if "chrom" in pts and pscan.chroms is not None:
        c = pscan.chroms
        axis = _plots.genome_axis(pts["chrom"], pts["pos"], c.names, np.array(c.lo), np.array(c.hi))
        x = axis["x"]
        kw = {"parity": axis["parity"], "ticks": axis["ticks"], "labels": axis["labels"]}
        where = "by chromosome and position"
    else:
        x = pts["index"].astype(float)
        where = "by feature index in the store (the store has no chromosome/position annotations)"
    fig = _plots.manhattan_plot(
        x,
        pts["y"],
        n_tested=pscan.n_tested,
        highlight=np.isin(pts["index"], shortlist),
        marked=np.isin(pts["index"], in_model),
        note=how,
        **kw,
    )
    caption = (
        f"-log10 p of the marginal screen, {where}. {how} Orange: the {shortlist.size} shortlisted "
        "features"
        + (
            f"; diamonds: the {in_model.size} features of the selected model"
            if in_model.size
            else ""
        )
        + ". Dashed line: p = 5e-8, the usual genome-wide level for common-variant studies (common "
        f"practice); dotted line: Bonferroni 0.05 / {pscan.n_tested:,} tested features. "
        "A p-value of 0 (below the float64 range) is drawn at 307.7."
    )
    return FigureRecord("manhattan", "Manhattan plot", caption, _plots.png_bytes(fig))


def _qq(summary: RunSummary, pscan: PValueScan) -> FigureRecord:
    qq = qq_from_histogram(pscan.top_values(), pscan.edges, pscan.counts)
    band = order_band(qq.ranks, qq.m) if qq.m else None
    note = (
        f"Expected: (i - 0.5) / m, m = {qq.m:,}. Below -log10 p = {qq.exact_above:g} observed quantiles "
        f"come from a histogram (bin width {qq.bin_width:.1e}); above it they are exact."
    )
    fig = _plots.qq_plot(
        qq.expected, qq.observed, lambda_gc=summary.lambda_gc, band=band, note=note
    )
    lam = summary.lambda_gc
    caption = (
        f"Observed against expected -log10 p of the {qq.m:,} tested features. {note} The grey band "
        "is the pointwise 95% range of uniform order statistics (Beta(i, m - i + 1)). "
        + (
            f"lambda_GC = {lam:.3f}: the median of the chi-square(1) statistics chi2.isf(p, 1) "
            "(an exact median of the p-values, found blockwise) over 0.4549, the chi-square(1) median "
            "(common practice); about 1 without inflation."
            if lam is not None
            else ""
        )
    )
    return FigureRecord("qq", "QQ plot", caption, _plots.png_bytes(fig))


def _score_histogram(summary: RunSummary, hist: ScoreHistogram, d: int) -> FigureRecord:
    cutoff = None
    r = summary.ranking
    if r is not None and "score" in r and d:
        scores = _floats(r["score"][:d])
        cutoff = float(scores[-1]) if scores.size else None
    fam = summary.manifest.get("config", {}).get("family", "")
    fig = _plots.score_histogram(
        hist.edges,
        hist.counts,
        cutoff=cutoff,
        cutoff_label=f"shortlist cutoff (top {d})",
        xlabel=f"screening score ({fam} family)",
    )
    caption = (
        f"Screening scores of the {int(hist.counts.sum()):,} tested features (log-scaled counts); "
        "larger is stronger."
        + (
            f" The line marks the score of the last of the {d} shortlisted features ({cutoff:.4g})."
            if cutoff is not None
            else ""
        )
    )
    return FigureRecord("score_histogram", "Screening scores", caption, _plots.png_bytes(fig))


def _iteration_figures(summary: RunSummary) -> None:
    it = summary.iterations
    if it is not None and next(iter(it.values()), np.empty(0)).size:
        size = _column(it, "selected_size", "n_selected", "size", "selected", "model_size")
        if size is not None:
            step = _column(it, "iteration", "iter", "step")
            x = _floats(step) if step is not None else np.arange(1, size.size + 1, dtype=float)
            ent = _column(it, "entered", "n_entered", "added")
            left = _column(it, "left", "n_left", "removed", "dropped")
            fig = _plots.iterations_plot(
                x,
                _count_or_number(size),
                entered=None if ent is None else _count_or_number(ent),
                left=None if left is None else _count_or_number(left),
            )
            moves = " and the numbers of features that entered and left" if ent is not None else ""
            caption = (
                f"Size of the selected set after each iteration of the iterative screen{moves}."
            )
            summary.figures.append(
                FigureRecord("iterations", "Iterations", caption, _plots.png_bytes(fig))
            )
    rec = find_path_record(summary.manifest)
    if rec is None:
        return
    lam = np.asarray(rec["lambdas"], dtype=float)
    chosen = _first(rec, "lambda_", "lambda", "chosen_lambda", "best_lambda", "selected_lambda")
    chosen = float(chosen) if isinstance(chosen, int | float) else None
    coefs = _first(rec, "coefs", "coef_path")
    if coefs is not None and np.asarray(coefs, float).size % max(lam.size, 1) == 0:
        names = _first(rec, "features", "feature_ids", "names")
        fig = _plots.lambda_path_plot(lam, np.asarray(coefs, float), chosen=chosen, names=names)
        summary.figures.append(
            FigureRecord(
                "lambda_path",
                "Coefficient path",
                "Coefficients of the penalised refit on the "
                "shortlist along the lambda path; the dashed line is the chosen lambda.",
                _plots.png_bytes(fig),
            )
        )
    values = _first(rec, "criterion_values", "criterion_path")
    if values is not None and len(values) == lam.size:
        name = rec.get("criterion") if isinstance(rec.get("criterion"), str) else "criterion"
        se = rec.get("cv_std_error")
        fig = _plots.criterion_plot(
            lam,
            np.asarray(values, float),
            chosen=chosen,
            name=name.upper(),
            std_error=None if se is None or len(se) != lam.size else np.asarray(se, float),
        )
        summary.figures.append(
            FigureRecord(
                "criterion",
                "Tuning criterion",
                f"The tuning criterion ({name}) along the lambda "
                "path; the chosen lambda minimises it.",
                _plots.png_bytes(fig),
            )
        )


# --------------------------------------------------------------------------------------------
# Entry points


def make_report(
    run_dir: str | os.PathLike,
    top: int = 50,
    *,
    threshold: float = 3.0,
    max_points: int = 200_000,
) -> ReportFiles:
    """Write ``RUN/figures/*.png`` and ``RUN/report.html`` for a finished run.

    Parameters
    ----------
    run_dir : path of the run folder
    top : int
        Rows of the ranking table shown on the page.
    threshold : float
        Manhattan thinning: every point with -log10 p at or above this is drawn.
    max_points : int
        About this many points below the threshold are drawn.
    """
    from ._html import render_html

    if isinstance(top, bool) or not isinstance(top, int | np.integer) or top < 1:
        raise ReportError(f"The 'top' parameter must be a positive int; got {top!r}.")
    run, manifest = open_finished_run(run_dir)
    summary = RunSummary(
        path=run.path,
        manifest=manifest,
        pass_name=marginal_pass(run),
        ranking=_table(run.path / "ranking.tsv"),
        model=_table(run.path / "model.tsv"),
        iterations=_table(run.path / "iterations.tsv"),
        top=int(top),
    )
    if summary.pass_name is not None:
        _stats_figures(summary, run, threshold=threshold, max_points=max_points)
    else:
        summary.notes.append("The run folder holds no per-feature statistics; no pictures of them.")
    _iteration_figures(summary)
    fig_dir = run.path / "figures"
    written = []
    for rec in summary.figures:
        path = fig_dir / f"{rec.name}.png"
        atomic_write(path, rec.png)
        written.append(path)
    for stale in FIGURE_NAMES:  # pictures of an earlier report that this run no longer has
        p = fig_dir / f"{stale}.png"
        if p not in written and p.exists():
            p.unlink()
    html = run.path / "report.html"
    atomic_write(html, render_html(summary))
    return ReportFiles(html=html, figures=tuple(written), lambda_gc=summary.lambda_gc)


def build_report(run_dir: str | os.PathLike, top: int = 50) -> Path:
    """Build the report of a finished run and return the path of ``RUN/report.html``.

    Also writes the pictures as PNG under ``RUN/figures/``. Raises `ReportError` when the folder
    is not a complete run.
    """
    return make_report(run_dir, top).html
