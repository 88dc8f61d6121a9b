"""One tree reduction over feature blocks: chunk, combine, finish.

Every pass over the blocks of a source is the same shape (the dask reductions' habit): a *chunk* task per
block returns a small record of partial results, *combine* merges a list of records into one, over a
fixed tree of fan-in ``split_every``, and *finish* turns the root record into the result. The tree is a
function of the number of records only, so the order of the sums, and with it every bit of the result,
does not depend on the scheduler or on which blocks a resumed run reuses.

The screening pass (`widescreen.engine.build_pass`: block records with their top k and statistics), the
Gram pass of HOLP (`reduce_blocks`: n x n sums, checkpointed by group) and the streamed thresholds all
use `add_tree`.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
from dask.base import tokenize

from ..schema import ReduceLayout
from ._runfolder import atomic_write
from ._scheduler import execute
from ._source import BlockSource

T = TypeVar("T")


def add_tree(
    graph: dict, leaves: list, combine: Callable[[list], Any], name: str, split_every: int = 8
) -> Any:
    """Add a fixed tree of ``combine`` tasks over ``leaves`` to ``graph``; return the root's key.

    The root is always a ``combine`` task (also over a single leaf), so the root record has the same
    form whatever the number of leaves. Returns None when there are no leaves.
    """
    if not leaves:
        return None
    layer, level = list(leaves), 0
    while len(layer) > 1 or level == 0:
        nxt = []
        for j in range(0, len(layer), split_every):
            key = (f"{name}-combine{level}", j)
            graph[key] = (combine, list(layer[j : j + split_every]))
            nxt.append(key)
        layer, level = nxt, level + 1
    return layer[0]


def tree_combine(records: list[T], combine: Callable[[list[T]], T], split_every: int = 8) -> T:
    """The same tree as `add_tree`, in memory (for records already at hand, such as reused ones)."""
    layer = list(records)
    level = 0
    while len(layer) > 1 or level == 0:
        layer = [combine(layer[j : j + split_every]) for j in range(0, len(layer), split_every)]
        level += 1
    return layer[0]


def sum_arrays(parts: list[np.ndarray]) -> np.ndarray:
    """Combine step of sums: float64, left to right (a fixed order)."""
    out = np.array(parts[0], dtype=np.float64, copy=True)
    for p in parts[1:]:
        out += p
    return out


def stream_combine(
    chunks: Iterable[T], combine: Callable[[list[T]], T], split_every: int = 8
) -> T | None:
    """Reduce records that arrive one at a time (for example blocks read from a run folder).

    Holds at most ``split_every`` records per tree level, so memory grows with log(number of records);
    the tree is the one `add_tree` builds over the same records, so the result is identical.
    """
    levels: list[list[T]] = []
    n = 0
    for rec in chunks:
        n += 1
        _push(levels, 0, rec, combine, split_every)
    if n == 0:
        return None
    # Close the levels from the bottom: a level's pending records plus the record made from the
    # partial group below (the last of this level) form its last group.
    carry: list[T] = []
    lvl = 0
    while True:
        group = (levels[lvl] if lvl < len(levels) else []) + carry
        if not any(levels[j] for j in range(lvl + 1, len(levels))):
            # The top: a single record above the leaves is the root, as in `add_tree`.
            return group[0] if lvl > 0 and len(group) == 1 else combine(group)
        carry = [combine(group)] if group else []
        lvl += 1


def _push(levels: list[list], lvl: int, rec, combine, split_every: int) -> None:
    while len(levels) <= lvl:
        levels.append([])
    levels[lvl].append(rec)
    if len(levels[lvl]) == split_every:
        group, levels[lvl] = levels[lvl], []
        _push(levels, lvl + 1, combine(group), combine, split_every)


def _iter_groups(n: int, size: int) -> Iterator[range]:
    for a in range(0, n, size):
        yield range(a, min(a + size, n))


def reduce_blocks(
    source: BlockSource,
    chunk: Callable[[BlockSource, int], np.ndarray],
    *,
    name: str,
    token: str,
    combine: Callable[[list], np.ndarray] = sum_arrays,
    finish: Callable[[np.ndarray], Any] | None = None,
    checkpoint: str | Path | None = None,
    scheduler: Any = None,
    progress: Callable[[int, int], None] | None = None,
    split_every: int = 8,
) -> Any:
    """Reduce every block of ``source`` to one array: ``finish(combine(... chunk(source, i) ...))``.

    Parameters
    ----------
    source : BlockSource
    chunk : callable (source, block) -> ndarray
        A module-level function (it pickles to worker processes).
    name : str
        Prefix of the task names.
    token : str
        A name of the reduction's inputs; checkpoints of another token are not reused.
    combine : callable (list of ndarray) -> ndarray
        Sums by default.
    finish : callable, optional
    checkpoint : path, optional
        A folder for checkpoints: the blocks are reduced in groups of ``split_every`` (the first level
        of the tree), each group's record saved there when it finishes, and the root saved at the end;
        a rerun loads what is there and computes only the missing groups. Records are arrays (``.npy``).
    scheduler, progress : optional
        As for `widescreen.engine.run_pass`; progress counts blocks.

    Returns
    -------
    The finished result.
    """
    fin = finish if finish is not None else (lambda r: r)
    n_blocks = source.n_blocks
    task = f"widescreen-{name}-{tokenize(token, source.token())[:12]}"
    if checkpoint is None:
        graph: dict = {}
        leaves = []
        for i in range(n_blocks):
            graph[(f"{task}-chunk", i)] = (chunk, source, i)
            leaves.append((f"{task}-chunk", i))
        root = add_tree(graph, leaves, combine, task, split_every)
        out = execute(graph, leaves, root, scheduler=scheduler, progress=progress, total=n_blocks)
        return fin(out["final"])
    layout = ReduceLayout(Path(checkpoint))
    folder = layout.root
    root_path = layout.result
    meta = {
        "token": token,
        "source": source.token(),
        "n_blocks": n_blocks,
        "split_every": split_every,
    }
    if _same_meta(folder, meta) and root_path.exists():
        if progress is not None:
            progress(n_blocks, n_blocks)
        return fin(np.load(root_path))
    if not _same_meta(folder, meta):
        _reset(folder, meta)
    groups = list(_iter_groups(n_blocks, split_every))
    records: list[Any] = [None] * len(groups)
    todo = []
    for g in range(len(groups)):
        rec = _load(layout.group(g))
        if rec is None:
            todo.append(g)
        else:
            records[g] = rec
    graph = {}
    leaves, heads = [], []
    for g in todo:
        keys = []
        for i in groups[g]:
            graph[(f"{task}-chunk", i)] = (chunk, source, i)
            keys.append((f"{task}-chunk", i))
        leaves += keys
        head = (f"{task}-group", g)
        graph[head] = (_save_group, combine, keys, str(layout.group(g)))
        heads.append(head)
    if heads:
        root_key = (f"{task}-groups", 0)
        graph[root_key] = (list, heads)
        done = n_blocks - len(leaves)
        out = execute(
            graph,
            leaves,
            root_key,
            scheduler=scheduler,
            progress=progress,
            offset=done,
            total=n_blocks,
        )
        for g, rec in zip(todo, out["final"], strict=True):
            records[g] = rec
    elif progress is not None:
        progress(n_blocks, n_blocks)
    result = tree_combine(records, combine, split_every) if len(records) > 1 else records[0]
    _save(root_path, result)
    for g in range(len(groups)):
        layout.group(g).unlink(missing_ok=True)  # the root holds them all now
    return fin(result)


def _save_group(combine, parts: list, path: str):
    rec = combine(parts)
    _save(Path(path), rec)
    return rec


def _save(path: Path, rec: np.ndarray) -> None:
    import io

    buf = io.BytesIO()
    np.save(buf, np.asarray(rec))
    atomic_write(path, buf.getvalue())


def _load(path: Path) -> np.ndarray | None:
    try:
        return np.load(path)
    except (OSError, ValueError):
        return None


def _same_meta(folder: Path, meta: dict) -> bool:
    try:
        return json.loads(ReduceLayout(folder).meta.read_text()) == meta
    except (OSError, ValueError):
        return False


def _reset(folder: Path, meta: dict) -> None:
    import shutil

    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    atomic_write(ReduceLayout(folder).meta, json.dumps(meta))


__all__ = ["add_tree", "reduce_blocks", "stream_combine", "sum_arrays", "tree_combine"]
