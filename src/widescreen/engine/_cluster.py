"""A local cluster of worker processes for one run."""

from __future__ import annotations

import logging

#: BLAS, OpenMP and Blosc limited to one thread in every worker process, set before they load.
WORKER_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "BLOSC_NTHREADS": "1",
}


def local_cluster_client(n_workers: int, memory_limit: str | int = "auto"):
    """Start ``n_workers`` single-threaded worker processes (BLAS limited to one thread each).

    Parameters
    ----------
    n_workers : int
    memory_limit : int or str
        Per worker process: bytes, a size text, or "auto" (distributed's share of the machine's memory).
        A worker that grows past 95% of it is restarted by its nanny, and its tasks run again elsewhere.

    Returns
    -------
    distributed.Client
        A client that owns its cluster: closing the client also ends the workers.
    """
    from distributed import Client, LocalCluster

    if n_workers < 1:
        raise ValueError(f"the number of workers must be at least 1; got {n_workers}")
    cluster = LocalCluster(
        n_workers=n_workers,
        threads_per_worker=1,
        processes=True,
        memory_limit=memory_limit,
        dashboard_address=None,
        worker_dashboard_address=None,
        silence_logs=logging.ERROR,
        env=dict(WORKER_ENV),
    )
    try:
        client = Client(cluster)
    except BaseException:
        cluster.close()
        raise
    orig_close = client.close

    def close(*args, **kwargs):
        try:
            orig_close(*args, **kwargs)
        finally:
            cluster.close()

    client.close = close
    return client
