"""Interrupted passes: blocks still running when a pass stops compute exactly as in an uninterrupted
pass (one BLAS thread until the pool is empty), and a resumed pass is bit-identical."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from widescreen.engine import open_executor


def _blas_threads() -> int:
    return max((i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"), default=1)


@pytest.mark.parametrize("stop", [RuntimeError, KeyboardInterrupt])
def test_blas_limit_holds_until_running_blocks_finish(stop):
    started = threading.Event()
    seen: list[int] = []

    def slow_block():
        started.set()
        # Watch the BLAS thread count while the pass is being stopped: it must stay 1 until this
        # task has finished (with the limit released early it turns 2 within milliseconds).
        deadline = time.monotonic() + 1.0
        while time.monotonic() < deadline and _blas_threads() == 1:
            time.sleep(0.01)
        seen.append(_blas_threads())
        return 1

    def failing_block():
        started.wait(5)
        raise stop("stop the pass")

    graph = {"a": (slow_block,), "b": (failing_block,), "final": (lambda a, b: a, "a", "b")}
    # Two BLAS threads outside the pass, so a limit released too early is visible.
    with threadpool_limits(limits=2, user_api="blas"):
        ex = open_executor("threads:2")
        with pytest.raises(stop):
            ex.run(graph, ["a", "b"], "final")
        after = _blas_threads()
    assert seen == [1]  # the running block finished under the one-thread limit
    assert after == 2  # and lifted once the pass has ended


def test_interrupted_import_says_what_was_left(tmp_path, monkeypatch):
    from typer.testing import CliRunner

    import widescreen.store._ingest_npy as ingest_npy
    from widescreen.cli import app

    src = tmp_path / "x.npy"
    np.save(src, np.zeros((4, 3), np.float32))

    def stopped(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(ingest_npy, "import_npy", stopped)
    res = CliRunner().invoke(app, ["import", str(src), str(tmp_path / "x.zarr")])
    assert res.exit_code == 130
    assert "partial store was removed" in res.output and "resume" not in res.output


def test_import_killed_mid_way_is_named_and_overwrite_replaces_it(tmp_path):
    from typer.testing import CliRunner

    from widescreen.cli import app
    from widescreen.store import DatasetWriter

    store = tmp_path / "x.zarr"
    # what a SIGKILL during an import leaves: a store never marked complete
    w = DatasetWriter(store, ["a", "b"], "continuous", "float32", n_features=2)
    w.append(np.zeros((2, 2), np.float32), ["f1", "f2"])
    src = tmp_path / "x.npy"
    np.save(src, np.ones((2, 3), np.float32))
    res = CliRunner().invoke(app, ["import", str(src), str(store)])
    assert res.exit_code == 1
    assert "did not finish" in res.output and "--overwrite" in res.output
    res = CliRunner().invoke(app, ["import", str(src), str(store), "--overwrite"])
    assert res.exit_code == 0, res.output
