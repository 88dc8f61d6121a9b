"""The report page: one self-contained HTML file (pictures embedded as base64 PNG, no external assets).

The page leads with the answer (a summary: the data, the family, the shortlist, the selected model
with its coefficients and positions, thresholds and cautions), then the pictures, then the long
tables, then the details of the job (sessions, timings, versions). It shows feature-level summaries
only; no sample identifier or sample-level value is written.
"""

from __future__ import annotations

import base64
import datetime as dt
import math
import re
from html import escape

import numpy as np

from .._version import __version__

CAUTIONS = (
    "A feature found by screening is associated with the outcome in these data. That is not "
    "evidence of causation, and not a diagnosis of anyone: confounding (for example population "
    "structure or batch) and chance produce associations too. Findings need replication in "
    "independent data before they are relied on.",
    "p-values of a model refitted after selection are not valid as plain p-values: the same data "
    "chose the features and then tested them, so such p-values are too small. Use them to order "
    "features, not as evidence; a valid test needs new data or a method made for inference after "
    "selection.",
    "The data behind this run are sensitive personal data. This page contains feature-level "
    "summaries only, yet it belongs under the same governance as the data: share it only with "
    "people allowed to see them.",
)

STYLE = """
body { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; margin: 2rem auto;
       max-width: 72rem; padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.6rem; margin-bottom: 0.2rem; } h2 { font-size: 1.3rem; margin-top: 2.2rem;
     border-bottom: 1px solid #ccc; padding-bottom: 0.2rem; } h3 { font-size: 1.05rem; }
.sub { color: #555; margin-top: 0; }
.answer { font-size: 1.05rem; }
.cautions { background: #fff4e5; border-left: 5px solid #b35900; padding: 0.6rem 1rem; }
.cautions li { margin: 0.35rem 0; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.5rem 0; }
th, td { padding: 0.2rem 0.5rem; border-bottom: 1px solid #e5e5e5; text-align: right;
         white-space: nowrap; }
th { background: #f0f0f0; } td.t, th.t { text-align: left; }
table.kv td { text-align: left; white-space: normal; } table.kv td:first-child { color: #555;
              white-space: nowrap; padding-right: 1.2rem; }
figure { margin: 1.4rem 0; } figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { font-size: 0.9rem; color: #333; max-width: 62rem; }
.note { color: #7a4b00; } .scroll { overflow-x: auto; max-width: 100%; }
footer { margin-top: 3rem; font-size: 0.8rem; color: #555; }
"""

#: Table columns shown as text (left-aligned) rather than numbers.
TEXT_COLUMNS = {
    "feature",
    "chrom",
    "term",
    "event",
    "passes",
    "criterion",
    "status",
    "pass",
    "started",
    "kind",
    "per session",
}
#: Integer columns: written whole, never in scientific notation.
INT_COLUMNS = {"rank", "index", "pos", "iteration", "entered", "left", "selected", "candidates"}


