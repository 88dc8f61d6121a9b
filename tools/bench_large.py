"""Large-data benchmark: ten million features (memory flat in p) and biobank-sized sample counts.

Two cases, each store built and each screen run in a fresh subprocess so that its peak resident memory
(``ru_maxrss``) belongs to that step alone:

``wide``
    n = 500 int8 dosages at p = 1,000,000 and p = 10,000,000 (``--features``): the store is written
    through `DatasetWriter` block by block (ids streamed), then ``screen`` (linear, a run folder,
    shortlist ``auto``) runs on it. Reported: build time and peak RSS, screen time, us per feature and
    peak RSS (the goal: under 1 GiB at p = 10^7, time per feature within 1.2x of the 1M run).
``tall``
    p = 200,000 int8 at n = 10,000 and n = 50,000 (``--samples``), ``screen`` with
    ``--budget`` (default 2 GiB): time against n x p, peak RSS against the budget.

``--repeat R`` runs each screen R times (the fastest counts, the largest peak); each screen child
first runs `bench_scale.py`'s warm-up, so its CPU time (user + system, all threads) is the screen's own.
Stores live under ``--workdir`` and are deleted after each size unless ``--keep`` (check ``df -h``
first: about 0.3 bytes per value on disk, ~1.5 GB at 500 x 10^7 and ~3 GB at 50,000 x 200,000).
Run with ``nice -n 10`` on a shared machine::

    nice -n 10 python tools/bench_large.py wide --workdir /tmp/scale-bench
    nice -n 10 python tools/bench_large.py tall --workdir /tmp/scale-bench
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

BUILD_CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, sys.argv[4])
from bench_scale import build_store
from pathlib import Path
t0 = time.perf_counter()
build_store(Path(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), 0)
print(json.dumps({"seconds": time.perf_counter() - t0,
                  "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
"""

SCREEN_CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, sys.argv[5])
from bench_scale import WARM_UP
exec(WARM_UP)  # imports and compiled loops first, so the CPU time below is the screen's own
from widescreen.workflow import ScreenConfig, screen
store, outcome, out, budget = sys.argv[1:5]
def cpu():
    u = resource.getrusage(resource.RUSAGE_SELF)
    return u.ru_utime + u.ru_stime
c0 = cpu()
t0 = time.perf_counter()
res = screen(store, outcome, ScreenConfig(response="y", shortlist="auto"), out,
             memory_budget=None if budget == "none" else budget)
