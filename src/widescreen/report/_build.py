"""Build the report of a finished run: figures into ``RUN/figures/``, one page ``RUN/report.html``.

Reads only what the run folder holds, through `widescreen.schema` (the manifest as typed records, the
tables with their dtypes, the statistics of the marginal pass by range) and, when it is still where
the manifest says and unchanged, the chromosome and position annotations of the store. The parts of
the iterative workflow (model.tsv, iterations, lambda paths) are used when present.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..engine._runfolder import RunFolder, atomic_write
from ..schema import (
    CV,
    MODEL,
    RANKING,
    STABILITY,
    FitRecord,
    IterationRecord,
    ManifestRecord,
    PassStats,
    RunLayout,
    read_table,
)
from ..store import is_url
from . import _plots
from ._scan import Counts, PValueScan, RankSelector, ScoreHistogram, scan
from ._stats import GENOME_WIDE, lambda_from_middle, order_band, qq_from_histogram

FIGURE_NAMES = (
    "manhattan",
    "qq",
    "score_histogram",
    "lambda_path",
    "selection_trace",
    "iterations",
    "criterion",
    "stability",
)

#: Features labelled in the Manhattan plot of a screen (the strongest of the shortlist).
SCREEN_LABELS = 10


class ReportError(ValueError):
    """A report cannot be built: the folder is not a finished run, or an argument is invalid."""


@dataclass(frozen=True)
class FigureRecord:
    """One picture of the report: file name stem, title, caption, alt text and the PNG bytes."""

    name: str
    title: str
    caption: str
    png: bytes
    alt: str = ""


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
    """Everything the page shows, gathered from the run folder.

    ``ranking``, ``model``, ``iterations`` and ``entries`` are pandas DataFrames with the schema's
    dtypes (None when the run has no such table); ``record`` is the manifest as typed records.
    """

    path: Path
    manifest: dict
    record: ManifestRecord
    pass_name: str | None
    ranking: object | None
    model: object | None
    iterations: object | None
    entries: object | None
    top: int
    lambda_gc: float | None = None
    counts: dict[str, int] = field(default_factory=dict)
    figures: list[FigureRecord] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    cautions: list[str] = field(default_factory=list)
    model_rows: object | None = None
    stability: object | None = None
    cv: object | None = None


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


def _table(layout: RunLayout, file: str):
    path = layout.table(file)
    return read_table(path) if path.is_file() else None


def marginal_pass(run: RunFolder) -> str | None:
    """Name of the marginal screening pass: ``screen``, else ``iter1``, else the first pass found."""
    names = RunLayout(run.path).pass_names()
    for preferred in ("screen", "iter1"):
        if preferred in names:
            return preferred
    return names[0] if names else None


def shortlist_index(summary: RunSummary) -> np.ndarray:
    """Store indices of the shortlist: the rows of ranking.tsv marked ``shortlisted``."""
    r = summary.ranking
    if r is None or "index" not in r:
        return np.empty(0, np.int64)
    if "shortlisted" in r:
        return r.loc[r["shortlisted"], "index"].to_numpy(np.int64)
    d = summary.record.shortlist or len(r)
    return r["index"].to_numpy(np.int64)[:d]


def model_features(summary: RunSummary):
    """The feature rows of model.tsv (None without a model)."""
    m = summary.model
    if m is None:
        return None
    return m[m["term"] == "feature"] if "term" in m else m[m["index"].notna()]


def model_index(summary: RunSummary) -> np.ndarray:
    """Store indices of the model's features."""
    f = model_features(summary)
    if f is None or "index" not in f:
        return np.empty(0, np.int64)
    return f["index"].to_numpy(np.int64)


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


def final_fit(summary: RunSummary) -> tuple[IterationRecord, FitRecord] | None:
    """The iteration whose fit is the final model (the last refit with a path)."""
    for rec in reversed(summary.record.iterations):
        if rec.refit and rec.model.path is not None and len(rec.model.path.lambdas) >= 2:
            return rec, rec.model
    return None


# --------------------------------------------------------------------------------------------
# The figures of the statistics


def _stats_figures(summary: RunSummary, run: RunFolder, *, threshold: float, max_points: int):
    stats = PassStats(run.path, summary.pass_name)
    names = set(stats.columns)
    n = stats.n_features
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
    scan(stats, accs)
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


def _ids_of(summary: RunSummary) -> dict[int, str]:
    """Feature id of each store index the tables name (shortlist and model)."""
    out: dict[int, str] = {}
    for t in (summary.ranking, model_features(summary)):
        if t is not None and "index" in t and "feature" in t:
            out.update(zip(t["index"].astype("int64").tolist(), t["feature"].tolist(), strict=True))
    return out


