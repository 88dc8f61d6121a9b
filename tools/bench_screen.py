"""Benchmark of the linear screening pass against the codec floor and the in-memory route.

Builds (or reuses, in ``--workdir``) two stores of the same shape, n = 2000 samples by default:

* ``int8.store``: genotype-like dosages 0/1/2 (allele frequency uniform on [0.05, 0.5]), a tenth of the
  features with 2% missing calls (the -128 sentinel);
* ``float32.store``: standard normal values, and beside it ``float32.npy`` holding the same matrix;

plus a response ``y.npy`` with a few true features. Then it measures, each in its own subprocess so that
peak memory (``ru_maxrss``) belongs to that measurement alone:

* ``pass``: `widescreen.engine.run_pass` with the linear family's spec (as `workflow.screen` builds it),
  threaded scheduler, no run folder;
* ``screen``: the whole `widescreen.workflow.screen` run with an outcome table and a run folder (int8 only,
  unless ``--screen-float``);
* ``floor``: every chunk file of the store read into a preallocated buffer and Blosc-decoded into another,
  no arithmetic, on the same number of threads;
* ``arithmetic``: the pass's arithmetic alone (block summaries, kernel, top k) on blocks already read,
  timed by each thread's CPU clock; its "seconds" are that CPU time over the threads;
* ``in-memory``: ``np.load`` of the float32 .npy, then blockwise Pearson correlation with the response
  (float64 per block, multithreaded BLAS).

Usage::

    python tools/bench_screen.py --features 250000 --workdir /tmp/ws-bench
    python tools/bench_screen.py --features 1000000 --workdir /tmp/ws-bench --clean

Disk: about 2.1 GB (int8 store, ~0.5 GB) + 2 x 4 bytes x n x p (float32 store and .npy) at p = 1e6.
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

N_TRUE = 10
BUILD_WIDTH = 8192


# --------------------------------------------------------------------------------------------
# Building the data


def _dosage_block(rng: np.random.Generator, n: int, width: int) -> np.ndarray:
    """Dosages as the sum of two Bernoulli(af) draws from random bytes (much faster than binomial)."""
    af = rng.uniform(0.05, 0.5, width)
    cut = np.round(af * 256).astype(np.int16)
    a = rng.integers(0, 256, (n, width), dtype=np.uint8)
    b = rng.integers(0, 256, (n, width), dtype=np.uint8)
    x = (a < cut).astype(np.int8) + (b < cut).astype(np.int8)
    holes = np.flatnonzero(rng.random(width) < 0.1)
    if holes.size:
        sub = x[:, holes]
        sub[rng.random(sub.shape) < 0.02] = -128
        x[:, holes] = sub
    return x


def build(workdir: Path, n: int, p: int, seed: int, want_float: bool) -> dict:
    """Create the stores, .npy and response unless a matching set is already in ``workdir``."""
    from widescreen.store import DatasetWriter

    workdir.mkdir(parents=True, exist_ok=True)
    meta_path = workdir / "bench.json"
    meta = {"n": n, "p": p, "seed": seed}
    old = json.loads(meta_path.read_text()) if meta_path.exists() else {}
    if all(old.get(k) == v for k, v in meta.items()) and (workdir / "y.npy").exists():
        if not want_float or old.get("float"):
            return old
    for name in (
        "int8.store",
        "float32.store",
        "float32.npy",
        "y.npy",
        "outcome.tsv",
        "bench.json",
    ):
        target = workdir / name
        if target.is_dir():
            shutil.rmtree(target)
        elif target.exists():
            target.unlink()
    rng = np.random.default_rng(seed)
    ids = [f"s{i}" for i in range(n)]
    true_idx = np.sort(rng.choice(p, N_TRUE, replace=False))
    beta = rng.choice([-1.0, 1.0], N_TRUE) * rng.uniform(0.1, 0.3, N_TRUE)
    eta_int8 = np.zeros(n)
    eta_f32 = np.zeros(n)
    t0 = time.perf_counter()
    w8 = DatasetWriter(workdir / "int8.store", ids, "dosage", "int8", n_features=p)
    wf = (
        DatasetWriter(workdir / "float32.store", ids, "continuous", "float32", n_features=p)
        if want_float
        else None
    )
    npy = (
        np.lib.format.open_memmap(workdir / "float32.npy", "w+", np.float32, (n, p))
        if want_float
        else None
    )
    for a in range(0, p, BUILD_WIDTH):
        b = min(a + BUILD_WIDTH, p)
        fids = [f"f{j}" for j in range(a, b)]
        x8 = _dosage_block(rng, n, b - a)
        here = (true_idx >= a) & (true_idx < b)
        for j, bj in zip(true_idx[here], beta[here], strict=True):
            col = x8[:, j - a].astype(np.float64)
            col[col < 0] = np.nanmean(np.where(col < 0, np.nan, col))
            eta_int8 += bj * col
        w8.append(x8, fids)
        if wf is not None:
            xf = rng.standard_normal((n, b - a), dtype=np.float32)
            for j, bj in zip(true_idx[here], beta[here], strict=True):
                eta_f32 += bj * xf[:, j - a]
            wf.append(xf, fids)
            npy[:, a:b] = xf
    w8.finalize()
    if wf is not None:
        wf.finalize()
        npy.flush()
        del npy
    # One response serves both stores: the sum of both signals plus noise.
    y = eta_int8 + eta_f32 + rng.standard_normal(n)
    np.save(workdir / "y.npy", y)
    lines = ["sample\ty"] + [f"{i}\t{float(v)!r}" for i, v in zip(ids, y, strict=True)]
    (workdir / "outcome.tsv").write_text("\n".join(lines) + "\n")
    meta.update(float=want_float, build_seconds=round(time.perf_counter() - t0, 1))
    meta_path.write_text(json.dumps(meta))
    return meta


# --------------------------------------------------------------------------------------------
# Measurements (each runs in a fresh interpreter)


def _maxrss_mib() -> float:
    """Peak resident set of this process in MiB.

    Linux's VmHWM belongs to the process's own address space; ``ru_maxrss`` would carry over the
    parent's peak across fork and exec (the parent built the data, so that would hide ours).
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _cpu() -> float:
    """CPU seconds (user + system, all threads) used by this process so far."""
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def measure_pass(workdir: Path, kind: str, threads: int, sub_block: int, keep_values: bool) -> dict:
    from widescreen.engine import PassSpec, StoreSource, run_pass
    from widescreen.families import Response, get_family
    from widescreen.store import open_dataset
    from widescreen.workflow import shortlist_size

    ds = open_dataset(workdir / f"{kind}.store")
    source = StoreSource(ds)
    y = np.load(workdir / "y.npy")
    fam = get_family("linear")
    rss0 = _maxrss_mib()
    cpu0 = _cpu()
    t0 = time.perf_counter()
    # The spec `workflow.PassContext.spec` builds for the linear family without covariates.
    spec = PassSpec(
        name="screen",
        kernel=fam.kernel,
        state=fam.prepare(Response(y=y), None),
        columns=fam.columns,
        keep=shortlist_size("auto", ds.n_samples, ds.n_features),
        sub_block=sub_block,
        keep_values=keep_values,
    )
    result = run_pass(source, spec, scheduler=f"threads:{threads}")
    seconds = time.perf_counter() - t0
    return {
        "seconds": seconds,
        "cpu_seconds": _cpu() - cpu0,
        "rss_mib": _maxrss_mib(),
        "rss_before_mib": rss0,
        "top": result.topk.index[:N_TRUE].tolist(),
    }


