"""Scaling benchmark of the linear screening pass: time linear in p, peak memory flat in p, and the cost
of resuming a run killed half way.

For each p (default 125,000 / 250,000 / 500,000 / 1,000,000 int8 features; n = 2000 samples) it builds a
store of random dosages once (kept in ``--workdir``), then runs, each in a fresh subprocess so that its
peak resident memory (``ru_maxrss``) belongs to that run alone:

* ``pass``: `widescreen.engine.run_pass` with the linear family's spec and a run folder, on the default
  threaded scheduler (all cores, BLAS at one thread);
* ``screen``: the whole `widescreen.workflow.screen` (outcome join, pass, ranking table, manifest).

Each child first runs a tiny pass (compiled loops, thread pools, lazy imports), and reports its peak RSS
and the growth of the peak over that warmed-up state. Each size and mode runs ``--repeat`` times; the
fastest time and the largest memory are reported (the machine may be shared).

Then, on the largest p, a ``screen`` subprocess is killed with SIGKILL once half of the blocks have their
completion markers, and the same screen is run again: its wall time against an uninterrupted run's.

Usage::

    python tools/bench_scale.py --workdir /tmp/ws-scale
    python tools/bench_scale.py --workdir /tmp/ws-scale --max-features 250000   # a smaller sweep

Disk: about 0.5 bytes x n x p per store (int8 dosages compress about 2x): ~1 GB at p = 1e6.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from widescreen.schema import ManifestRecord, RunLayout, read_pass_meta

BUILD_WIDTH = 8192

WARM_UP = r"""
import resource, tempfile, numpy as np
from widescreen.engine import PassSpec, RunFolder, as_source, run_pass
from widescreen.kernels._linear import linear_statistics, prepare_linear
from widescreen.store import DatasetWriter
import widescreen.workflow
# A tiny pass over a tiny store first (missing values, sub-blocks narrower than a chunk, a run folder):
# compiled loops, thread pools and lazy imports reach their high-water mark here, so the growth of
# ru_maxrss after it belongs to the measured run.
_rng = np.random.default_rng(1)
_x = _rng.integers(0, 3, (64, 512), dtype=np.int8)
_x[_rng.random(_x.shape) < 0.02] = -128
with tempfile.TemporaryDirectory() as _d:
    _w = DatasetWriter(_d + "/w.zarr", [f"s{i}" for i in range(64)], "dosage", "int8",
                       n_features=512, chunks=(64, 256))
    _w.append(_x, [f"f{j}" for j in range(512)])
    run_pass(as_source(_w.finalize()), PassSpec("warm", linear_statistics,
             prepare_linear(_rng.standard_normal(64)), ("score", "correlation", "t", "p_value"), 5,
             sub_block=128), RunFolder(_d + "/run"))
RSS0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
"""

PASS_CHILD = (
    WARM_UP
    + r"""