def _manhattan(summary, pscan: PValueScan, shortlist, in_model) -> FigureRecord:
    pts = pscan.points()
    n_below = pscan.n_tested - pscan.n_above
    drawn_below = int((~pts["above"]).sum())
    if pscan.fraction >= 1.0:
        how = f"All {pscan.n_tested:,} tested features are drawn."
        short_note = None
    else:
        how = (
            f"Every tested feature with -log10 p >= {pscan.threshold:g} is drawn "
            f"({pscan.n_above:,}); of the {n_below:,} below it, a random {drawn_below:,} "
            f"(each with probability {pscan.fraction:.2%} + (1 - {pscan.fraction:.2%}) "
            f"10^(y - {pscan.threshold:g}) at height y, so the density has no step at the "
            "threshold) and the shortlisted ones."
        )
        short_note = (
            f"Thinned for drawing: all {pscan.n_above:,} features with -log10 p >= "
            f"{pscan.threshold:g} are shown, and {drawn_below:,} of the {n_below:,} below it "
            "(chosen at random, denser near the cut)."
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
    ids_of = _ids_of(summary)
    marked = np.isin(pts["index"], in_model)
    to_label = marked
    if not in_model.size:  # a screen: label the strongest of the shortlist
        top = shortlist[:SCREEN_LABELS]
        to_label = np.isin(pts["index"], top)
    point_ids = np.full(pts["index"].size, "", dtype=object)
    point_ids[to_label] = [ids_of.get(int(i), str(i)) for i in pts["index"][to_label]]
    fig = _plots.manhattan_plot(
        x,
        pts["y"],
        n_tested=pscan.n_tested,
        highlight=np.isin(pts["index"], shortlist),
        marked=marked,
        point_ids=point_ids,
        note=short_note,
        **kw,
    )
    bonf = 0.05 / pscan.n_tested if pscan.n_tested else None
    merged = bonf is not None and abs(np.log10(bonf) - np.log10(GENOME_WIDE)) < _plots.MERGE_LINES
    lines = (
        f"One dashed line: the Bonferroni level 0.05 / {pscan.n_tested:,} tested features "
        f"(p = {bonf:.2g}), which here nearly coincides with the usual genome-wide level p = 5e-8 "
        "(common practice), so it stands for both."
        if merged
        else "Dashed line: p = 5e-8, the usual genome-wide level for common-variant studies "
        "(common practice)"
        + (
            f"; dotted line: Bonferroni 0.05 / {pscan.n_tested:,} tested features (p = {bonf:.2g})."
            if bonf
            else "."
        )
    )
    caption = (
        f"-log10 p of the marginal screen, {where}. {how} Orange triangles: the "
        f"{shortlist.size} shortlisted features"
        + (
            f"; blue diamonds, labelled with their ids: the {in_model.size} features of the "
            "selected model"
            if in_model.size
            else f"; the strongest {min(SCREEN_LABELS, shortlist.size)} are labelled with their ids"
        )
        + f". {lines} A p-value of 0 (below the float64 range) is drawn at 307.7."
    )
    labelled = [str(v) for v in point_ids[point_ids != ""]][:8]
    alt = (
        f"Manhattan plot of {pscan.n_tested:,} tested features {where.split(' (')[0]}; "
        f"highest -log10 p {float(np.max(pts['y'])) if pts['y'].size else 0:.1f}; "
        + (f"labelled: {', '.join(labelled)}." if labelled else "no feature labelled.")
    )
    return FigureRecord("manhattan", "Manhattan plot", caption, _plots.png_bytes(fig), alt)


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
    alt = f"QQ plot of {qq.m:,} p-values against the uniform expectation" + (
        f"; lambda_GC {lam:.3f}." if lam is not None else "."
    )
    return FigureRecord("qq", "QQ plot", caption, _plots.png_bytes(fig), alt)


def _score_histogram(summary: RunSummary, hist: ScoreHistogram, d: int) -> FigureRecord:
    cutoff = None
    r = summary.ranking
    if r is not None and "score" in r and d:
        scores = r["score"].to_numpy(np.float64)[:d]
        cutoff = float(scores[-1]) if scores.size else None
    fam = summary.record.config.get("family", "")
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
            f" The dashed line marks the score of the last of the {d} shortlisted features "
            f"({cutoff:.4g})."
            if cutoff is not None
            else ""
        )
    )
    alt = f"Histogram of the screening scores of {int(hist.counts.sum()):,} features" + (
        f", shortlist cutoff at {cutoff:.4g}." if cutoff is not None else "."
    )
    return FigureRecord("score_histogram", "Screening scores", caption, _plots.png_bytes(fig), alt)