def measure_screen(workdir: Path, kind: str, threads: int, sub_block: int) -> dict:
    from widescreen.workflow import screen
    from widescreen.workflow._screen import ScreenConfig

    out = workdir / f"run-{kind}"
    if out.exists():
        shutil.rmtree(out)
    rss0 = _maxrss_mib()
    cpu0 = _cpu()
    t0 = time.perf_counter()
    screen(
        workdir / f"{kind}.store",
        workdir / "outcome.tsv",
        ScreenConfig(response="y", sub_block=sub_block),
        out,
        scheduler=f"threads:{threads}",
    )
    seconds = time.perf_counter() - t0
    shutil.rmtree(out)
    return {
        "seconds": seconds,
        "cpu_seconds": _cpu() - cpu0,
        "rss_mib": _maxrss_mib(),
        "rss_before_mib": rss0,
    }


def measure_floor(workdir: Path, kind: str, threads: int) -> dict:
    """Read and decode every chunk file into per-thread preallocated buffers; nothing else."""
    from concurrent.futures import ThreadPoolExecutor

    import numcodecs.blosc as blosc

    blosc.use_threads = False
    root = workdir / f"{kind}.store" / "X"
    meta = json.loads((root / "zarr.json").read_text())
    rows, cols = meta["chunk_grid"]["configuration"]["chunk_shape"]
    dtype = np.dtype(meta["data_type"])
    files = sorted((root / "c").rglob("*"))
    files = [f for f in files if f.is_file()]
    biggest = max(f.stat().st_size for f in files)
    rss0 = _maxrss_mib()

    def work(part: list[Path]) -> int:
        src = bytearray(biggest)
        view = memoryview(src)
        out = np.empty(rows * cols, dtype=dtype)
        total = 0
        for f in part:
            with open(f, "rb", buffering=0) as fh:
                size = fh.readinto(view)
            blosc.decompress(view[:size], out)
            total += out.nbytes
        return total

    cpu0 = _cpu()
    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        decoded = sum(pool.map(work, [files[i::threads] for i in range(threads)]))
    seconds = time.perf_counter() - t0
    # The last chunk column decodes to a whole chunk too (zarr pads edge chunks).
    return {
        "seconds": seconds,
        "cpu_seconds": _cpu() - cpu0,
        "rss_mib": _maxrss_mib(),
        "rss_before_mib": rss0,
        "decoded_gb": decoded / 1e9,
        "stored_gb": sum(f.stat().st_size for f in files) / 1e9,
    }


