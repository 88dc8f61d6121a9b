"""The block task of a pass over K responses at once (a response matrix), and its completion marker.

Like `process_block`, but the kernel's statistics have shape (width, K) and the block keeps each
response's top k (`MultiTopK`, one vectorised selection for all K). The engine's own columns
(``missing_rate``, ``mean``, ``filtered``) are per response too: the kernel gives each feature's mean and
missing rate over each response's samples, and the filters apply to those, as a one-response pass over
those samples would. No values are kept in the block: the shortlists of K responses may together be wide, so the
caller reads the columns it needs once the pass is merged (`widescreen.engine.read_columns`).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from ..schema import PassLayout
from ..store import prepare_block
from ._block import (
    MARKER_COUNTS,
    _filter_mask,
    check_reachable,
    chunks_whole,
    finish_block,
    save_marker,
    screen_out,
)
from ._source import BlockSource
from ._spec import PassSpec
from ._topk import MultiTopK, block_topk_multi


def process_multi_block(source: BlockSource, spec: PassSpec, i: int, out_dir: str | None) -> dict:
    """Read block ``i``, compute every response's statistics, record them, return its top lists.

    Returns
    -------
    dict
        As `process_block`'s, with ``topk`` a `MultiTopK` and ``n_degenerate``, ``n_nonfinite`` arrays
        of shape (K,) (per response); ``stats`` holds (width, K) arrays for the kernel's columns.
    """
    t0 = time.perf_counter()
    check_reachable(out_dir)
    K = spec.n_responses
    start, stop = source.bounds(i)
    raw = source.read(i)
    dosage = source.value_kind == "dosage"
    rows = stop - start
    # Each statistic is filled in place, sub-block by sub-block, in the (width, K) layout it is written
    # in; the top k of each response is chosen once for the whole block (the same lists as merging
    # per-sub-block lists: the selection is exact, ties broken by index).
    stats = {c: np.empty((rows, K)) for c in spec.all_columns}
    scores = np.empty((rows, K))
    ok = np.empty((rows, K), dtype=bool)
    n_constant = np.zeros(K, np.int64)
    n_filtered = np.zeros(K, np.int64)
    n_degenerate = np.zeros(K, np.int64)
    n_nonfinite = np.zeros(K, np.int64)
    for a in range(0, rows, spec.sub_block):
        b = min(a + spec.sub_block, rows)
        block = prepare_block(raw[:, a:b], start + a, spec.rows)
        out = spec.kernel(block, spec.state)
        shape = (block.width, K)
        mean = out.get("mean", np.broadcast_to(block.mean[:, None], shape))
        missing = out.get("missing_rate", np.broadcast_to(block.missing_rate[:, None], shape))
        constant = out.get("constant", np.broadcast_to(block.constant[:, None], shape))
        filtered = _filter_mask(spec, missing, mean, dosage)
        off = filtered | constant
        score, degenerate, nonfinite, eligible = screen_out(spec, out, off, start + a, start + b)
        out["score"] = score
        ok[a:b] = eligible
        n_filtered += np.count_nonzero(filtered, axis=0)
        n_degenerate += np.count_nonzero(degenerate, axis=0)
        n_nonfinite += np.count_nonzero(nonfinite, axis=0)
        n_constant += np.count_nonzero(constant, axis=0)
        for c in spec.columns:
            stats[c][a:b] = out[c]
        stats["missing_rate"][a:b] = missing
        stats["mean"][a:b] = mean
        stats["filtered"][a:b] = filtered
        scores[a:b] = score
    record = {
        "block": i,
        "start": start,
        "stop": stop,
        "topk": block_topk_multi(spec.keep, start, scores, ok),
        "n_filtered": n_filtered,
        "n_constant": n_constant,
        "n_degenerate": n_degenerate,
        "n_nonfinite": n_nonfinite,
        "sub_block": int(min(spec.sub_block, rows)),
        "seconds": time.perf_counter() - t0,
    }
    return finish_block(record, stats, out_dir, source.block_width, t0, write_multi_marker)


def write_multi_marker(out_dir: str | Path, record: dict) -> None:
    top: MultiTopK = record["topk"]
    lengths = (top.index >= 0).sum(axis=1)
    lists = {
        "n_responses": int(top.n_responses),
        # Each response's list without its padding; repr of floats round-trips exactly, so a resumed
        # merge is identical.
        "index": [row[:c].tolist() for row, c in zip(top.index, lengths, strict=True)],
        "score": [row[:c].tolist() for row, c in zip(top.score, lengths, strict=True)],
    }
    save_marker(out_dir, record, lists)


def read_multi_marker(
    out_dir: str | Path, block: int, spec: PassSpec, bounds: tuple[int, int]
) -> dict | None:
    """The record of a finished block of a K-response pass, or None when it cannot be trusted
    (the rule of `read_marker`: the marker parses and names the block, every chunk file is whole)."""
    layout = PassLayout(Path(out_dir))
    K, k = spec.n_responses, spec.keep
    try:
        m = json.loads(layout.marker(block).read_text())
        if (int(m["start"]), int(m["stop"])) != tuple(bounds) or int(m["n_responses"]) != K:
            return None
        top = MultiTopK.empty(k, K)
        if len(m["index"]) != K or len(m["score"]) != K:
            return None
        for r, (ix, sc) in enumerate(zip(m["index"], m["score"], strict=True)):
            if len(ix) != len(sc) or len(ix) > k:
                return None
            top.index[r, : len(ix)] = ix
            top.score[r, : len(sc)] = sc
        counts = {c: np.asarray(m[c], dtype=np.int64).reshape(K) for c in MARKER_COUNTS}
    except (OSError, ValueError, KeyError, TypeError):
        return None
    rows = int(bounds[1]) - int(bounds[0])
    if not chunks_whole(out_dir, block, spec.all_columns, rows * 8 * K, wide=True):
        return None
    return {**m, "topk": top, **counts}


__all__ = ["process_multi_block", "read_multi_marker", "write_multi_marker"]
