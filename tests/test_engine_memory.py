"""Memory plans: the rule bounds what a block task really allocates, the planner obeys the budget, a
budget too small for one chunk is refused with the numbers, and the peak memory is flat in p."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import tracemalloc

import numpy as np
import pytest

from widescreen.engine import (
    BlockShape,
    MemoryBudgetError,
    PassSpec,
    RunFolder,
    as_source,
    parse_budget,
    plan_memory,
    process_block,
    read_stats,
    run_pass,
    thread_bytes,
)
from widescreen.engine._memory import BASELINE_BYTES, process_baseline, shared_bytes
from widescreen.kernels._linear import linear_statistics, prepare_linear
from widescreen.store import MISSING_INT8

from .conftest import write_store

MiB = 2**20


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    rng = np.random.default_rng(2)
    n, p = 1000, 4096
    X = rng.integers(0, 3, (n, p), dtype=np.int8)
    X[rng.random((n, p)) < 0.02] = MISSING_INT8
    ds = write_store(tmp_path_factory.mktemp("mem") / "x.zarr", X, chunk_features=1024)
    return as_source(ds), rng.standard_normal(n), rng.standard_normal((n, 2))


def _spec(y, Z=None, keep=50, sub_block=1024, rows=None):
    return PassSpec(
        name="screen",
        kernel=linear_statistics,
        state=prepare_linear(y, Z),
        columns=("score", "correlation", "t", "p_value"),
        keep=keep,
        rows=rows,
        sub_block=sub_block,
    )


def _traced_peak(src, spec) -> int:
    """Peak bytes allocated by one block task in a fresh thread (fresh per-thread buffers), measured
    with the standard library's tracemalloc (numpy reports its allocations to it)."""
    process_block(src, spec, 0, None)  # warm-up: lazily imported modules are not the task's memory
    out = {}

    def task():
        tracemalloc.start()
        tracemalloc.reset_peak()
        process_block(src, spec, 1, None)
        out["peak"] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()

    t = threading.Thread(target=task)
    t.start()
    t.join()
    return out["peak"]


@pytest.mark.parametrize(
    ("sub_block", "keep", "half"), [(64, 10, False), (256, 50, False), (1024, 300, True)]
)
def test_rule_bounds_the_measured_peak_of_a_block_task(store, sub_block, keep, half):
    src, y, Z = store
    rows = np.arange(0, src.n_samples, 2)[::-1].copy() if half else None
    spec = _spec(
        y if rows is None else y[rows], Z if rows is None else Z[rows], keep, sub_block, rows
    )
    peak = _traced_peak(src, spec)
    shape = src.block_shape(spec.n_analysed)
    bound = thread_bytes(shape, sub_block, keep=keep, n_columns=len(spec.all_columns))
    assert shape.column_bytes <= peak <= bound
    # and the rule is not absurdly loose (the linear kernel never builds the float64 sub-block the
    # rule allows for, and a block keeps its top k as stored bytes, so it stays somewhat below it)
    assert bound < 6 * peak


def test_plan_fits_the_budget_and_prefers_threads(store):
    src, _y, _Z = store
    shape = src.block_shape()
    per_full = thread_bytes(shape, 1024, keep=50)
    big = plan_memory(BASELINE_BYTES + 10 * per_full + 100 * MiB, shape, keep=50, max_threads=2)
    assert (big.n_threads, big.sub_block) == (2, 1024)
    assert big.peak_bytes <= big.budget
    # room for two threads only with narrower sub-blocks: still two threads, a power-of-two width
    tight = BASELINE_BYTES + shared_bytes(shape, 2, keep=50, baseline=0)
    tight += 2 * thread_bytes(shape, 300, keep=50)
    plan = plan_memory(tight, shape, keep=50, max_threads=2)
    assert plan.n_threads == 2 and plan.sub_block == 256
    assert (
        plan.peak_bytes
        <= tight
        < plan.peak_bytes + 2 * (thread_bytes(shape, 512, keep=50) - plan.thread_bytes)
    )
    # a width already used by the pass is kept, with one thread if need be
    kept = plan_memory(tight, shape, keep=50, max_threads=2, prefer_sub_block=512)
    assert (kept.n_threads, kept.sub_block) == (1, 512)
    # the plan never exceeds the requested width nor the chunk width
    assert (
        plan_memory(10 * 2**30, shape, keep=50, max_threads=2, max_sub_block=100).sub_block == 100
    )
    assert (
        plan_memory(10 * 2**30, shape, keep=50, max_threads=2, max_sub_block=4096).sub_block == 1024
    )


def test_budget_too_small_for_one_chunk_is_refused_with_numbers(store):
    src, y, _Z = store
    with pytest.raises(MemoryBudgetError) as err:
        plan_memory("258MiB", src.block_shape(), keep=50, max_threads=2)
    msg = str(err.value)
    assert "258.00 MiB is too small" in msg
    assert "a chunk column of 1000 x 1024 values of 1 byte(s)" in msg
    assert "fewer features per chunk" in msg
    with pytest.raises(MemoryBudgetError, match="too small"):
        run_pass(src, _spec(y), memory_budget=BASELINE_BYTES)
    # memory the process already holds counts against the budget
    assert process_baseline() >= BASELINE_BYTES