def measure_arithmetic(workdir: Path, kind: str, threads: int, sub_block: int) -> dict:
    """The pass's arithmetic alone: every block read and decoded first (untimed), then the block
    summaries, the kernel, the filters and the top k of its sub-blocks timed by each thread's CPU
    clock (the floor of the arithmetic: what the pass costs beyond the codec floor at best)."""
    from concurrent.futures import ThreadPoolExecutor

    from widescreen.engine import StoreSource
    from widescreen.engine._topk import block_topk, merge_all
    from widescreen.families import Response, get_family
    from widescreen.store import open_dataset, prepare_block
    from widescreen.workflow import shortlist_size

    ds = open_dataset(workdir / f"{kind}.store")
    source = StoreSource(ds)
    fam = get_family("linear")
    state = fam.prepare(Response(y=np.load(workdir / "y.npy")), None)
    keep = shortlist_size("auto", ds.n_samples, ds.n_features)
    rss0 = _maxrss_mib()

    def work(part: range) -> float:
        spent = 0.0
        for i in part:
            raw = source.read(i)
            start, stop = source.bounds(i)
            t = time.thread_time()
            best = None
            for a in range(0, stop - start, sub_block):
                block = prepare_block(raw[:, a : a + sub_block], start + a)
                out = fam.kernel(block, state)
                score = np.where(block.constant, 0.0, out["score"])
                floor = -np.inf if best is None else best.kth
                part_k = block_topk(keep, start + a, score, None, ~block.constant, None, floor)
                best = part_k if best is None else merge_all([best, part_k], keep)
            spent += time.thread_time() - t
        return spent

    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        cpu = sum(pool.map(work, [range(j, source.n_blocks, threads) for j in range(threads)]))
    return {
        "seconds": cpu / threads,
        "cpu_seconds": cpu,
        "wall_with_reads": time.perf_counter() - t0,
        "rss_mib": _maxrss_mib(),
        "rss_before_mib": rss0,
    }


def measure_in_memory(workdir: Path, threads: int, width: int = 4096) -> dict:
    """np.load of the float32 matrix, then Pearson correlation block by block in float64."""
    from threadpoolctl import threadpool_limits

    y = np.load(workdir / "y.npy")
    rss0 = _maxrss_mib()
    cpu0 = _cpu()
    t0 = time.perf_counter()
    X = np.load(workdir / "float32.npy")
    t_load = time.perf_counter() - t0
    yc = y - y.mean()
    yc /= np.linalg.norm(yc)
    p = X.shape[1]
    r = np.empty(p)
    with threadpool_limits(limits=threads, user_api="blas"):
        for a in range(0, p, width):
            xb = X[:, a : a + width].astype(np.float64)
            xb -= xb.mean(axis=0)
            norms = np.sqrt(np.einsum("ij,ij->j", xb, xb))
            r[a : a + width] = (yc @ xb) / np.where(norms > 0, norms, 1.0)
    seconds = time.perf_counter() - t0
    top = np.argsort(-np.abs(r))[:N_TRUE]
    return {
        "seconds": seconds,
        "cpu_seconds": _cpu() - cpu0,
        "load_seconds": t_load,
        "rss_mib": _maxrss_mib(),
        "rss_before_mib": rss0,
        "top": sorted(top.tolist()),
    }


