"""Blockwise summaries of one pass's statistics, with memory bounded independently of p.

A pass's statistics are one float64 array of shape (n_features,) per column (read through
`widescreen.schema.PassStats`, by range). Every
summary here is a chunk / combine / finish triple, possibly over several passes over the arrays: per
block `part` makes a small record, `combine` merges records, `end_pass` finishes the merged record
of a pass. `scan` reads each block once per pass and reduces the records with the engine's tree
reduction (`widescreen.engine.stream_combine`), so memory grows with log(blocks), not with p.

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
    """Base of the blockwise summaries: columns read, passes wanted, and the chunk / combine / finish
    of each pass."""

    columns: tuple[str, ...] = ()

    def wants_pass(self) -> bool:
        return False

    def part(self, chunk: Chunk):  # pragma: no cover - interface
        """The record of one block."""
        raise NotImplementedError

    def combine(self, records: list):  # pragma: no cover - interface
        """Records merged into one, in block order."""
        raise NotImplementedError

    def end_pass(self, record) -> None:
        """Finish a pass from the merged record of all blocks (None when there were no blocks)."""


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
    from ..engine import stream_combine

    names = set(stats.columns)
    while True:
        active = [a for a in accumulators if a.wants_pass()]
        if not active:
            return
        need = {c for a in active for c in a.columns} | {"filtered", "score", "p_value"}
        need &= names

        def records(active=active, need=need):
            for start, stop, cols in stats.blocks(sorted(need), step=block):
                chunk = Chunk(start, stop, cols, tested_mask(cols, stop - start))
                yield tuple(a.part(chunk) for a in active)

        def combine(recs: list, active=active) -> tuple:
            return tuple(a.combine([r[i] for r in recs]) for i, a in enumerate(active))

        root = stream_combine(records(), combine)
        for i, a in enumerate(active):
            a.end_pass(None if root is None else root[i])


def _sum(records: list) -> np.ndarray:
    out = np.array(records[0], copy=True)
    for r in records[1:]:
        out += r
    return out


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

    def part(self, chunk: Chunk) -> np.ndarray:
        b = chunk.stop - chunk.start
        filtered = chunk.cols["filtered"] == 1.0 if "filtered" in chunk.cols else np.zeros(b, bool)
        return np.array([b, filtered.sum(), (~chunk.tested & ~filtered).sum()], dtype=np.int64)

    def combine(self, records: list) -> np.ndarray:
        return _sum(records)

    def end_pass(self, record) -> None:
        if record is not None:
            self.features, self.filtered, self.untested = (int(v) for v in record)
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

    def part(self, chunk: Chunk):
        u = self._bits(chunk)
        if self._pass == 0:
            hist = np.bincount((u >> np.uint64(48)).astype(np.intp), minlength=1 << 16)
            return (u.size, hist.astype(np.int64))
        out = []
        for t in self._targets:
            if t["value"] is not None:
                out.append(None)
                continue
            shift = np.uint64(64 - t["bits"])
            sel = u[(u >> shift) == np.uint64(t["prefix"])] if t["bits"] else u
            if t["gather"]:
                out.append(sel)
            else:
                digit = ((sel >> np.uint64(48 - t["bits"])) & np.uint64(0xFFFF)).astype(np.intp)
                out.append(np.bincount(digit, minlength=1 << 16).astype(np.int64))
        return out

    def combine(self, records: list):
        if self._pass == 0:
            return (sum(r[0] for r in records), _sum([r[1] for r in records]))
        merged = []
        for i, t in enumerate(self._targets):
            parts = [r[i] for r in records]
            if t["value"] is not None:
                merged.append(None)
            elif t["gather"]:
                merged.append(np.concatenate(parts) if parts else np.empty(0, np.uint64))
            else:
                merged.append(_sum(parts))
        return merged

    def end_pass(self, record) -> None:
        if self._pass == 0:
            self.count, self._hist = (0, self._hist) if record is None else record
            if self.count == 0:
                self.values = (float("nan"), float("nan"))
                self._targets = []
            else:
                ranks = sorted({(self.count - 1) // 2, self.count // 2})
                self._targets = [self._descend(k, 0, 0, self._hist) for k in ranks]
        else:
            for t, got in zip(self._targets, record, strict=True):
                if t["value"] is not None:
                    continue
                if t["gather"]:
                    t["value"] = float(np.partition(got, t["rank"])[t["rank"]].view(np.float64))
                else:
                    t.update(self._descend(t["rank"], t["prefix"], t["bits"], got))
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
        t = {"rank": rank, "prefix": prefix, "bits": bits, "value": None}
        if bits == 64:  # every bit is known: that is the value
            t["value"] = float(np.array([prefix], dtype=np.uint64).view(np.float64)[0])
        t["gather"] = int(hist[digit]) <= self.gather_limit
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

    def part(self, chunk: Chunk) -> dict:
        p = chunk.cols["p_value"]
        ok = chunk.tested & np.isfinite(p)
        y = np.where(ok, neg_log10(np.where(ok, p, 1.0)), np.nan)
        above = ok & (y >= self.threshold)
        rng = np.random.default_rng([self.seed, chunk.start])
        keep = thin_mask(y, self.threshold, self.fraction, rng)
        idx_all = np.arange(chunk.start, chunk.stop)
        lo, hi = np.searchsorted(self.highlight, [chunk.start, chunk.stop])
        if hi > lo:
            keep[self.highlight[lo:hi] - chunk.start] |= ok[self.highlight[lo:hi] - chunk.start]
        points = {"index": idx_all[keep], "y": y[keep], "above": above[keep]}
        if self.annotations is not None:
            # Chromosome codes are given in the order blocks are read (parts run in block order).
            chrom = as_unicode(self.annotations[0][chunk.start : chunk.stop])
            pos = np.asarray(self.annotations[1][chunk.start : chunk.stop], dtype=np.int64)
            codes = self.chroms.codes(chrom, pos)
            points["chrom"] = codes[keep]
            points["pos"] = pos[keep]
        return {
            "n_tested": int(ok.sum()),
            "n_above": int(above.sum()),
            "counts": np.histogram(y[ok & ~above], bins=self.edges)[0].astype(np.int64),
            "points": [points],
        }

    def combine(self, records: list) -> dict:
        return {
            "n_tested": sum(r["n_tested"] for r in records),
            "n_above": sum(r["n_above"] for r in records),
            "counts": _sum([r["counts"] for r in records]),
            "points": [p for r in records for p in r["points"]],
        }

    def end_pass(self, record) -> None:
        if record is not None:
            self.n_tested, self.n_above = record["n_tested"], record["n_above"]
            self.counts = record["counts"]
            self._parts = record["points"]
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

    def part(self, chunk: Chunk):
        s = self._values(chunk)
        if self._pass == 0:
            return (float(s.min()), float(s.max())) if s.size else (np.inf, -np.inf)
        return np.histogram(s, bins=self.edges)[0].astype(np.int64)

    def combine(self, records: list):
        if self._pass == 0:
            return (min(r[0] for r in records), max(r[1] for r in records))
        return _sum(records)

    def end_pass(self, record) -> None:
        if self._pass == 0:
            if record is not None:
                self.lo, self.hi = record
            lo, hi = (0.0, 1.0) if not np.isfinite(self.lo) else (min(self.lo, 0.0), self.hi)
            hi = hi if hi > lo else lo + 1.0
            self.edges = np.linspace(lo, hi, self.bins + 1)
        elif record is not None:
            self.counts = record
        self._pass += 1