import json, sys, time
from widescreen.engine import RunFolder
from widescreen.workflow import PassContext, load_problem
store, outcome, out = sys.argv[1:4]
t0 = time.perf_counter()
problem = load_problem(store, outcome, response="y")
ctx = PassContext(problem, run=RunFolder(out))
spec = ctx.spec("screen", keep=100)
t1 = time.perf_counter()
res = ctx.run_spec(spec)
t2 = time.perf_counter()
print(json.dumps({"seconds": t2 - t1, "setup": t1 - t0, "summary": res.summary(), "rss0": RSS0,
                  "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
"""
)

SCREEN_CHILD = (
    WARM_UP
    + r"""
import json, sys, time
from widescreen.workflow import ScreenConfig, screen
store, outcome, out = sys.argv[1:4]
t0 = time.perf_counter()
res = screen(store, outcome, ScreenConfig(response="y", shortlist=100), out)
t1 = time.perf_counter()
print(json.dumps({"seconds": t1 - t0, "summary": res.pass_result.summary(), "rss0": RSS0,
                  "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
"""
)


def _dosages(rng: np.random.Generator, n: int, width: int) -> np.ndarray:
    """0/1/2 as two Bernoulli(af) draws from random bytes, af uniform on [0.05, 0.5]; 1% missing."""
    cut = np.round(rng.uniform(0.05, 0.5, width) * 256).astype(np.uint8)
    x = (rng.integers(0, 256, (n, width), dtype=np.uint8) < cut).astype(np.int8)
    x += rng.integers(0, 256, (n, width), dtype=np.uint8) < cut
    x[rng.integers(0, 256, (n, width), dtype=np.uint8) < 3] = -128
    return x


def build_store(path: Path, n: int, p: int, seed: int) -> float:
    """Write a store of random dosages plus ``path.outcome.tsv``; returns seconds (0 when reused)."""
    from widescreen.store import DatasetWriter, open_dataset

    outcome = path.with_name(path.name + ".outcome.tsv")
    if path.exists() and outcome.exists():
        try:
            if open_dataset(path).shape == (n, p):
                return 0.0
        except Exception:
            pass
        shutil.rmtree(path)
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    ids = [f"S{i:05d}" for i in range(n)]
    eta = np.zeros(n)
    true = set(rng.choice(p, size=10, replace=False).tolist())
    with DatasetWriter(path, ids, "dosage", "int8", n_features=p, overwrite=True) as w:
        for a in range(0, p, BUILD_WIDTH):
            b = min(a + BUILD_WIDTH, p)
            x = _dosages(rng, n, b - a)
            for j in sorted(t for t in true if a <= t < b):
                eta += 0.3 * np.where(x[:, j - a] < 0, 0, x[:, j - a])
            w.append(x, [f"F{j:07d}" for j in range(a, b)])
        w.finalize()
    y = eta + rng.standard_normal(n)
    lines = ["sample\ty", *(f"{s}\t{float(v)!r}" for s, v in zip(ids, y, strict=True))]
    outcome.write_text("\n".join(lines) + "\n")
    return time.perf_counter() - t0


def _child(script: str, store: Path, out: Path) -> dict:
    shutil.rmtree(out, ignore_errors=True)
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-c", script, str(store), _outcome(store), str(out)],
        capture_output=True,
        text=True,
        check=False,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"benchmark child failed: {proc.stderr[-2000:]}")
    rec = json.loads(proc.stdout.strip().splitlines()[-1])
    rec["wall"] = time.perf_counter() - t0
    return rec


def _outcome(store: Path) -> str:
    return str(store.with_name(store.name + ".outcome.tsv"))


def resume_after_kill(store: Path, out: Path, at: float) -> dict:
    """Kill a screen with SIGKILL once ``at`` of its blocks are finished; time the rerun."""
    shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-c", SCREEN_CHILD, str(store), _outcome(store), str(out)]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    layout = RunLayout(out).pass_("screen")
    t0 = time.perf_counter()
    while True:
        if proc.poll() is not None:
            raise RuntimeError(
                f"the screen ended before it was killed: {proc.stderr.read()[-2000:]}"
            )
        meta = read_pass_meta(layout)
        if meta is not None and layout.done.is_dir():
            n_blocks = meta.n_blocks
            if len(layout.done_blocks()) >= at * n_blocks:
                break
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    proc.stderr.close()
    killed_after = time.perf_counter() - t0
    left = len(layout.done_blocks())
    t1 = time.perf_counter()
    rerun = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if rerun.returncode != 0:
        raise RuntimeError(f"the resumed screen failed: {rerun.stderr[-2000:]}")
    rec = json.loads(rerun.stdout.strip().splitlines()[-1])
    rec["wall"] = time.perf_counter() - t1
    man = ManifestRecord.from_dict(json.loads(RunLayout(out).manifest.read_text()))
    return {
        "n_blocks": n_blocks,
        "markers_at_kill": left,
        "killed_after": killed_after,
        "resumed": rec,
        "manifest_runs": [r.to_dict() for r in man.passes["screen"].runs],
    }


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/ws-scale"))
    ap.add_argument("--samples", "-n", type=int, default=2000)
    ap.add_argument("--features", default="125000,250000,500000,1000000")
    ap.add_argument("--max-features", type=int, default=None, help="Skip larger sizes.")
    ap.add_argument("--modes", default="pass,screen", help="Comma list of pass, screen.")
    ap.add_argument("--resume-at", type=float, default=0.5, help="0 to skip the kill-and-resume.")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument(
        "--repeat", type=int, default=2, help="Runs per size and mode; the fastest is reported."
    )
    ap.add_argument("--json", type=Path, default=None, help="Also write the figures here.")
    args = ap.parse_args(argv)

    sizes = [int(s) for s in args.features.split(",")]
    if args.max_features:
        sizes = [p for p in sizes if p <= args.max_features]
    modes = [m.strip() for m in args.modes.split(",") if m.strip()]
    args.workdir.mkdir(parents=True, exist_ok=True)
    n = args.samples
    print(f"n = {n}, cores = {len(os.sched_getaffinity(0))}, load average {os.getloadavg()[0]:.1f}")
    rows, full = [], {}
    for p in sizes:
        store = args.workdir / f"dosage-{n}x{p}.zarr"
        built = build_store(store, n, p, args.seed)
        if built:
            print(f"built {store.name} in {built:.1f} s")
        for mode in modes:
            script = PASS_CHILD if mode == "pass" else SCREEN_CHILD
            recs = [
                _child(script, store, args.workdir / f"run-{mode}-{p}")
                for _ in range(max(1, args.repeat))
            ]
            rec = min(recs, key=lambda r: r["seconds"])
            rec["maxrss"] = max(r["maxrss"] for r in recs)
            rec["growth"] = max(r["maxrss"] - r["rss0"] for r in recs)
            rows.append((p, mode, rec))
            full[(p, mode)] = rec
            s = rec["summary"]
            print(
                f"p={p:>9,} {mode:<6} {rec['seconds']:7.2f} s "
                f"({rec['seconds'] / p * 1e6:5.2f} us/feature, {s['blocks_computed']} blocks, "
                f"sub-block {s['sub_block']})  peak RSS {rec['maxrss'] / 2**20:7.1f} MiB "
                f"(+{rec['growth'] / 2**20:.1f} MiB over the warmed-up process)",
                flush=True,
            )
    print()
    print("| p | mode | seconds | us / feature | peak RSS (MiB) | RSS growth in the run (MiB) |")
    print("|---:|---|---:|---:|---:|---:|")
    for p, mode, rec in rows:
        print(
            f"| {p:,} | {mode} | {rec['seconds']:.2f} | {rec['seconds'] / p * 1e6:.2f} | "
            f"{rec['maxrss'] / 2**20:.1f} | {rec['growth'] / 2**20:.1f} |"
        )
    result = {"rows": [{"p": p, "mode": m, **r} for p, m, r in rows]}
    if args.resume_at > 0 and sizes:
        p = sizes[-1]
        store = args.workdir / f"dosage-{n}x{p}.zarr"
        # Alternate killed-and-resumed runs with uninterrupted ones, so both see the same machine.
        tries, refs = [], []
        for _ in range(max(1, args.repeat)):
            tries.append(resume_after_kill(store, args.workdir / f"run-resume-{p}", args.resume_at))
            refs.append(_child(SCREEN_CHILD, store, args.workdir / "run-ref"))
        res = min(tries, key=lambda r: r["resumed"]["seconds"])
        ref = min(refs, key=lambda r: r["seconds"])
        last = res["manifest_runs"][-1]
        ratio = res["resumed"]["seconds"] / ref["seconds"]
        pass_ratio = last["seconds"] / ref["summary"]["seconds"]
        print()
        print(
            f"resume at p={p:,}: killed after {res['killed_after']:.1f} s with "
            f"{res['markers_at_kill']} of {res['n_blocks']} blocks done; the rerun reused "
            f"{last['blocks_reused']} and computed {last['blocks_computed']} blocks in "
            f"{res['resumed']['seconds']:.2f} s against {ref['seconds']:.2f} s for a full run "
            f"({ratio:.2f} of it); the pass alone {last['seconds']:.2f} s against "
            f"{ref['summary']['seconds']:.2f} s ({pass_ratio:.2f}), of which reading the kept values "
            f"of reused blocks back {last['seconds_fetch']:.2f} s"
        )
        result["resume"] = {**res, "full": ref, "ratio": ratio, "pass_ratio": pass_ratio}
    if args.json:
        args.json.write_text(json.dumps(result, indent=2, default=str))


if __name__ == "__main__":
    main()
