"""One place decides where a pass runs, in a documented order.

``scheduler`` may be
1. a `distributed.Client` (an existing cluster; left open afterwards);
2. a string address such as ``"tcp://10.0.0.5:8786"`` (connect to that cluster for this pass);
3. ``"processes:N"`` (start a local cluster of N single-threaded worker processes for this pass, each
   with a memory limit: the budget / N when a memory budget is given, else distributed's share of the
   machine's memory);
4. ``"sync"`` (run in the calling thread: for debugging);
5. ``None`` or ``"threads"`` / ``"threads:N"`` (the default: Dask's threaded scheduler on all cores).

BLAS is limited to one thread per worker thread everywhere (threads: around the pass; cluster workers:
for the life of the worker process, through a worker plugin that also covers restarted workers), so the
two never oversubscribe the cores and every scheduler rounds the same way.

On a cluster, the store and the run folder must be reachable by every worker at the same path (a
shared file system). `Executor.check_reachable` asks every worker before the pass starts and names
the paths and workers that do not see them.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask
from dask.callbacks import Callback
from threadpoolctl import threadpool_limits


class WorkerAccessError(OSError):
    """A cluster worker cannot reach the store or the run folder."""


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


def _parse_count(scheduler: str, what: str) -> int:
    text = scheduler.split(":", 1)[1]
    try:
        n = int(text)
    except ValueError:
        raise ValueError(f"scheduler {scheduler!r}: {what} must be a whole number") from None
    if n < 1:
        raise ValueError(f"scheduler {scheduler!r}: {what} must be at least 1")
    return n


def _is_local(scheduler: Any) -> bool:
    return (
        scheduler is None
        or scheduler in ("sync", "threads")
        or (isinstance(scheduler, str) and scheduler.startswith("threads:"))
    )


@dataclass
class Executor:
    """Where a pass runs: the local threaded (or synchronous) scheduler or a distributed client.

    Attributes
    ----------
    kind : {"sync", "threads", "distributed"}
    n_workers : int
        Processes doing block work (1 for the local schedulers).
    threads_per_worker : int
        Concurrent block tasks per process; a memory plan may lower it (local threads only).
    memory_per_worker : int or None
        Known memory limit of one worker process in bytes (the budget for the local schedulers).
    client : distributed.Client or None
    owned : bool
        Whether closing the executor closes the client (and the cluster it started).
    """

    kind: str
    n_workers: int = 1
    threads_per_worker: int = 1
    memory_per_worker: int | None = None
    client: Any = None
    owned: bool = False

    def describe(self) -> str:
        if self.kind != "distributed":
            return f"{self.kind}:{self.threads_per_worker}" if self.kind == "threads" else "sync"
        return (
            f"distributed {self.client.scheduler.address} "
            f"({self.n_workers} workers x {self.threads_per_worker} threads)"
        )

    def close(self) -> None:
        if self.owned and self.client is not None:
            self.client.close()
        self.client = None

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ----------------------------------------------------------------------------------------

    def check_reachable(self, paths: list[tuple[str, Path, str]]) -> None:
        """Make sure every worker sees the given folders.

        Parameters
        ----------
        paths : list of (what, folder, probe)
            ``probe`` names a file inside ``folder`` (relative) whose size and modification time the
            workers compare with the driver's, so a different folder at the same path is caught too.
        """
        if self.kind != "distributed" or not paths:
            return
        expected = []
        for what, folder, probe in paths:
            st = os.stat(Path(folder) / probe)
            expected.append((what, str(folder), str(probe), st.st_size, st.st_mtime_ns))
        self._check_expected(expected)

    def _check_expected(self, expected: list[tuple[str, str, str, int, int]]) -> None:
        answers = self.client.run(_probe_paths, expected)
        problems = [f"{addr}: {msg}" for addr, msgs in sorted(answers.items()) for msg in msgs]
        if problems:
            raise WorkerAccessError(
                "cluster workers cannot use the data of this pass (the store and the run folder "
                "must be on a file system every worker sees at the same path): "
                + "; ".join(problems)
            )

    def run(
        self,
        graph: dict,
        block_keys: list,
        final_key,
        *,
        progress: Callable[[int, int], None] | None = None,
        offset: int = 0,
        total: int = 0,
        want_blocks: bool = False,
    ) -> dict:
        """Run a pass graph; return the final merged record (and the block records when asked)."""
        if final_key is None:
            return {"final": None, "blocks": []}
        if self.kind == "distributed":
            return _run_distributed(
                self.client, graph, block_keys, final_key, progress, offset, total, want_blocks
            )
        keys = [final_key, *block_keys] if want_blocks else [final_key]
        pool = None
        if self.kind == "sync":
            get, kwargs = dask.get, {}
        else:
            # A pool of the pass's own, shut down before returning: when a block fails, the blocks
            # still running finish (and write their markers) before the error reaches the caller,
            # so nothing writes into the run folder after the pass has ended and released it.
            pool = ThreadPoolExecutor(self.threads_per_worker)
            get, kwargs = dask.threaded.get, {"num_workers": self.threads_per_worker, "pool": pool}
        callbacks = [_BlockProgress(block_keys, progress, offset, total)] if progress else []
        # The one-thread BLAS limit is process-wide and must outlive every block task: when the pass
        # stops early (a failed block, Ctrl-C, SIGTERM), blocks still running finish and write their
        # statistics, and they must compute them exactly as an uninterrupted pass would (BLAS with
        # more threads sums in another order). So the pool is shut down inside the limit.
        with threadpool_limits(limits=1, user_api="blas"):
            try:
                with dask.config.set(callbacks=set()), _Callbacks(callbacks):
                    out = get(graph, keys, **kwargs)
            finally:
                if pool is not None:
                    _shutdown(pool)
        return {"final": out[0], "blocks": list(out[1:])}


def _shutdown(pool: ThreadPoolExecutor) -> None:
    """Cancel the blocks not started and wait for the running ones, even through a second Ctrl-C.

    A second interrupt while waiting would otherwise leave blocks running (and writing) after the
    BLAS limit is released; it is delivered once the pool is empty.
    """
    pending: BaseException | None = None
    while True:
        try:
            pool.shutdown(wait=True, cancel_futures=True)
            break
        except KeyboardInterrupt as exc:  # a second Ctrl-C / SIGTERM: finish waiting first
            pending = exc
    if pending is not None:
        raise pending


def open_executor(scheduler: Any = None, *, memory_budget: int | None = None) -> Executor:
    """An `Executor` for anything the module docstring lists.

    Parameters
    ----------
    scheduler : see the module docstring
    memory_budget : int, optional
        Bytes: for the local schedulers the budget of this process; for ``"processes:N"`` the budget
        shared by the N workers; for an existing cluster, the budget of one worker process (capped by
        the worker's own memory limit).
    """
    if _is_local(scheduler):
        if scheduler == "sync":
            return Executor("sync", memory_per_worker=memory_budget)
        n = n_cores()
        if isinstance(scheduler, str) and scheduler.startswith("threads:"):
            n = _parse_count(scheduler, "the number of threads")
        return Executor("threads", threads_per_worker=n, memory_per_worker=memory_budget)
    try:
        from distributed import Client
    except ImportError as exc:  # pragma: no cover - distributed is a dependency
        raise RuntimeError("the distributed package is needed for cluster scheduling") from exc
    if isinstance(scheduler, Client):
        client, owned = scheduler, False
    elif isinstance(scheduler, str) and scheduler.startswith("processes:"):
        from ._cluster import local_cluster_client

        n = _parse_count(scheduler, "the number of worker processes")
        limit = "auto" if memory_budget is None else max(1, memory_budget // n)
        client, owned = local_cluster_client(n, memory_limit=limit), True
    elif isinstance(scheduler, str):
        try:
            client = Client(scheduler, timeout="30s")
        except OSError as exc:
            raise OSError(f"cannot reach the Dask scheduler at {scheduler!r}: {exc}") from None
        owned = True
    else:
        raise ValueError(
            f"unknown scheduler {scheduler!r}: give 'threads', 'threads:N', 'processes:N', 'sync', "
            "a scheduler address or a distributed Client"
        )
    try:
        _register_blas_limit(client)
        workers = client.scheduler_info().get("workers", {})
        if not workers:
            client.wait_for_workers(1, timeout=60)
            workers = client.scheduler_info().get("workers", {})
        nthreads = [int(w.get("nthreads", 1)) for w in workers.values()] or [1]
        limits = [int(w.get("memory_limit") or 0) for w in workers.values()]
        known = [m for m in limits if m > 0]
        per_worker = min(known) if known else None
        if memory_budget is not None and not (
            isinstance(scheduler, str) and scheduler.startswith("processes:")
        ):
            per_worker = memory_budget if per_worker is None else min(per_worker, memory_budget)
        return Executor(
            "distributed",
            n_workers=len(workers),
            threads_per_worker=max(nthreads),
            memory_per_worker=per_worker,
            client=client,
            owned=owned,
        )
    except BaseException:
        if owned:
            client.close()
        raise


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
    """Run a pass graph on ``scheduler``; return the final merged record (and the block records)."""
    if final_key is None:
        return {"final": None, "blocks": []}
    with open_executor(scheduler) as ex:
        return ex.run(
            graph,
            block_keys,
            final_key,
            progress=progress,
            offset=offset,
            total=total,
            want_blocks=want_blocks,
        )


class _Callbacks:
    def __init__(self, callbacks):
        self._cbs = callbacks

    def __enter__(self):
        for c in self._cbs:
            c.__enter__()

    def __exit__(self, *exc):
        for c in reversed(self._cbs):
            c.__exit__(*exc)


def _run_distributed(
    client, graph, block_keys, final_key, progress, offset, total, want_blocks
) -> dict:
    from distributed import as_completed

    futures = client.get(graph, [*list(block_keys), final_key], sync=False)
    block_futs, final_fut = futures[:-1], futures[-1]
    del futures  # a block's result is released once merged, unless the caller wants it
    kept = list(block_futs) if want_blocks else []
    done = offset
    if progress is not None:
        pending = as_completed(block_futs)
        del block_futs  # as_completed holds them until they finish; then they can be released
        for fut in pending:
            if fut.status == "error":
                break  # the final result raises the block's error
            done += 1
            progress(done, total)
            del fut
    else:
        del block_futs
    final = final_fut.result()
    blocks = client.gather(kept) if want_blocks else []
    return {"final": final, "blocks": blocks}


# --------------------------------------------------------------------------------------------
# Worker side


def _probe_paths(expected: list[tuple[str, str, str, int, int]]) -> list[str]:
    """Run on each worker: which of the driver's folders this worker does not see as the driver does."""
    host = socket.gethostname()
    out = []
    for what, folder, probe, size, mtime in expected:
        path = Path(folder) / probe
        try:
            st = os.stat(path)
        except FileNotFoundError:
            out.append(f"{what} {folder} is not reachable from host {host} (no {probe})")
            continue
        except OSError as exc:
            out.append(f"{what} {folder} cannot be read on host {host}: {exc}")
            continue
        if (st.st_size, st.st_mtime_ns) != (size, mtime):
            out.append(
                f"{what} {folder} on host {host} is another copy than the driver's ({probe} differs)"
            )
        elif what == "run folder" and not os.access(folder, os.W_OK):
            out.append(f"{what} {folder} is not writable on host {host}")
    return out


def _register_blas_limit(client) -> None:
    try:
        from distributed.diagnostics.plugin import WorkerPlugin
    except ImportError:  # pragma: no cover
        return

    class _OneBlasThread(WorkerPlugin):
        name = "widescreen-one-blas-thread"

        def setup(self, worker):
            # Kept for the life of the worker process; a restarted worker runs setup again.
            worker._widescreen_blas_limit = threadpool_limits(limits=1, user_api="blas")

    client.register_plugin(_OneBlasThread(), name=_OneBlasThread.name)
