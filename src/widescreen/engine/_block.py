"""The block task of a pass, its completion marker, and the kept columns beside it.

A block task reads one block (a column of chunks of X), computes its statistics sub-block by
sub-block, writes them into the pass's Zarr group, then writes its completion marker, and returns
only its top k. The marker is what makes a block count as finished, so it is written last and
atomically; it holds the block's top-k indices and scores (floats as their exact repr), which a
resumed pass merges without reading the block again.
"""

from __future__ import annotations

import io
import json
import os
import socket
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from ..schema import PassLayout, stats_chunk_bytes
from ..store import Block, prepare_block
from ._runfolder import atomic_write
from ._scheduler import WorkerAccessError
from ._source import BlockSource
from ._spec import PassSpec
from ._topk import TopK, block_topk, floor_of, merge_all, raise_floor


def _filter_mask(
    spec: PassSpec, missing_rate: np.ndarray, mean: np.ndarray, dosage: bool
) -> np.ndarray:
    mask = np.zeros(missing_rate.shape, dtype=bool)
    f = spec.filters
    if f.drop_missing is not None:
        mask |= missing_rate > f.drop_missing
    if f.drop_rare is not None and dosage:
        af = mean / 2.0
        mask |= np.minimum(af, 1.0 - af) < f.drop_rare
    return mask