t1 = time.perf_counter()
print(json.dumps({"seconds": t1 - t0, "pass_seconds": res.pass_result.summary()["seconds"],
                  "cpu_seconds": cpu() - c0,
                  "summary": res.pass_result.summary(),
                  "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
"""

RUN_CHILD = SCREEN_CHILD.replace(
    """res = screen(store, outcome, ScreenConfig(response="y", shortlist="auto"), out,
             memory_budget=None if budget == "none" else budget)""",
    """from widescreen.workflow import IterateConfig, run
res = run(store, outcome, IterateConfig(response="y", shortlist="auto", max_iter=1), out,
          memory_budget=None if budget == "none" else budget)
class _P:
    def summary(self):
        return {"seconds": 0.0, "budget": int(res.budget), "selected": int(res.index.size),
                "iterations": len(res.iterations), "warnings": list(res.warnings)}
res.pass_result = _P()""",
)


def _child(script: str, *args: str) -> dict:
    proc = subprocess.run(
        [sys.executable, "-c", script, *args], capture_output=True, text=True, check=False
    )
    if proc.returncode != 0:
        raise RuntimeError(f"benchmark child failed: {proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def measure(
    workdir: Path, n: int, p: int, budget: str, keep: bool, repeat: int = 1, command: str = "screen"
) -> dict:
    store = workdir / f"dosage-{n}x{p}.zarr"
    outcome = store.with_name(store.name + ".outcome.tsv")
    tools = str(Path(__file__).resolve().parent)
    build = _child(BUILD_CHILD, str(store), str(n), str(p), tools)
    out = workdir / f"run-{n}x{p}"
    shutil.rmtree(out, ignore_errors=True)
    recs = []
    for _ in range(max(1, repeat)):  # the fastest run, the largest peak (a shared machine)
        shutil.rmtree(out, ignore_errors=True)
        script = SCREEN_CHILD if command == "screen" else RUN_CHILD
        recs.append(_child(script, str(store), str(outcome), str(out), budget, tools))
    rec = min(recs, key=lambda r: r["pass_seconds"])
    rec["maxrss"] = max(r["maxrss"] for r in recs)
    disk = sum(f.stat().st_size for f in store.rglob("*") if f.is_file())
    if not keep:
        shutil.rmtree(store, ignore_errors=True)
        shutil.rmtree(out, ignore_errors=True)
        outcome.unlink(missing_ok=True)
    row = {
        "n": n,
        "p": p,
        "disk_bytes": disk,
        "build_seconds": build["seconds"],
        "build_maxrss": build["maxrss"],
        "screen_seconds": rec["seconds"],
        "pass_seconds": rec["pass_seconds"],
        "screen_cpu": min(r["cpu_seconds"] for r in recs),
        "screen_maxrss": rec["maxrss"],
        "blocks": rec["summary"].get("blocks_computed"),
        "sub_block": rec["summary"].get("sub_block"),
        "command": command,
        "summary": rec["summary"],
    }
    if command == "run":
        print(f"run: {rec['summary']}", flush=True)
    print(
        f"n={n:,} p={p:,}: build {row['build_seconds']:.1f} s (peak RSS "
        f"{row['build_maxrss'] / 2**20:.0f} MiB, {disk / 1e9:.2f} GB on disk); screen "
        f"{row['screen_seconds']:.1f} s, pass {row['pass_seconds']:.1f} s "
        f"({row['pass_seconds'] / p * 1e6:.2f} us/feature, "
        f"{row['pass_seconds'] / (n * p) * 1e9:.3f} ns/value; screen CPU {row['screen_cpu']:.1f} s, "
        f"{row['screen_cpu'] / (n * p) * 1e9:.3f} CPU ns/value), peak RSS "
        f"{row['screen_maxrss'] / 2**20:.0f} MiB",
        flush=True,
    )
    return row


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("case", choices=("wide", "tall"))
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/scale-bench"))
    ap.add_argument("--samples", default=None, help="Comma list (tall: 10000,50000; wide: 500).")
    ap.add_argument("--features", default=None, help="Comma list (wide: 1e6,1e7; tall: 200000).")
    ap.add_argument("--budget", default=None, help="Memory budget of the screen (tall: 2GiB).")
    ap.add_argument("--keep", action="store_true", help="Keep the stores and run folders.")
    ap.add_argument("--repeat", type=int, default=1, help="Screens per size; the fastest counts.")
    ap.add_argument(
        "--command", choices=("screen", "run"), default="screen",
        help="run: the iterative workflow (one conditional iteration) instead of screen.",
    )  # fmt: skip
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    wide = args.case == "wide"
    samples = [
        int(float(s)) for s in (args.samples or ("500" if wide else "10000,50000")).split(",")
    ]
    features = [
        int(float(s)) for s in (args.features or ("1e6,1e7" if wide else "200000")).split(",")
    ]
    budget = args.budget or ("none" if wide else "2GiB")
    args.workdir.mkdir(parents=True, exist_ok=True)
    print(
        f"{args.case}: cores {len(os.sched_getaffinity(0))}, load average "
        f"{os.getloadavg()[0]:.1f}, budget {budget}, {time.strftime('%H:%M:%S')}",
        flush=True,
    )
    rows = [
        measure(args.workdir, n, p, budget, args.keep, args.repeat, args.command)
        for n in samples
        for p in features
    ]
    print(
        "\n| n | p | build s | build peak RSS MiB | screen s | pass s | us/feature | ns/value "
        "| screen CPU s | screen peak RSS MiB |"
    )
    print("|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in rows:
        print(
            f"| {r['n']:,} | {r['p']:,} | {r['build_seconds']:.1f} | "
            f"{r['build_maxrss'] / 2**20:.0f} | {r['screen_seconds']:.1f} | "
            f"{r['pass_seconds']:.1f} | {r['pass_seconds'] / r['p'] * 1e6:.2f} | "
            f"{r['pass_seconds'] / (r['n'] * r['p']) * 1e9:.3f} | {r['screen_cpu']:.1f} | "
            f"{r['screen_maxrss'] / 2**20:.0f} |"
        )
    if args.json:
        args.json.write_text(json.dumps(rows, indent=2))


if __name__ == "__main__":
    main()