def fmt_cell(name: str, value) -> str:
    """A table cell's text: p-values as 1.038e-264, integers whole, other numbers with 4 digits."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "NA"
    if type(value).__name__ == "NAType":
        return "NA"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if name in TEXT_COLUMNS or isinstance(value, str):
        return str(value)
    if isinstance(value, int | np.integer):
        return str(int(value))
    f = float(value)
    if not math.isfinite(f):
        return "NA" if math.isnan(f) else ("inf" if f > 0 else "-inf")
    if name in INT_COLUMNS and f.is_integer():
        return str(int(f))
    if name == "p" or "p_value" in name:
        return f"{f:.3e}"
    return f"{f:.4g}"


def html_table(columns: dict, rows: int | None = None, skip=()) -> str:
    """A table of equal-length columns (a dict of sequences or a pandas DataFrame)."""
    names = [c for c in columns if c not in skip]
    if not names:
        return "<p>(empty)</p>"
    values = {c: list(columns[c]) for c in names}
    n = len(values[names[0]]) if rows is None else min(rows, len(values[names[0]]))
    head = "".join(
        f'<th scope="col" class="{"t" if c in TEXT_COLUMNS else ""}">{escape(c)}</th>'
        for c in names
    )
    body = []
    for i in range(n):
        cells = "".join(
            f'<td class="{"t" if c in TEXT_COLUMNS else ""}">{escape(fmt_cell(c, values[c][i]))}</td>'
            for c in names
        )
        body.append(f"<tr>{cells}</tr>")
    return f'<div class="scroll"><table><tr>{head}</tr>{"".join(body)}</table></div>'


def _kv(rows: list[tuple[str, object]], cls: str = "kv") -> str:
    cells = "".join(
        f"<tr><td>{escape(k)}</td><td>{escape(str(v))}</td></tr>" for k, v in rows if v is not None
    )
    return f'<table class="{cls}">{cells}</table>'


def _when(ts) -> str | None:
    if not isinstance(ts, int | float):
        return None
    return dt.datetime.fromtimestamp(ts, tz=dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _seconds(s) -> str:
    if s is None:
        return "NA"
    s = float(s)
    return f"{s:.1f} s" if s < 120 else f"{s / 60:.1f} min"


# --------------------------------------------------------------------------------------------
# The summary


def _filters(cfg: dict) -> str:
    out = []
    for key, text in (
        ("max_missing", "missing rate > {:g} excluded"),
        ("drop_missing", "missing rate > {:g} excluded"),
        ("min_maf", "minor allele frequency < {:g} excluded"),
        ("drop_rare", "minor allele frequency < {:g} excluded"),
    ):
        if cfg.get(key) is not None:
            out.append(text.format(cfg[key]))
    return "; ".join(out) or "none"


def _threshold(summary) -> str:
    rec = summary.record
    rule = rec.config.get("threshold", "none")
    if not rec.iterations or rule in (None, "none"):
        return "none: the top d by score"
    parts = []
    for t in rec.iterations[0].threshold:
        if "cutoff_p_value" in t:
            cut = t["cutoff_p_value"]
            text = f"p <= {cut:.3e}" if cut is not None else "no feature passes"
        elif "cutoff_score" in t:
            cut = t["cutoff_score"]
            text = f"score > {cut:.4g}" if cut is not None else "no feature passes"
        else:
            continue
        if "n_kept" in t and "n_tested" in t:
            text += f" ({t['n_kept']:,} kept of {t['n_tested']:,} tested)"
        parts.append(text)
    alpha = rec.config.get("alpha")
    return f"{rule} at alpha {alpha:g}: " + "; ".join(parts) if parts else str(rule)


def _answer(summary) -> str:
    """One sentence that says what the run found."""
    rec = summary.record
    mf = summary.model_rows
    if rec.command == "run" and mf is not None:
        k = len(mf)
        its = len(rec.iterations)
        stop = rec.stop_reason or ""
        names = ", ".join(mf["feature"].astype(str).tolist()[:8]) + (" ..." if k > 8 else "")
        return (
            f"The selected model holds {k} feature{'s' if k != 1 else ''}"
            + (f" ({names})" if k else "")
            + f", after {its} iteration{'s' if its != 1 else ''} (stopped: {stop})."
        )
    d = rec.shortlist
    r = summary.ranking
    if r is not None and d:
        best = r["feature"].astype(str).tolist()[: min(3, d)]
        return f"The shortlist holds the {d} strongest features; the strongest: {', '.join(best)}."
    return "The run finished; see the tables below."


def _model_table(summary) -> str:
    mf = summary.model_rows
    if mf is None or not len(mf):
        return ""
    cols = [
        c
        for c in (
            "feature",
            "chrom",
            "pos",
            "coefficient",
            "refit_coefficient",
            "refit_se",
            "entered",
            "p_value",
            "score",
        )
        if c in mf and mf[c].notna().any()  # no empty chrom/pos columns without annotations
    ]
    parts = [html_table({c: mf[c].tolist() for c in cols})]
    m = summary.model
    other = m[m["term"] != "feature"] if "term" in m else m.iloc[0:0]
    if len(other):
        terms = "; ".join(
            f"{f}: {fmt_cell('coefficient', v)}"
            for f, v in zip(other["feature"], other["coefficient"], strict=True)
        )
        parts.append(
            f"<p>Other terms (unpenalised): {escape(terms)}. Coefficients are per unit of each "
            "feature as stored, missing values at the feature's mean.</p>"
        )
    return "".join(parts)


def _shortlist_table(summary) -> str:
    r = summary.ranking
    d = summary.record.shortlist
    if r is None or not d:
        return ""
    short = r[r["shortlisted"]] if "shortlisted" in r else r.iloc[:d]
    cols = [
        c
        for c in ("rank", "feature", "chrom", "pos", "score", "p_value")
        if c in short and short[c].notna().any()
    ]
    shown = min(len(short), 10)
    return f"<p>The {shown} strongest of the {len(short)} shortlisted features:</p>" + html_table(
        {c: short[c].tolist() for c in cols}, rows=shown
    )


def _stability_line(summary) -> str | None:
    """The stable set and its error bounds, from the manifest's ``stability``."""
    rec = summary.record.extra.get("stability")
    if not rec:
        return None
    ss = rec.get("bound_ss_unimodal")
    return (
        f"{len(rec.get('stable', []))} features selected in at least {rec['threshold']:g} of "
        f"{2 * rec['n_pairs']} half-samples (screen and refit on each); expected false selections "
        f"<= {rec['bound_mb']:.3g} (Meinshausen & Buhlmann 2010)"
        + (f", <= {ss:.3g} if unimodal (Shah & Samworth 2013)" if ss is not None else "")
    )


