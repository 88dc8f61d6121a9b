"""Pictures of a run: Manhattan, QQ, score histogram, lambda path, criterion curve, iterations,
and the trace of which features entered and left the selected set.

Each plot function is pure: arrays in, a `matplotlib.figure.Figure` out. Figures are made without
pyplot, so no display or global state is involved; they render with the Agg canvas.

Colours are from the Okabe-Ito palette (distinguishable with the common colour-vision deficiencies)
and every distinction also has a shape, line style or lightness, so the pictures read in greyscale.
Feature ids are drawn as plain text (no mathtext, no TeX): an id may hold ``$`` or ``_``.
"""

from __future__ import annotations

import functools
import io
import os
import re
import textwrap
from pathlib import Path

import numpy as np
from matplotlib import rc_context
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import EngFormatter, FuncFormatter, MaxNLocator

from ._stats import GENOME_WIDE

#: Okabe-Ito colours (Okabe & Ito 2008, "Color Universal Design"), safe for colour-blind readers.
OI_ORANGE, OI_SKY, OI_GREEN, OI_BLUE, OI_VERMILLION, OI_PURPLE = (
    "#E69F00",
    "#56B4E9",
    "#009E73",
    "#0072B2",
    "#D55E00",
    "#CC79A7",
)
#: Two greys of different lightness for neighbouring chromosomes (the background of the picture).
CHROM_COLOURS = ("#4a4a4a", "#c4c4c4")
HIGHLIGHT = OI_ORANGE
MODEL = OI_BLUE
LINE_GW = OI_VERMILLION
LINE_BONF = "#000000"
GREY = "#b8b8b8"
#: Colours and line styles of labelled lines, in turn (the style tells them apart in greyscale).
SERIES = (
    (OI_BLUE, "-"),
    (OI_VERMILLION, "--"),
    (OI_GREEN, "-."),
    (OI_PURPLE, ":"),
    (OI_ORANGE, "-"),
    (OI_SKY, "--"),
    ("#000000", "-."),
)
DPI = 110
#: Plain text everywhere unless a label asks for mathtext: a user's matplotlibrc with usetex on must
#: not send feature ids to TeX.
PLAIN = {"text.usetex": False}


def plain_text(fn):
    """Run a plot function with TeX off (text objects take the setting when they are made)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with rc_context(PLAIN):
            return fn(*args, **kwargs)

    return wrapper


def _figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _note(fig: Figure, text: str | None) -> None:
    """A note under the axes, wrapped to the figure's width, in a size that stays readable."""
    if text:
        width = int(fig.get_figwidth() * 14)  # characters of 9 pt text per inch, roughly
        t = fig.supxlabel(
            textwrap.fill(text, width), fontsize=9, color="#333333", x=0.01, ha="left"
        )
        t.set_parse_math(False)


def _plain_labels(texts) -> None:
    """Feature ids as plain text: no mathtext for ``$`` in an id."""
    for t in texts:
        t.set_parse_math(False)


def png_bytes(fig: Figure) -> bytes:
    """The figure rendered as PNG."""
    buf = io.BytesIO()
    with rc_context(PLAIN):
        fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def save_png(fig: Figure, path: str | os.PathLike, data: bytes | None = None) -> Path:
    """Write the figure as PNG to a temporary name in the same folder, then rename it to ``path``.

    ``data`` (from `png_bytes`) avoids rendering the figure a second time.
    """
    from ..engine._runfolder import atomic_write

    path = Path(path)
    atomic_write(path, png_bytes(fig) if data is None else data)
    return path


# --------------------------------------------------------------------------------------------
# Manhattan


def chrom_sort_key(name: str) -> tuple:
    """Natural order of chromosome names: 1, 2, ..., 22, X, Y, XY, MT, then the rest by name."""
    s = re.sub(r"^(chr|chrom|chromosome)", "", str(name), flags=re.IGNORECASE)
    if s.isdigit():
        return (0, int(s), "")
    special = {"X": 1, "Y": 2, "XY": 3, "M": 4, "MT": 4}
    if s.upper() in special:
        return (1, special[s.upper()], "")
    return (2, 0, s)


