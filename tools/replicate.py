"""Replication harness (not a test): the published simulation designs of SIS / ISIS, side by side.

Runs, over repeated seeds, the designs of Fan & Lv (2008) as `widescreen.simulate` writes them:

* ``independent``: (n, p, s) = (200, 1000, 8), x ~ N(0, I_p), sigma = 1.5 (simulation I);
* ``hidden``: rho = 0.5, y = 5 x1 + 5 x2 + 5 x3 - 15 sqrt(rho) x4 + x5 + eps, n = 200, p = 1000, where x4
  is marginally uncorrelated with y (Section 4.2.2; the x5 term is our weak extra effect);

and for each the methods SIS + SCAD, SIS + Dantzig selector, SIS + lasso (one screen keeping
d = floor(n / log n), one refit tuned by EBIC) and ISIS + SCAD (conditional passes until the selected set
is stable). It prints per design and method: the median selected model size, the median estimation error
||beta_hat - beta||_2 over all p coefficients, the share of runs whose first shortlist holds every true
feature, and the share whose final model does.

Usage::

    python tools/replicate.py --reps 20
    python tools/replicate.py --reps 100 --designs hidden --workdir /tmp/ws-rep

Each replicate is a store written to ``--workdir`` (a temporary folder by default) and screened in memory
(no run folder). The published tables are recalled, not quoted: compare the pattern (ISIS keeps x4,
SIS does not; SIS + SCAD near the true size on the independent design), not the digits.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

METHODS = {
    "SIS-SCAD": {"penalty": "scad", "max_iter": 0},
    "SIS-DS": {"penalty": "dantzig", "max_iter": 0},
    "SIS-lasso": {"penalty": "lasso", "max_iter": 0},
    "ISIS-SCAD": {"penalty": "scad", "max_iter": 5},
}

DESIGNS = {
    "independent": {"design": "independent", "n_true": 8, "sigma": 1.5},
    "hidden": {"design": "hidden", "rho": 0.5},
}


def one_replicate(workdir: Path, design: str, seed: int, n: int, p: int) -> dict[str, dict]:
    from widescreen.simulate import SimulationConfig, simulate
    from widescreen.workflow import IterateConfig, iterate, load_problem

    cfg = SimulationConfig(n_samples=n, n_features=p, seed=seed, **DESIGNS[design])
    sim = simulate(workdir / f"{design}-{seed}.zarr", cfg, overwrite=True)
    problem = load_problem(sim.dataset.path, sim.outcome_path, response="y")
    beta = np.zeros(p)
    beta[sim.true_index] = sim.true_coef
    truth = set(sim.true_index.tolist())
    out = {}
    for name, kw in METHODS.items():
        t0 = time.perf_counter()
        res = iterate(problem, IterateConfig(shortlist="auto", criterion="ebic", seed=seed, **kw))
        est = np.zeros(p)
        est[res.index] = res.coef
        out[name] = {
            "size": res.index.size,
            "error": float(np.linalg.norm(est - beta)),
            "screen_all": truth <= set(res.iterations[0]["candidates"]),
            "model_all": truth <= set(res.index.tolist()),
            "hidden_found": design == "hidden" and int(sim.true_index[3]) in res.index,
            "seconds": time.perf_counter() - t0,
        }
    for f in workdir.glob(f"{design}-{seed}.zarr*"):
        if f.is_dir():
            import shutil

            shutil.rmtree(f)
        else:
            f.unlink()
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--reps", type=int, default=20, help="replicates per design")
    ap.add_argument("--seed", type=int, default=1, help="seed of the first replicate")
    ap.add_argument("--designs", default="independent,hidden", help="comma-separated designs")
    ap.add_argument("-n", "--samples", type=int, default=200)
    ap.add_argument("-p", "--features", type=int, default=1000)
    ap.add_argument("--workdir", type=Path, default=None, help="folder for the stores")
    args = ap.parse_args(argv)
    designs = [d.strip() for d in args.designs.split(",") if d.strip()]
    for d in designs:
        if d not in DESIGNS:
            ap.error(f"unknown design {d!r}; choose from {', '.join(DESIGNS)}")
    tmp = None
    workdir = args.workdir
    if workdir is None:
        tmp = tempfile.TemporaryDirectory(prefix="ws-replicate-")
        workdir = Path(tmp.name)
    workdir.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    print(
        f"n = {args.samples}, p = {args.features}, d = floor(n / log n), EBIC tuning, "
        f"{args.reps} replicates per design (seeds {args.seed}..{args.seed + args.reps - 1})"
    )
    for design in designs:
        runs = [
            one_replicate(workdir, design, args.seed + r, args.samples, args.features)
            for r in range(args.reps)
        ]
        print(f"\ndesign: {design}")
        head = f"{'method':<11} {'median size':>11} {'median ||b-b0||':>16} {'screen has all':>15}"
        head += f" {'model has all':>14}" + (" x4 found" if design == "hidden" else "")
        print(head + f" {'s/run':>6}")
        for name in METHODS:
            rows = [r[name] for r in runs]
            line = (
                f"{name:<11} {np.median([r['size'] for r in rows]):>11.1f} "
                f"{np.median([r['error'] for r in rows]):>16.3f} "
                f"{np.mean([r['screen_all'] for r in rows]):>15.2f} "
                f"{np.mean([r['model_all'] for r in rows]):>14.2f}"
            )
            if design == "hidden":
                line += f" {np.mean([r['hidden_found'] for r in rows]):>8.2f}"
            line += f" {np.mean([r['seconds'] for r in rows]):>6.2f}"
            print(line)
        sys.stdout.flush()
    print(f"\ntotal {time.perf_counter() - t0:.0f} s")
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