# --------------------------------------------------------------------------------------------
# The figures of the iterations


def _union_ids(records) -> dict[int, str]:
    """Feature id of every fitted store index, from the fits' paths (features align with union)."""
    out: dict[int, str] = {}
    for rec in records:
        p = rec.model.path
        if p is not None and len(p.features) == rec.model.union.size:
            out.update(zip(rec.model.union.tolist(), p.features, strict=True))
    return out


def _iteration_figures(summary: RunSummary) -> None:
    records = summary.record.iterations
    if not records:
        return
    it = np.array([r.iteration for r in records])
    ids = {**_union_ids(records), **_ids_of(summary)}
    final = set(model_index(summary).tolist())
    ever = sorted(
        {int(i) for r in records for i in r.model.index},
        key=lambda i: (min(r.iteration for r in records if i in r.model.index), ids.get(i, "")),
    )
    if ever:
        member = np.array([[i in set(r.model.index.tolist()) for r in records] for i in ever])
        names = [ids.get(i, f"index {i}") for i in ever]
        fig = _plots.selection_trace_plot(
            names, it, member, final=np.array([i in final for i in ever])
        )
        moves = sum(len(r.entered) + len(r.left) for r in records)
        summary.figures.append(
            FigureRecord(
                "selection_trace",
                "Entries and exits",
                "Each row is a feature that was ever in the selected set (final model in bold), "
                "each column an iteration: a square while it is in the set, a triangle where it "
                "entered, a cross where it left (entries.tsv lists the same events).",
                _plots.png_bytes(fig),
                f"Trace of {len(ever)} features over {len(records)} iterations with {moves} "
                f"entries and exits; final model: {', '.join(names[k] for k in range(len(ever)) if ever[k] in final)[:300]}.",
            )
        )
    if len(records) > 1:
        fig = _plots.iterations_plot(
            it,
            np.array([r.selected_size for r in records]),
            entered=np.array([len(r.entered) for r in records]),
            left=np.array([len(r.left) for r in records]),
        )
        summary.figures.append(
            FigureRecord(
                "iterations",
                "Iterations",
                "Size of the selected set after each iteration of the iterative screen and the "
                "numbers of features that entered and left.",
                _plots.png_bytes(fig),
                "Bar chart of the selected set's size by iteration: "
                + ", ".join(f"{r.iteration}: {r.selected_size}" for r in records)
                + ".",
            )
        )
    found = final_fit(summary)
    if found is None:
        return
    rec, fit = found
    path = fit.path
    lam = np.asarray(path.lambdas, dtype=float)
    selected = [ids.get(int(i), f"index {i}") for i in fit.index]
    fig = _plots.lambda_path_plot(
        lam,
        path.coefs,
        chosen=path.lambda_,
        names=list(path.features),
        selected=selected,
        title=f"Coefficient path of the final fit (iteration {rec.iteration})",
    )
    summary.figures.append(
        FigureRecord(
            "lambda_path",
            "Coefficient path",
            f"Coefficients of the penalised fit of iteration {rec.iteration} (the final model) on "
            f"its {fit.union.size} features along the lambda path: the {len(selected)} selected "
            "features in colour and named, the others grey; the dotted line is the chosen lambda.",
            _plots.png_bytes(fig),
            f"Coefficient paths of {fit.union.size} features against log10 lambda; selected: "
            f"{', '.join(selected)[:300]}.",
        )
    )
    if len(path.criterion_values) == lam.size:
        name = path.criterion or "criterion"
        se = path.extra.get("cv_std_error")
        fig = _plots.criterion_plot(
            lam,
            np.asarray(path.criterion_values, float),
            chosen=path.lambda_,
            name=name.upper(),
            std_error=None if se is None or len(se) != lam.size else np.asarray(se, float),
        )
        summary.figures.append(
            FigureRecord(
                "criterion",
                "Tuning criterion",
                f"The tuning criterion ({name}) of the final fit along the lambda path; the chosen "
                "lambda minimises it.",
                _plots.png_bytes(fig),
                f"Line chart of {name.upper()} against log10 lambda, minimum at the chosen lambda.",
            )
        )


# --------------------------------------------------------------------------------------------
# The figure of stability selection


