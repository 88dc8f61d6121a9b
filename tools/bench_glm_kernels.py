"""Benchmark of the marginal logistic, Poisson and Cox kernels against the linear kernel and statsmodels.

On one in-memory block (n = 2000 samples by width = 4096 features by default; genotype-like int8 dosages or
standard normal floats) it measures, as the minimum over ``--repeat`` runs on one BLAS thread (in a pass each
worker thread runs its kernel single-threaded):

* ``prepare``: `prepare_block` on the raw block plus materialising ``block.values`` (what any kernel that
  needs the centred values pays before its own work; the linear kernel needs only ``block.cross``);
* each kernel on a block whose values are already materialised (kernel time proper), and per feature;
  ``_score`` is the score-test option, ``_cov10`` a logistic pass adjusted for 10 covariates (the full
  model ``y ~ 1 + Z + x_j`` refitted per feature), ``cox_cov2`` a Cox pass with 2 covariates;
* ``pass-like``: `prepare_block` + kernel from the raw block, the in-memory part of a pass (decoding and
  reading the chunk files come on top and are the same for every kernel);
* a per-feature statsmodels loop (GLM Binomial / Poisson, PHReg Breslow) on ``--sm-features`` features,
  scaled to the block width.

Goals: logistic at most 3x and Cox at most 5x the linear kernel; at least 100x faster than the statsmodels
loop; ``logistic_cov10`` pass-like within 1.5x of the covariate-adjusted pass it replaced (covariates frozen
at the null fit): run this script with ``PYTHONPATH`` pointing at that version's ``src`` for its figure.

The compiled (numba) route is used when numba imports; ``WIDESCREEN_NUMBA=0`` measures the numpy route.

Usage::

    python tools/bench_glm_kernels.py
    python tools/bench_glm_kernels.py --kind float --width 8192 --repeat 7 --json out.json
"""

from __future__ import annotations

import argparse
import json
import os
import time

import numpy as np
from threadpoolctl import threadpool_limits

from widescreen.kernels import linear_statistics, prepare_linear
from widescreen.kernels._cox import cox_statistics, prepare_cox
from widescreen.kernels._glm import (
    logistic_statistics,
    poisson_statistics,
    prepare_logistic,
    prepare_poisson,
)
from widescreen.store import _accel
from widescreen.store._reader import prepare_block

N_TRUE = 5


def _raw_block(rng: np.random.Generator, kind: str, n: int, width: int) -> np.ndarray:
    if kind == "float":
        return rng.standard_normal((n, width))
    af = rng.uniform(0.05, 0.5, width)
    x = (rng.random((n, width)) < af).astype(np.int8) + (rng.random((n, width)) < af).astype(
        np.int8
    )
    x[rng.random((n, width)) < 0.01] = -128  # 1% missing calls
    return x


def _outcomes(rng: np.random.Generator, x: np.ndarray) -> dict[str, np.ndarray]:
    """Outcomes driven by the first N_TRUE features (already centred and imputed)."""
    n = x.shape[0]
    signal = x[:, :N_TRUE] @ np.linspace(0.3, 0.6, N_TRUE)
    p = 1.0 / (1.0 + np.exp(-(signal - 0.5)))
    t_event = rng.exponential(1.0 / np.exp(signal))
    t_censor = rng.exponential(2.0, n)
    return {
        "y_linear": signal + rng.standard_normal(n),
        "y_logistic": (rng.random(n) < p).astype(float),
        "y_poisson": rng.poisson(np.exp(signal)).astype(float),
        "time": np.minimum(t_event, t_censor),
        "event": (t_event <= t_censor).astype(int),
        # Ten covariates, the first correlated with a feature (the adjustment matters).
        "covariates": np.column_stack(
            [x[:, 7] + rng.standard_normal(n), rng.standard_normal((n, 9))]
        ),
    }


def _best(fn, repeat: int) -> float:
    """Minimum CPU time of ``fn()`` over ``repeat`` runs, after one warm-up run (seconds).

    CPU time of this process rather than wall time: on a shared machine the wall time of a
    single-threaded kernel mostly measures the other tenants. Wall times go to `WALL`.
    """
    fn()
    cpu, wall = [], []
    for _ in range(repeat):
        c0, t0 = time.process_time(), time.perf_counter()
        fn()
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - t0)
    WALL.append(min(wall))
    return min(cpu)


WALL: list[float] = []


