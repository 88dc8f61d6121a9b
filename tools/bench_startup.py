"""Start-up benchmark of the command line: ``widescreen --help``, a command's help, and finished runs
resumed (the cost of a command that has nothing left to compute).

Each case runs ``--repeat`` times in a fresh interpreter (``python -m widescreen.cli ...``); the median
and minimum wall time and CPU time (user + system of the child) are printed. On a shared machine the CPU
time is the steadier figure. The import cost of a module alone can be seen with
``python -X importtime -c "import widescreen.cli"``.

Usage::

    python tools/bench_startup.py --workdir /tmp/ws-startup
    PYTHONPATH=/other/checkout/src python tools/bench_startup.py --workdir /tmp/ws-startup   # compare

The resumed cases simulate a 200 x 1000 store once (kept in ``--workdir``), finish a ``screen`` and a
``run`` on it, then time the same commands again (``--no-report``, and ``run`` with its report).
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path


def timed(args: list[str], repeat: int) -> tuple[list[float], list[float]]:
    """Wall and CPU seconds of ``repeat`` runs of ``python -m widescreen.cli ARGS``."""
    walls, cpus = [], []
    for _ in range(repeat):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        subprocess.run(
            [sys.executable, "-m", "widescreen.cli", *args],
            check=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        walls.append(time.perf_counter() - t0)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return walls, cpus


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workdir", type=Path, required=True)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    wd = args.workdir
    wd.mkdir(parents=True, exist_ok=True)
    store = wd / "s.zarr"
    if not store.exists():
        subprocess.run(
            [sys.executable, "-m", "widescreen.cli", "simulate", str(store), "-q"], check=True
        )
    common = [str(store), "--outcome", f"{store}.outcome.tsv", "--response", "y", "-q"]
    screen = ["screen", *common, "--out", str(wd / "screen"), "--no-report"]
    run = ["run", *common, "--out", str(wd / "run"), "--no-report"]
    for finish in (screen, run):
        subprocess.run([sys.executable, "-m", "widescreen.cli", *finish], check=True)
    cases = {
        "widescreen --help": ["--help"],
        "widescreen screen --help": ["screen", "--help"],
        "screen, finished, resumed (--no-report)": screen,
        "run, finished, resumed (--no-report)": run,
        "run, finished, resumed (with the report)": run[:-1],
    }
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}")
    for name, case in cases.items():
        walls, cpus = timed(case, args.repeat)
        print(
            f"{name:<42} wall median {statistics.median(walls):5.2f} s (min {min(walls):5.2f}), "
            f"cpu median {statistics.median(cpus):5.2f} s (min {min(cpus):5.2f})"
        )


if __name__ == "__main__":
    main()
