"""Time the model-free and nonparametric screening kernels on one in-memory block.

Each kernel runs on a block of n samples x width features (continuous, or int8 dosages with --dosage),
best of --repeats runs, and the time is scaled linearly to --p features (the kernels are linear in the
number of features; the per-pass preparation is timed once and added). The linear kernel is the yardstick.
HOLP counts both passes: the Gram part of every block, then the coefficients.

Both wall-clock and CPU time (of this process, all threads) are printed: on a busy machine the CPU time
is the steadier figure; BLAS threads make it exceed the wall time for the matrix products.

    python tools/bench_modelfree_kernels.py --n 2000 --width 4096 --p 100000
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from threadpoolctl import threadpool_info

from widescreen.kernels import linear_statistics, prepare_linear
from widescreen.kernels._dcor import dcor_statistics, prepare_dcor
from widescreen.kernels._holp import holp_gram, holp_statistics, prepare_holp
from widescreen.kernels._rank import (
    prepare_rank_utility,
    prepare_spearman,
    rank_utility_statistics,
    spearman_statistics,
)
from widescreen.kernels._spline import prepare_spline, spline_statistics
from widescreen.store._reader import prepare_block


def _best(fn, repeats: int) -> tuple[float, float]:
    """Best wall-clock and best CPU seconds of ``repeats`` calls."""
    wall, cpu = [], []
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return min(wall), min(cpu)


def main() -> None:
    ap = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    ap.add_argument("--n", type=int, default=2000, help="samples")
    ap.add_argument("--width", type=int, default=4096, help="features in the block")
    ap.add_argument("--p", type=int, default=100_000, help="features to scale the figures to")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument(
        "--dosage", action="store_true", help="int8 dosages 0/1/2 instead of Gaussian values"
    )
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    rng = np.random.default_rng(args.seed)
    n, width = args.n, args.width
    if args.dosage:
        raw = rng.binomial(2, rng.uniform(0.05, 0.5, width), size=(n, width)).astype(np.int8)
    else:
        raw = rng.standard_normal((n, width))
    y = raw[:, 0] + rng.standard_normal(n)
    block = prepare_block(raw, start=0)
    scale = args.p / width

    blas = (
        ", ".join(f"{i['internal_api']} x{i['num_threads']}" for i in threadpool_info()) or "none"
    )
    print(
        f"block: n = {n}, width = {width}, {'int8 dosages' if args.dosage else 'float64 Gaussian'}"
    )
    print(f"cores: {os.cpu_count()}, BLAS: {blas}; best of {args.repeats}; scaled to p = {args.p}")
    head = (
        "kernel",
        "prepare s",
        "block s",
        "block cpu s",
        "us/feature",
        "p total s",
        "p cpu s",
        "x linear",
    )
    print(f"{head[0]:<14}" + "".join(f"{h:>12}" for h in head[1:]))

    def row(name, t_prep, wall, cpu, base, extra=""):
        print(
            f"{name:<14}{t_prep:>12.3f}{wall:>12.3f}{cpu:>12.3f}{1e6 * wall / width:>12.1f}"
            f"{t_prep + scale * wall:>12.1f}{t_prep + scale * cpu:>12.1f}{wall / base:>12.1f}{extra}"
        )

    kernels = {
        "linear": (lambda: prepare_linear(y), linear_statistics),
        "spearman": (lambda: prepare_spearman(y), spearman_statistics),
        "rank_utility": (lambda: prepare_rank_utility(y), rank_utility_statistics),
        "dcor": (lambda: prepare_dcor(y), dcor_statistics),
        "spline": (lambda: prepare_spline(y), spline_statistics),
    }
    base = None
    for name, (prep, stats) in kernels.items():
        t0 = time.perf_counter()
        state = prep()
        t_prep = time.perf_counter() - t0
        wall, cpu = _best(lambda stats=stats, state=state: stats(block, state), args.repeats)
        base = base or wall
        row(name, t_prep, wall, cpu, base)

    # HOLP: pass 1 (Gram part of each block), the solve once, pass 2 (coefficients of each block).
    g_wall, g_cpu = _best(lambda: holp_gram(block), args.repeats)
    gram = holp_gram(block) * scale  # a stand-in of the right size for the solve
    t0 = time.perf_counter()
    state = prepare_holp(y, gram, ridge=1.0)
    t_prep = time.perf_counter() - t0
    b_wall, b_cpu = _best(lambda: holp_statistics(block, state), args.repeats)
    extra = f"   (gram {g_wall:.3f} s + beta {b_wall:.3f} s per block)"
    row("holp", t_prep, g_wall + b_wall, g_cpu + b_cpu, base, extra)


if __name__ == "__main__":
    main()
