"""Interrupted passes: blocks still running when a pass stops compute exactly as in an uninterrupted
pass (one BLAS thread until the pool is empty), and a resumed pass is bit-identical."""

from __future__ import annotations

import threading
import time

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
