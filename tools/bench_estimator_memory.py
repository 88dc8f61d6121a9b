"""Memory of the estimators on a store with many features and few samples: feature ids against statistics.

Not a test. Builds (or reuses) an int8 dosage store in ``--workdir`` (n = 50 by default, one strong
feature so the fits select it), then measures, each in its own subprocess so that peak memory
(``ru_maxrss``, and the Python heap's peak from tracemalloc) belongs to that measurement alone:

* ``every id``: `StoreView.feature_ids` (the whole id column, as the estimators read it before they
  read by coordinate);
* ``20 ids``: `StoreView.feature_ids_at` of 20 features spread over the store (one id chunk decoded at
  a time, the estimators' route);
* ``selector`` / ``model``: `ScreeningSelector(shortlist=20)` and `IterativeScreeningModel(shortlist=20,
  max_iter=1)` fitted on a `StoreView`, then ``get_feature_names_out`` (the pass holds every feature's
  statistics in memory: the selector's ``statistics_``).

Usage::

    python tools/bench_estimator_memory.py --features 3000000 --workdir /tmp/wse
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
import tracemalloc
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
    step = 1 << 17
    for a in range(0, p, step):
        b = min(a + step, p)
        x = rng.integers(0, 3, size=(n, b - a), dtype=np.int8)
        w.append(x, [f"rs{j}" for j in range(a, b)])
    w.finalize()
    return path


def _response(store: Path):
    """A view of the store and a response of feature 7 plus noise, indexed by sample id."""
    import pandas as pd

    from widescreen.api import StoreView
    from widescreen.engine import as_source, read_columns

    view = StoreView(store)
    col = read_columns(as_source(store), np.array([7]), kind="float")[:, 0]
    y = 2.0 * col + np.random.default_rng(1).normal(size=col.size)
    return view, pd.Series(y, index=view.sample_ids)


def measure(store: Path, what: str) -> dict:
    from widescreen.api import IterativeScreeningModel, ScreeningSelector

    view, y = _response(store)
    p = view.shape[1]
    tracemalloc.start()
    t0 = time.perf_counter()
    if what == "all":
        view.feature_ids  # noqa: B018
    elif what == "some":
        view.feature_ids_at(np.arange(0, p, max(p // 20, 1))[:20])
    elif what == "selector":
        ScreeningSelector(shortlist=20).fit(view, y).get_feature_names_out()
    else:
        IterativeScreeningModel(shortlist=20, max_iter=1).fit(view, y).get_feature_names_out()
    seconds = time.perf_counter() - t0
    heap = tracemalloc.get_traced_memory()[1] / 2**20
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"seconds": seconds, "heap_mib": heap, "rss_mib": rss}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workdir", default="/tmp/widescreen-bench-estimator")
    ap.add_argument("--samples", type=int, default=50)
    ap.add_argument("--features", type=int, default=3_000_000)
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args()
    store = build(Path(args.workdir), args.samples, args.features)
    if args.child:
        print(json.dumps(measure(store, args.child)))
        return
    labels = {"all": "every id", "some": "20 ids", "selector": "selector", "model": "model"}
    print(f"int8 store n = {args.samples}, p = {args.features}")
    print(f"{'measurement':<14}{'wall s':>9}{'heap peak MiB':>15}{'peak RSS MiB':>14}")
    for what, label in labels.items():
        cmd = [sys.executable, __file__, "--workdir", args.workdir, "--samples", str(args.samples)]
        cmd += ["--features", str(args.features), "--child", what]
        proc = subprocess.run(cmd, capture_output=True, text=True, env=dict(os.environ))
        if proc.returncode:
            raise SystemExit(proc.stderr)
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        print(f"{label:<14}{r['seconds']:>9.2f}{r['heap_mib']:>15.0f}{r['rss_mib']:>14.0f}")


if __name__ == "__main__":
    main()