def _child(args: argparse.Namespace) -> None:
    what, kind = args.child.split(":")
    workdir = Path(args.workdir)
    if what == "pass":
        out = measure_pass(workdir, kind, args.threads, args.sub_block, not args.no_keep_values)
    elif what == "screen":
        out = measure_screen(workdir, kind, args.threads, args.sub_block)
    elif what == "floor":
        out = measure_floor(workdir, kind, args.threads)
    elif what == "arith":
        out = measure_arithmetic(workdir, kind, args.threads, args.sub_block)
    elif what == "memory":
        out = measure_in_memory(workdir, args.threads)
    else:
        raise SystemExit(f"unknown measurement {args.child!r}")
    print(json.dumps(out))


def _run_child(args: argparse.Namespace, child: str, env_extra: dict | None = None) -> dict:
    cmd = [
        sys.executable,
        __file__,
        "--workdir",
        str(args.workdir),
        "--threads",
        str(args.threads),
        "--sub-block",
        str(args.sub_block),
        "--child",
        child,
    ]
    if args.no_keep_values:
        cmd.append("--no-keep-values")
    env = {**os.environ, **(env_extra or {})}
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
    if proc.returncode != 0:
        raise SystemExit(f"{child} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--workdir", default="/tmp/widescreen-bench", help="where the data live")
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=250_000)
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--sub-block", type=int, default=1024, help="PassSpec.sub_block of the pass")
    ap.add_argument("--no-keep-values", action="store_true", help="PassSpec.keep_values = False")
    ap.add_argument("--repeat", type=int, default=1, help="repeat each timing; the best is shown")
    ap.add_argument("--int8-only", action="store_true", help="skip the float32 store and .npy")
    ap.add_argument("--no-numba", action="store_true", help="also time the numpy fallback")
    ap.add_argument("--clean", action="store_true", help="delete the data after the run")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        _child(args)
        return
    workdir = Path(args.workdir)
    meta = build(workdir, args.samples, args.features, args.seed, not args.int8_only)
    print(
        f"data: n = {meta['n']}, p = {meta['p']} in {workdir}"
        f" (built in {meta.get('build_seconds', '?')} s); {args.threads} threads,"
        f" sub_block {args.sub_block}, keep_values {not args.no_keep_values}"
    )

    def best(child: str, env: dict | None = None) -> dict:
        runs = [_run_child(args, child, env) for _ in range(max(1, args.repeat))]
        return min(runs, key=lambda r: r["seconds"])

    rows = []
    kinds = ["int8"] if args.int8_only else ["int8", "float32"]
    for kind in kinds:
        floor = best(f"floor:{kind}")
        variants = [("pass", None)]
        if args.no_numba:
            variants.append(("pass (numpy)", {"WIDESCREEN_NUMBA": "0"}))
        for label, env in variants:
            res = best(f"pass:{kind}", env)
            rows.append((f"{kind} {label}", res, floor))
        if kind == "int8":
            rows.append((f"{kind} screen (run folder)", best(f"screen:{kind}"), floor))
        rows.append((f"{kind} codec floor", floor, floor))
        rows.append((f"{kind} arithmetic alone (CPU / threads)", best(f"arith:{kind}"), floor))
    if not args.int8_only:
        mem = best("memory:float32")
        rows.append(("float32 in-memory (np.load + Pearson)", mem, None))
    print(
        f"\n{'measurement':40s} {'seconds':>8s} {'x floor':>8s} {'CPU s':>8s} {'x floor':>8s}"
        f" {'peak RSS MiB':>13s}"
    )
    for label, res, floor in rows:
        ratio = f"{res['seconds'] / floor['seconds']:8.2f}" if floor else f"{'':8s}"
        cpu_ratio = f"{res['cpu_seconds'] / floor['cpu_seconds']:8.2f}" if floor else f"{'':8s}"
        print(
            f"{label:40s} {res['seconds']:8.2f} {ratio} {res['cpu_seconds']:8.2f} {cpu_ratio}"
            f" {res['rss_mib']:13.0f}"
        )
        if "load_seconds" in res:
            print(f"{'  of which np.load':40s} {res['load_seconds']:8.2f}")
    print(
        "\nCPU s: user + system time of all threads; on a machine shared with other work it is the"
        " steadier figure.\nPeak RSS includes the interpreter and imports"
        f" (about {rows[0][1]['rss_before_mib']:.0f} MiB before the pass)."
    )
    if args.clean:
        shutil.rmtree(workdir)


if __name__ == "__main__":
    main()
