"""Benchmark the text importers: throughput (MB/s of input) and peak memory of the importing process.

Generates a CSV (samples as rows, the hard direction) and a VCF (GT calls of 2,000 samples), imports
each in a fresh subprocess and reports wall time, MB/s and that process's peak resident memory
(``ru_maxrss``). Goals: a 2 GB CSV under 1 GB RSS; VCF at 40 MB/s or more with bounded memory.

    python tools/bench_import.py                      # ~2 GB CSV and ~500 MB VCF
    python tools/bench_import.py --csv-mb 200 --vcf-mb 100
    python tools/bench_import.py --only vcf --vcf-format GT:DP:GQ --gzip
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

CHILD = r"""
import json, resource, sys, time
from widescreen.store._ingest_text import import_table
from widescreen.store._ingest_vcf import import_vcf
kind, src, store = sys.argv[1:4]
t0 = time.perf_counter()
ds = (import_table if kind == "csv" else import_vcf)(src, store, overwrite=True)
dt = time.perf_counter() - t0
rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kilobytes on Linux
print(json.dumps({"seconds": dt, "peak_rss": rss, "shape": list(ds.shape)}))
"""


def _digits(x: np.ndarray) -> np.ndarray:
    """Fixed-width text of values in (-10, 10) with 5 decimals, as uint8 of shape (..., 8)."""
    q = np.abs(np.round(x * 1e5)).astype(np.int64)
    out = np.empty((*x.shape, 8), np.uint8)
    out[..., 0] = np.where(x < 0, ord("-"), ord("+"))
    out[..., 1] = ord("0") + (q // 100000) % 10
    out[..., 2] = ord(".")
    for k in range(5):
        out[..., 3 + k] = ord("0") + (q // 10 ** (4 - k)) % 10
    return out


def make_csv(path: Path, size_mb: float, n: int, seed: int) -> tuple[int, int]:
    """Samples as rows; 9 bytes per cell (``+1.23456,``)."""
    p = max(1, int(size_mb * 1e6 / (n * 9)))
    rng = np.random.default_rng(seed)
    with open(path, "wb") as fh:
        fh.write(("sample," + ",".join(f"feat{j}" for j in range(p)) + "\n").encode())
        rows = max(1, int(32e6 // (9 * p)))
        for i0 in range(0, n, rows):
            k = min(rows, n - i0)
            cells = np.empty((k, p, 9), np.uint8)
            cells[..., :8] = _digits(np.clip(rng.standard_normal((k, p)), -9.9, 9.9))
            cells[..., 8] = ord(",")
            cells[:, -1, 8] = ord("\n")
            for r in range(k):
                fh.write(f"s{i0 + r},".encode())
                fh.write(cells[r].tobytes())
    return n, p


def make_vcf(path: Path, size_mb: float, n: int, fmt: str, compress: bool, seed: int) -> int:
    """Biallelic sites; calls ``a|b`` / ``a/b`` (1 % missing), with DP and GQ when asked."""
    rng = np.random.default_rng(seed)
    extra = fmt != "GT"
    cell = 4 + (6 if extra else 0)
    m = max(1, int(size_mb * 1e6 / (n * cell + 40)))
    # Level 1: the benchmark measures reading; level 9 would make writing the file take minutes.
    with gzip.open(path, "wb", compresslevel=1) if compress else open(path, "wb") as fh:
        fh.write(b"##fileformat=VCFv4.3\n##contig=<ID=1>\n")
        head = "#CHROM\tPOS\tID\tREF\tALT\tQUAL\tFILTER\tINFO\tFORMAT\t"
        fh.write((head + "\t".join(f"i{k}" for k in range(n)) + "\n").encode())
        batch = max(1, int(16e6 // (n * cell)))
        for j0 in range(0, m, batch):
            k = min(batch, m - j0)
            a = rng.random((k, n, 2)) < 0.3
            c = np.empty((k, n, cell), np.uint8)
            c[..., 0] = np.where(a[..., 0], ord("1"), ord("0"))
            c[..., 1] = np.where(rng.random((k, n)) < 0.5, ord("|"), ord("/"))
            c[..., 2] = np.where(a[..., 1], ord("1"), ord("0"))
            miss = rng.random((k, n)) < 0.01
            c[..., 0][miss] = c[..., 2][miss] = ord(".")
            if extra:  # ":DP:GQ" with two-digit values
                c[..., 3] = c[..., 6] = ord(":")
                c[..., 4:6] = rng.integers(ord("1"), ord("9") + 1, (k, n, 2))
                c[..., 7:9] = rng.integers(ord("1"), ord("9") + 1, (k, n, 2))
            c[..., -1] = ord("\t")
            c[:, -1, -1] = ord("\n")
            for r in range(k):
                j = j0 + r
                fh.write(f"1\t{j + 1}\trs{j}\tA\tG\t.\tPASS\t.\t{fmt}\t".encode())
                fh.write(c[r].tobytes())
    return m


def run_child(kind: str, src: Path, store: Path) -> dict:
    out = subprocess.run(
        [sys.executable, "-c", CHILD, kind, str(src), str(store)],
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def report(label: str, src: Path, res: dict) -> None:
    mb = src.stat().st_size / 1e6
    print(
        f"{label}: {mb:,.0f} MB -> shape {tuple(res['shape'])} in {res['seconds']:.1f} s = "
        f"{mb / res['seconds']:.1f} MB/s; peak RSS {res['peak_rss'] / 2**20:,.0f} MiB"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--csv-mb", type=float, default=2000.0, help="CSV size in MB (default 2000)")
    ap.add_argument("--csv-samples", type=int, default=2000)
    ap.add_argument("--vcf-mb", type=float, default=500.0, help="VCF size in MB of text")
    ap.add_argument("--vcf-samples", type=int, default=2000)
    ap.add_argument("--vcf-format", default="GT", choices=["GT", "GT:DP:GQ"])
    ap.add_argument("--gzip", action="store_true", help="gzip the VCF")
    ap.add_argument("--only", choices=["csv", "vcf"])
    ap.add_argument("--dir", type=Path, help="work folder (default: a temporary one, removed)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    work = args.dir or Path(tempfile.mkdtemp(prefix="bench-import-", dir=os.getcwd()))
    work.mkdir(parents=True, exist_ok=True)
    try:
        if args.only in (None, "csv"):
            src = work / "bench.csv"
            t0 = time.perf_counter()
            n, p = make_csv(src, args.csv_mb, args.csv_samples, args.seed)
            print(f"generated {src} ({n} x {p}) in {time.perf_counter() - t0:.0f} s")
            report("csv", src, run_child("csv", src, work / "csv.ws"))
            src.unlink()
        if args.only in (None, "vcf"):
            src = work / ("bench.vcf.gz" if args.gzip else "bench.vcf")
            t0 = time.perf_counter()
            text_mb = args.vcf_mb
            m = make_vcf(src, text_mb, args.vcf_samples, args.vcf_format, args.gzip, args.seed)
            print(
                f"generated {src} ({m} sites, {args.vcf_format}) in {time.perf_counter() - t0:.0f} s"
            )
            res = run_child("vcf", src, work / "vcf.ws")
            report("vcf", src, res)
            if args.gzip:
                print(f"    of text: {text_mb / res['seconds']:.1f} MB/s (about {text_mb:.0f} MB)")
    finally:
        if args.dir is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