def screen_out(
    spec: PassSpec, out: dict, off: np.ndarray, lo: int, hi: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Scores and eligibility of features ``lo:hi`` (a one- or a K-response pass alike).

    ``off`` (filtered or constant; shape (width,) or (width, K)) scores 0. Of the rest, a feature the
    kernel marks ``degenerate`` or whose score is not finite cannot enter the top list, nor can one
    the pass excludes.

    Returns
    -------
    score, degenerate, nonfinite, eligible : ndarray, each of the shape of ``off``
    """
    score = np.where(off, 0.0, out["score"])
    degenerate = np.asarray(out.get("degenerate", False)) & ~off
    nonfinite = ~np.isfinite(score) & ~(off | degenerate)
    eligible = ~(off | degenerate | nonfinite)
    if spec.exclude.size:
        excluded = np.isin(np.arange(lo, hi), spec.exclude)
        eligible &= ~(excluded if off.ndim == 1 else excluded[:, None])
    return score, degenerate, nonfinite, eligible


def check_reachable(out_dir: str | None) -> None:
    """Raise a `WorkerAccessError` naming this host when a block's run folder is not visible here.

    Checked before the block's read, so a cluster worker that does not see the run folder (no shared
    file system) says so plainly instead of failing on its first write.
    """
    if out_dir is not None and not PassLayout(Path(out_dir)).stats.is_dir():
        raise WorkerAccessError(
            f"run folder {Path(out_dir).parent.parent} is not reachable from host "
            f"{socket.gethostname()} (pid {os.getpid()}): no {PassLayout(Path(out_dir)).stats}"
        )


def process_block(source: BlockSource, spec: PassSpec, i: int, out_dir: str | None) -> dict:
    """Read block ``i``, compute its statistics, record them, return its top k.

    Returns
    -------
    dict
        ``block``, ``start``, ``stop``, ``topk`` (a `TopK` with the kept values), ``n_filtered``,
        ``n_constant``, ``n_degenerate`` (explained by the adjustment set, or the kernel's fit
        failed), ``n_nonfinite`` (a score that is not a finite number), ``seconds``, and ``stats``
        (dict of arrays of shape (width,)) without a run folder.
    """
    t0 = time.perf_counter()
    check_reachable(out_dir)
    start, stop = source.bounds(i)
    raw = source.read(i)
    dosage = source.value_kind == "dosage"
    cols: dict[str, list[np.ndarray]] = {c: [] for c in spec.all_columns}
    best = TopK.empty(spec.keep, spec.n_nulls)
    n_constant = n_degenerate = n_nonfinite = 0
    for a in range(0, stop - start, spec.sub_block):
        b = min(a + spec.sub_block, stop - start)
        block = prepare_block(raw[:, a:b], start + a, spec.rows)
        out = spec.kernel(block, spec.state)
        filtered = _filter_mask(spec, block.missing_rate, block.mean, dosage)
        off = filtered | block.constant
        score, degenerate, nonfinite, eligible = screen_out(spec, out, off, start + a, start + b)
        out["score"] = score
        n_degenerate += int(np.count_nonzero(degenerate))
        n_nonfinite += int(np.count_nonzero(nonfinite))
        n_constant += int(block.constant.sum())
        for c in spec.columns:
            cols[c].append(np.asarray(out[c], dtype=np.float64))
        cols["missing_rate"].append(block.missing_rate)
        cols["mean"].append(block.mean)
        cols["filtered"].append(filtered.astype(np.float64))
        # Features below the pass's running floor (or this block's own k-th score) cannot enter.
        floor = max(floor_of(spec.floor_key, spec.keep), best.kth)
        part = block_topk(spec.keep, start + a, score, None, eligible, out.get("null_score"), floor)
        best = merge_all([best, part], spec.keep, part.null_max.size)
    stats = {c: np.concatenate(v) for c, v in cols.items()}
    kept_raw = None
    raise_floor(spec.floor_key, best.score, spec.keep)
    if spec.keep_values and best.index.size:
        # The stored values of the block's final top k only (a byte a value for int8); the pass makes
        # the float64 values once, for its final list (`TopK.raw`).
        local = best.index - start
        kept_raw = _kept_raw(raw, local, spec.rows)
        best = replace(best, raw=kept_raw, mean=stats["mean"][local])
    record = {
        "block": i,
        "start": start,
        "stop": stop,
        "topk": best,
        "n_filtered": int(stats["filtered"].sum()),
        "n_constant": n_constant,
        "n_degenerate": n_degenerate,
        "n_nonfinite": n_nonfinite,
        "sub_block": int(min(spec.sub_block, stop - start)),
        "seconds": time.perf_counter() - t0,
    }
    kept = None if kept_raw is None else (best.index, kept_raw, stats["mean"][best.index - start])
    return finish_block(record, stats, out_dir, source.block_width, t0, write_marker, kept)


def finish_block(
    record: dict,
    stats: dict[str, np.ndarray],
    out_dir: str | None,
    width: int,
    t0: float,
    mark,
    kept: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> dict:
    """A block task's last step: its statistics in the record, or on disk with its marker last.

    With a run folder, the block's statistic chunks are written, then its kept columns (``kept``:
    index, stored values, means; see `write_kept`), then its completion marker by ``mark`` (a
    function of ``out_dir`` and the record), so a block with a marker is whole.
    """
    if out_dir is None:
        record["stats"] = stats
        return record
    write_stats(out_dir, record["block"], stats, width)
    if kept is not None:
        write_kept(out_dir, record["block"], *kept)
    record["seconds"] = time.perf_counter() - t0
    mark(out_dir, record)
    return record


def kept_values(raw: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """Imputed, centred float64 values of a few columns, from their stored values and observed means.

    A block of just these columns with the pass's means: `Block.columns` centres them exactly as
    the pass does.
    """
    k = raw.shape[1]
    zeros = np.zeros(k)
    blk = Block(
        start=0,
        mean=np.asarray(mean, dtype=np.float64),
        sumsq=zeros,
        missing_rate=zeros,
        constant=np.zeros(k, dtype=bool),
        raw=raw,
        n_missing=np.zeros(k, dtype=np.int64),
    )
    return blk.columns(np.arange(k))


def _kept_raw(raw: np.ndarray, local: np.ndarray, rows: np.ndarray | None) -> np.ndarray:
    # As prepare_block sees them: the analysed rows, other integer types as float64.
    cols = raw[:, local]
    if cols.dtype not in (np.int8, np.float32, np.float64):
        cols = cols.astype(np.float64)
    return cols if rows is None else cols[rows]


# --------------------------------------------------------------------------------------------
# Statistics and completion markers


def write_stats(out_dir: str | Path, block: int, stats: dict[str, np.ndarray], width: int) -> None:
    """Write one block's chunk of every statistic straight to its file.

    The pass creates its statistic arrays uncompressed (Zarr v3 ``bytes`` codec, little endian), one
    chunk per block (`widescreen.schema.create_stats`), so a chunk file is just the float64 values,
    padded with NaN to the chunk length at the last block. Writing it directly costs a file write
    instead of zarr's per-call machinery (which took longer than the statistics of a small block).
    Each file is written to a temporary name and renamed, so a chunk file that exists is whole.
    """
    layout = PassLayout(Path(out_dir))
    for c, v in stats.items():
        chunk = layout.stats_chunk(c, block, wide=v.ndim == 2)
        atomic_write(chunk, stats_chunk_bytes(v, width), sync=False)


def write_marker(out_dir: str | Path, record: dict) -> None:
    top: TopK = record["topk"]
    lists = {
        "index": top.index.tolist(),
        # repr of floats round-trips exactly, so a resumed merge is bit-identical
        "score": [float(s) for s in top.score],
        "null_max": [float(s) for s in top.null_max],
    }
    save_marker(out_dir, record, lists)


#: The counts of a block's record kept in its marker (numbers; K of them for a K-response pass).
MARKER_COUNTS = ("n_filtered", "n_constant", "n_degenerate", "n_nonfinite")


def save_marker(out_dir: str | Path, record: dict, lists: dict) -> None:
    """Write a block's completion marker (atomically): its range, its top lists, counts and timing.

    ``lists`` holds the pass's top-list entries (one-response or K-response form), placed after the
    block's range; the counts are written as plain integers (lists of them when per response).
    """
    marker = {
        "block": record["block"],
        "start": record["start"],
        "stop": record["stop"],
        **lists,
        **{c: np.asarray(record.get(c, 0)).tolist() for c in MARKER_COUNTS},
        "sub_block": record.get("sub_block"),
        "seconds": record["seconds"],
    }
    atomic_write(PassLayout(Path(out_dir)).marker(record["block"]), json.dumps(marker))


def write_kept(
    out_dir: str | Path, block: int, index: np.ndarray, raw: np.ndarray, mean: np.ndarray
) -> None:
    """Keep the stored values of a block's top-k columns beside its marker (``done/BLOCK.kept.npz``).

    A resumed pass rebuilds the kept float64 values of reused blocks from these few columns and the
    recorded means (centring is elementwise, so the values are bit-identical) instead of reading and
    decoding each block again. Written before the marker; a missing or unreadable file only means the
    values are read from the store instead.

    Parameters
    ----------
    index : ndarray of int64, shape (k,)
    raw : ndarray of shape (n_analysed, k)
        Stored values of those features (int8 with the sentinel, or floats with NaN).
    mean : ndarray of float64, shape (k,)
        Their observed means, as the pass computed them.
    """
    buf = io.BytesIO()
    np.savez(buf, index=np.asarray(index, np.int64), raw=raw, mean=np.asarray(mean, np.float64))
    atomic_write(kept_path(out_dir, block), buf.getvalue(), sync=False)


def kept_path(out_dir: str | Path, block: int) -> Path:
    return PassLayout(Path(out_dir)).kept(block)


def read_kept(out_dir: str | Path, block: int) -> tuple[np.ndarray, np.ndarray] | None:
    """(index, values of shape (n_analysed, k)) of a block's kept columns, or None if unusable."""
    try:
        with np.load(kept_path(out_dir, block)) as z:
            index, raw, mean = z["index"], z["raw"], z["mean"]
        k = index.size
        if raw.ndim != 2 or raw.shape[1] != k or mean.shape != (k,):
            return None
        return index, kept_values(raw, mean)
    except (OSError, ValueError, KeyError, TypeError):
        return None


