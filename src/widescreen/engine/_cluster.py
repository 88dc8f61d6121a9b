"""A local cluster of worker processes for one run."""

from __future__ import annotations


def local_cluster_client(n_workers: int, memory_limit: str | int = "auto"):
    """Start ``n_workers`` single-threaded worker processes (BLAS limited to one thread each).

    Returns a Client that owns its cluster: closing the client's cluster ends the workers.
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
        env={"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"},
    )
    client = Client(cluster)
    # Closing the client also shuts the cluster it started down.
    client._owned_cluster = cluster
    orig_close = client.close

    def close(*args, **kwargs):
        orig_close(*args, **kwargs)
        cluster.close()

    client.close = close
    return client