def _stability_figure(summary: RunSummary) -> None:
    t = summary.stability
    if t is None or not len(t):
        return
    rec = summary.record.extra.get("stability") or {}
    pi = float(rec.get("threshold", summary.record.config.get("stability_threshold", 0.6)))
    halves = 2 * int(rec.get("n_pairs", summary.record.config.get("stability", 0)))
    freq = t["selection_frequency"].to_numpy(np.float64)
    names = [str(f) for f in t["feature"]]
    stable = int(t["stable"].sum())
    fig = _plots.stability_plot(freq, pi, in_model=t["in_model"].to_numpy(bool), names=names)
    bound = rec.get("bound_mb")
    summary.figures.append(
        FigureRecord(
            "stability",
            "Stability selection",
            f"Selection frequency of every feature selected in at least one of the {halves} "
            f"half-samples (screen and refit on each half), against its rank; blue diamonds: the "
            f"final model's features; dashed line: the threshold {pi:g}. The {stable} features on "
            "or above it are the stable set"
            + (
                f"; the expected number of false selections among them is at most {bound:.3g} "
                "(Meinshausen & Buhlmann 2010)."
                if bound is not None
                else "."
            )
            + " The ten most frequent are labelled.",
            _plots.png_bytes(fig),
            f"Scatter plot of the selection frequencies of {len(t)} features against rank, "
            f"threshold {pi:g}; {stable} features at or above it: "
            f"{', '.join(names[:stable])[:300]}.",
        )
    )


# --------------------------------------------------------------------------------------------
# Cautions that depend on the run


def run_cautions(summary: RunSummary) -> list[str]:
    """What a reader of this run's results should know beyond the general cautions."""
    out: list[str] = []
    lam = summary.lambda_gc
    if lam is not None and np.isfinite(lam) and lam > 1.1:
        out.append(
            f"lambda_GC = {lam:.3f}: the p-values are inflated; confounding (population structure, "
            "batch) or many small true effects; consider adjusting for more covariates."
        )
    elif lam is not None and np.isfinite(lam) and lam < 0.9:
        out.append(f"lambda_GC = {lam:.3f}: the test is conservative for these data.")
    stop = summary.record.stop_reason
    if stop == "iteration limit":
        out.append("The iterations reached --max-iter before the selected set settled.")
    elif stop == "empty model":
        out.append("The penalised fit selected no feature.")
    elif stop and stop.startswith("cannot condition"):
        out.append(f"The iterations stopped early: {stop}.")
    if summary.record.config.get("split"):
        out.append(
            "Sample splitting: each half was screened on its own; no ranking of all samples."
        )
    for p in summary.record.passes.values():
        out += list(p.notes)
    # Extension point: notes and warnings any step records in the manifest reach the summary.
    for key in ("warnings", "notes"):
        out += [str(n) for n in summary.record.extra.get(key) or []]
    return out


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
    run_dir : path of the run folder, or its s3:// URL (the report is built in the folder's local
        copy, `widescreen.engine.local_copy_path`, and uploaded; the paths returned are the copy's)
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
    if is_url(str(run_dir)):
        from ..engine import staged_run_folder

        with staged_run_folder(run_dir) as here:
            return make_report(here, top, threshold=threshold, max_points=max_points)
    run, manifest = open_finished_run(run_dir)
    layout = RunLayout(run.path)
    summary = RunSummary(
        path=run.path,
        manifest=manifest,
        record=ManifestRecord.from_dict(manifest),
        pass_name=marginal_pass(run),
        ranking=_table(layout, RANKING.file),
        model=_table(layout, MODEL.file),
        iterations=_table(layout, "iterations.tsv"),
        entries=_table(layout, "entries.tsv"),
        top=int(top),
        stability=_table(layout, STABILITY.file),
        cv=_table(layout, CV.file),
    )
    if summary.pass_name is not None:
        _stats_figures(summary, run, threshold=threshold, max_points=max_points)
    else:
        summary.notes.append("The run folder holds no per-feature statistics; no pictures of them.")
    _iteration_figures(summary)
    _stability_figure(summary)
    summary.cautions = run_cautions(summary)
    written = []
    for rec in summary.figures:
        path = layout.figure(rec.name)
        atomic_write(path, rec.png)
        written.append(path)
    for stale in FIGURE_NAMES:  # pictures of an earlier report that this run no longer has
        p = layout.figure(stale)
        if p not in written and p.exists():
            p.unlink()
    atomic_write(layout.report, render_html(summary))
    return ReportFiles(html=layout.report, figures=tuple(written), lambda_gc=summary.lambda_gc)


def build_report(run_dir: str | os.PathLike, top: int = 50) -> Path:
    """Build the report of a finished run and return the path of ``RUN/report.html``.

    Also writes the pictures as PNG under ``RUN/figures/``. Raises `ReportError` when the folder
    is not a complete run.
    """
    return make_report(run_dir, top).html
