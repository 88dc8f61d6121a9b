"""The report page: one self-contained HTML file (pictures embedded as base64 PNG, no external assets).

The page shows feature-level summaries only; no sample identifier or sample-level value is written.
"""

from __future__ import annotations

import base64
import datetime as dt
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
h1 { font-size: 1.6rem; margin-bottom: 0.2rem; } h2 { font-size: 1.25rem; margin-top: 2rem;
     border-bottom: 1px solid #ddd; padding-bottom: 0.2rem; }
.sub { color: #555; margin-top: 0; }
.cautions { background: #fff4e5; border-left: 5px solid #d95f02; padding: 0.6rem 1rem; }
.cautions li { margin: 0.35rem 0; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.5rem 0; }
th, td { padding: 0.2rem 0.6rem; border-bottom: 1px solid #e5e5e5; text-align: right; }
th { background: #f3f3f3; } td.t, th.t { text-align: left; }
table.kv td:first-child { text-align: left; color: #555; } table.kv td { text-align: left; }
figure { margin: 1.2rem 0; } figure img { max-width: 100%; border: 1px solid #eee; }
figcaption { font-size: 0.85rem; color: #444; max-width: 60rem; }
.note { color: #7a4b00; } .scroll { overflow-x: auto; }
footer { margin-top: 3rem; font-size: 0.8rem; color: #777; }
"""

#: Table columns shown as text (left-aligned) rather than numbers.
TEXT_COLUMNS = {"feature", "chrom", "entered", "left", "selected", "features", "status"}


def fmt_cell(name: str, value: str) -> str:
    """A table cell's text: p-values in scientific notation, other numbers with 4 significant digits."""
    if name in TEXT_COLUMNS or value in ("", "NA"):
        return value
    try:
        f = float(value)
    except ValueError:
        return value
    if name in ("rank", "index", "pos", "iteration") or (f.is_integer() and "." not in value):
        return value
    if name == "p" or "p_value" in name:
        return f"{f:.3e}"
    return f"{f:.4g}"


def html_table(columns: dict[str, np.ndarray], rows: int | None = None, skip=()) -> str:
    names = [c for c in columns if c not in skip]
    if not names:
        return "<p>(empty)</p>"
    n = len(columns[names[0]]) if rows is None else min(rows, len(columns[names[0]]))
    head = "".join(
        f'<th class="{"t" if c in TEXT_COLUMNS else ""}">{escape(c)}</th>' for c in names
    )
    body = []
    for i in range(n):
        cells = "".join(
            f'<td class="{"t" if c in TEXT_COLUMNS else ""}">{escape(fmt_cell(c, str(columns[c][i])))}</td>'
            for c in names
        )
        body.append(f"<tr>{cells}</tr>")
    return f'<div class="scroll"><table><tr>{head}</tr>{"".join(body)}</table></div>'


def _kv(rows: list[tuple[str, object]]) -> str:
    cells = "".join(
        f"<tr><td>{escape(k)}</td><td>{escape(str(v))}</td></tr>" for k, v in rows if v is not None
    )
    return f'<table class="kv">{cells}</table>'


def _when(ts) -> str | None:
    if not isinstance(ts, int | float):
        return None
    return dt.datetime.fromtimestamp(ts, tz=dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _job(summary) -> str:
    m = summary.manifest
    cfg = m.get("config", {})
    ds = m.get("dataset", {})
    smp = m.get("samples", {})
    shape = ds.get("shape")
    covs = cfg.get("covariates") or []
    filters = [
        f"missing rate > {cfg['drop_missing']:g} excluded"
        if cfg.get("drop_missing") is not None
        else None,
        f"minor allele frequency < {cfg['drop_rare']:g} excluded"
        if cfg.get("drop_rare") is not None
        else None,
    ]
    sessions = m.get("sessions") or [{}]
    rows = [
        ("command", m.get("command")),
        ("run folder", summary.path),
        ("started", _when(sessions[0].get("started"))),
        ("sessions", f"{len(sessions)} ({sum(bool(s.get('resumed')) for s in sessions)} resumed)"),
        ("dataset", ds.get("path")),
        ("dataset shape", f"{shape[0]:,} samples x {shape[1]:,} features" if shape else None),
        ("dataset fingerprint", ds.get("fingerprint")),
        ("family", cfg.get("family")),
        ("response", cfg.get("response")),
        ("event indicator", cfg.get("event")),
        ("covariates", ", ".join(covs) if covs else "none"),
        ("filters", "; ".join(f for f in filters if f) or "none"),
        ("shortlist size", m.get("shortlist_size")),
        ("samples analysed", smp.get("n_analysed")),
        ("dropped for missing values", smp.get("n_dropped_missing")),
        ("outcome rows with unknown ids", smp.get("n_unknown_ids")),
        ("store samples without outcome", smp.get("n_store_without_outcome")),
    ]
    return _kv(rows)


def _results(summary) -> str:
    c = summary.counts
    lam = summary.lambda_gc
    rows = [
        ("features in the pass", f"{c['features']:,}" if "features" in c else None),
        ("filtered out", f"{c['filtered']:,}" if "filtered" in c else None),
        (
            "not testable (constant, or explained by the covariates)",
            f"{c['untested']:,}" if "untested" in c else None,
        ),
        ("tested (with a p-value)", f"{c['tested']:,}" if "tested" in c else None),
        ("lambda_GC", f"{lam:.4f}" if lam is not None and np.isfinite(lam) else None),
    ]
    text = _kv(rows)
    if lam is not None and np.isfinite(lam):
        text += (
            "<p>lambda_GC = median of the chi-square(1) statistics / 0.4549 (the chi-square(1) "
            "median), common practice. Near 1: no sign of inflation. Well above 1: confounding "
            "(population structure, batch), or many small true effects; well below 1: a test that "
            "is conservative here.</p>"
        )
    return text


def _timings(summary) -> str:
    m = summary.manifest
    passes = m.get("passes", {})
    cols: dict[str, list] = {
        k: [] for k in ("pass", "seconds", "blocks computed", "blocks reused", "n_features")
    }
    for name, rec in passes.items():
        cols["pass"].append(name)
        cols["seconds"].append(str(rec.get("seconds", "")))
        cols["blocks computed"].append(str(rec.get("blocks_computed", "")))
        cols["blocks reused"].append(str(rec.get("blocks_reused", "")))
        cols["n_features"].append(str(rec.get("n_features", "")))
    out = html_table({k: np.array(v, dtype=str) for k, v in cols.items()}) if passes else ""
    rows = [("total seconds", m.get("seconds_total"))]
    rows += [(k.replace("_", " ") + " seconds", v) for k, v in (m.get("timings") or {}).items()]
    return out + _kv(rows)


def _figures(summary) -> str:
    parts = []
    for rec in summary.figures:
        data = base64.b64encode(rec.png).decode("ascii")
        parts.append(
            f'<figure id="fig-{escape(rec.name)}"><img alt="{escape(rec.title)}" '
            f'src="data:image/png;base64,{data}"><figcaption><b>{escape(rec.title)}.</b> '
            f"{escape(rec.caption)}</figcaption></figure>"
        )
    return "".join(parts) or "<p>No pictures for this run.</p>"


def render_html(summary) -> str:
    """The whole page for a `RunSummary` (see `widescreen.report._build`)."""
    m = summary.manifest
    where = summary.path.resolve()
    title = f"widescreen report: {where.parent.name}/{where.name}"
    sec = [
        f"<h1>{escape(title)}</h1>",
        f'<p class="sub">{escape(str(m.get("command", "")))} run, status {escape(str(m.get("status")))}; '
        f"generated {escape(dt.datetime.now(dt.UTC).strftime('%Y-%m-%d %H:%M UTC'))}</p>",
        '<div class="cautions"><b>Read this first</b><ul>'
        + "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS)
        + "</ul></div>",
    ]
    if summary.notes:
        sec.append("".join(f'<p class="note">{escape(n)}</p>' for n in summary.notes))
    sec += ["<h2>The job</h2>", _job(summary), "<h2>Results</h2>", _results(summary)]
    r = summary.ranking
    if r is not None:
        n = len(next(iter(r.values()))) if r else 0
        shown = min(summary.top, n)
        sec += [
            "<h2>Ranking</h2>",
            f"<p>The top {shown} of {n} listed features, strongest first (from ranking.tsv). "
            "Marginal p-values, one test per feature: not adjusted for multiple testing.</p>",
            html_table(r, rows=summary.top),
        ]
    if summary.model is not None:
        sec += [
            "<h2>Selected model</h2>",
            f'<p class="note">{escape(CAUTIONS[1])}</p>',
            html_table(summary.model),
        ]
    if summary.iterations is not None:
        sec += ["<h2>Iterations</h2>", html_table(summary.iterations)]
    sec += ["<h2>Pictures</h2>", _figures(summary), "<h2>Timings</h2>", _timings(summary)]
    versions = m.get("versions", {})
    sec.append(
        f"<footer>widescreen {escape(__version__)}; run made with "
        + escape(", ".join(f"{k} {v}" for k, v in versions.items()))
        + "</footer>"
    )
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>\n"
        + "\n".join(sec)
        + "\n</body></html>\n"
    )
