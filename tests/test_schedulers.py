"""Schedulers: threads, a local cluster of processes and an existing cluster give the same pass.

A worker process killed mid-pass does not change the result (distributed runs its tasks again), and
workers that cannot see the store or the run folder are named in a clear error.
"""

from __future__ import annotations

import os
import signal
import socket
import threading
import time

import numpy as np
import pytest
import scipy.stats as st

from widescreen.engine import (
    PassSpec,
    RunFolder,
    StoreSource,
    WorkerAccessError,
    as_source,
    open_executor,
    process_block,
    read_stats,
    run_pass,
)
from widescreen.kernels._linear import linear_statistics, prepare_linear
from widescreen.store import MISSING_INT8, StoreError, open_dataset

from .conftest import write_store

distributed = pytest.importorskip("distributed")

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def cluster():
    """An existing cluster: two single-threaded worker processes."""
    with distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        dashboard_address=None,
        worker_dashboard_address=None,
        silence_logs=50,
    ) as c:
        yield c


@pytest.fixture(scope="module")
def client(cluster):
    with distributed.Client(cluster) as c:
        yield c


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    rng = np.random.default_rng(5)
    root = tmp_path_factory.mktemp("sched")
    n, p = 80, 1600
    X = rng.binomial(2, rng.uniform(0.05, 0.5, p), size=(n, p)).astype(np.int8)
    X[rng.random((n, p)) < 0.01] = MISSING_INT8
    y = 2.0 * np.where(X[:, 1400] == MISSING_INT8, 1, X[:, 1400]) + rng.standard_normal(n)
    ds = write_store(root / "x.zarr", X, chunk_features=16)  # 100 small blocks
    return root, X, y, as_source(ds)


def _spec(y, keep=20):
    return PassSpec(
        name="screen",
        kernel=linear_statistics,
        state=prepare_linear(y),
        columns=("score", "correlation", "t", "p_value"),
        keep=keep,
    )


@pytest.fixture(scope="module")
def threaded(data):
    root, _X, y, src = data
    run = RunFolder(root / "threads")
    res = run_pass(src, _spec(y), run, scheduler="threads")
    return res, read_stats(run, "screen")


def _same(res, stats, ref):
    ref_res, ref_stats = ref
    np.testing.assert_array_equal(res.topk.index, ref_res.topk.index)
    np.testing.assert_array_equal(res.topk.score, ref_res.topk.score)
    np.testing.assert_array_equal(res.topk.values, ref_res.topk.values)
    for c, v in ref_stats.items():
        np.testing.assert_array_equal(stats[c].view(np.uint64), v.view(np.uint64), err_msg=c)


def test_threaded_pass_matches_scipy(data, threaded):
    _root, X, y, _src = data
    res, stats = threaded
    assert res.topk.index[0] == 1400
    x = X[:, 1400].astype(float)
    miss = X[:, 1400] == MISSING_INT8
    x[miss] = x[~miss].mean()  # mean imputation (common practice for screening)
    assert stats["correlation"][1400] == pytest.approx(st.pearsonr(x, y)[0], abs=1e-12)


