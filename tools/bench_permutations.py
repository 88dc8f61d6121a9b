"""Cost of the permutation threshold: a linear pass with K permuted responses against one response.

Not a test. Usage: python tools/bench_permutations.py [--features 262144] [--permutations 20]
The K null utilities come from the same matrix product as the real one, so the pass should cost
little more than a single-response pass.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time

import numpy as np

from widescreen.engine import PassSpec, as_source, run_pass
from widescreen.families import Response, get_family
from widescreen.store import DatasetWriter, open_dataset


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=262_144)
    ap.add_argument("--permutations", type=int, default=20)
    ap.add_argument("--workdir", default=tempfile.gettempdir())
    args = ap.parse_args()
    n, p = args.samples, args.features
    path = os.path.join(args.workdir, f"perm-bench-{n}x{p}.zarr")
    if not os.path.exists(path):
        rng = np.random.default_rng(0)
        w = DatasetWriter(path, [f"s{i}" for i in range(n)], "dosage", "int8", n_features=p)
        step = 16_384
        for a in range(0, p, step):
            b = min(a + step, p)
            w.append(
                rng.binomial(2, 0.3, size=(n, b - a)).astype(np.int8),
                [f"f{j}" for j in range(a, b)],
            )
        w.finalize()
    src = as_source(open_dataset(path))
    fam = get_family("linear")
    y = np.random.default_rng(1).normal(size=n)
    print(f"{'responses':>10} {'wall s':>8} {'cpu s':>8}")
    for k in (0, args.permutations, 0, args.permutations):
        state = fam.prepare(Response(y=y), None, n_permutations=k, seed=3)
        spec = PassSpec("screen", fam.kernel, state, fam.columns, keep=100)
        t, c = time.perf_counter(), time.process_time()
        run_pass(src, spec)
        print(f"{1 + k:>10} {time.perf_counter() - t:>8.2f} {time.process_time() - c:>8.2f}")


if __name__ == "__main__":
    main()