def _statsmodels_loop(name: str, x: np.ndarray, out: dict, k: int) -> float:
    """Seconds per feature of a statsmodels fit (plus its null fit for the LR test)."""
    import statsmodels.api as sm
    from statsmodels.duration.hazard_regression import PHReg

    cols = x[:, :k]
    t0 = time.process_time()
    for j in range(k):
        if name == "cox":
            model = PHReg(out["time"], cols[:, [j]], status=out["event"], ties="breslow")
            fit = model.fit()
            _ = 2 * (fit.llf - model.loglike(np.zeros(1))), fit.bse
        else:
            fam = sm.families.Binomial() if name == "logistic" else sm.families.Poisson()
            y = out[f"y_{name}"]
            fit = sm.GLM(y, sm.add_constant(cols[:, j]), family=fam).fit()
            _ = fit.bse, 2 * (fit.llf - fit.llnull)
    return (time.process_time() - t0) / k


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--width", type=int, default=4096)
    ap.add_argument("--kind", choices=["int8", "float"], default="int8")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--sm-features", type=int, default=40, help="features in the statsmodels loop")
    ap.add_argument("--blas-threads", type=int, default=1)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", type=str, default=None, help="also write the figures to this file")
    args = ap.parse_args()

    rng = np.random.default_rng(args.seed)
    raw = _raw_block(rng, args.kind, args.samples, args.width)
    block = prepare_block(raw, 0)
    x = block.values.copy()
    out = _outcomes(rng, x)
    states = {
        "linear": prepare_linear(out["y_linear"]),
        "logistic": prepare_logistic(out["y_logistic"]),
        "logistic_score": prepare_logistic(out["y_logistic"], test="score"),
        "logistic_cov10": prepare_logistic(out["y_logistic"], out["covariates"]),
        "logistic_score_cov10": prepare_logistic(
            out["y_logistic"], out["covariates"], test="score"
        ),
        "poisson": prepare_poisson(out["y_poisson"]),
        "poisson_score": prepare_poisson(out["y_poisson"], test="score"),
        "cox": prepare_cox(out["time"], out["event"]),
        "cox_cov2": prepare_cox(out["time"], out["event"], out["covariates"][:, :2]),
    }
    kernels = {
        "linear": linear_statistics,
        "logistic": logistic_statistics,
        "logistic_score": logistic_statistics,
        "logistic_cov10": logistic_statistics,
        "logistic_score_cov10": logistic_statistics,
        "poisson": poisson_statistics,
        "poisson_score": poisson_statistics,
        "cox": cox_statistics,
        "cox_cov2": cox_statistics,
    }
    width = args.width
    fig: dict = {
        "samples": args.samples,
        "width": width,
        "kind": args.kind,
        "blas_threads": args.blas_threads,
        "load_average": os.getloadavg()[0],
        "numba": bool(_accel.use_numba),
    }
    with threadpool_limits(args.blas_threads):

        def prepared():
            b = prepare_block(raw, 0)
            b.values  # noqa: B018 - materialise the centred values
            return b

        fig["prepare_s"] = _best(prepared, args.repeat)
        fig["prepare_block_only_s"] = _best(lambda: prepare_block(raw, 0), args.repeat)
        ready = prepared()
        for name, fn in kernels.items():
            st = states[name]
            fig[f"{name}_s"] = _best(lambda fn=fn, st=st: fn(ready, st), args.repeat)
            fig[f"{name}_wall_s"] = WALL[-1]
            fig[f"{name}_pass_s"] = _best(
                lambda fn=fn, st=st: fn(prepare_block(raw, 0), st), args.repeat
            )
            res = fn(ready, st)
            if "n_iter" in res:
                fig[f"{name}_mean_iter"] = float(np.mean(res["n_iter"]))
            fig[f"{name}_top_true"] = int(np.sum(np.argsort(-res["score"])[:N_TRUE] < N_TRUE))
        for name in ("logistic", "poisson", "cox"):
            fig[f"{name}_statsmodels_s_per_feature"] = _statsmodels_loop(
                name, x, out, args.sm_features
            )

    lin, lin_pass = fig["linear_s"], fig["linear_pass_s"]
    print(
        f"block n={args.samples} x width={width} ({args.kind}), {args.blas_threads} BLAS thread(s), "
        f"load average {fig['load_average']:.1f}; min of {args.repeat} runs; "
        f"compiled loops {'on' if fig['numba'] else 'off (numpy route)'}"
    )
    print(
        f"CPU times; prepare_block + values: {fig['prepare_s'] * 1e3:.1f} ms, "
        f"prepare_block alone: {fig['prepare_block_only_s'] * 1e3:.1f} ms"
    )
    print(
        f"{'kernel':16s} {'ms':>8s} {'(wall)':>8s} {'us/feat':>8s} {'x linear':>9s}"
        f" {'pass ms':>8s} {'x linear':>9s}"
    )
    for name in kernels:
        k, p, w = fig[f"{name}_s"], fig[f"{name}_pass_s"], fig[f"{name}_wall_s"]
        print(
            f"{name:16s} {k * 1e3:8.1f} {w * 1e3:8.1f} {k / width * 1e6:8.2f} {k / lin:9.1f}"
            f" {p * 1e3:8.1f} {p / lin_pass:9.1f}"
        )
    for name in ("logistic", "poisson", "cox"):
        per = fig[f"{name}_statsmodels_s_per_feature"]
        fig[f"{name}_speedup_vs_statsmodels"] = per * width / fig[f"{name}_s"]
        print(
            f"statsmodels {name:8s}: {per * 1e3:7.2f} ms/feature -> {per * width:7.1f} s per block; "
            f"kernel {fig[f'{name}_speedup_vs_statsmodels']:7.0f}x faster"
        )
    print(
        "mean Newton evaluations per feature: "
        + ", ".join(f"{k} {fig[f'{k}_mean_iter']:.2f}" for k in ("logistic", "poisson", "cox"))
    )
    print(
        "true features in the top 5: " + ", ".join(f"{k} {fig[f'{k}_top_true']}" for k in kernels)
    )
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(fig, fh, indent=2)


if __name__ == "__main__":
    main()