def genome_axis(
    codes: np.ndarray, pos: np.ndarray, names: list[str], lo: np.ndarray, hi: np.ndarray
) -> dict:
    """Place features of several chromosomes on one axis, chromosomes side by side in natural order.

    Parameters
    ----------
    codes : ndarray of int of shape (k,)
        Chromosome code of each point (an index into ``names``).
    pos : ndarray of int of shape (k,)
    names : list of str of length c
    lo, hi : ndarray of shape (c,)
        Smallest and largest position on each chromosome (over all features, not only the points).

    Returns
    -------
    dict
        ``x`` of shape (k,), ``parity`` of shape (k,) (0/1 alternating by chromosome), ``ticks`` and
        ``labels`` (one per chromosome, at its middle), ``bounds`` (start and end of each chromosome).
    """
    order = sorted(range(len(names)), key=lambda i: chrom_sort_key(names[i]))
    span = np.maximum(np.asarray(hi, float) - np.asarray(lo, float), 1.0)
    gap = 0.004 * span.sum()
    start = np.zeros(len(names))
    rank = np.zeros(len(names), dtype=np.int64)
    at = 0.0
    for r, i in enumerate(order):
        start[i], rank[i] = at, r
        at += span[i] + gap
    codes = np.asarray(codes, dtype=np.int64)
    x = start[codes] + (np.asarray(pos, float) - np.asarray(lo, float)[codes])
    return {
        "x": x,
        "parity": rank[codes] % 2,
        "ticks": np.array([start[i] + span[i] / 2 for i in order]),
        "labels": [re.sub(r"^(chr|chrom)", "", names[i], flags=re.IGNORECASE) for i in order],
        "bounds": np.array([[start[i], start[i] + span[i]] for i in order]).reshape(-1, 2),
    }


#: Lines closer than this in -log10 p are drawn as one (a factor of about 1.8 in p).
MERGE_LINES = 0.25


