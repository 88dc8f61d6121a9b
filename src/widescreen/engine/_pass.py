"""One pass over a block source: map a kernel over feature blocks with Dask, keep the top k.

Building the work is separate from running it: `build_pass` returns a Dask graph of one task per block
(named deterministically from the pass's inputs) and a tree of top-k merges; `run_pass` decides which
blocks are already finished (checkpoints), plans the memory, runs the rest on the chosen scheduler and
finishes the merge.

With a run folder, each block task writes its statistics into the pass's Zarr group and then its
completion marker, and returns only its top k, so the driver's memory does not grow with p. A resumed
pass merges the markers' top-k lists with the new blocks' and is bit-identical to an uninterrupted one
(the sub-block width is recorded with the pass and kept).
"""

from __future__ import annotations

import json
import shutil
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from ..schema import PassLayout, PassMeta, create_stats, read_pass_meta, read_stats
from ._block import kept_values, process_block, read_kept, read_marker
from ._columns import read_columns
from ._memory import (
    BASELINE_BYTES,
    CLUSTER_SHARE,
    MemoryBudgetError,
    MemoryPlan,
    parse_budget,
    plan_memory,
    process_baseline,
)
from ._multiblock import process_multi_block, read_multi_marker
from ._reduce import add_tree
from ._runfolder import RunFolder, atomic_write
from ._scheduler import Executor, n_cores, open_executor
from ._source import BlockSource
from ._spec import ENGINE_COLUMNS, FeatureFilter, PassResult, PassSpec
from ._topk import MultiTopK, TopK, merge_all, merge_multi


def _merge_records(records: list[dict], *, k: int, n_nulls: int, n_responses: int = 0) -> dict:
    if n_responses:
        top = merge_multi([r["topk"] for r in records], k, n_responses)
    else:
        top = merge_all([r["topk"] for r in records], k, n_nulls)
    return {
        "topk": top,
        "n_filtered": sum(r["n_filtered"] for r in records),
        "n_constant": sum(r["n_constant"] for r in records),
        "n_degenerate": sum(r.get("n_degenerate", 0) for r in records),
        "n_nonfinite": sum(r.get("n_nonfinite", 0) for r in records),
        "blocks": sum(r.get("blocks", 1) for r in records),
        "busy": sum(r.get("busy", r.get("seconds", 0.0)) for r in records),
    }


def build_pass(
    source: BlockSource,
    spec: PassSpec,
    blocks: list[int],
    out_dir: str | None,
    split_every: int = 8,
):
    """Dask graph of the block tasks and a tree of merges.

    The source and the spec are single nodes of the graph that every block task refers to, so a
    cluster ships them to each worker once rather than with every task.

    Returns
    -------
    graph : dict
    block_keys : list of keys, one per block (their records carry statistics without a run folder)
    final_key : key of the merged record, or None when there are no blocks
    """
    token = spec.token(source)
    name = f"widescreen-{spec.name}-{token[:12]}"
    # A fresh running floor per build: the blocks of this call share it (`raise_floor`).
    spec = replace(spec, floor_key=f"{name}-{uuid.uuid4().hex}")
    src_key, spec_key = f"{name}-source", f"{name}-spec-{spec.sub_block}"
    graph: dict = {}
    block_keys = []
    task = process_multi_block if spec.n_responses else process_block
    for i in blocks:
        key = (f"{name}-block", i)
        graph[key] = (task, src_key, spec_key, i, out_dir)
        block_keys.append(key)
    if block_keys:
        graph[src_key] = source
        graph[spec_key] = spec
    merge = partial(_merge_records, k=spec.keep, n_nulls=spec.n_nulls, n_responses=spec.n_responses)
    final = add_tree(graph, block_keys, merge, f"{name}-merge", split_every)
    return graph, block_keys, final


# --------------------------------------------------------------------------------------------
# The pass folder


