"""Benchmark: screening a store on a local S3 server against the same store on local disk.

Builds (or reuses) the int8 dosage store of ``bench_screen.py`` in ``--workdir``, starts moto's S3 server
on a free port (or uses ``--endpoint`` with the credentials already in the environment), uploads the
store as it is, then measures on this machine, best of ``--repeat``:

* ``floor``: every chunk column read and decoded into the reused buffers (`read_block`), on
  ``--threads`` threads, no arithmetic; on S3 through `ReadAhead` (a pass's route: each thread's next
  block requested while it decodes the current one) unless ``--no-read-ahead``;
* ``screen``: the whole ``widescreen screen STORE ... --no-report`` command in a fresh process (wall
  time, including the fingerprint and the start-up), and its CPU time (user + system of the child);
* ``screen, run folder local or on S3``: the same command on the store on disk, once with a local run
  folder and once with ``--out s3://...`` (worked on in a local copy and uploaded as it goes).

Also printed: the load average before each measurement (the machine is shared) and the CPU time the
moto server spent serving the S3 runs (it runs on the same cores as the pass).

Usage::

    python tools/bench_object_store.py --features 100000 --workdir /tmp/ws-s3bench
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import resource
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


def floor(store: str, threads: int, read_ahead: bool) -> tuple[float, float]:
    """Wall and CPU seconds (of this process) to read and decode every chunk column."""
    from widescreen.store import ChunkLayout, is_url, open_dataset, read_block

    ds = open_dataset(store)
    layout = ChunkLayout.of(ds)
    n_blocks = -(-ds.n_features // layout.chunk_cols)
    read = lambda i: read_block(ds, i, layout)  # noqa: E731
    ahead = None
    if read_ahead and is_url(store):
        from widescreen.store import ReadAhead

        ahead = ReadAhead(ds, layout, range(n_blocks), threads)
        read = ahead.read
    t0, c0 = time.perf_counter(), time.process_time()
    with ThreadPoolExecutor(threads) as pool:
        list(pool.map(lambda i: read(i).shape, range(n_blocks)))
    if ahead is not None:
        ahead.close()
    return time.perf_counter() - t0, time.process_time() - c0


def _children_cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def screen(store: str, outcome: Path, out: Path | str) -> tuple[float, float, float]:
    """Wall and CPU seconds of the ``screen`` command in a fresh process, and its pass's seconds
    (``out`` may be an s3:// run folder: emptied first, its manifest read from the bucket)."""
    import fsspec

    if str(out).startswith("s3://"):
        fs = fsspec.filesystem("s3")
        key = str(out).removeprefix("s3://")
        if fs.exists(key):
            fs.rm(key, recursive=True)
    else:
        shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "widescreen.cli", "screen", store, "--outcome", str(outcome)]
    cmd += ["--response", "y", "--out", str(out), "--no-report", "--quiet"]
    t0, c0 = time.perf_counter(), _children_cpu()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
    wall, cpu = time.perf_counter() - t0, _children_cpu() - c0
    if str(out).startswith("s3://"):
        text = fsspec.filesystem("s3").cat_file(f"{str(out).removeprefix('s3://')}/manifest.json")
    else:
        text = (Path(out) / "manifest.json").read_text()
    manifest = json.loads(text)
    return wall, cpu, float(manifest["passes"]["screen"]["seconds"])


def _server_cpu(server: subprocess.Popen | None) -> float:
    if server is None:
        return float("nan")
    import psutil

    t = psutil.Process(server.pid).cpu_times()
    return t.user + t.system


async def _relay(reader, writer, delay: float) -> None:
    try:
        while data := await reader.read(1 << 16):
            if delay:
                await asyncio.sleep(delay)
            writer.write(data)
            await writer.drain()
    except ConnectionError:
        pass
    finally:
        writer.close()


async def _serve_latency(listen: int, target: int, delay: float) -> None:
    """Forward TCP to ``target``, holding each piece the client sends ``delay`` seconds: a request
    (a GET's headers arrive in one piece) reaches the server ``delay`` later, like a storage service's
    time to first byte; the answers flow back at once."""

    async def handle(client_r, client_w):
        server_r, server_w = await asyncio.open_connection("127.0.0.1", target)
        await asyncio.gather(_relay(client_r, server_w, delay), _relay(server_r, client_w, 0.0))

    server = await asyncio.start_server(handle, "127.0.0.1", listen)
    async with server:
        await server.serve_forever()