def read_marker(
    out_dir: str | Path, block: int, k: int, bounds: tuple[int, int], columns: tuple[str, ...]
) -> dict | None:
    """The record of a finished block, or None when its marker or statistics cannot be trusted.

    A marker is trusted when it parses, names the block's feature range, and every statistic's chunk
    file of the block exists and holds at least the block's values (an empty or truncated file is what
    a crash of the machine can leave behind); otherwise the block is computed again.
    """
    path = PassLayout(Path(out_dir)).marker(block)
    try:
        m = json.loads(path.read_text())
        if (int(m["start"]), int(m["stop"])) != tuple(bounds):
            return None
        top = TopK(
            k=k,
            index=np.asarray(m["index"], dtype=np.int64),
            score=np.asarray(m["score"], dtype=np.float64),
            values=None,
            null_max=np.asarray(m["null_max"], dtype=np.float64),
        )
    except (OSError, ValueError, KeyError, TypeError):
        return None
    need = (int(bounds[1]) - int(bounds[0])) * 8  # float64 values of the block's features
    if not chunks_whole(out_dir, block, columns, need):
        return None
    return {**m, "topk": top}


def chunks_whole(
    out_dir: str | Path, block: int, columns: tuple[str, ...], need: int, *, wide: bool = False
) -> bool:
    """Whether every statistic's chunk file of a block exists and holds ``need`` bytes or more (of
    whole float64 values): an empty or truncated file is what a crash of the machine can leave."""
    layout = PassLayout(Path(out_dir))
    for c in columns:
        try:
            size = os.stat(layout.stats_chunk(c, block, wide=wide)).st_size
        except OSError:
            return False
        if size < need or size % 8:
            return False
    return True