@plain_text
def manhattan_plot(
    x: np.ndarray,
    y: np.ndarray,
    *,
    n_tested: int,
    parity: np.ndarray | None = None,
    ticks: np.ndarray | None = None,
    labels: list[str] | None = None,
    highlight: np.ndarray | None = None,
    marked: np.ndarray | None = None,
    point_ids: np.ndarray | None = None,
    xlabel: str = "feature index in the store",
    title: str = "Manhattan plot",
    note: str | None = None,
    alpha: float = 0.05,
    max_labels: int = 25,
) -> Figure:
    """-log10 p against position, with the genome-wide and Bonferroni lines.

    Parameters
    ----------
    x, y : ndarray of shape (k,)
        Position on the axis and -log10 p of the drawn points.
    n_tested : int
        Number of features tested (for the Bonferroni line ``alpha / n_tested``).
    parity : ndarray of int of shape (k,), optional
        0/1 by chromosome, for the alternating greys.
    ticks, labels : optional
        Chromosome tick positions and names.
    highlight : ndarray of bool of shape (k,), optional
        Shortlisted points (orange triangles).
    marked : ndarray of bool of shape (k,), optional
        Points of the selected model (blue diamonds, labelled with their ids).
    point_ids : ndarray of str of shape (k,), optional
        Ids to write beside points ("" for none), as plain text.
    note : str, optional
        A note under the axes (how the points were thinned).
    max_labels : int
        At most this many points are labelled (the strongest).

    Notes
    -----
    The genome-wide line at p = 5e-8 is the usual threshold for common-variant association
    studies (common practice); the Bonferroni line is the family-wise 0.05 level for the features
    actually tested here. When the two lie within `MERGE_LINES` of each other, one line is drawn
    and named for both.
    """
    fig = _figure(11.0, 4.6)
    ax = fig.add_subplot()
    x, y = np.asarray(x, float), np.asarray(y, float)
    par = np.zeros(x.size, int) if parity is None else np.asarray(parity)
    h = np.zeros(x.size, bool) if highlight is None else np.asarray(highlight, bool)
    mk = np.zeros(x.size, bool) if marked is None else np.asarray(marked, bool)
    rest = ~(h | mk)
    for k, colour in enumerate(CHROM_COLOURS):
        sel = rest & (par == k)
        ax.scatter(x[sel], y[sel], s=4, c=colour, linewidths=0, rasterized=True)
    short = h & ~mk
    if short.any():
        ax.scatter(
            x[short],
            y[short],
            s=22,
            c=HIGHLIGHT,
            marker="^",
            edgecolors="#7a5200",
            linewidths=0.5,
            label="shortlisted",
            zorder=3,
        )
    if mk.any():
        ax.scatter(
            x[mk],
            y[mk],
            s=48,
            c=MODEL,
            marker="D",
            edgecolors="#000000",
            linewidths=0.8,
            label="in the selected model",
            zorder=4,
        )
    if point_ids is not None:
        ids = np.asarray(point_ids, dtype=object)
        lab = ids != ""
        if lab.any():
            _label_points(ax, x[lab], y[lab], ids[lab], max_labels)
    gw = -np.log10(GENOME_WIDE)
    bonf = -np.log10(alpha / n_tested) if n_tested > 0 else None
    if bonf is not None and abs(bonf - gw) < MERGE_LINES:
        ax.axhline(
            bonf,
            color=LINE_BONF,
            ls="--",
            lw=1.2,
            label=f"Bonferroni {alpha:g} / {n_tested:,} (p = {alpha / n_tested:.2g}) "
            "~ genome-wide 5e-8",
        )
    else:
        ax.axhline(gw, color=LINE_GW, ls="--", lw=1.2, label="genome-wide p = 5e-8")
        if bonf is not None:
            ax.axhline(
                bonf,
                color=LINE_BONF,
                ls=":",
                lw=1.4,
                label=f"Bonferroni {alpha:g} / {n_tested:,} (p = {alpha / n_tested:.2g})",
            )
    top = max(float(np.nanmax(y)) if y.size else 0.0, gw, bonf or gw)
    ax.set_ylim(0, top * 1.15 + 0.5)
    if x.size:
        pad = 0.01 * (x.max() - x.min() + 1)
        ax.set_xlim(x.min() - pad, x.max() + pad)
    if ticks is not None and labels is not None:
        step = max(1, int(np.ceil(len(labels) / 30)))  # keep labels legible with many contigs
        ax.set_xticks(ticks[::step], labels[::step], fontsize=8)
        _plain_labels(ax.get_xticklabels())
        xlabel = "chromosome"
    else:
        ax.xaxis.set_major_formatter(EngFormatter(sep=""))  # 2M rather than 0.2 x 1e7
    ax.set_xlabel(xlabel)
    ax.set_ylabel(r"$-\log_{10}\,p$")
    ax.set_title(title)
    leg = ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8.5, frameon=False)
    _plain_labels(leg.get_texts())
    ax.spines[["top", "right"]].set_visible(False)
    _note(fig, note)
    return fig


def _label_points(ax, x: np.ndarray, y: np.ndarray, ids: np.ndarray, max_labels: int) -> None:
    """Ids beside the strongest points, alternately above and below when neighbours crowd."""
    order = np.argsort(-y, kind="stable")[:max_labels]
    order = order[np.argsort(x[order], kind="stable")]
    span = (np.nanmax(x) - np.nanmin(x)) if x.size > 1 else 1.0
    last_x, up = -np.inf, True
    for i in order:
        crowded = x[i] - last_x < 0.04 * max(span, 1.0)
        up = not up if crowded else True
        ax.annotate(
            str(ids[i]),
            (x[i], y[i]),
            xytext=(4, 7 if up else -11),
            textcoords="offset points",
            fontsize=8,
            color="#000000",
            parse_math=False,
            zorder=5,
        )
        last_x = x[i]


# --------------------------------------------------------------------------------------------
# QQ and histogram