def start_latency(target: str, ms: float) -> tuple[subprocess.Popen, str]:
    """A process adding ``ms`` to every request to the endpoint ``target``; its own endpoint."""
    port = _free_port()
    target_port = target.rsplit(":", 1)[1]
    proc = subprocess.Popen(
        [sys.executable, __file__, "--serve-latency", str(port), target_port, str(ms)]
    )
    endpoint = f"http://127.0.0.1:{port}"
    for _ in range(300):
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=1):
                return proc, endpoint
        except OSError:
            time.sleep(0.1)
    proc.kill()
    raise SystemExit("the latency relay did not start")


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--samples", type=int, default=2000)
    ap.add_argument("--features", type=int, default=100_000)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/ws-s3bench"))
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--endpoint", help="an S3 endpoint to use instead of starting moto")
    ap.add_argument(
        "--no-read-ahead", action="store_true", help="floor: read each block only when asked"
    )
    ap.add_argument(
        "--latency-ms",
        type=float,
        default=0.0,
        help="add this time to every request (a relay in front of the server), as a storage "
        "service far from the machine would",
    )
    ap.add_argument("--serve-latency", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.serve_latency:
        listen, target, ms = args.serve_latency
        asyncio.run(_serve_latency(int(listen), int(target), float(ms) / 1000.0))
        return

    build(args.workdir, args.samples, args.features, 0, False)
    local = str(args.workdir / "int8.store")
    server = relay = None
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
        if args.latency_ms:
            relay, endpoint = start_latency(os.environ["AWS_ENDPOINT_URL"], args.latency_ms)
            os.environ["AWS_ENDPOINT_URL"] = (
                endpoint  # the runs (and the screen commands) go through it
            )
            type(fs).clear_instance_cache()
        rows = []
        loads = []
        # The run folder on S3 (its local copy under the work folder): the store on local disk for
        # both, the run folder local or in the bucket.
        os.environ["WIDESCREEN_CACHE_DIR"] = str(args.workdir / "cache")
        outcome = args.workdir / "outcome.tsv"
        for what, fn, stores in (
            ("floor", lambda s: floor(s, args.threads, not args.no_read_ahead), (local, remote)),
            ("screen", lambda s: screen(s, outcome, args.workdir / "run"), (local, remote)),
            (
                "screen, run folder local or on S3 (store on disk)",
                lambda out: screen(local, outcome, out),
                (args.workdir / "run", f"s3://{BUCKET}/runs/screen"),
            ),
        ):
            best = {}
            server_cpu = 0.0
            # Alternate the two stores, so a change of the machine's load touches both alike.
            runs: dict[str, list] = {"local": [], "s3": []}
            for _ in range(args.repeat):
                for name, store in zip(("local", "s3"), stores, strict=True):
                    loads.append(os.getloadavg()[0])
                    s0 = _server_cpu(server)
                    runs[name].append(fn(store))
                    if name == "s3":
                        server_cpu += _server_cpu(server) - s0
            best = {name: min(r) for name, r in runs.items()}  # the fastest wall, with its CPU
            rows.append((what, best["local"][:2], best["s3"][:2], server_cpu / args.repeat))
            if what.startswith("screen"):  # the pass alone, as the command's manifest records it
                best = {name: min(r[2] for r in runs[name]) for name in runs}
                rows.append(("its pass", (best["local"], None), (best["s3"], None), None))
        print(
            f"n = {args.samples}, p = {args.features}, int8, {args.threads} threads, best of "
            f"{args.repeat}; {args.latency_ms:g} ms added per S3 request; load average (1 min) "
            f"{min(loads):.1f}-{max(loads):.1f}"
        )
        print(
            "| measurement | local disk s (CPU s) | local S3 server s (CPU s) | ratio | server CPU s |"
        )
        print("|---|---:|---:|---:|---:|")
        for what, (a, ac), (b, bc), srv in rows:
            a_text = f"{a:.2f}" + ("" if ac is None else f" ({ac:.2f})")
            b_text = f"{b:.2f}" + ("" if bc is None else f" ({bc:.2f})")
            srv_text = "" if srv is None else f"{srv:.2f}"
            print(f"| {what} | {a_text} | {b_text} | {b / a:.2f} | {srv_text} |")
    finally:
        for proc in (relay, server):
            if proc is not None:
                proc.terminate()
                proc.wait()


if __name__ == "__main__":
    main()