def _prepare_out_dir(run: RunFolder, source: BlockSource, spec: PassSpec) -> tuple[str, PassMeta]:
    """Create (or check) the pass's statistics group; a pass of other inputs under this name starts over.

    Returns the folder and its `PassMeta` (``pass.json``: token, statistic names, block plan, and the
    sub-block width of the first session, or None when the folder is new).
    """
    layout = run.layout.pass_(spec.name)
    d = layout.root
    token = spec.token(source)
    meta = read_pass_meta(layout)
    if meta is not None and meta.token == token:
        _clean_partial_files(layout)
        return str(d), meta
    if d.exists():
        shutil.rmtree(d)
    d.mkdir(parents=True)
    create_stats(
        layout,
        spec.all_columns,
        source.n_features,
        source.block_width,
        wide=spec.wide_columns,
        n_responses=spec.n_responses,
    )
    layout.done.mkdir()
    meta = PassMeta(
        token=token,
        columns=tuple(spec.all_columns),
        n_features=source.n_features,
        block_width=source.block_width,
        n_blocks=source.n_blocks,
    )
    # Last: the folder counts as made once this exists.
    atomic_write(layout.meta, json.dumps(meta.to_dict()))
    return str(d), meta


def _clean_partial_files(layout: PassLayout) -> None:
    """Temporary files that a killed writer left (zarr's ``*.partial``, our ``.*.tmp-*``)."""
    for f in layout.done.glob(".*.tmp-*"):
        f.unlink(missing_ok=True)
    for f in layout.stats.glob("*/c/*.partial"):
        f.unlink(missing_ok=True)


def _choose_sub_block(
    source: BlockSource, spec: PassSpec, ex: Executor, recorded: int | None
) -> tuple[int, MemoryPlan | None]:
    """The sub-block width of this call and the memory plan (see `widescreen.engine.plan_memory`)."""
    cap = int(min(spec.sub_block, source.block_width))
    if ex.memory_per_worker is None:
        # No budget: keep a recorded width that is within the requested one.
        return (recorded if recorded is not None and recorded <= cap else cap), None
    budget, baseline = ex.memory_per_worker, process_baseline()
    if ex.kind == "distributed":
        # A worker's own memory before its first task is not known here: the fixed estimate.
        budget, baseline = int(budget * CLUSTER_SHARE), BASELINE_BYTES
    plan = plan_memory(
        budget,
        source.block_shape(spec.n_analysed, read_ahead=ex.kind != "distributed"),
        keep=spec.keep if spec.keep_values else 0,  # no values kept: the top list is indices only
        max_threads=ex.threads_per_worker,
        max_sub_block=cap,
        n_responses=spec.lhs_rows if spec.n_responses else spec.n_nulls + 1,
        n_columns=len(spec.all_columns) + len(spec.wide_columns) * max(spec.n_responses - 1, 0),
        temporaries=spec.temporaries,
        prefer_sub_block=recorded,
        baseline=baseline,
    )
    if ex.kind == "distributed" and plan.n_threads < ex.threads_per_worker:
        raise MemoryBudgetError(
            f"cluster workers with {ex.threads_per_worker} threads and {ex.memory_per_worker} "
            f"bytes each cannot run this pass: it fits {plan.n_threads} thread(s) per worker; give "
            "the workers more memory or fewer threads"
        )
    if ex.kind == "threads":
        ex.threads_per_worker = plan.n_threads
    return plan.sub_block, plan


def run_pass(
    source: BlockSource,
    spec: PassSpec,
    run: RunFolder | None = None,
    scheduler: Any = None,
    progress: Callable[[int, int], None] | None = None,
    memory_budget: int | str | None = None,
) -> PassResult:
    """Run one pass, resuming from the run folder's completion markers when there are any.

    Parameters
    ----------
    source : BlockSource
    spec : PassSpec
    run : RunFolder, optional
        Without one, statistics are returned in memory (fine for modest p).
    scheduler : optional
        Anything `widescreen.engine.open_executor` accepts; the threaded scheduler by default.
    progress : callable(done, total), optional
        Called with the number of finished blocks (reused ones included) as blocks finish, on every
        scheduler.
    memory_budget : int or str, optional
        Bytes (or a size such as "4GB") the pass may use; plans the sub-block width and the threads
        (`widescreen.engine.plan_memory`). For ``"processes:N"`` the budget is shared by the N workers.

    Raises
    ------
    MemoryBudgetError
        The budget cannot hold one block.
    widescreen.store.ChunkError
        A chunk of X is missing or corrupt (the message names the chunk and its features); the blocks
        finished before stay recorded.
    WorkerAccessError
        Cluster workers do not see the store or the run folder.
    """
    t0 = time.perf_counter()
    budget = parse_budget(memory_budget)
    if run is not None:
        # Workers may run in another working folder (or on another machine): absolute paths only.
        run = RunFolder(Path(run.path).resolve())
    source = source.absolute()
    out_dir, meta = _prepare_out_dir(run, source, spec) if run is not None else (None, None)
    reused = _reused_blocks(run, out_dir, source, spec)
    done = {r["block"] for r in reused}
    todo = [i for i in range(source.n_blocks) if i not in done]
    computed = _compute_blocks(
        source, spec, run, out_dir, meta, todo, len(done), scheduler, budget, progress
    )
    return _finish(source, computed, reused, out_dir, t0)