@plain_text
def qq_plot(
    expected: np.ndarray,
    observed: np.ndarray,
    *,
    lambda_gc: float | None = None,
    band: tuple[np.ndarray, np.ndarray] | None = None,
    title: str = "QQ plot of p-values",
    note: str | None = None,
) -> Figure:
    """Observed against expected -log10 p, with the identity line and an optional null band.

    Parameters
    ----------
    expected, observed : ndarray of shape (k,)
    lambda_gc : float, optional
        Shown in the corner.
    band : (lower, upper) of ndarray of shape (k,), optional
        Pointwise 95% band of the order statistics under the null, in -log10 p.
    """
    fig = _figure(5.4, 5.2)
    ax = fig.add_subplot()
    e, o = np.asarray(expected, float), np.asarray(observed, float)
    order = np.argsort(e)
    if band is not None:
        ax.fill_between(
            e[order],
            band[0][order],
            band[1][order],
            color="#cccccc",
            lw=0,
            label="95% band under the null",
        )
    lim = max(float(e.max()) if e.size else 1.0, 1.0)
    ax.plot([0, lim], [0, lim], color=LINE_GW, lw=1, label="observed = expected")
    ax.scatter(e, o, s=6, c=OI_BLUE, linewidths=0, rasterized=True, label="p-values")
    if lambda_gc is not None and np.isfinite(lambda_gc):
        ax.text(
            0.04,
            0.95,
            rf"$\lambda_{{GC}}$ = {lambda_gc:.3f}",
            transform=ax.transAxes,
            va="top",
            fontsize=11,
        )
    ax.set_xlabel(r"expected $-\log_{10}\,p$")
    ax.set_ylabel(r"observed $-\log_{10}\,p$")
    ax.set_xlim(0, lim * 1.03)
    ax.set_ylim(0, max(float(o.max()) if o.size else 1.0, lim) * 1.05)
    ax.set_title(title)
    ax.legend(loc="lower right", fontsize=8, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    _note(fig, note)
    return fig


@plain_text
def score_histogram(
    edges: np.ndarray,
    counts: np.ndarray,
    *,
    cutoff: float | None = None,
    cutoff_label: str = "shortlist cutoff",
    xlabel: str = "screening score",
    title: str = "Screening scores",
    note: str | None = None,
) -> Figure:
    """Histogram of the screening scores (counts on a log scale), the shortlist cutoff marked.

    Parameters
    ----------
    edges : ndarray of shape (B + 1,)
    counts : ndarray of shape (B,)
    cutoff : float, optional
        Score of the last shortlisted feature.
    """
    fig = _figure(6.4, 4.0)
    ax = fig.add_subplot()
    edges, counts = np.asarray(edges, float), np.asarray(counts, float)
    ax.stairs(counts, edges, fill=True, color=OI_SKY, edgecolor=OI_BLUE)
    if np.any(counts > 0):
        ax.set_yscale("log")
        ax.set_ylim(0.7, counts.max() * 1.6)
    if cutoff is not None and np.isfinite(cutoff):
        ax.axvline(cutoff, color=OI_VERMILLION, ls="--", lw=1.5, label=cutoff_label)
        ax.legend(loc="upper right", fontsize=8, frameon=False)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("features (log scale)")
    ax.set_title(title)
    ax.spines[["top", "right"]].set_visible(False)
    _note(fig, note)
    return fig


# --------------------------------------------------------------------------------------------
# The penalised fit and the iterations


@plain_text
def lambda_path_plot(
    lambdas: np.ndarray,
    coefs: np.ndarray,
    *,
    chosen: float | None = None,
    names: list[str] | None = None,
    selected: list[str] | None = None,
    title: str = "Coefficient path",
) -> Figure:
    """Coefficients against log10 lambda: the selected features in colour and labelled, the rest grey.

    Parameters
    ----------
    lambdas : ndarray of shape (L,)
    coefs : ndarray of shape (L, d)
    chosen : float, optional
        The selected lambda (a vertical line).
    names : list of str of length d, optional
        Feature ids of the columns.
    selected : list of str, optional
        Ids drawn in colour and named in the legend (at most 12; the others of them in black);
        the rest of the fitted features are grey. Without it, every feature is drawn in colour
        when there are at most 12.
    title : str
    """
    fig = _figure(7.6, 4.6)
    ax = fig.add_subplot()
    lam = np.asarray(lambdas, float)
    B = np.asarray(coefs, float).reshape(lam.size, -1)
    xl = np.log10(lam)
    names = list(names) if names is not None else [f"feature {j}" for j in range(B.shape[1])]
    if selected is None:
        selected = names if B.shape[1] <= 12 else []
    chosen_set = set(selected)
    grey = [j for j in range(B.shape[1]) if names[j] not in chosen_set]
    for j in grey:  # one line per fitted feature: the shortlist is small
        ax.plot(xl, B[:, j], lw=0.8, color=GREY, zorder=1)
    if grey:
        ax.plot([], [], lw=0.8, color=GREY, label=f"not selected ({len(grey)})")
    sel = [j for j in range(B.shape[1]) if names[j] in chosen_set]
    for k, j in enumerate(sel):
        colour, style = SERIES[k % len(SERIES)] if k < 12 else ("#000000", "-")
        ax.plot(
            xl,
            B[:, j],
            lw=1.8,
            color=colour,
            ls=style,
            label=names[j] if k < 12 else None,
            zorder=3,
        )
    ax.axhline(0, color="#999999", lw=0.6)
    if chosen is not None and np.isfinite(chosen) and chosen > 0:
        ax.axvline(np.log10(chosen), color="#000000", ls=(0, (1, 2)), lw=1, label="chosen lambda")
    ax.set_xlabel(r"$\log_{10}\,\lambda$ (larger: stronger penalty)")
    ax.set_ylabel("coefficient (per unit)")
    ax.set_title(title)
    leg = ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    _plain_labels(leg.get_texts())
    ax.spines[["top", "right"]].set_visible(False)
    return fig


@plain_text
def criterion_plot(
    lambdas: np.ndarray,
    values: np.ndarray,
    *,
    chosen: float | None = None,
    name: str = "criterion",
    std_error: np.ndarray | None = None,
) -> Figure:
    """The tuning criterion against log10 lambda (smaller is better), the chosen lambda marked."""
    fig = _figure(6.4, 4.0)
    ax = fig.add_subplot()
    xl = np.log10(np.asarray(lambdas, float))
    v = np.asarray(values, float)
    if std_error is not None:
        ax.errorbar(xl, v, yerr=np.asarray(std_error, float), fmt="o-", ms=3, lw=1, capsize=2)
    else:
        ax.plot(xl, v, "o-", ms=3, lw=1, color=OI_BLUE)
    if chosen is not None and np.isfinite(chosen) and chosen > 0:
        ax.axvline(np.log10(chosen), color=LINE_GW, ls="--", lw=1, label="chosen lambda")
        ax.legend(fontsize=8, frameon=False)
    ax.set_xlabel(r"$\log_{10}\,\lambda$")
    ax.set_ylabel(f"{name} (smaller is better)")
    ax.set_title(f"Tuning: {name}")
    ax.spines[["top", "right"]].set_visible(False)
    return fig


@plain_text
def iterations_plot(
    iteration: np.ndarray,
    size: np.ndarray,
    *,
    entered: np.ndarray | None = None,
    left: np.ndarray | None = None,
) -> Figure:
    """Size of the selected set after each iteration, with the numbers that entered and left."""
    fig = _figure(7.0, 3.8)
    ax = fig.add_subplot()
    it = np.asarray(iteration, float)
    ax.bar(it, np.asarray(size, float), width=0.6, color=OI_SKY, label="selected set")
    if entered is not None:
        ax.plot(it, entered, "^-", color=OI_GREEN, ms=6, lw=1.2, label="entered")
    if left is not None:
        ax.plot(it, left, "v--", color=OI_VERMILLION, ms=6, lw=1.2, label="left")
    ax.set_xticks(it)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("iteration (0 = the marginal screen)")
    ax.set_ylabel("features")
    ax.set_title("Selected set by iteration")
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    ax.spines[["top", "right"]].set_visible(False)
    return fig


@plain_text
def selection_trace_plot(
    features: list[str],
    iterations: np.ndarray,
    member: np.ndarray,
    *,
    final: np.ndarray | None = None,
) -> Figure:
    """Which features were in the selected set after each iteration, with their entries and exits.

    Parameters
    ----------
    features : list of str of length n_f
        Every feature that was ever selected (rows, drawn top to bottom).
    iterations : ndarray of int of shape (n_it,)
    member : ndarray of bool of shape (n_f, n_it)
        In the selected set after the iteration.
    final : ndarray of bool of shape (n_f,), optional
        In the final model (its id is drawn in bold).
    """
    n_f, n_it = member.shape
    fig = _figure(min(2.6 + 0.7 * n_it, 10.0), min(1.6 + 0.24 * n_f, 14.0))
    ax = fig.add_subplot()
    rows = np.arange(n_f)
    prev = np.concatenate([np.zeros((n_f, 1), bool), member[:, :-1]], axis=1)
    entered = member & ~prev
    left = ~member & prev
    stay = member & prev
    cols = np.broadcast_to(np.arange(n_it), (n_f, n_it))
    rr = np.broadcast_to(rows[:, None], (n_f, n_it))
    for mask, marker, colour, size, label in (
        (stay, "s", OI_BLUE, 70, "in the selected set"),
        (entered, "^", OI_GREEN, 90, "entered (and in the set)"),
        (left, "X", OI_VERMILLION, 80, "left"),
    ):
        if mask.any():
            ax.scatter(
                cols[mask],
                rr[mask],
                marker=marker,
                s=size,
                c=colour,
                edgecolors="#000000",
                linewidths=0.6,
                label=label,
                zorder=3,
            )
    for j in range(n_f):  # a thin line while a feature is in the set
        ins = np.flatnonzero(member[j])
        if ins.size:
            ax.hlines(j, ins.min(), ins.max(), color="#777777", lw=0.8, zorder=1)
    ax.set_yticks(rows, [str(f) for f in features], fontsize=8)
    _plain_labels(ax.get_yticklabels())
    if final is not None:
        for t, f in zip(ax.get_yticklabels(), final, strict=True):
            t.set_fontweight("bold" if f else "normal")
    ax.set_xticks(np.arange(n_it), [str(int(i)) for i in iterations])
    ax.set_xlim(-0.6, n_it - 0.4)
    ax.set_ylim(n_f - 0.5, -0.5)
    ax.set_xlabel("iteration (0 = the marginal screen)")
    ax.set_title("Entries and exits of the selected set")
    ax.grid(axis="x", color="#e5e5e5", lw=0.6)
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    ax.spines[["top", "right"]].set_visible(False)
    return fig


@plain_text
def stability_plot(
    frequency: np.ndarray,
    threshold: float,
    *,
    in_model: np.ndarray | None = None,
    names: list[str] | None = None,
    label: int = 10,
) -> Figure:
    """Selection frequency against its rank (most frequent first), the threshold as a dashed line.

    Parameters
    ----------
    frequency : ndarray of shape (m,)
        Selection frequencies, in decreasing order.
    threshold : float
        The stable set's threshold pi_thr.
    in_model : ndarray of bool of shape (m,), optional
        In the run's final model (blue diamonds; others sky-blue circles).
    names : list of str, optional
        Feature ids; the first ``label`` are written beside their points.
    """
    f = np.asarray(frequency, float)
    rank = np.arange(1, f.size + 1)
    model = np.zeros(f.size, bool) if in_model is None else np.asarray(in_model, bool)
    fig = _figure(7.0, 4.0)
    ax = fig.add_subplot()
    if (~model).any():
        ax.plot(rank[~model], f[~model], "o", ms=4, color=OI_SKY, label="other features")
    if model.any():
        ax.plot(rank[model], f[model], "D", ms=6, color=MODEL, label="in the final model")
    ax.axhline(threshold, ls="--", lw=1.2, color=LINE_GW, label=f"threshold {threshold:g}")
    if names:
        texts = [
            ax.annotate(
                str(n), (r, v), xytext=(4, 3), textcoords="offset points", fontsize=7, rotation=30
            )
            for n, r, v in zip(names[:label], rank[:label], f[:label], strict=False)
        ]
        _plain_labels(texts)
    if f.size > 50:  # a long tail of rarely selected features: spread the top ranks out
        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    else:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylim(-0.02, 1.12)
    ax.set_xlabel("rank by selection frequency" + (" (log scale)" if f.size > 50 else ""))
    ax.set_ylabel("selection frequency")
    ax.set_title("Stability selection")
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    ax.spines[["top", "right"]].set_visible(False)
    return fig
