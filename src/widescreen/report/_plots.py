"""Pictures of a run: Manhattan, QQ, score histogram, lambda path, criterion curve, iterations.

Each plot function is pure: arrays in, a `matplotlib.figure.Figure` out. Figures are made without
pyplot, so no display or global state is involved; they render with the Agg canvas.
"""

from __future__ import annotations

import io
import os
import re
import textwrap
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import EngFormatter, MaxNLocator

from ._stats import GENOME_WIDE

#: Two alternating colours for neighbouring chromosomes, and the accents.
CHROM_COLOURS = ("#1f4e79", "#79a6d2")
HIGHLIGHT = "#d95f02"
MODEL = "#000000"
LINE_GW = "#b2182b"
LINE_BONF = "#555555"
DPI = 110


def _figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _note(fig: Figure, text: str | None) -> None:
    """Small print under the axes, wrapped to the figure's width."""
    if text:
        width = int(fig.get_figwidth() * 17)  # characters of 7.5 pt text per inch, roughly
        fig.supxlabel(textwrap.fill(text, width), fontsize=7.5, color="#444444", x=0.01, ha="left")


def png_bytes(fig: Figure) -> bytes:
    """The figure rendered as PNG."""
    buf = io.BytesIO()
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
    xlabel: str = "feature index in the store",
    title: str = "Manhattan plot",
    note: str | None = None,
    alpha: float = 0.05,
) -> Figure:
    """-log10 p against position, with the genome-wide and Bonferroni lines.

    Parameters
    ----------
    x, y : ndarray of shape (k,)
        Position on the axis and -log10 p of the drawn points.
    n_tested : int
        Number of features tested (for the Bonferroni line ``alpha / n_tested``).
    parity : ndarray of int of shape (k,), optional
        0/1 by chromosome, for the alternating colours.
    ticks, labels : optional
        Chromosome tick positions and names.
    highlight : ndarray of bool of shape (k,), optional
        Shortlisted points.
    marked : ndarray of bool of shape (k,), optional
        Points in the selected model.
    note : str, optional
        Small print under the axes (how the points were thinned).

    Notes
    -----
    The genome-wide line at p = 5e-8 is the usual threshold for common-variant association
    studies (common practice); the Bonferroni line is the family-wise 0.05 level for the features
    actually tested here.
    """
    fig = _figure(11.0, 4.2)
    ax = fig.add_subplot()
    x, y = np.asarray(x, float), np.asarray(y, float)
    par = np.zeros(x.size, int) if parity is None else np.asarray(parity)
    for k, colour in enumerate(CHROM_COLOURS):
        sel = par == k
        ax.scatter(x[sel], y[sel], s=4, c=colour, linewidths=0, rasterized=True)
    if highlight is not None and np.any(highlight):
        h = np.asarray(highlight, bool)
        ax.scatter(x[h], y[h], s=14, c=HIGHLIGHT, linewidths=0, label="shortlisted", zorder=3)
    if marked is not None and np.any(marked):
        mk = np.asarray(marked, bool)
        ax.scatter(
            x[mk],
            y[mk],
            s=42,
            facecolors="none",
            edgecolors=MODEL,
            marker="D",
            linewidths=0.9,
            label="in the selected model",
            zorder=4,
        )
    gw = -np.log10(GENOME_WIDE)
    ax.axhline(gw, color=LINE_GW, ls="--", lw=1, label="genome-wide p = 5e-8")
    if n_tested > 0:
        bonf = -np.log10(alpha / n_tested)
        ax.axhline(
            bonf, color=LINE_BONF, ls=":", lw=1.2, label=f"Bonferroni {alpha:g} / {n_tested:,}"
        )
    else:
        bonf = gw
    top = max(float(np.nanmax(y)) if y.size else 0.0, gw, bonf)
    ax.set_ylim(0, top * 1.08 + 0.5)
    if x.size:
        pad = 0.01 * (x.max() - x.min() + 1)
        ax.set_xlim(x.min() - pad, x.max() + pad)
    if ticks is not None and labels is not None:
        step = max(1, int(np.ceil(len(labels) / 30)))  # keep labels legible with many contigs
        ax.set_xticks(ticks[::step], labels[::step], fontsize=8)
        xlabel = "chromosome"
    else:
        ax.xaxis.set_major_formatter(EngFormatter(sep=""))  # 2M rather than 0.2 x 1e7
    ax.set_xlabel(xlabel)
    ax.set_ylabel(r"$-\log_{10}\,p$")
    ax.set_title(title)
    ax.legend(loc="upper right", fontsize=8, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    _note(fig, note)
    return fig


# --------------------------------------------------------------------------------------------
# QQ and histogram


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
    ax.scatter(e, o, s=6, c=CHROM_COLOURS[0], linewidths=0, rasterized=True)
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
    ax.stairs(counts, edges, fill=True, color=CHROM_COLOURS[1], edgecolor=CHROM_COLOURS[0])
    if np.any(counts > 0):
        ax.set_yscale("log")
        ax.set_ylim(0.7, counts.max() * 1.6)
    if cutoff is not None and np.isfinite(cutoff):
        ax.axvline(cutoff, color=HIGHLIGHT, lw=1.5, label=cutoff_label)
        ax.legend(loc="upper right", fontsize=8, frameon=False)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("features (log scale)")
    ax.set_title(title)
    ax.spines[["top", "right"]].set_visible(False)
    _note(fig, note)
    return fig


# --------------------------------------------------------------------------------------------
# The penalised fit and the iterations


def lambda_path_plot(
    lambdas: np.ndarray,
    coefs: np.ndarray,
    *,
    chosen: float | None = None,
    names: list[str] | None = None,
    title: str = "Coefficient path",
) -> Figure:
    """Coefficients against log10 lambda.

    Parameters
    ----------
    lambdas : ndarray of shape (L,)
    coefs : ndarray of shape (L, d)
    chosen : float, optional
        The selected lambda (a vertical line).
    names : list of str of length d, optional
        Labelled in a legend when there are at most 12 features.
    """
    fig = _figure(6.8, 4.4)
    ax = fig.add_subplot()
    lam = np.asarray(lambdas, float)
    B = np.asarray(coefs, float).reshape(lam.size, -1)
    xl = np.log10(lam)
    labelled = names is not None and B.shape[1] <= 12
    for j in range(B.shape[1]):  # one line per feature of the shortlist: d is small here
        ax.plot(xl, B[:, j], lw=1, label=names[j] if labelled else None)
    ax.axhline(0, color="#999999", lw=0.6)
    if chosen is not None and np.isfinite(chosen) and chosen > 0:
        ax.axvline(np.log10(chosen), color=LINE_GW, ls="--", lw=1, label="chosen lambda")
    ax.set_xlabel(r"$\log_{10}\,\lambda$ (larger: stronger penalty)")
    ax.set_ylabel("coefficient")
    ax.set_title(title)
    if labelled or chosen is not None:
        ax.legend(fontsize=7, frameon=False, loc="best")
    ax.spines[["top", "right"]].set_visible(False)
    return fig


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
        ax.plot(xl, v, "o-", ms=3, lw=1, color=CHROM_COLOURS[0])
    if chosen is not None and np.isfinite(chosen) and chosen > 0:
        ax.axvline(np.log10(chosen), color=LINE_GW, ls="--", lw=1, label="chosen lambda")
        ax.legend(fontsize=8, frameon=False)
    ax.set_xlabel(r"$\log_{10}\,\lambda$")
    ax.set_ylabel(f"{name} (smaller is better)")
    ax.set_title(f"Tuning: {name}")
    ax.spines[["top", "right"]].set_visible(False)
    return fig


def iterations_plot(
    iteration: np.ndarray,
    size: np.ndarray,
    *,
    entered: np.ndarray | None = None,
    left: np.ndarray | None = None,
) -> Figure:
    """Size of the selected set after each iteration, with the features that entered and left."""
    fig = _figure(6.4, 4.0)
    ax = fig.add_subplot()
    it = np.asarray(iteration, float)
    ax.bar(it, np.asarray(size, float), width=0.6, color=CHROM_COLOURS[1], label="selected set")
    if entered is not None:
        ax.plot(it, entered, "^-", color="#1b7837", ms=5, lw=1, label="entered")
    if left is not None:
        ax.plot(it, left, "v-", color=LINE_GW, ms=5, lw=1, label="left")
    ax.set_xticks(it)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("iteration")
    ax.set_ylabel("features")
    ax.set_title("Selected set by iteration")
    ax.legend(fontsize=8, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    return fig
