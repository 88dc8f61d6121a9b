"""Replication harness (not a test): ISIS with a SCAD refit on designs with a known answer, per loss.

Designs (our own numpy generators; the project's CHECKS notes give their sources):

* ``linear-independent``: Fan & Lv (2008) simulation I, x ~ N(0, I_p), s = 8,
  beta_j = (-1)^U (a + |Z|), a = 4 log n / sqrt(n), sigma = 1.5; n = 200, p = 1000.
* ``linear-hidden``: Fan & Lv (2008) Section 4.2.2 at rho = 0.5: y = 5 x1 + 5 x2 + 5 x3 - 15 sqrt(rho) x4
  + x5 + eps, x4 marginally uncorrelated with y; n = 200, p = 1000.
* ``logistic-hidden``: Fan, Samworth & Wu (2009): equicorrelation 0.5, corr(x4, .) = 1/sqrt(2),
  beta = (4, 4, 4, -6 sqrt(2), 0, ...), Bernoulli(expit(X beta)); n = 400, p = 1000.
* ``poisson-hidden``, ``cox-hidden``: the same construction scaled, beta = c (1, 1, 1, -1.5 sqrt(2))
  (so cov(x4, X beta) = 0 again), Poisson counts with mean exp(X beta) (c = 0.5), and exponential
  survival times with rate exp(X beta) (c = 1) censored by independent exponential times of the same
  mean (about half the events observed); n = 400, p = 1000.

Methods: ``ISIS-SCAD`` (the default run: conditional passes, SCAD by coordinate descent tuned by EBIC over
the refits of the visited supports), ``SIS-SCAD`` (one screen, one refit) and ``ISIS-SCAD-LLA`` (the
previous solver, SCAD by the local linear approximation from the lasso path). ``oracle`` is the
unpenalised maximum likelihood fit on the true support. Per design and method it prints: the share of
runs whose model holds every true feature, the median model size, the median number of false
positives, the median L2 error ||beta_hat - beta||_2 over all p coefficients (the refit on the selected
set) and its ratio to the oracle's median.

Usage::

    python tools/replicate.py --reps 40
    python tools/replicate.py --reps 10 --designs logistic-hidden --methods ISIS-SCAD
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

DESIGNS = {
    # name: (family, n, p)
    "linear-independent": ("linear", 200, 1000),
    "linear-hidden": ("linear", 200, 1000),
    "logistic-hidden": ("logistic", 400, 1000),
    "poisson-hidden": ("poisson", 400, 1000),
    "cox-hidden": ("cox", 400, 1000),
}

METHODS = {
    "ISIS-SCAD": {"penalty": "scad", "max_iter": 5},
    "ISIS-MCP": {"penalty": "mcp", "max_iter": 5},
    "SIS-SCAD": {"penalty": "scad", "max_iter": 0},
    "ISIS-SCAD-LLA": {"penalty": "scad", "max_iter": 5, "concave_solver": "lla"},
}


def _hidden_x(rng, n: int, p: int) -> np.ndarray:
    """Equicorrelation 0.5 with x4 = z, so corr(x4, x_j) = sqrt(0.5) (Fan & Lv 2008, Section 4.2.2)."""
    z = rng.standard_normal((n, 1))
    X = np.sqrt(0.5) * z + np.sqrt(0.5) * rng.standard_normal((n, p))
    X[:, 3] = z[:, 0]
    return X


def generate(design: str, seed: int, n: int | None = None, p: int | None = None):
    """Data of one replicate: ``(X, y, event, beta)``; ``event`` is None except for the Cox design.

    The true features are the first columns (the screen and the fit never see positions).
    """
    _, n0, p0 = DESIGNS[design]
    n, p = n or n0, p or p0
    rng = np.random.default_rng(seed)
    beta = np.zeros(p)
    event = None
    if design == "linear-independent":
        X = rng.standard_normal((n, p))
        a = 4 * np.log(n) / np.sqrt(n)
        beta[:8] = (-1.0) ** rng.binomial(1, 0.4, 8) * (a + np.abs(rng.standard_normal(8)))
        y = X @ beta + 1.5 * rng.standard_normal(n)
        return X, y, event, beta
    X = _hidden_x(rng, n, p)
    if design == "linear-hidden":
        X[:, 4] = rng.standard_normal(n)  # x5: independent of everything
        beta[:5] = [5.0, 5.0, 5.0, -15.0 * np.sqrt(0.5), 1.0]
        y = X @ beta + rng.standard_normal(n)
    elif design == "logistic-hidden":
        beta[:4] = [4.0, 4.0, 4.0, -6.0 * np.sqrt(2.0)]
        y = (rng.random(n) < 1.0 / (1.0 + np.exp(-(X @ beta)))).astype(np.float64)
    elif design == "poisson-hidden":
        beta[:4] = 1.0 * np.array([1.0, 1.0, 1.0, -1.5 * np.sqrt(2.0)])
        y = rng.poisson(np.exp(X @ beta)).astype(np.float64)
    else:
        beta[:4] = 1.0 * np.array([1.0, 1.0, 1.0, -1.5 * np.sqrt(2.0)])
        t = rng.exponential(np.exp(-(X @ beta)))
        c = rng.exponential(np.exp(-(X @ beta)).mean(), n)
        y = np.minimum(t, c)
        event = (t <= c).astype(np.float64)
    return X, y, event, beta


def problem_of(family: str, X, y, event):
    """An in-memory workflow problem (the survival event attached for Cox)."""
    from widescreen.workflow import Problem

    return Problem.from_arrays(X, y, family=family, event=event)


def oracle_error(family: str, X, y, event, beta) -> float:
    """L2 error of the unpenalised maximum likelihood fit on the true support."""
    from widescreen.fit import refit

    loss = {"linear": "gaussian", "logistic": "binomial", "poisson": "poisson", "cox": "cox"}[
        family
    ]
    s = np.flatnonzero(beta)
    resp = y if event is None else np.column_stack([y, event])
    fit = refit(X[:, s], resp, loss)
    est = np.zeros_like(beta)
    est[s] = fit.coef
    return float(np.linalg.norm(est - beta))


def run_method(design: str, method: str, X, y, event, beta, seed: int) -> dict:
    from widescreen.workflow import IterateConfig, iterate

    family = DESIGNS[design][0]
    kw = dict(METHODS[method])
    solver = kw.pop("concave_solver", None)
    cfg = IterateConfig(family=family, shortlist="auto", criterion="ebic", seed=seed, **kw)
    t0 = time.perf_counter()
    if solver is None:
        res = iterate(problem_of(family, X, y, event), cfg)
    else:
        from functools import partial
        from unittest import mock

        from widescreen.fit import SolverOptions, fit_path

        # The workflow's refit with the other SCAD solver (the workflow has no option for it).
        lla = partial(fit_path, options=SolverOptions(concave_solver=solver))
        with mock.patch("widescreen.workflow._refit.fit_path", lla):
            res = iterate(problem_of(family, X, y, event), cfg)
    truth = set(np.flatnonzero(beta).tolist())
    est = np.zeros_like(beta)
    est[res.index] = res.refit.coef
    chosen = set(res.index.tolist())
    return {
        "all": truth <= chosen,
        "size": len(chosen),
        "fp": len(chosen - truth),
        "error": float(np.linalg.norm(est - beta)),
        "x4": 3 in chosen,
        "seconds": time.perf_counter() - t0,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--reps", type=int, default=10, help="replicates per design")
    ap.add_argument("--seed", type=int, default=1, help="seed of the first replicate")
    ap.add_argument("--designs", default=",".join(DESIGNS), help="comma-separated designs")
    ap.add_argument("--methods", default=",".join(METHODS), help="comma-separated methods")
    args = ap.parse_args(argv)
    designs = [d.strip() for d in args.designs.split(",") if d.strip()]
    methods = [m.strip() for m in args.methods.split(",") if m.strip()]
    for d in designs:
        if d not in DESIGNS:
            ap.error(f"unknown design {d!r}; choose from {', '.join(DESIGNS)}")
    for m in methods:
        if m not in METHODS:
            ap.error(f"unknown method {m!r}; choose from {', '.join(METHODS)}")
    t0 = time.perf_counter()
    seeds = range(args.seed, args.seed + args.reps)
    print(
        f"{args.reps} replicates per design (seeds {seeds[0]}..{seeds[-1]}), EBIC, d = floor(n / log n)"
    )
    head = (
        f"{'design':<19} {'method':<14} {'all true':>8} {'x4':>5} {'size':>5} {'FP':>5} "
        f"{'L2 error':>9} {'/oracle':>8} {'s/run':>6}"
    )
    print(head)
    for design in designs:
        family = DESIGNS[design][0]
        rows = {m: [] for m in methods}
        oracle = []
        for seed in seeds:
            X, y, event, beta = generate(design, seed)
            oracle.append(oracle_error(family, X, y, event, beta))
            for m in methods:
                rows[m].append(run_method(design, m, X, y, event, beta, seed))
        o = float(np.median(oracle))
        print(f"{design:<19} {'oracle':<14} {'':>8} {'':>5} {'':>5} {'':>5} {o:>9.3f} {1:>8.2f}")
        for m in methods:
            r = rows[m]
            err = float(np.median([x["error"] for x in r]))
            print(
                f"{design:<19} {m:<14} {np.mean([x['all'] for x in r]):>8.2f} "
                f"{np.mean([x['x4'] for x in r]):>5.2f} {np.median([x['size'] for x in r]):>5.1f} "
                f"{np.median([x['fp'] for x in r]):>5.1f} {err:>9.3f} {err / o:>8.2f} "
                f"{np.mean([x['seconds'] for x in r]):>6.2f}"
            )
        sys.stdout.flush()
    print(f"total {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
