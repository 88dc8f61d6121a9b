"""Benchmark: screening a store on a local S3 server against the same store on local disk.

Builds (or reuses) the int8 dosage store of ``bench_screen.py`` in ``--workdir``, starts moto's S3 server
on a free port (or uses ``--endpoint`` with the credentials already in the environment), uploads the
store as it is, then measures on this machine, best of ``--repeat``:

* ``floor``: every chunk column read and decoded into the reused buffers (`read_block`), on
  ``--threads`` threads, no arithmetic;
* ``screen``: the whole ``widescreen screen STORE ... --no-report`` command in a fresh process (wall
  time, including the fingerprint and the start-up).

Usage::

    python tools/bench_object_store.py --features 100000 --workdir /tmp/ws-s3bench
"""

from __future__ import annotations

import argparse
import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_screen import build

BUCKET = "widescreen-bench"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start_server() -> subprocess.Popen:
    port = _free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    endpoint = f"http://127.0.0.1:{port}"
    os.environ.update(
        AWS_ENDPOINT_URL=endpoint,
        AWS_ACCESS_KEY_ID="bench",
        AWS_SECRET_ACCESS_KEY="bench",
        AWS_DEFAULT_REGION="us-east-1",
        AWS_EC2_METADATA_DISABLED="true",
    )
    for _ in range(300):
        try:
            urllib.request.urlopen(endpoint, timeout=2).close()
            return proc
        except OSError:
            time.sleep(0.1)
    proc.kill()
    raise SystemExit("the S3 server did not start")


def floor(store: str, threads: int) -> float:
    from widescreen.store import ChunkLayout, open_dataset, read_block

    ds = open_dataset(store)
    layout = ChunkLayout.of(ds)
    n_blocks = -(-ds.n_features // layout.chunk_cols)
    t0 = time.perf_counter()
    with ThreadPoolExecutor(threads) as pool:
        list(pool.map(lambda i: read_block(ds, i, layout).shape, range(n_blocks)))
    return time.perf_counter() - t0


def screen(store: str, outcome: Path, out: Path) -> float:
    shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "widescreen.cli", "screen", store, "--outcome", str(outcome)]
    cmd += ["--response", "y", "--out", str(out), "--no-report", "--quiet"]
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=100_000)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/ws-s3bench"))
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--endpoint", help="an S3 endpoint to use instead of starting moto")
    args = ap.parse_args(argv)

    build(args.workdir, args.samples, args.features, 0, False)
    local = str(args.workdir / "int8.store")
    server = None
    if args.endpoint:
        os.environ["AWS_ENDPOINT_URL"] = args.endpoint
    else:
        server = start_server()
    try:
        import fsspec

        fs = fsspec.filesystem("s3")
        if not fs.exists(BUCKET):
            fs.mkdir(BUCKET)
        remote = f"s3://{BUCKET}/int8.store"
        if fs.exists(f"{BUCKET}/int8.store"):
            fs.rm(f"{BUCKET}/int8.store", recursive=True)
        t0 = time.perf_counter()
        fs.put(local, f"{BUCKET}/int8.store", recursive=True)
        print(f"upload {time.perf_counter() - t0:.1f} s")
        rows = []
        for what, fn in (
            ("floor", lambda s: floor(s, args.threads)),
            ("screen", lambda s: screen(s, args.workdir / "outcome.tsv", args.workdir / "run")),
        ):
            best = {}
            for name, store in (("local", local), ("s3", remote)):
                best[name] = min(fn(store) for _ in range(args.repeat))
            rows.append((what, best["local"], best["s3"]))
        print(f"n = {args.samples}, p = {args.features}, int8, {args.threads} threads")
        print("| measurement | local disk s | local S3 server s | ratio |")
        print("|---|---:|---:|---:|")
        for what, a, b in rows:
            print(f"| {what} | {a:.2f} | {b:.2f} | {b / a:.2f} |")
    finally:
        if server is not None:
            server.terminate()
            server.wait()


if __name__ == "__main__":
    main()
