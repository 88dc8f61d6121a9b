"""Blockwise summaries of one pass's statistics, with memory bounded independently of p.

A pass's statistics are one float64 array of shape (n_features,) per column (read through
`widescreen.schema.PassStats`, by range). Every
summary here is an accumulator fed block by block (update), possibly over several passes over the
arrays (end_pass), then finished; `scan` drives a set of them with one read per block and pass.

Features that were filtered in the pass, and those with score exactly 0 and p-value 1 (constant, or
explained by the covariates), were not tested and are left out of every summary.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..store._format import as_unicode
from ._stats import neg_log10, thin_mask, thinning_plan

#: Features read per block (rounded up to whole chunks): 8 MiB per float64 column.
BLOCK = 1 << 20


@dataclass
class Chunk:
    """One block of statistics: columns of shape (b,) for features start..stop, and the tested mask."""

    start: int
    stop: int
    cols: dict[str, np.ndarray]
    tested: np.ndarray


class Accumulator:
    """Base of the blockwise summaries: which columns it reads and whether it needs another pass."""

    columns: tuple[str, ...] = ()

    def wants_pass(self) -> bool:
        return False

    def update(self, chunk: Chunk) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def end_pass(self) -> None:
        pass


def scan(stats, accumulators: list[Accumulator], block: int = BLOCK) -> None:
    """Feed every block of a pass's statistics to the accumulators, pass after pass until done.

    Parameters
    ----------
    stats : widescreen.schema.PassStats
        The pass's statistics: arrays of shape (n_features,), read by range.
    accumulators : list of Accumulator
    block : int
        Features per block (rounded up to a multiple of the arrays' chunk length).
    """
    names = set(stats.columns)
    while True:
        active = [a for a in accumulators if a.wants_pass()]
        if not active:
            return
        need = {c for a in active for c in a.columns} | {"filtered", "score", "p_value"}
        need &= names
        for start, stop, cols in stats.blocks(sorted(need), step=block):
            chunk = Chunk(start, stop, cols, tested_mask(cols, stop - start))
            for a in active:
                a.update(chunk)
        for a in active:
            a.end_pass()


def tested_mask(cols: dict[str, np.ndarray], b: int) -> np.ndarray:
    """Features of a block that were tested: not filtered, and not (score 0 with p-value 1)."""
    tested = np.ones(b, dtype=bool)
    if "filtered" in cols:
        tested &= cols["filtered"] != 1.0
    if "score" in cols:
        untested = cols["score"] == 0.0
        if "p_value" in cols:
            untested &= (cols["p_value"] == 1.0) | np.isnan(cols["p_value"])
        tested &= ~untested
    return tested


class Counts(Accumulator):
    """Numbers of features, of filtered ones and of untested ones (score 0 with p-value 1), in one pass."""

    columns = ("filtered",)

    def __init__(self) -> None:
        self.features = self.filtered = self.untested = 0
        self._done = False

    def wants_pass(self) -> bool:
        return not self._done

    def update(self, chunk: Chunk) -> None:
        b = chunk.stop - chunk.start
        filtered = chunk.cols["filtered"] == 1.0 if "filtered" in chunk.cols else np.zeros(b, bool)
        self.features += b
        self.filtered += int(filtered.sum())
        self.untested += int((~chunk.tested & ~filtered).sum())

    def end_pass(self) -> None:
        self._done = True


# --------------------------------------------------------------------------------------------
# The exact median of the p-values by radix selection


class RankSelector(Accumulator):
    """Exact order statistics of the tested, finite values of one column, in a few passes.

    Non-negative float64 values order like their bit patterns read as uint64, so the k-th smallest
    value is found 16 bits at a time: a pass histograms the next 16 bits of the values that share
    the prefix found so far. Once the values under the prefix are few (``gather_limit``) the next
    pass collects them and selects exactly. Memory: a 65,536-bin histogram, or the gathered values.

    Parameters
    ----------
    column : str
    gather_limit : int

    Attributes
    ----------
    count : int
        Number of values ranked.
    values : (float, float) or None
        After the scan: the two middle order statistics (equal when ``count`` is odd; NaN when 0).
    """

    def __init__(self, column: str = "p_value", gather_limit: int = 1 << 21) -> None:
        self.columns = (column,)
        self.column = column
        self.gather_limit = gather_limit
        self.count = 0
        self._pass = 0
        self._targets: list[dict] = []
        self._hist = np.zeros(1 << 16, dtype=np.int64)
        self.values: tuple[float, float] | None = None

    def wants_pass(self) -> bool:
        return self._pass == 0 or any(t["value"] is None for t in self._targets)

    def _bits(self, chunk: Chunk) -> np.ndarray:
        v = chunk.cols[self.column]
        v = v[chunk.tested & np.isfinite(v)]
        if np.any(v < 0):
            raise ValueError(f"{self.column}: negative values cannot be ranked by their bits")
        return (v + 0.0).view(np.uint64)  # + 0.0 turns -0.0 into +0.0

    def update(self, chunk: Chunk) -> None:
        u = self._bits(chunk)
        if self._pass == 0:
            self.count += u.size
            self._hist += np.bincount((u >> np.uint64(48)).astype(np.intp), minlength=1 << 16)
            return
        for t in self._targets:
            if t["value"] is not None:
                continue
            shift = np.uint64(64 - t["bits"])
            sel = u[(u >> shift) == np.uint64(t["prefix"])] if t["bits"] else u
            if t["gather"]:
                t["bucket"].append(sel)
            else:
                digit = ((sel >> np.uint64(48 - t["bits"])) & np.uint64(0xFFFF)).astype(np.intp)
                t["hist"] += np.bincount(digit, minlength=1 << 16)

    def end_pass(self) -> None:
        if self._pass == 0:
            if self.count == 0:
                self.values = (float("nan"), float("nan"))
                self._targets = []
            else:
                ranks = sorted({(self.count - 1) // 2, self.count // 2})
                self._targets = [self._descend(k, 0, 0, self._hist) for k in ranks]
        else:
            for t in self._targets:
                if t["value"] is not None:
                    continue
                if t["gather"]:
                    vals = np.concatenate(t["bucket"]) if t["bucket"] else np.empty(0, np.uint64)
                    t["value"] = float(np.partition(vals, t["rank"])[t["rank"]].view(np.float64))
                else:
                    t.update(self._descend(t["rank"], t["prefix"], t["bits"], t["hist"]))
        self._pass += 1
        if self._targets and all(t["value"] is not None for t in self._targets):
            v = [t["value"] for t in self._targets]
            self.values = (v[0], v[-1])

    def _descend(self, rank: int, prefix: int, bits: int, hist: np.ndarray) -> dict:
        """Pick the 16-bit digit holding ``rank``; decide whether the next pass gathers or refines."""
        cum = np.cumsum(hist)
        digit = int(np.searchsorted(cum, rank, side="right"))
        below = int(cum[digit - 1]) if digit else 0
        prefix = (prefix << 16) | digit
        bits += 16
        rank -= below
        t = {"rank": rank, "prefix": prefix, "bits": bits, "value": None, "bucket": []}
        if bits == 64:  # every bit is known: that is the value
            t["value"] = float(np.array([prefix], dtype=np.uint64).view(np.float64)[0])
        t["gather"] = int(hist[digit]) <= self.gather_limit
        t["hist"] = np.zeros(1 << 16, dtype=np.int64)
        return t


# --------------------------------------------------------------------------------------------
# The p-value scan: Manhattan points, QQ histogram, annotations


@dataclass
class ChromIndex:
    """Chromosome names met so far, their codes and the position range of each."""

    names: list[str] = field(default_factory=list)
    lo: list[int] = field(default_factory=list)
    hi: list[int] = field(default_factory=list)

    def codes(self, chrom: np.ndarray, pos: np.ndarray) -> np.ndarray:
        uniq, inv = np.unique(chrom, return_inverse=True)
        lookup = {n: i for i, n in enumerate(self.names)}
        glob = np.empty(uniq.size, dtype=np.int64)
        for j, name in enumerate(uniq.tolist()):  # a handful of names per block
            if name not in lookup:
                lookup[name] = len(self.names)
                self.names.append(name)
                self.lo.append(np.iinfo(np.int64).max)
                self.hi.append(np.iinfo(np.int64).min)
            glob[j] = lookup[name]
        codes = glob[inv]
        lo = np.full(len(self.names), np.iinfo(np.int64).max)
        hi = np.full(len(self.names), np.iinfo(np.int64).min)
        np.minimum.at(lo, codes, pos)
        np.maximum.at(hi, codes, pos)
        self.lo = np.minimum(self.lo, lo).tolist()
        self.hi = np.maximum(self.hi, hi).tolist()
        return codes


class PValueScan(Accumulator):
    """One pass over the p-values: the points a Manhattan plot draws and a histogram for the QQ plot.

    Kept: every tested feature with -log10 p >= ``threshold``, a random subset of the others (see
    `thin_mask`; seeded per block, so the choice does not depend on the block order) and every
    feature of ``highlight``. The threshold may be raised for very many features (see
    `thinning_plan`). The QQ histogram has ``bins`` bins over [0, threshold).

    Parameters
    ----------
    n_features : int
    threshold : float
    max_below : int
        About this many points below the threshold are drawn (under the null).
    highlight : ndarray of int, optional
        Store indices always kept (the shortlist).
    annotations : (chrom array, pos array), optional
        Zarr arrays of shape (n_features,) read block by block alongside.
    bins : int
    seed : int
    """

    columns = ("p_value",)

    def __init__(
        self,
        n_features: int,
        threshold: float = 3.0,
        max_below: int = 200_000,
        highlight: np.ndarray | None = None,
        annotations=None,
        bins: int = 6000,
        seed: int = 0,
    ) -> None:
        self.threshold, self.fraction = thinning_plan(n_features, threshold, max_below)
        self.highlight = np.unique(np.asarray([] if highlight is None else highlight, np.int64))
        self.annotations = annotations
        self.chroms = ChromIndex() if annotations is not None else None
        self.edges = np.linspace(0.0, self.threshold, bins + 1)
        self.counts = np.zeros(bins, dtype=np.int64)
        self.seed = seed
        self.n_tested = 0
        self.n_above = 0
        self._parts: list[dict[str, np.ndarray]] = []
        self._done = False

    def wants_pass(self) -> bool:
        return not self._done

    def update(self, chunk: Chunk) -> None:
        p = chunk.cols["p_value"]
        ok = chunk.tested & np.isfinite(p)
        y = np.where(ok, neg_log10(np.where(ok, p, 1.0)), np.nan)
        self.n_tested += int(ok.sum())
        above = ok & (y >= self.threshold)
        self.n_above += int(above.sum())
        low = y[ok & ~above]
        self.counts += np.histogram(low, bins=self.edges)[0]
        rng = np.random.default_rng([self.seed, chunk.start])
        keep = thin_mask(y, self.threshold, self.fraction, rng)
        idx_all = np.arange(chunk.start, chunk.stop)
        lo, hi = np.searchsorted(self.highlight, [chunk.start, chunk.stop])
        if hi > lo:
            keep[self.highlight[lo:hi] - chunk.start] |= ok[self.highlight[lo:hi] - chunk.start]
        part = {"index": idx_all[keep], "y": y[keep], "above": above[keep]}
        if self.annotations is not None:
            chrom = as_unicode(self.annotations[0][chunk.start : chunk.stop])
            pos = np.asarray(self.annotations[1][chunk.start : chunk.stop], dtype=np.int64)
            codes = self.chroms.codes(chrom, pos)
            part["chrom"] = codes[keep]
            part["pos"] = pos[keep]
        self._parts.append(part)

    def end_pass(self) -> None:
        self._done = True

    def points(self) -> dict[str, np.ndarray]:
        """The kept points: ``index``, ``y`` (-log10 p), ``above``, and ``chrom``, ``pos`` if annotated."""
        keys = ("index", "y", "above", "chrom", "pos")
        return {
            k: np.concatenate([part[k] for part in self._parts])
            for k in keys
            if self._parts and k in self._parts[0]
        } or {"index": np.empty(0, np.int64), "y": np.empty(0), "above": np.empty(0, bool)}

    def top_values(self) -> np.ndarray:
        pts = self.points()
        return pts["y"][pts["above"]]


class ScoreHistogram(Accumulator):
    """Histogram of the tested features' finite scores: a pass for the range, a pass for the counts."""

    columns = ("score",)

    def __init__(self, bins: int = 80) -> None:
        self.bins = bins
        self.lo, self.hi = np.inf, -np.inf
        self.edges: np.ndarray | None = None
        self.counts = np.zeros(bins, dtype=np.int64)
        self._pass = 0

    def wants_pass(self) -> bool:
        return self._pass < 2

    def _values(self, chunk: Chunk) -> np.ndarray:
        s = chunk.cols["score"]
        return s[chunk.tested & np.isfinite(s)]

    def update(self, chunk: Chunk) -> None:
        s = self._values(chunk)
        if self._pass == 0:
            if s.size:
                self.lo, self.hi = min(self.lo, float(s.min())), max(self.hi, float(s.max()))
        else:
            self.counts += np.histogram(s, bins=self.edges)[0]

    def end_pass(self) -> None:
        if self._pass == 0:
            lo, hi = (0.0, 1.0) if not np.isfinite(self.lo) else (min(self.lo, 0.0), self.hi)
            hi = hi if hi > lo else lo + 1.0
            self.edges = np.linspace(lo, hi, self.bins + 1)
        self._pass += 1
