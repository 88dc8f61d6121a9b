"""Cost of a response-matrix pass (many traits, half-samples, folds): K responses against one.

Not a test. Builds (or reuses) an int8 dosage store in ``--workdir`` (n = 2000 by default, 5% of the
values of a tenth of the features missing), then measures, each in its own subprocess so that peak memory
(``ru_maxrss``) belongs to that measurement alone:

* ``K = k``: `widescreen.workflow.screen_responses` of k traits (each missing 5% of its samples) with a
  run folder (statistics of shape (features, k) written to disk), as ``screen --response a,b,...``
  runs its pass, threaded scheduler (``--covariates q``: q shared covariates, each trait adjusted on
  its own samples);
* ``single``: the one-response pass of the first trait (`widescreen.workflow.screen_problem` on its own
  samples, linear family, run folder), the pass the goals compare K responses with;
* ``floor``: every chunk read, checked and decoded (`widescreen.engine` block source), nothing else;
* ``product K``: the floor plus each block converted to float32 and multiplied by an n x K float32
  matrix (BLAS), the arithmetic a K-response pass cannot avoid.

Usage::

    python tools/bench_responses.py --features 100000 --responses 1,20,100,200 --workdir /tmp/wsr
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def build(workdir: Path, n: int, p: int) -> Path:
    from widescreen.store import DatasetWriter

    path = workdir / f"int8-{n}x{p}.zarr"
    if path.exists():
        return path
    workdir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    w = DatasetWriter(path, [f"s{i}" for i in range(n)], "dosage", "int8", n_features=p)
    step = 8192
    for a in range(0, p, step):
        b = min(a + step, p)
        x = rng.binomial(2, rng.uniform(0.05, 0.5, b - a), size=(n, b - a)).astype(np.int8)
        holes = np.flatnonzero(rng.random(b - a) < 0.1)
        sub = x[:, holes]
        sub[rng.random(sub.shape) < 0.05] = -128
        x[:, holes] = sub
        w.append(x, [f"f{j}" for j in range(a, b)])
    w.finalize()
    return path


def _traits(n: int, k: int) -> np.ndarray:
    rng = np.random.default_rng(k)
    Y = rng.normal(size=(n, k))
    Y[rng.random((n, k)) < 0.05] = np.nan
    return Y


def _covariates(n: int, q: int) -> np.ndarray | None:
    """q shared covariates (standard normal plus an offset), or None."""
    if not q:
        return None
    rng = np.random.default_rng(1)
    return rng.normal(size=(n, q)) + 50 * rng.random(q)


def _cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def _rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def measure(
    store: Path, what: str, k: int, threads: int, workdir: Path, covariates: int = 0
) -> dict:
    from concurrent.futures import ThreadPoolExecutor

    from widescreen.engine import RunFolder, as_source
    from widescreen.workflow import Problem, screen_problem, screen_responses

    src = as_source(store)
    n = src.n_samples
    t0, c0 = time.perf_counter(), _cpu()
    if what == "pass":
        out = workdir / f"run-{k}"
        shutil.rmtree(out, ignore_errors=True)
        Z = _covariates(n, covariates)
        problem = Problem.from_arrays(store, np.zeros(n) + np.arange(n) % 3, covariates=Z)
        screen_responses(
            problem,
            _traits(n, k),
            keep_values=False,
            run=RunFolder(out),
            scheduler=f"threads:{threads}",
        )
    elif what == "single":
        out = workdir / "run-single"
        shutil.rmtree(out, ignore_errors=True)
        y = _traits(n, 1)[:, 0]
        rows = np.flatnonzero(np.isfinite(y))
        Z = _covariates(n, covariates)
        problem = Problem.from_arrays(
            store,
            y[rows],
            covariates=None if Z is None else Z[rows],
            sample_ids=[f"s{i}" for i in rows],
        )
        screen_problem(problem, run=RunFolder(out), scheduler=f"threads:{threads}")
    else:
        lhs = np.ascontiguousarray(np.nan_to_num(_traits(n, k)).T, dtype=np.float32)

        def one(i: int) -> None:
            raw = src.read(i)
            if what == "product":
                lhs @ raw.astype(np.float32)

        from threadpoolctl import threadpool_limits

        # One BLAS thread per worker, as the pass runs its products (idle BLAS threads spinning on
        # a loaded machine otherwise count as CPU time).
        with threadpool_limits(limits=1, user_api="blas"), ThreadPoolExecutor(threads) as pool:
            list(pool.map(one, range(src.n_blocks)))
    seconds = time.perf_counter() - t0
    if what in ("pass", "single"):
        shutil.rmtree(
            workdir / ("run-single" if what == "single" else f"run-{k}"), ignore_errors=True
        )
    return {"seconds": seconds, "cpu": _cpu() - c0, "rss_mib": _rss_mib()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workdir", default="/tmp/widescreen-bench-responses")
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=100_000)
    ap.add_argument("--responses", default="1,20,100,200")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--covariates", type=int, default=0, help="shared covariates of every trait")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args()
    workdir = Path(args.workdir)
    store = build(workdir, args.samples, args.features)
    if args.child:
        what, k = args.child.split(":")
        r = measure(store, what, int(k), args.threads, workdir, args.covariates)
        print(json.dumps(r))
        return
    ks = [int(v) for v in args.responses.split(",")]
    todo = (
        [("floor", 1), ("single", 1)]
        + [("pass", k) for k in ks]
        + [("product", k) for k in ks if k > 1]
    )
    print(
        f"int8 store n = {args.samples}, p = {args.features}, {args.threads} threads, "
        f"{args.covariates} covariates"
    )
    print(f"{'measurement':<22}{'wall s':>9}{'CPU s':>9}{'peak RSS MiB':>14}")
    for what, k in todo:
        cmd = [sys.executable, __file__, "--workdir", str(workdir), "--samples", str(args.samples)]
        cmd += ["--features", str(args.features), "--threads", str(args.threads)]
        cmd += ["--covariates", str(args.covariates)]
        cmd += ["--child", f"{what}:{k}"]
        proc = subprocess.run(cmd, capture_output=True, text=True, env=dict(os.environ))
        if proc.returncode:
            raise SystemExit(proc.stderr)
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        label = {
            "floor": "codec floor",
            "single": "one-response pass",
            "pass": f"pass, K = {k}",
            "product": f"float32 product K={k}",
        }
        print(f"{label[what]:<22}{r['seconds']:>9.2f}{r['cpu']:>9.2f}{r['rss_mib']:>14.0f}")


if __name__ == "__main__":
    main()
