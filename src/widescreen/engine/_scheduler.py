"""One place decides where a pass runs, in a documented order.

``scheduler`` may be
1. a `distributed.Client` (an existing cluster);
2. a string address such as ``"tcp://10.0.0.5:8786"`` (connect to that cluster);
3. ``"processes:N"`` (start a local cluster of N single-threaded worker processes for this run);
4. ``"sync"`` (run in the calling thread: for debugging);
5. ``None`` or ``"threads"`` / ``"threads:N"`` (the default: Dask's threaded scheduler on all cores).

With threads, BLAS is limited to one thread per worker thread so the two don't oversubscribe the cores.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from typing import Any

import dask
from dask.callbacks import Callback
from threadpoolctl import threadpool_limits


def n_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


class _BlockProgress(Callback):
    def __init__(self, block_keys, progress, offset: int, total: int) -> None:
        super().__init__()
        self._keys = set(block_keys)
        self._progress = progress
        self._done = offset
        self._total = total

    def _posttask(self, key, result, dsk, state, worker_id):
        if key in self._keys:
            self._done += 1
            self._progress(self._done, self._total)


def _client_for(scheduler: Any):
    """A distributed Client for a client, an address or "processes:N"; None for local schedulers."""
    if (
        scheduler is None
        or scheduler in ("sync", "threads")
        or (isinstance(scheduler, str) and scheduler.startswith("threads:"))
    ):
        return None, False
    try:
        from distributed import Client
    except ImportError as exc:  # pragma: no cover - distributed is a dependency
        raise RuntimeError("the distributed package is needed for cluster scheduling") from exc
    if isinstance(scheduler, Client):
        return scheduler, False
    if isinstance(scheduler, str) and scheduler.startswith("processes:"):
        from ._cluster import local_cluster_client

        return local_cluster_client(int(scheduler.split(":", 1)[1])), True
    if isinstance(scheduler, str):
        return Client(scheduler, timeout="30s"), True
    raise ValueError(f"unknown scheduler {scheduler!r}")


def execute(
    graph: dict,
    block_keys: list,
    final_key,
    *,
    scheduler: Any = None,
    progress: Callable[[int, int], None] | None = None,
    offset: int = 0,
    total: int = 0,
    want_blocks: bool = False,
) -> dict:
    """Run a pass graph; return the final merged record (and the block records when asked)."""
    if final_key is None:
        return {"final": None, "blocks": []}
    keys = [final_key, *block_keys] if want_blocks else [final_key]
    client, owned = _client_for(scheduler)
    if client is not None:
        try:
            return _execute_distributed(
                client, graph, keys, block_keys, progress, offset, total, want_blocks
            )
        finally:
            if owned:
                client.close()
    if scheduler == "sync":
        get, kwargs = dask.get, {}
    else:
        n = n_cores()
        if isinstance(scheduler, str) and scheduler.startswith("threads:"):
            n = int(scheduler.split(":", 1)[1])
        get, kwargs = dask.threaded.get, {"num_workers": n}
    callbacks = [_BlockProgress(block_keys, progress, offset, total)] if progress else []
    with threadpool_limits(limits=1, user_api="blas"), dask.config.set(callbacks=set()):
        with _maybe(callbacks):
            out = get(graph, keys, **kwargs)
    return {"final": out[0], "blocks": list(out[1:])}


class _maybe:
    def __init__(self, callbacks):
        self._cbs = callbacks

    def __enter__(self):
        for c in self._cbs:
            c.__enter__()

    def __exit__(self, *exc):
        for c in reversed(self._cbs):
            c.__exit__(*exc)


def _execute_distributed(
    client, graph, keys, block_keys, progress, offset, total, want_blocks
) -> dict:
    from distributed import as_completed

    futures = client.get(graph, [*list(block_keys), keys[0]], sync=False)
    block_futs, final_fut = futures[:-1], futures[-1]
    done = offset
    if progress is not None:
        for _ in as_completed(block_futs):
            done += 1
            progress(done, total)
    final = final_fut.result()
    blocks = client.gather(block_futs) if want_blocks else []
    return {"final": final, "blocks": blocks}
