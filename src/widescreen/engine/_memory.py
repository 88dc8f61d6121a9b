"""Plan a pass to a memory budget: the sub-block width and the number of worker threads.

Notation: n analysed samples (N stored ones), chunks of X of r rows x C features of s bytes each, a
sub-block of w features, t float64 (n, w) temporaries of the kernel (`PassSpec.temporaries`, 2 by
default), m responses scored at once (1 + permuted copies), c statistics per feature, k the top-k
length, T worker threads, f the fan-in of the top-k merge tree (8).

What one worker thread holds at its peak while it processes one block::

    column     = ceil(N / r) * r * C * s          the block's chunk column, decoded whole: a chunk
                                                  cannot be decoded in parts
    encoded    = 1.25 * (r * C * s * 257/256 + 64)  one chunk file, read into a reused buffer
                                                  (at worst incompressible); on object storage
                 or e * ceil(N / r) * (r * C * s * 257/256 + 68)   e whole encoded chunk columns:
                                                  the block's objects (e = 1), and the next block's
                                                  requested ahead (e = 2, the local schedulers)
    sub(w)     = n * w * (s + 8 * (1 + t))        the analysed rows of one sub-block, its float64
                 + 2 * m * w * 8                  values and the kernel's temporaries; the
                                                  cross-products and null scores of the m responses
    topk       = 2 * n * min(k, C) * s            the stored values of the block's final top k
                                                  (gathered, then kept: a byte a value for int8)
    stats      = 2 * c * C * 8                    the block's statistics
    thread(w)  = column + encoded + sub(w) + topk + stats

and what the process holds besides the threads::

    shared(T)  = baseline + (f + T + 4) * s * n * k   the process itself, the top-k records
                 + 8 * n * k                      waiting for a merge (stored values), a pairwise
                                                  merge's own three (the two lists stacked, the kept
                                                  columns gathered) and the final list's float64
                                                  values; baseline = 320 MiB (interpreter and
                                                  libraries), or the resident memory of the calling
                                                  process when larger; k = 0 when the pass keeps no
                                                  values

A plan (T, w) fits when ``shared(T) + T * thread(w) <= budget``. The planner takes the most threads (up
to the cores, or a cluster worker's threads) for which a sub-block of ``MIN_SUB_BLOCK`` (128) features
still fits, then the widest sub-block that fits at that thread count: the requested width (never
exceeded), else the largest power of two below it. If one thread with a one-feature sub-block does not
fit, the budget is refused with the numbers: the chunk column alone must fit, since a chunk is decoded
whole; the remedy is a larger budget or a store with fewer features per chunk.

A pass over a response matrix of K responses (several traits, half-samples, folds) counts m = the rows
of its kernel's left factor (K plus the sample masks and their covariate bases) and c = its statistics
times K (each has one value per response), and keeps no values (k = 0 in ``topk``); its K top lists
(16 K k bytes a block) are small beside the statistics. So its memory grows with K, not with p.

No term grows with the number of features p, so the peak memory of a pass is flat in p. On a cluster
the plan is made for one worker process, with 3/4 of its memory limit (below the share at which
distributed pauses a worker, 80%): for ``processes:N`` that limit is the budget / N, for an existing
cluster the budget or the worker's own limit, whichever is smaller.

The sub-block width changes the last bits of the kernel's statistics (matrix products round by width),
so the width is recorded with the pass, and a resumed pass keeps it whenever it fits at all (with fewer
threads if need be); only a budget too small for it makes the resumed blocks use a narrower one, which
the pass reports in its notes.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from dask.utils import format_bytes, parse_bytes

#: Resident memory of a process with the interpreter, numpy, scipy, numba, dask and zarr loaded and its
#: compiled loops warmed up, before its blocks: about 270 MiB measured (ru_maxrss, tools/bench_scale.py);
#: rounded up.
BASELINE_BYTES = 320 * 2**20
#: Below this sub-block width the per-call overhead outweighs the memory saved; fewer threads first.
MIN_SUB_BLOCK = 128
#: Float64 (n, width) temporaries a kernel makes at its peak, unless the pass says otherwise.
DEFAULT_TEMPORARIES = 2.0
#: Share of a cluster worker's memory limit a plan may use: distributed pauses a worker at 80%.
CLUSTER_SHARE = 0.75
#: Copies of a top-k list's values a pairwise merge makes besides its inputs: the two lists stacked
#: (2) and the kept columns gathered (1). A screen at n = 10,000, k = 1085 under a 2 GiB budget
#: peaked at 2.3 GiB before they were counted.
MERGE_COPIES = 3


class MemoryBudgetError(ValueError):
    """The memory budget cannot hold even one worker thread with a one-feature sub-block."""


@dataclass(frozen=True)
class BlockShape:
    """What a pass reads per block, for the memory plan.

    Attributes
    ----------
    n_samples : int
        Rows in the store (all of them are decoded).
    n_analysed : int
        Rows analysed (after the outcome join).
    chunk_rows, chunk_cols : int
        Chunk shape of X.
    itemsize : int
        Bytes per stored value (1 for int8 dosages).
    encoded_columns : int
        Whole encoded chunk columns one thread holds: 0 for a store on a file system (one chunk file
        at a time, into a reused buffer), 1 on object storage (a block's objects are fetched together),
        2 on object storage read ahead (the next block's objects in flight too).
    """

    n_samples: int
    n_analysed: int
    chunk_rows: int
    chunk_cols: int
    itemsize: int
    encoded_columns: int = 0

    @property
    def column_bytes(self) -> int:
        n_row_chunks = -(-self.n_samples // self.chunk_rows)
        return n_row_chunks * self.chunk_rows * self.chunk_cols * self.itemsize

    @property
    def encoded_bytes(self) -> int:
        raw = self.chunk_rows * self.chunk_cols * self.itemsize
        if self.encoded_columns:
            # Whole objects (at worst incompressible, plus the Blosc header and the checksum) of each
            # row chunk of the column.
            n_row_chunks = -(-self.n_samples // self.chunk_rows)
            return self.encoded_columns * n_row_chunks * (raw + raw // 256 + 64 + 4)
        # At worst incompressible (Blosc adds a little), read into a reused buffer grown by 1.25x.
        return int(1.25 * (raw + raw // 256 + 64))


@dataclass(frozen=True)
class MemoryPlan:
    """A pass planned to a budget.

    Attributes
    ----------
    budget : int
        Bytes the process (or one cluster worker) may use.
    sub_block : int
        Features prepared and scored at once inside a block.
    n_threads : int
        Concurrent block tasks in the process (or per cluster worker).
    thread_bytes : int
        Peak bytes of one worker thread at ``sub_block``.
    shared_bytes : int
        Bytes held besides the threads (baseline and top-k records awaiting a merge).
    baseline : int
        The process's own memory counted in ``shared_bytes``.
    """

    budget: int
    sub_block: int
    n_threads: int
    thread_bytes: int
    shared_bytes: int
    baseline: int = BASELINE_BYTES

    @property
    def peak_bytes(self) -> int:
        return self.shared_bytes + self.n_threads * self.thread_bytes

    def to_dict(self) -> dict:
        return {**asdict(self), "peak_bytes": self.peak_bytes}


def process_baseline() -> int:
    """`BASELINE_BYTES`, or the resident memory of this process when that is larger (a budget is what
    the whole process may use, so memory it already holds counts)."""
    try:
        import psutil

        rss = int(psutil.Process().memory_info().rss)
    except Exception:  # pragma: no cover - psutil is a dependency; keep planning without it
        rss = 0
    return max(BASELINE_BYTES, rss)


def parse_budget(value: int | str | None) -> int | None:
    """Bytes from an int or a text such as ``"4GB"`` or ``"512MiB"``; None stays None."""
    if value is None:
        return None
    if isinstance(value, bool):
        raise ValueError(
            f"the memory budget must be a number of bytes or a size text; got {value!r}"
        )
    try:
        out = int(value) if isinstance(value, int) else int(parse_bytes(str(value)))
    except (ValueError, TypeError):
        raise ValueError(
            f"the memory budget must be a number of bytes or a size such as '4GB'; got {value!r}"
        ) from None
    if out <= 0:
        raise ValueError(f"the memory budget must be positive; got {value!r}")
    return out


def thread_bytes(
    shape: BlockShape,
    sub_block: int,
    *,
    keep: int,
    n_responses: int = 1,
    n_columns: int = 8,
    temporaries: float = DEFAULT_TEMPORARIES,
) -> int:
    """Peak bytes of one worker thread processing one block with sub-blocks of ``sub_block`` features."""
    w = min(sub_block, shape.chunk_cols)
    n = shape.n_analysed
    sub = n * w * (shape.itemsize + 8 * (1.0 + temporaries)) + 2 * n_responses * w * 8
    # The stored values of the block's final top k (a gathered copy and the kept one); the float64
    # values are made once, for the pass's final list (`shared_bytes`).
    top = 2 * n * min(keep, shape.chunk_cols) * shape.itemsize
    stats = 2 * n_columns * shape.chunk_cols * 8
    return int(shape.column_bytes + shape.encoded_bytes + sub + top + stats)


def shared_bytes(
    shape: BlockShape, n_threads: int, *, keep: int, split_every: int = 8, baseline: int
) -> int:
    copies = split_every + n_threads + 1 + MERGE_COPIES
    n = shape.n_analysed
    return int(baseline + copies * n * keep * shape.itemsize + 8 * n * keep)


def _widths(max_sub_block: int) -> list[int]:
    """The requested width, then the powers of two below it (they stay aligned with chunk widths)."""
    out = [max_sub_block]
    w = 1 << (max_sub_block.bit_length() - 1)
    if w == max_sub_block:
        w //= 2
    while w >= 1:
        out.append(w)
        w //= 2
    return out


def plan_memory(
    budget: int | str,
    shape: BlockShape,
    *,
    keep: int,
    max_threads: int,
    max_sub_block: int = 1024,
    n_responses: int = 1,
    n_columns: int = 8,
    temporaries: float = DEFAULT_TEMPORARIES,
    split_every: int = 8,
    baseline: int = BASELINE_BYTES,
    prefer_sub_block: int | None = None,
) -> MemoryPlan:
    """Choose the sub-block width and the number of threads that keep a pass within ``budget``.

    Parameters
    ----------
    budget : int or str
        Bytes (or a size text) the process may use in all.
    shape : BlockShape
    keep : int
        Length of the top-k list whose values are kept.
    max_threads : int
        Threads available (cores, or a worker's threads).
    max_sub_block : int
        The pass's requested sub-block width; the plan never exceeds it.
    n_responses : int
        Responses scored at once (1 + the number of permuted copies).
    n_columns : int
        Statistics recorded per feature.
    temporaries : float
        Float64 (n, width) temporaries the kernel makes at its peak.
    split_every : int
        Fan-in of the top-k merge tree.
    baseline : int
        Bytes of the process before the pass (`process_baseline` for the calling process).
    prefer_sub_block : int, optional
        A width already used by this pass (on resume): kept when it fits the chosen thread count, so
        the resumed statistics stay bit-identical.

    Returns
    -------
    MemoryPlan

    Raises
    ------
    MemoryBudgetError
        When one thread with a one-feature sub-block does not fit; the message gives the numbers.
    """
    total = parse_budget(budget)
    if max_threads < 1:
        raise ValueError(f"max_threads must be at least 1; got {max_threads}")
    if max_sub_block < 1:
        raise ValueError(f"the sub-block width must be at least 1; got {max_sub_block}")
    cap = min(max_sub_block, shape.chunk_cols)
    widths = _widths(cap)
    kw = {"keep": keep, "n_responses": n_responses, "n_columns": n_columns}

    def fits(t: int, w: int) -> tuple[bool, int, int]:
        per = thread_bytes(shape, w, temporaries=temporaries, **kw)
        shared = shared_bytes(shape, t, keep=keep, split_every=split_every, baseline=baseline)
        return shared + t * per <= total, per, shared

    if prefer_sub_block is not None and prefer_sub_block <= cap:
        # Bit-identical resumed statistics are worth a thread.
        for t in range(max_threads, 0, -1):
            ok, per, shared = fits(t, prefer_sub_block)
            if ok:
                return MemoryPlan(total, prefer_sub_block, t, per, shared, baseline)
    floor_w = min(MIN_SUB_BLOCK, cap)
    for t in range(max_threads, 0, -1):
        if t > 1 and not fits(t, floor_w)[0]:
            continue
        for w in widths:
            ok, per, shared = fits(t, w)
            if ok:
                return MemoryPlan(total, w, t, per, shared, baseline)
    per = thread_bytes(shape, 1, temporaries=temporaries, **kw)
    shared = shared_bytes(shape, 1, keep=keep, split_every=split_every, baseline=baseline)
    n_row_chunks = -(-shape.n_samples // shape.chunk_rows)
    kept = 2 * shape.n_analysed * min(keep, shape.chunk_cols) * shape.itemsize
    raise MemoryBudgetError(
        f"a memory budget of {_size(total)} is too small for this pass: one worker thread "
        f"needs at least {_size(per)} (a chunk column of {n_row_chunks * shape.chunk_rows} x "
        f"{shape.chunk_cols} values of {shape.itemsize} byte(s), {_size(shape.column_bytes)}, "
        f"is decoded whole; {_encoded_what(shape)} up to {_size(shape.encoded_bytes)}"
        + (f"; the top-{keep} values {_size(kept)}" if keep else "")
        + f") on top of {_size(shared)} for the process ({_size(baseline)} of its own) and "
        f"pending merges; give at least {_size(per + shared)}, or store X with fewer features per "
        "chunk"
    )


def _size(n: float) -> str:
    """Bytes as the rest of the program writes them (dask writes kibibytes "kiB")."""
    return format_bytes(n).replace("kiB", "KiB")


def _encoded_what(shape: BlockShape) -> str:
    if shape.encoded_columns > 1:
        return "its objects and the next block's (read ahead) take"
    return "its objects take" if shape.encoded_columns else "its chunk file takes"


__all__ = [
    "BASELINE_BYTES",
    "BlockShape",
    "MemoryBudgetError",
    "MemoryPlan",
    "parse_budget",
    "plan_memory",
    "process_baseline",
    "thread_bytes",
]
