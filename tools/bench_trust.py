"""Cost of stability selection and of cross-validating the pipeline, against one plain `run`.

Not a test. Usage:

    nice -n 10 python tools/bench_trust.py [--samples 2000] [--features 100000] [--pairs 50]
        [--folds 5] [--workdir /tmp/wst]

Builds an int8 dosage store (n x p, 10 features with an effect on a linear outcome), then runs, each
into a fresh run folder: the plain `run`, `run --stability B`, `run --cv-folds K`, the plain `run` again (a shared machine's load changes); prints wall and CPU
seconds of each, the ratio to the plain run, and the phases (screen passes, the read of the union,
the refits) of the extra step. ``--single-passes`` measures the fallback (one pass per subset). Goals (issue 11): B = 50 within 10x a plain run, 5 folds within 3x.
"""

from __future__ import annotations

import argparse
import os
import shutil
import time

import numpy as np

from widescreen.store import DatasetWriter
from widescreen.workflow import IterateConfig, run


def _store(path: str, n: int, p: int) -> str:
    outcome = path + ".outcome.tsv"
    if os.path.exists(path) and os.path.exists(outcome):
        return outcome
    rng = np.random.default_rng(0)
    true = np.sort(rng.choice(p, size=10, replace=False))
    y = rng.standard_normal(n)
    w = DatasetWriter(path, [f"s{i}" for i in range(n)], "dosage", "int8", n_features=p)
    step = 16_384
    for a in range(0, p, step):
        b = min(a + step, p)
        X = rng.binomial(2, 0.3, size=(n, b - a)).astype(np.int8)
        hit = true[(true >= a) & (true < b)]
        y += 0.35 * (X[:, hit - a].astype(float) - 0.6).sum(axis=1)
        w.append(X, [f"f{j}" for j in range(a, b)])
    w.finalize()
    with open(outcome, "w") as f:
        f.write("sample\ty\n")
        f.writelines(f"s{i}\t{float(v)!r}\n" for i, v in enumerate(y))
    return outcome


def _timed(store: str, outcome: str, out: str, config: IterateConfig):
    shutil.rmtree(out, ignore_errors=True)
    t, c = time.perf_counter(), time.process_time()
    res = run(store, outcome, config, out)
    return res, time.perf_counter() - t, time.process_time() - c


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=100_000)
    ap.add_argument("--pairs", type=int, default=50)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--workdir", default="/tmp/wst")
    ap.add_argument(
        "--single-passes",
        action="store_true",
        help="Screen the subsets one pass each (the fallback of Cox and the model-free families).",
    )
    ap.add_argument("--skip-cv", action="store_true")
    args = ap.parse_args()
    if args.single_passes:
        from widescreen.families import get_family

        type(get_family("linear")).multi_kernel = None
    os.makedirs(args.workdir, exist_ok=True)
    n, p = args.samples, args.features
    store = os.path.join(args.workdir, f"trust-{n}x{p}.zarr")
    outcome = _store(store, n, p)
    base = IterateConfig(response="y")
    runs = [
        ("plain run", base),
        (f"--stability {args.pairs}", IterateConfig(response="y", stability=args.pairs)),
        (f"--cv-folds {args.folds}", IterateConfig(response="y", cv_folds=args.folds)),
    ][: 2 if args.skip_cv else 3]
    runs.append(("plain run again", base))  # brackets the load of a shared machine
    print(f"n = {n}, p = {p}, int8; load average {os.getloadavg()[0]:.1f}")
    print(
        f"{'run':>16} {'wall s':>8} {'cpu s':>8} {'x wall':>7} {'x cpu':>7}  phases of the extra step"
    )
    ref = None
    for name, cfg in runs:
        res, wall, cpu = _timed(store, outcome, os.path.join(args.workdir, "run"), cfg)
        ref = ref or (wall, cpu)
        extra = res.extra.get("stability") or res.extra.get("cv")
        phases = "" if extra is None else str(extra.seconds)
        if res.extra.get("stability") is not None:
            s = res.extra["stability"]
            phases += f"; stable {s.stable.size}, q {s.q:.1f}, shortlist {s.shortlist}"
        if res.extra.get("cv") is not None:
            phases += f"; {res.extra['cv'].text()}"
        print(
            f"{name:>16} {wall:>8.1f} {cpu:>8.1f} {wall / ref[0]:>7.1f} {cpu / ref[1]:>7.1f}  {phases}",
            flush=True,
        )


if __name__ == "__main__":
    main()