@dataclass
class _Computed:
    """What the blocks computed in this call left: their merged record and how they ran."""

    spec: PassSpec  # with the sub-block width chosen
    final: dict | None  # the merged record of the computed blocks
    blocks: list[dict]  # their records (only without a run folder: they carry the statistics)
    n_computed: int
    plan: MemoryPlan | None
    notes: list[str]
    where: str
    fetch_threads: int


def _reused_blocks(
    run: RunFolder | None, out_dir: str | None, source: BlockSource, spec: PassSpec
) -> list[dict]:
    """Records of the blocks whose completion markers (and statistics) can be trusted."""
    reused = []
    if run is None:
        return reused
    for i in sorted(run.done_blocks(spec.name)):
        if 0 <= i < source.n_blocks:
            if spec.n_responses:
                rec = read_multi_marker(out_dir, i, spec, source.bounds(i))
            else:
                rec = read_marker(out_dir, i, spec.keep, source.bounds(i), spec.all_columns)
            if rec is not None:
                reused.append(rec)
    return reused


def _compute_blocks(
    source: BlockSource,
    spec: PassSpec,
    run: RunFolder | None,
    out_dir: str | None,
    meta: PassMeta | None,
    todo: list[int],
    n_done: int,
    scheduler: Any,
    budget: int | None,
    progress: Callable[[int, int], None] | None,
) -> _Computed:
    """Plan the memory, check the workers see the data, run the blocks still to do."""
    notes: list[str] = []
    with open_executor(scheduler, memory_budget=budget) as ex:
        sub_block, plan = _choose_sub_block(
            source, spec, ex, None if meta is None else meta.sub_block
        )
        spec = replace(spec, sub_block=sub_block)
        if out_dir is not None:
            _record_sub_block(PassLayout(Path(out_dir)), meta, sub_block, bool(todo), notes)
        if todo and out_dir is not None:
            checks = [
                ("run folder", Path(run.path), PassLayout(Path(out_dir)).meta.relative_to(run.path))
            ]
            location = source.location()
            if location is not None:
                checks.insert(0, ("store", location, "zarr.json"))
            ex.check_reachable(checks)
        graph, block_keys, final = build_pass(source, spec, todo, out_dir)
        if progress is not None:
            progress(n_done, source.n_blocks)
        if ex.kind != "distributed":
            # A store on object storage: each thread's next block is requested while it computes.
            source.start_reads(_read_order(graph, block_keys), ex.threads_per_worker)
        try:
            results = ex.run(
                graph,
                block_keys,
                final,
                progress=progress,
                offset=n_done,
                total=source.n_blocks,
                want_blocks=out_dir is None,
            )
        finally:
            source.end_reads()
        return _Computed(
            spec=spec,
            final=results["final"],
            blocks=results["blocks"],
            n_computed=len(todo),
            plan=plan,
            notes=notes,
            where=ex.describe(),
            fetch_threads=ex.threads_per_worker if ex.kind == "threads" else n_cores(),
        )


def _read_order(graph: dict, block_keys: list) -> list[int]:
    """The blocks in the order the local schedulers start them: Dask's static priority of the graph
    (`dask.order.order`, the order `dask.local.get_async` takes ready tasks in), not the block order."""
    from dask.order import order

    priority = order(graph)
    return [key[1] for key in sorted(block_keys, key=priority.__getitem__)]


