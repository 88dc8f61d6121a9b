"""One pass over a block source: map a kernel over feature blocks with Dask, keep the top k.

Building the work is separate from running it: `build_pass` returns a Dask graph of one task per block
(named deterministically from the pass's inputs) and a tree of top-k merges; `run_pass` decides which
blocks are already finished (checkpoints), runs the rest on the chosen scheduler and finishes the merge.

With a run folder, each block task writes its statistics into the pass's Zarr group and then its
completion marker, and returns only its top k, so the driver's memory does not grow with p.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from dask.base import tokenize

from ..store._reader import prepare_block
from ._runfolder import RunFolder, atomic_write
from ._source import BlockSource
from ._topk import TopK, block_topk, merge_all

#: Statistics every pass records beside the kernel's own columns.
ENGINE_COLUMNS = ("missing_rate", "mean", "filtered")


@dataclass(frozen=True)
class FeatureFilter:
    """Features excluded in the pass (they get score 0, ``filtered`` = True and stay off the shortlist).

    Attributes
    ----------
    max_missing : float, optional
        Exclude features whose missing rate exceeds this.
    min_maf : float, optional
        Dosage stores only: exclude features whose minor allele frequency is below this.
    """

    max_missing: float | None = None
    min_maf: float | None = None

    def to_dict(self) -> dict:
        return {"max_missing": self.max_missing, "min_maf": self.min_maf}


@dataclass(frozen=True)
class PassSpec:
    """Everything a pass needs besides the data.

    Attributes
    ----------
    name : str
        Name of the pass inside the run folder (for example ``"screen"`` or ``"iter2"``).
    kernel : callable (Block, state) -> dict of arrays
        A pure statistics kernel (module-level function, so it pickles to worker processes).
    state : object
        The kernel's response state.
    columns : tuple of str
        Kernel outputs recorded for every feature.
    keep : int
        Length of the top-k list kept (with the columns' values when ``keep_values``).
    rows : ndarray of int, optional
        Store rows of the analysed samples, in the order of the response; all rows when None.
    exclude : ndarray of int
        Store indices of features kept off the top-k list (the already selected ones).
    filters : FeatureFilter
    keep_values : bool
    sub_block : int
        Width of the sub-blocks a chunk is processed in; bounds the float64 working memory per thread.
    """

    name: str
    kernel: Callable[[Any, Any], dict]
    state: Any
    columns: tuple[str, ...]
    keep: int
    rows: np.ndarray | None = None
    exclude: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))
    filters: FeatureFilter = FeatureFilter()
    keep_values: bool = True
    sub_block: int = 1024

    def token(self, source: BlockSource) -> str:
        return tokenize(
            self.name,
            self.kernel.__module__,
            self.kernel.__qualname__,
            self.state,
            self.columns,
            self.keep,
            self.rows,
            self.exclude,
            self.filters.to_dict(),
            source.token(),
        )

    @property
    def all_columns(self) -> tuple[str, ...]:
        return (*self.columns, *ENGINE_COLUMNS)


@dataclass
class PassResult:
    """Outcome of a pass.

    Attributes
    ----------
    topk : TopK
        Strongest features (values filled in, also for blocks reused from a checkpoint).
    stats : dict of ndarray of shape (n_features,), or None
        All features' statistics when the pass ran without a run folder.
    n_filtered, n_constant : int
        Features excluded by the filters, and constant ones.
    blocks_reused, blocks_computed : int
    seconds : float
    """

    name: str
    topk: TopK
    stats: dict[str, np.ndarray] | None
    n_features: int
    n_filtered: int
    n_constant: int
    blocks_reused: int
    blocks_computed: int
    seconds: float

    def summary(self) -> dict:
        return {
            "n_features": self.n_features,
            "n_filtered": self.n_filtered,
            "n_constant": self.n_constant,
            "blocks_reused": self.blocks_reused,
            "blocks_computed": self.blocks_computed,
            "seconds": round(self.seconds, 3),
        }


# --------------------------------------------------------------------------------------------
# The block task


def _filter_mask(
    spec: PassSpec, missing_rate: np.ndarray, mean: np.ndarray, dosage: bool
) -> np.ndarray:
    mask = np.zeros(missing_rate.shape, dtype=bool)
    f = spec.filters
    if f.max_missing is not None:
        mask |= missing_rate > f.max_missing
    if f.min_maf is not None and dosage:
        af = mean / 2.0
        mask |= np.minimum(af, 1.0 - af) < f.min_maf
    return mask


def process_block(source: BlockSource, spec: PassSpec, i: int, out_dir: str | None) -> dict:
    """Read block ``i``, compute its statistics, record them, return its top k.

    Returns a small record: the block's `TopK`, counts, and (without a run folder) its statistics.
    """
    t0 = time.perf_counter()
    start, stop = source.bounds(i)
    raw = source.read(i)
    dosage = source.value_kind == "dosage"
    cols: dict[str, list[np.ndarray]] = {c: [] for c in spec.all_columns}
    best = TopK.empty(spec.keep, _n_nulls(spec.state))
    n_constant = 0
    for a in range(0, stop - start, spec.sub_block):
        b = min(a + spec.sub_block, stop - start)
        block = prepare_block(raw[:, a:b], start + a, spec.rows)
        out = spec.kernel(block, spec.state)
        filtered = _filter_mask(spec, block.missing_rate, block.mean, dosage)
        score = np.where(filtered | block.constant, 0.0, out["score"])
        out["score"] = score
        eligible = ~(filtered | block.constant | out.get("degenerate", False)) & np.isfinite(score)
        if spec.exclude.size:
            eligible &= ~np.isin(np.arange(start + a, start + b), spec.exclude)
        n_constant += int(block.constant.sum())
        for c in spec.columns:
            cols[c].append(np.asarray(out[c], dtype=np.float64))
        cols["missing_rate"].append(block.missing_rate)
        cols["mean"].append(block.mean)
        cols["filtered"].append(filtered.astype(np.float64))
        values = block.values if spec.keep_values else None
        part = block_topk(spec.keep, start + a, score, values, eligible, out.get("null_score"))
        best = merge_all([best, part], spec.keep, part.null_max.size)
    stats = {c: np.concatenate(v) for c, v in cols.items()}
    record = {
        "block": i,
        "start": start,
        "stop": stop,
        "topk": best,
        "n_filtered": int(stats["filtered"].sum()),
        "n_constant": n_constant,
        "seconds": time.perf_counter() - t0,
    }
    if out_dir is None:
        record["stats"] = stats
        return record
    group = zarr.open_group(Path(out_dir) / "stats", mode="r+")
    for c, v in stats.items():
        group[c][start:stop] = v
    _write_marker(out_dir, record)
    return record


def _n_nulls(state: Any) -> int:
    return int(getattr(state, "n_nulls", 0))


def _write_marker(out_dir: str, record: dict) -> None:
    top: TopK = record["topk"]
    marker = {
        "block": record["block"],
        "start": record["start"],
        "stop": record["stop"],
        "index": top.index.tolist(),
        # repr of floats round-trips exactly, so a resumed merge is bit-identical
        "score": [float(s) for s in top.score],
        "null_max": [float(s) for s in top.null_max],
        "n_filtered": record["n_filtered"],
        "n_constant": record["n_constant"],
        "seconds": record["seconds"],
    }
    atomic_write(Path(out_dir) / "done" / f"{record['block']}.json", json.dumps(marker))


def _record_from_marker(path, k: int) -> dict:
    m = json.loads(path.read_text())
    top = TopK(
        k=k,
        index=np.asarray(m["index"], dtype=np.int64),
        score=np.asarray(m["score"], dtype=np.float64),
        values=None,
        null_max=np.asarray(m["null_max"], dtype=np.float64),
    )
    return {**m, "topk": top}


# --------------------------------------------------------------------------------------------
# Building and running


def _merge_records(records: list[dict], k: int, n_nulls: int) -> dict:
    top = merge_all([r["topk"] for r in records], k, n_nulls)
    return {
        "topk": top,
        "n_filtered": sum(r["n_filtered"] for r in records),
        "n_constant": sum(r["n_constant"] for r in records),
        "blocks": sum(r.get("blocks", 1) for r in records),
    }


def build_pass(
    source: BlockSource,
    spec: PassSpec,
    blocks: list[int],
    out_dir: str | None,
    split_every: int = 8,
):
    """Dask graph of the block tasks and a tree of merges.

    Returns
    -------
    graph : dict
    block_keys : list of keys, one per block (their records carry statistics without a run folder)
    final_key : key of the merged record
    """
    token = spec.token(source)
    name = f"widescreen-{spec.name}-{token[:12]}"
    graph: dict = {}
    block_keys = []
    for i in blocks:
        key = (f"{name}-block", i)
        graph[key] = (process_block, source, spec, i, out_dir)
        block_keys.append(key)
    level, layer = 0, block_keys
    n_nulls = _n_nulls(spec.state)
    while len(layer) > 1:
        nxt = []
        for j in range(0, len(layer), split_every):
            key = (f"{name}-merge{level}", j)
            graph[key] = (_merge_records, list(layer[j : j + split_every]), spec.keep, n_nulls)
            nxt.append(key)
        layer, level = nxt, level + 1
    final = layer[0] if layer else None
    if final is not None and final in block_keys:
        key = (f"{name}-merge0", 0)
        graph[key] = (_merge_records, [final], spec.keep, n_nulls)
        final = key
    return graph, block_keys, final


def _prepare_out_dir(run: RunFolder, source: BlockSource, spec: PassSpec) -> str:
    """Create (or check) the pass's statistics group; a pass of other inputs under this name starts over."""
    import shutil

    d = run.pass_dir(spec.name)
    token = spec.token(source)
    meta = d / "pass.json"
    if meta.exists():
        if json.loads(meta.read_text()).get("token") == token:
            return str(d)
        shutil.rmtree(d)
    d.mkdir(parents=True, exist_ok=True)
    group = zarr.open_group(d / "stats", mode="w")
    for c in spec.all_columns:
        group.create_array(
            c,
            shape=(source.n_features,),
            chunks=(source.block_width,),
            dtype="float64",
            fill_value=np.nan,
        )
    (d / "done").mkdir(exist_ok=True)
    atomic_write(meta, json.dumps({"token": token, "columns": list(spec.all_columns)}))
    return str(d)


def run_pass(
    source: BlockSource,
    spec: PassSpec,
    run: RunFolder | None = None,
    scheduler: Any = None,
    progress: Callable[[int, int], None] | None = None,
) -> PassResult:
    """Run one pass, resuming from the run folder's completion markers when there are any.

    Parameters
    ----------
    source : BlockSource
    spec : PassSpec
    run : RunFolder, optional
        Without one, statistics are returned in memory (fine for modest p).
    scheduler : optional
        Anything `widescreen.engine.get_scheduler` accepts; the threaded scheduler by default.
    progress : callable(done, total), optional
        Called as blocks finish.
    """
    from ._scheduler import execute

    t0 = time.perf_counter()
    n_blocks = source.n_blocks
    out_dir = _prepare_out_dir(run, source, spec) if run is not None else None
    done = run.done_blocks(spec.name) if run is not None else set()
    todo = [i for i in range(n_blocks) if i not in done]
    reused = (
        [_record_from_marker(run.marker(spec.name, i), spec.keep) for i in sorted(done)]
        if done
        else []
    )
    graph, block_keys, final = build_pass(source, spec, todo, out_dir)
    if progress is not None:
        progress(len(done), n_blocks)
    results = execute(
        graph,
        block_keys,
        final,
        scheduler=scheduler,
        progress=progress,
        offset=len(done),
        total=n_blocks,
        want_blocks=out_dir is None,
    )
    merged = _merge_records(
        [r for r in (results["final"], *reused) if r is not None], spec.keep, _n_nulls(spec.state)
    )
    stats = None
    if out_dir is None:
        recs = sorted(results["blocks"], key=lambda r: r["start"])
        stats = (
            {c: np.concatenate([r["stats"][c] for r in recs]) for c in spec.all_columns}
            if recs
            else {}
        )
    top = merged["topk"]
    if top.values is None and spec.keep_values and top.index.size:
        top = TopK(
            top.k,
            top.index,
            top.score,
            fetch_columns(source, top.index, spec.rows, spec.sub_block),
            top.null_max,
        )
    return PassResult(
        name=spec.name,
        topk=top,
        stats=stats,
        n_features=source.n_features,
        n_filtered=merged["n_filtered"],
        n_constant=merged["n_constant"],
        blocks_reused=len(done),
        blocks_computed=len(todo),
        seconds=time.perf_counter() - t0,
    )


def fetch_columns(
    source: BlockSource, index: np.ndarray, rows: np.ndarray | None, sub_block: int = 1024
) -> np.ndarray:
    """Imputed, centred float64 values of the given features, reading each block once.

    Each column is prepared within the same sub-block as in the pass, so the values are bit-identical
    to those the pass kept.
    """
    index = np.asarray(index, dtype=np.int64)
    n = source.n_samples if rows is None else len(rows)
    out = np.empty((n, index.size), dtype=np.float64, order="F")
    blocks = index // source.block_width
    for i in np.unique(blocks):
        start, stop = source.bounds(int(i))
        raw = source.read(int(i))
        sel = np.flatnonzero(blocks == i)
        local = index[sel] - start
        for a in np.unique(local // sub_block * sub_block):
            b = min(int(a) + sub_block, stop - start)
            block = prepare_block(raw[:, a:b], start + int(a), rows)
            here = (local >= a) & (local < b)
            out[:, sel[here]] = block.values[:, local[here] - a]
    return out


def read_stats(
    run: RunFolder,
    name: str,
    columns: tuple[str, ...] | None = None,
    start: int = 0,
    stop: int | None = None,
) -> dict[str, np.ndarray]:
    """Statistics of a finished pass, read back from the run folder."""
    group = zarr.open_group(run.pass_dir(name) / "stats", mode="r")
    cols = columns or tuple(json.loads((run.pass_dir(name) / "pass.json").read_text())["columns"])
    return {c: np.asarray(group[c][start:stop]) for c in cols}