#: Names of the held-out metrics on the page.
METRIC_NAMES = {"r2": "R^2", "auc": "AUC", "deviance": "mean deviance", "concordance": "C-index"}


def _cv_line(summary) -> str | None:
    """The cross-validated accuracy (mean +- sd over the folds), from the manifest's ``cv``."""
    rec = summary.record.extra.get("cv")
    if not rec:
        return None

    def num(v):
        return "NA" if v is None else f"{v:.3f}"

    parts = [
        f"{METRIC_NAMES.get(m, m)} {num(v.get('mean'))} +- {num(v.get('sd'))}"
        for m, v in rec.get("metrics", {}).items()
    ]
    return (
        ", ".join(parts) + f" (mean +- sd over {rec['n_folds']} folds; screen and refit on the "
        "training folds only, so the held-out samples never chose the features)"
    )


def _summary(summary) -> str:
    rec = summary.record
    cfg = rec.config
    ds = rec.dataset
    shape = ds.get("shape")
    n = rec.samples.get("n_analysed")
    covs = cfg.get("covariates") or []
    keep = cfg.get("keep", cfg.get("shortlist"))
    d = rec.shortlist
    how = " (floor(n / log n))" if keep == "auto" else ""
    c = summary.counts
    lam = summary.lambda_gc
    tested = c.get("tested")
    rows = [
        (
            "data",
            f"{n:,} samples analysed x {shape[1]:,} features ({ds.get('path')})"
            if shape and n is not None
            else ds.get("path"),
        ),
        ("family", cfg.get("family")),
        (
            "response",
            cfg.get("response") + (f", event {cfg['event']}" if cfg.get("event") else "")
            if cfg.get("response")
            else None,
        ),
        ("covariates", ", ".join(covs) if covs else "none"),
        ("filters", _filters(cfg)),
        ("shortlist", f"{d} features{how}" if d else None),
        ("threshold", _threshold(summary) if rec.command == "run" else None),
        ("penalty, tuning", f"{cfg['penalty']}, {cfg['criterion']}" if "penalty" in cfg else None),
        ("tested", f"{tested:,} features with a p-value" if tested is not None else None),
        (
            "reference lines",
            f"genome-wide p = 5e-8 (common practice); Bonferroni 0.05 / {tested:,} = "
            f"{0.05 / tested:.3e}"
            if tested
            else None,
        ),
        ("lambda_GC", f"{lam:.3f}" if lam is not None and np.isfinite(lam) else None),
        ("stability selection", _stability_line(summary)),
        ("cross-validation", _cv_line(summary)),
    ]
    parts = [
        '<section id="summary"><h2>Summary</h2>',
        f'<p class="answer">{escape(_answer(summary))}</p>',
        _kv(rows),
    ]
    if rec.command == "run":
        parts += ["<h3>Selected model</h3>", _model_table(summary) or "<p>No feature selected.</p>"]
    else:
        parts += ["<h3>Shortlist</h3>", _shortlist_table(summary)]
    cautions = [*summary.cautions, *summary.notes, *CAUTIONS]
    parts += [
        '<div class="cautions"><b>Cautions: read this first</b><ul>'
        + "".join(f"<li>{escape(x)}</li>" for x in cautions)
        + "</ul></div></section>"
    ]
    return "".join(parts)