def _finish(
    source: BlockSource, computed: _Computed, reused: list[dict], out_dir: str | None, t0: float
) -> PassResult:
    """Merge the computed and reused blocks' top lists, gather statistics and kept values."""
    spec = computed.spec
    merged = _merge_records(
        [r for r in (computed.final, *reused) if r is not None],
        k=spec.keep,
        n_nulls=spec.n_nulls,
        n_responses=spec.n_responses,
    )
    stats = None
    if out_dir is None:
        recs = sorted(computed.blocks, key=lambda r: r["start"])
        stats = (
            {c: np.concatenate([r["stats"][c] for r in recs]) for c in spec.all_columns}
            if recs
            else {}
        )
    t_fetch = time.perf_counter()
    top = merged["topk"]
    if isinstance(top, MultiTopK):
        pass  # the caller reads the columns its responses need (`widescreen.engine.read_columns`)
    elif top.values is None and spec.keep_values and top.index.size:
        values = _kept_values(source, spec, top, computed.final, out_dir, computed.fetch_threads)
        top = replace(top, values=values, raw=None, mean=None)
    t_fetch = time.perf_counter() - t_fetch if reused else 0.0
    return PassResult(
        name=spec.name,
        topk=top,
        stats=stats,
        n_features=source.n_features,
        n_filtered=merged["n_filtered"],
        n_constant=merged["n_constant"],
        n_degenerate=merged["n_degenerate"],
        n_nonfinite=merged["n_nonfinite"],
        blocks_reused=len(reused),
        blocks_computed=computed.n_computed,
        seconds=time.perf_counter() - t0,
        sub_block=spec.sub_block,
        scheduler=computed.where,
        plan=None if computed.plan is None else computed.plan.to_dict(),
        seconds_blocks=0.0 if computed.final is None else float(computed.final["busy"]),
        seconds_fetch=t_fetch,
        notes=tuple(computed.notes),
    )


def _record_sub_block(
    layout: PassLayout, meta: PassMeta, sub_block: int, computing: bool, notes: list
) -> None:
    first = meta.sub_block
    if first is None:
        atomic_write(layout.meta, json.dumps(replace(meta, sub_block=sub_block).to_dict()))
    elif first != sub_block and computing:
        widths = tuple(sorted({*(meta.sub_blocks_used or (first,)), sub_block}))
        atomic_write(layout.meta, json.dumps(replace(meta, sub_blocks_used=widths).to_dict()))
        notes.append(
            f"blocks were computed with sub-block widths {list(widths)} (the memory budget "
            "changed); statistics may differ from an uninterrupted run in the last bits"
        )


def _kept_values(
    source: BlockSource,
    spec: PassSpec,
    top: TopK,
    computed: dict | None,
    out_dir: str | None,
    n_threads: int,
) -> np.ndarray:
    """Values of the final top-k: from the new blocks' lists where they are, then from the kept
    columns recorded beside reused blocks' markers, and read back from the store for the rest."""
    n = source.n_samples if spec.rows is None else len(spec.rows)
    values = np.empty((n, top.index.size), dtype=np.float64, order="F")
    have = np.zeros(top.index.size, dtype=bool)
    ctop = None if computed is None else computed["topk"]
    if ctop is not None and ctop.raw is not None and ctop.index.size:
        order = np.argsort(ctop.index)
        pos = np.searchsorted(ctop.index[order], top.index)
        pos = np.minimum(pos, ctop.index.size - 1)
        have = ctop.index[order][pos] == top.index
        src = order[pos[have]]
        values[:, have] = kept_values(ctop.raw[:, src], ctop.mean[src])
    if out_dir is not None and not have.all():
        for b in np.unique(top.index[~have] // source.block_width):
            got = read_kept(out_dir, int(b))
            if got is None:
                continue
            kidx, kvals = got
            if kidx.size == 0 or kvals.shape[0] != n:
                continue
            want = np.flatnonzero(~have & (top.index // source.block_width == b))
            order = np.argsort(kidx)
            pos = np.minimum(np.searchsorted(kidx[order], top.index[want]), kidx.size - 1)
            ok = kidx[order][pos] == top.index[want]
            values[:, want[ok]] = kvals[:, order[pos[ok]]]
            have[want[ok]] = True
    if not have.all():
        missing = np.flatnonzero(~have)
        values[:, missing] = read_columns(
            source,
            top.index[missing],
            rows=spec.rows,
            sub_block=spec.sub_block,
            n_threads=n_threads,
        ).values
    return values


__all__ = [
    "ENGINE_COLUMNS",
    "FeatureFilter",
    "PassResult",
    "PassSpec",
    "build_pass",
    "process_block",
    "read_stats",
    "run_pass",
]
