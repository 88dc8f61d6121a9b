"""The first pass of HOLP: the n x n Gram matrix X X^T of the centred features, summed over blocks."""

from __future__ import annotations

import numpy as np
from dask.base import tokenize

from ..engine._scheduler import execute
from ..engine._source import BlockSource
from ..kernels._holp import check_holp_size, holp_gram
from ..store._reader import prepare_block


def _block_gram(source: BlockSource, i: int, rows, sub_block: int) -> np.ndarray:
    start, stop = source.bounds(i)
    raw = source.read(i)
    total = None
    for a in range(0, stop - start, sub_block):
        b = min(a + sub_block, stop - start)
        g = holp_gram(prepare_block(raw[:, a:b], start + a, rows))
        total = g if total is None else total + g
    return total


def _sum(parts: list[np.ndarray]) -> np.ndarray:
    out = parts[0].copy()
    for p in parts[1:]:
        out += p
    return out


def gram_pass(
    source: BlockSource,
    rows=None,
    *,
    scheduler=None,
    progress=None,
    sub_block: int = 1024,
    memory_budget: int | None = None,
) -> np.ndarray:
    """Accumulate X X^T over every block (a fixed tree of sums, so the result is deterministic).

    Refused up front, with the memory it would need, when n is too large for an n x n matrix.
    """
    n = source.n_samples if rows is None else len(rows)
    if memory_budget is None:
        check_holp_size(n)
    else:
        check_holp_size(n, memory_budget)
    name = f"widescreen-gram-{tokenize(source.token(), rows, sub_block)[:12]}"
    graph: dict = {}
    keys = []
    for i in range(source.n_blocks):
        graph[(f"{name}-block", i)] = (_block_gram, source, i, rows, sub_block)
        keys.append((f"{name}-block", i))
    layer, level = keys, 0
    while len(layer) > 1 or level == 0:
        nxt = []
        for j in range(0, len(layer), 8):
            key = (f"{name}-sum{level}", j)
            graph[key] = (_sum, list(layer[j : j + 8]))
            nxt.append(key)
        layer, level = nxt, level + 1
    out = execute(graph, keys, layer[0], scheduler=scheduler, progress=progress, total=len(keys))
    return out["final"]