def test_plan_is_the_same_for_any_number_of_features():
    # the rule has no term in p: a store 1000 times wider gets the same plan
    a = BlockShape(n_samples=2000, n_analysed=2000, chunk_rows=2000, chunk_cols=8192, itemsize=1)
    plans = {plan_memory("1GiB", a, keep=263, max_threads=2) for _ in range(2)}
    assert len(plans) == 1
    assert next(iter(plans)).peak_bytes <= 2**30


def test_parse_budget():
    assert parse_budget("4GB") == 4 * 10**9  # dask.utils.parse_bytes: decimal units
    assert parse_budget("512MiB") == 512 * MiB
    assert parse_budget(None) is None
    for bad in ("lots", -1, 0, True):
        with pytest.raises(ValueError, match="memory budget"):
            parse_budget(bad)


def test_run_pass_follows_the_plan_and_resumes_with_its_width(store, tmp_path):
    src, y, Z = store
    shape = src.block_shape()
    kw = {"keep": 50, "n_columns": 7}
    budget = process_baseline() + shared_bytes(shape, 2, keep=50, baseline=0)
    budget += 2 * thread_bytes(shape, 300, **kw) + 2 * MiB
    run = RunFolder(tmp_path / "run")
    res = run_pass(src, _spec(y, Z), run, scheduler="threads:2", memory_budget=budget)
    assert res.plan["n_threads"] == 2 and res.sub_block == res.plan["sub_block"] in (256, 512)
    assert res.plan["peak_bytes"] <= budget
    assert (
        json.loads((run.pass_dir("screen") / "pass.json").read_text())["sub_block"] == res.sub_block
    )
    full = read_stats(run, "screen")
    # resumed with a larger budget: the recorded width is kept, bit for bit
    (run.pass_dir("screen") / "done" / "2.json").unlink()
    again = run_pass(src, _spec(y, Z), run, memory_budget="8GiB")
    assert again.sub_block == res.sub_block and again.blocks_computed == 1 and not again.notes
    for c, v in read_stats(run, "screen").items():
        np.testing.assert_array_equal(v.view(np.uint64), full[c].view(np.uint64))
    # resumed with a budget too small for it: a narrower width, and the pass says so
    (run.pass_dir("screen") / "done" / "3.json").unlink()
    small = process_baseline() + shared_bytes(shape, 1, keep=50, baseline=0)
    small += thread_bytes(shape, 100, **kw) + MiB
    narrow = run_pass(src, _spec(y, Z), run, memory_budget=small)
    assert narrow.sub_block < res.sub_block and narrow.plan["n_threads"] == 1
    assert f"sub-block widths [{narrow.sub_block}, {res.sub_block}]" in narrow.notes[0]
    np.testing.assert_array_equal(narrow.topk.index, again.topk.index)


WRITE_SCRIPT = r"""
import sys, numpy as np
from widescreen.store import DatasetWriter
n, p, root = 100, int(sys.argv[1]), sys.argv[2]
rng = np.random.default_rng(0)
w = DatasetWriter(root + "/x.zarr", [f"s{i}" for i in range(n)], "dosage", "int8",
                  n_features=p, chunks=(n, 512))
for a in range(0, p, 4096):
    w.append(rng.integers(0, 3, (n, 4096), dtype=np.int8), [f"f{j}" for j in range(a, a + 4096)])
w.finalize()
"""

PASS_SCRIPT = r"""
import sys, tracemalloc, numpy as np
from widescreen.engine import PassSpec, RunFolder, as_source, run_pass
from widescreen.kernels._linear import linear_statistics, prepare_linear
root, in_memory = sys.argv[1], sys.argv[2] == "memory"
src = as_source(root + "/x.zarr")
y = np.random.default_rng(0).standard_normal(src.n_samples)
spec = PassSpec("screen", linear_statistics, prepare_linear(y),
                ("score", "correlation", "t", "p_value"), keep=50)
tracemalloc.start()
run_pass(src, spec, None if in_memory else RunFolder(root + "/run"), scheduler="threads:2")
print(tracemalloc.get_traced_memory()[1])
"""


def _pass_peak(root, mode: str) -> int:
    out = subprocess.run(
        [sys.executable, "-c", PASS_SCRIPT, str(root), mode],
        capture_output=True,
        text=True,
        timeout=300,
        check=True,
    )
    return int(out.stdout)


@pytest.mark.slow
def test_peak_memory_of_a_pass_is_flat_in_p(tmp_path):
    # Peak memory allocated during one pass (the standard library's tracemalloc, which numpy reports
    # to), in a fresh process per size. (Resident memory, which tools/bench_scale.py reports, also
    # holds what compiled loops cost to compile, which varies from run to run.)
    peak = {}
    for p in (4096, 262144):
        d = tmp_path / str(p)
        d.mkdir()
        subprocess.run(
            [sys.executable, "-c", WRITE_SCRIPT, str(p), str(d)], check=True, timeout=300
        )
        peak[p] = _pass_peak(d, "folder")
    # 64 times the features: statistics kept in memory (262144 x 7 x 8 bytes = 14 MiB) or the kept
    # values of every block (100 x 50 x 8 bytes x 512 blocks = 20 MiB) would show.
    assert peak[262144] - peak[4096] < 8 * MiB, peak
    # the same measurement sees the statistics of a pass without a run folder, which do grow with p
    assert _pass_peak(tmp_path / "262144", "memory") - peak[262144] > 10 * MiB