def test_local_processes_give_the_same_tables(data, threaded, tmp_path):
    _root, _X, y, src = data
    run = RunFolder(tmp_path / "run")
    seen = []
    res = run_pass(
        src,
        _spec(y),
        run,
        scheduler="processes:2",
        progress=lambda d, t: seen.append((d, t)),
        memory_budget="2GB",
    )
    _same(res, read_stats(run, "screen"), threaded)
    assert res.scheduler.startswith("distributed") and "2 workers x 1 threads" in res.scheduler
    # each worker got half the budget as its memory limit; the plan uses 3/4 of it
    assert res.plan["budget"] == int(0.75 * (2 * 10**9 // 2))
    assert res.plan["n_threads"] == 1
    # progress reached the driver for every block
    assert seen[0] == (0, 100) and seen[-1] == (100, 100) and len(seen) == 101


def test_existing_cluster_by_address_and_by_client(data, threaded, cluster, client, tmp_path):
    _root, _X, y, src = data
    run = RunFolder(tmp_path / "addr")
    res = run_pass(src, _spec(y), run, scheduler=cluster.scheduler_address)
    _same(res, read_stats(run, "screen"), threaded)
    assert client.status == "running"
    mem = run_pass(src, _spec(y), scheduler=client)  # no run folder: statistics in memory
    _same(mem, mem.stats, threaded)
    assert client.status == "running"  # a client given is left open


def test_killed_worker_does_not_change_the_result(data, threaded, client, tmp_path):
    _root, _X, y, src = data
    run = RunFolder(tmp_path / "kill")
    done_dir = run.pass_dir("screen") / "done"
    out: dict = {}

    def work():
        try:
            out["res"] = run_pass(src, _spec(y), run, scheduler=client)
        except BaseException as exc:  # pragma: no cover - reported below
            out["err"] = exc

    t = threading.Thread(target=work)
    t.start()
    t0 = time.monotonic()
    while not done_dir.is_dir() or len(list(done_dir.glob("*.json"))) < 10:
        assert t.is_alive(), out
        assert time.monotonic() - t0 < 60
        time.sleep(0.002)
    pids = client.run(os.getpid)
    victim = sorted(pids.values())[0]
    os.kill(victim, signal.SIGKILL)
    killed_at = len(list(done_dir.glob("*.json")))
    t.join(timeout=120)
    assert not t.is_alive() and "err" not in out, out.get("err")
    assert killed_at < 100  # the worker died mid-pass
    res = out["res"]
    assert res.blocks_computed == 100
    _same(res, read_stats(run, "screen"), threaded)
    client.wait_for_workers(2, timeout=60)  # its nanny started a new worker process
    assert victim not in client.run(os.getpid).values()


def test_workers_must_see_the_store_and_the_run_folder(data, client, tmp_path):
    _root, _X, y, src = data
    ex = open_executor(client)
    assert ex.kind == "distributed" and ex.n_workers == 2
    ex.check_reachable([("store", src.location(), "zarr.json")])  # seen by every worker
    host = socket.gethostname()
    st_ = os.stat(src.location() / "zarr.json")
    expected = [
        ("store", str(tmp_path / "elsewhere.zarr"), "zarr.json", 1, 1),
        ("run folder", str(src.location()), "zarr.json", st_.st_size + 1, st_.st_mtime_ns),
    ]
    with pytest.raises(WorkerAccessError) as err:
        ex._check_expected(expected)
    msg = str(err.value)
    assert f"store {tmp_path / 'elsewhere.zarr'} is not reachable from host {host}" in msg
    assert "is another copy than the driver's (zarr.json differs)" in msg
    assert all(addr in msg for addr in client.run(os.getpid))  # every worker is named
    # Inside a task: a run folder the worker does not see is named as such.
    fut = client.submit(process_block, src, _spec(y), 0, str(tmp_path / "gone" / "passes" / "x"))
    with pytest.raises(WorkerAccessError, match=r"run folder .*gone.* is not reachable from host"):
        fut.result()


def test_a_store_gone_from_a_machine_is_not_called_damaged(data, tmp_path):
    _root, X, _y, _src = data
    X2 = X[:, :64]
    ds = write_store(tmp_path / "s.zarr", X2, chunk_features=32)
    moved = StoreSource(open_dataset(ds.path))
    os.rename(ds.path, tmp_path / "t.zarr")
    with pytest.raises(StoreError, match=r"s\.zarr: the store is not reachable from host"):
        moved.read(0)


def test_unknown_schedulers_are_refused():
    with pytest.raises(ValueError, match="unknown scheduler"):
        open_executor(3.5)
    with pytest.raises(ValueError, match="at least 1"):
        open_executor("threads:0")
    with pytest.raises(ValueError, match="whole number"):
        open_executor("processes:two")
    ex = open_executor("threads:3", memory_budget=10**9)
    assert (ex.kind, ex.threads_per_worker, ex.memory_per_worker) == ("threads", 3, 10**9)