# --------------------------------------------------------------------------------------------
# Pictures, tables, details


def _figures(summary) -> str:
    parts = []
    for rec in summary.figures:
        data = base64.b64encode(rec.png).decode("ascii")
        alt = rec.alt or rec.title
        parts.append(
            f'<figure id="fig-{escape(rec.name)}"><img alt="{escape(alt)}" '
            f'src="data:image/png;base64,{data}"><figcaption><b>{escape(rec.title)}.</b> '
            f"{escape(rec.caption)}</figcaption></figure>"
        )
    return "".join(parts) or "<p>No pictures for this run.</p>"


def _redundant(frame) -> tuple[str, ...]:
    """Columns a page table leaves out: empty ones (all NA), ``mean`` beside allele frequencies,
    and ``term`` (the feature column already says intercept or covariate)."""
    skip = [c for c in frame.columns if frame[c].isna().all()]
    if "allele_freq" in frame and frame["allele_freq"].notna().any():
        skip.append("mean")
    return (*skip, "term")


def _tables(summary) -> str:
    parts = ['<section id="tables"><h2>Tables</h2>']
    r = summary.ranking
    if r is not None:
        n = len(r)
        shown = min(summary.top, n)
        parts += [
            "<h3>Ranking</h3>",
            f"<p>The top {shown} of {n} listed features, strongest first (ranking.tsv). "
            "Marginal p-values, one test per feature: not adjusted for multiple testing.</p>",
            html_table(r, rows=summary.top, skip=_redundant(r)),
        ]
    if summary.model is not None:
        parts += [
            "<h3>Selected model</h3>",
            f'<p class="note">{escape(CAUTIONS[1])}</p>',
            # The refit's two columns need room: missing rate, mean and allele frequency stay in
            # model.tsv.
            html_table(
                summary.model,
                skip=(*_redundant(summary.model), "missing_rate", "mean", "allele_freq"),
            ),
        ]
    st = summary.stability
    if st is not None:
        shown = min(summary.top, len(st))
        parts += [
            "<h3>Stability selection</h3>",
            f"<p>The {shown} most frequently selected of {len(st)} features selected in at least "
            "one half-sample (stability.tsv); <i>stable</i>: at or above the threshold.</p>",
            html_table(st, rows=summary.top),
        ]
    if summary.cv is not None:
        parts += [
            "<h3>Cross-validation</h3>",
            "<p>Held-out accuracy per fold (cv.tsv): each fold's screen and refit saw only the "
            "other folds. Screening on all samples and then cross-validating only the refit would "
            "be optimistic (Ambroise & McLachlan 2002).</p>",
            html_table(summary.cv, skip=_redundant(summary.cv)[:-1]),
        ]
    if summary.iterations is not None:
        parts += [
            "<h3>Iterations</h3>",
            html_table(summary.iterations),
        ]
    if summary.entries is not None and len(summary.entries):
        parts += [
            "<h3>Entries and exits</h3>",
            "<p>Every feature that entered or left the selected set, by iteration (entries.tsv).</p>",
            html_table(summary.entries),
        ]
    parts.append("</section>")
    return "".join(parts)


def _job(summary) -> str:
    rec = summary.record
    smp = rec.samples
    sessions = rec.sessions
    rows = [
        ("command", rec.command),
        ("run folder", summary.path),
        ("started", _when(sessions[0].started) if sessions else None),
        ("dataset fingerprint", rec.dataset.get("fingerprint")),
        ("samples analysed", smp.get("n_analysed")),
        ("dropped for missing values", smp.get("n_dropped_missing")),
        ("outcome rows with unknown ids", smp.get("n_unknown_ids")),
        ("store samples without outcome", smp.get("n_store_without_outcome")),
        ("stop reason", rec.stop_reason),
    ]
    return _kv(rows)


def _pass_order(name: str) -> tuple:
    """screen (and its halves) first, then iter1, iter2, ... in number order."""
    m = re.match(r"(screen|iter)(\d*)(.*)", name)
    if not m:
        return (2, 0, name)
    return (0 if m.group(1) == "screen" else 1, int(m.group(2) or 0), m.group(3))


def _timings(summary) -> str:
    rec = summary.record
    sess = rec.sessions
    known = [s.seconds for s in sess if s.seconds is not None]
    total = sum(known) if known else None
    rows = {"session": [], "started": [], "kind": [], "status": [], "seconds": []}
    for i, s in enumerate(sess):
        rows["session"].append(i + 1)
        rows["started"].append(_when(s.started) or "NA")
        rows["kind"].append("resumed" if s.resumed else "new")
        rows["status"].append(s.status or "running")
        rows["seconds"].append(s.seconds)
    out = [
        f"<p>{len(sess)} session{'s' if len(sess) != 1 else ''}"
        + (f", {sum(s.resumed for s in sess)} resumed" if len(sess) > 1 else "")
        + (f"; {_seconds(total)} of work in total" if total is not None else "")
        + ".</p>",
        html_table(rows),
    ]
    passes = rec.passes
    if passes:
        cols = {
            "pass": [],
            "seconds": [],
            "per session": [],
            "blocks computed": [],
            "blocks reused": [],
        }
        for name, p in sorted(passes.items(), key=lambda kv: _pass_order(kv[0])):
            runs = p.runs or (p,)
            cols["pass"].append(name)
            cols["seconds"].append(p.total_seconds)
            cols["per session"].append(
                ", ".join(f"{(r.session or 0) + 1}: {r.seconds:.2f} s" for r in runs)
            )
            cols["blocks computed"].append(sum(r.blocks_computed for r in runs))
            cols["blocks reused"].append(p.blocks_reused)
        out.append(html_table(cols))
    return "".join(out)


def _versions(summary) -> str:
    rec = summary.record
    seen = [dict(s.versions) for s in rec.sessions if s.versions] or [rec.versions]
    first = seen[0]
    text = ", ".join(f"{k} {v}" for k, v in first.items())
    changed = [
        f"session {i + 1}: " + ", ".join(f"{k} {v}" for k, v in s.items() if first.get(k) != v)
        for i, s in enumerate(seen)
        if s != first
    ]
    out = f"<p>{escape(text)}.</p>"
    if changed:
        out += (
            '<p class="note">Later sessions ran other versions: '
            + escape("; ".join(changed))
            + ".</p>"
        )
    return out


def render_html(summary) -> str:
    """The whole page for a `RunSummary` (see `widescreen.report._build`)."""
    from ._build import model_features

    summary.model_rows = model_features(summary)
    rec = summary.record
    where = summary.path.resolve()
    title = f"widescreen report: {where.parent.name}/{where.name}"
    sec = [
        f"<header><h1>{escape(title)}</h1>",
        f'<p class="sub">{escape(rec.command)} run, status {escape(rec.status)}; generated '
        f"{escape(dt.datetime.now(dt.UTC).strftime('%Y-%m-%d %H:%M UTC'))}</p></header>",
        "<main>",
        _summary(summary),
        '<section id="pictures"><h2>Pictures</h2>',
        _figures(summary),
        "</section>",
        _tables(summary),
        '<section id="details"><h2>Details</h2><h3>The job</h3>',
        _job(summary),
        "<h3>Sessions and timings</h3>",
        _timings(summary),
        "<h3>Versions</h3>",
        _versions(summary),
        "</section></main>",
        f"<footer>Made by widescreen {escape(__version__)}.</footer>",
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>\n"
        + "\n".join(sec)
        + "\n</body></html>\n"
    )
