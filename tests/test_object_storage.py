"""Stores on object storage, and a real Dask cluster, against servers started here on localhost.

An S3-compatible server (moto's server mode, `s3_kit`) runs as a subprocess for the test session; the
endpoint and dummy credentials reach the storage library through its usual environment variables
(``AWS_ENDPOINT_URL``, ``AWS_ACCESS_KEY_ID``, ...), as a user's would. A Dask scheduler and two
single-threaded workers run as separate processes (the ``dask scheduler`` / ``dask worker``
commands). Small data: 200 samples x 800 int8 features in chunks of 16 (50 blocks).

Each run through S3 or the cluster is compared byte for byte with the threaded run on the same data on
local disk: reading the same chunks and computing the same blocks must give the same tables.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.simulate import SimulationConfig, simulate
from widescreen.store import ChunkError, StoreError, open_dataset

from .s3_kit import BUCKET, free_port, stop_process

pytestmark = pytest.mark.slow
pytest.importorskip("s3fs")
pytest.importorskip("moto.server")

CLI = [sys.executable, "-c", "from widescreen.cli import main; main()"]
runner = CliRunner()


@pytest.fixture(scope="module")
def study(s3_server, tmp_path_factory):
    """A simulated dosage study on local disk, imported into the bucket through the CLI, and the
    threaded runs on the local store (the references)."""
    root = tmp_path_factory.mktemp("objstore")
    cfg = SimulationConfig(
        design="dosage",
        n_samples=200,
        n_features=800,
        n_true=6,
        sigma=0.5,
        chunk_features=16,
        seed=3,
    )
    sim = simulate(root / "local.zarr", cfg)
    X = np.asarray(sim.dataset.X[:])
    ids = sim.dataset.sample_ids()
    fids = sim.dataset.feature_ids()
    text = ["sample," + ",".join(fids)]
    text += [
        f"{s}," + ",".join(np.where(row == -128, "NA", row.astype(str)))
        for s, row in zip(ids, X, strict=True)
    ]
    (root / "geno.csv").write_text("\n".join(text) + "\n")
    url = f"s3://{BUCKET}/geno.zarr"
    res = runner.invoke(
        app, ["import", str(root / "geno.csv"), url, "--dosage", "--chunk-features", "16", "-q"]
    )
    assert res.exit_code == 0, res.output
    refs = {}
    for command in ("screen", "run"):
        refs[command] = root / f"ref-{command}"
        res = runner.invoke(app, _args(command, sim.dataset.path, sim.outcome_path, refs[command]))
        assert res.exit_code == 0, res.output
    return {"root": root, "sim": sim, "url": url, "X": X, "refs": refs}


def _args(command: str, store, outcome, out: Path, *extra: str) -> list[str]:
    return [
        command,
        str(store),
        "--outcome",
        str(outcome),
        "--response",
        "y",
        "--out",
        str(out),
        "--quiet",
        "--no-report",
        *extra,
    ]


def _same_outputs(out: Path, ref: Path) -> None:
    """Tables (timing columns aside) and every statistics chunk file equal byte for byte."""
    for name in ("ranking.tsv", "model.tsv", "iterations.tsv"):
        if (ref / name).exists():
            assert _table(out / name) == _table(ref / name), name
    files = sorted(p.relative_to(ref) for p in (ref / "passes").glob("*/stats/*/c/*"))
    assert files == sorted(p.relative_to(out) for p in (out / "passes").glob("*/stats/*/c/*"))
    differ = [f for f in files if (out / f).read_bytes() != (ref / f).read_bytes()]
    assert not differ, differ[:5]


def _table(path: Path) -> list[list[str]]:
    rows = [line.split("\t") for line in path.read_text().splitlines()]
    keep = [i for i, c in enumerate(rows[0]) if c not in ("pass_seconds", "fit_seconds")]
    return [[r[i] for i in keep] for r in rows]


def _markers(out: Path, name: str = "screen") -> int:
    d = out / "passes" / name / "done"
    return len(list(d.glob("*.json"))) if d.is_dir() else 0


# ------------------------------------------------------------------------------------------------
# object storage


def test_import_to_s3_then_inspect(study):
    ds = open_dataset(study["url"])
    assert ds.shape == (200, 800)
    np.testing.assert_array_equal(np.asarray(ds.X[:]), study["X"])
    # the same store on disk and in the bucket is the same dataset (sizes and CRCs of its chunks)
    local = study["root"] / "copy.zarr"
    import fsspec

    fsspec.filesystem("s3").get(f"{BUCKET}/geno.zarr", str(local), recursive=True)
    assert open_dataset(local).fingerprint() == ds.fingerprint()
    res = runner.invoke(app, ["inspect", study["url"]])
    assert res.exit_code == 0, res.output
    assert f"store        {study['url']}" in res.output
    assert "200 samples x 800 features" in res.output
    assert "CRC-32C per chunk" in res.output
    from widescreen.store import inspect_dataset

    # every block read (ahead, on object storage): the missing rate of the values themselves
    assert inspect_dataset(study["url"]).missing_rate == float(np.mean(study["X"] == -128))


@pytest.mark.parametrize("command", ["screen", "run"])
def test_screen_and_run_from_s3_equal_local(study, command):
    out = study["root"] / f"s3-{command}"
    res = runner.invoke(app, _args(command, study["url"], study["sim"].outcome_path, out))
    assert res.exit_code == 0, res.output
    _same_outputs(out, study["refs"][command])
    assert f'"path": "{study["url"]}"' in (out / "manifest.json").read_text()


def test_read_ahead_holds_one_block_per_thread_and_reads_the_same_values(study):
    from concurrent.futures import ThreadPoolExecutor

    from widescreen.engine import as_source
    from widescreen.store import ChunkLayout, ReadAhead

    ds = open_dataset(study["url"])
    ahead = ReadAhead(ds, ChunkLayout.of(ds), range(50), depth=2)
    held = []

    def read(c: int) -> bool:
        block = ahead.read(c)
        held.append(ahead.held)
        return np.array_equal(block, study["X"][:, 16 * c : 16 * c + 16])

    with ThreadPoolExecutor(2) as pool:
        assert all(pool.map(read, range(50)))
    assert max(held) <= 2  # the bytes of at most one block ahead per thread
    assert ahead.hits >= 50 - 2  # only the first blocks were not requested before they were read
    ahead.close()
    assert ahead.held == 0
    # the memory plan counts the block's objects and the next block's (a local store: one chunk file)
    src = as_source(ds)
    assert src.block_shape(read_ahead=True).encoded_columns == 2
    assert as_source(study["sim"].dataset).block_shape(read_ahead=True).encoded_columns == 0


def test_one_request_per_object(study, monkeypatch):
    """Opening a store reads each array's metadata once; a block is one GET per chunk object (s3fs
    would ask each object's size first: `PROTOCOL_OPTIONS`)."""
    import aiobotocore.client

    from widescreen.store import ChunkLayout, read_block

    calls = []
    call = aiobotocore.client.AioBaseClient._make_api_call

    async def spy(self, name, params):
        calls.append((name, params.get("Key", "")))
        return await call(self, name, params)

    monkeypatch.setattr(aiobotocore.client.AioBaseClient, "_make_api_call", spy)
    ds = open_dataset(study["url"])
    opened = list(calls)
    layout = ChunkLayout.of(ds)  # reads the checksum table
    calls.clear()
    np.testing.assert_array_equal(read_block(ds, 3, layout), study["X"][:, 48:64])
    assert calls == [("GetObject", "geno.zarr/X/c/0/3")]
    assert [c for c in opened if c[0] == "HeadObject"] == [("HeadObject", "geno.zarr/zarr.json")]
    metadata = [key for name, key in opened if key.endswith("zarr.json")]
    assert (
        len(metadata) == len(set(metadata)) + 1
    )  # the group's (tested, then read), each array's once
    calls.clear()
    ds.fingerprint()
    assert not [c for c in calls if c[0] == "HeadObject" or c[1].endswith("zarr.json")]


def test_pass_reads_ahead_in_the_order_the_scheduler_runs_blocks(study, monkeypatch):
    from widescreen.store import ReadAhead

    closed = []
    close = ReadAhead.close

    def spy(self):
        closed.append((self.reads, self.hits, self.depth))
        close(self)

    monkeypatch.setattr(ReadAhead, "close", spy)
    out = study["root"] / "s3-ahead"
    res = runner.invoke(app, _args("screen", study["url"], study["sim"].outcome_path, out))
    assert res.exit_code == 0, res.output
    _same_outputs(out, study["refs"]["screen"])
    [(reads, hits, depth)] = closed
    assert reads == 50 and hits >= reads - depth


def test_killed_and_resumed_from_s3_equals_uninterrupted(study):
    """SIGKILL mid-pass with the store in the bucket; the rerun finishes bit-identical."""
    out = study["root"] / "s3-killed"
    proc = subprocess.Popen(
        [*CLI, *_args("screen", study["url"], study["sim"].outcome_path, out)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    t0 = time.monotonic()
    try:
        while _markers(out) < 5 and proc.poll() is None:
            assert time.monotonic() - t0 < 120, "no progress"
            time.sleep(0.002)
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=60)
    finally:
        stop_process(proc)
    assert proc.returncode == -signal.SIGKILL
    assert 5 <= _markers(out) < 50
    res = runner.invoke(app, _args("screen", study["url"], study["sim"].outcome_path, out))
    assert res.exit_code == 0, res.output
    _same_outputs(out, study["refs"]["screen"])


def test_corrupt_object_is_named(study):
    import fsspec

    fs = fsspec.filesystem("s3")
    fs.copy(f"{BUCKET}/geno.zarr", f"{BUCKET}/bad.zarr", recursive=True)
    key = f"{BUCKET}/bad.zarr/X/c/0/7"
    data = bytearray(fs.cat_file(key))
    data[40] ^= 0xFF  # one flipped byte inside the frame: the CRC-32C no longer matches
    fs.pipe_file(key, bytes(data))
    url = f"s3://{BUCKET}/bad.zarr"
    out = study["root"] / "s3-bad"
    res = runner.invoke(app, _args("screen", url, study["sim"].outcome_path, out))
    assert res.exit_code != 0
    assert f"corrupt chunk 0/7 of {url}/X (features 112..127)" in res.output
    # a missing object is named too, before any block is read (the fingerprint's census)
    fs.rm(key)
    with pytest.raises(ChunkError, match=r"missing chunk 0/7 of s3://.*/bad.zarr/X"):
        open_dataset(url).fingerprint()


def test_missing_credentials_and_bucket_are_one_line(study, monkeypatch):
    import s3fs

    for name in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"):
        monkeypatch.delenv(name)
    s3fs.S3FileSystem.clear_instance_cache()  # a cached file system keeps its credentials
    try:
        res = runner.invoke(app, ["inspect", study["url"]])
        assert res.exit_code != 0
        assert res.output.strip().splitlines() == [
            f"error: {study['url']}: no credentials for s3:// found (set AWS_ACCESS_KEY_ID and "
            "AWS_SECRET_ACCESS_KEY, AWS_PROFILE or ~/.aws/credentials)"
        ]
    finally:
        monkeypatch.undo()
        s3fs.S3FileSystem.clear_instance_cache()
    res = runner.invoke(app, ["inspect", "s3://no-such-bucket/geno.zarr"])
    assert res.exit_code != 0
    assert "s3://no-such-bucket/geno.zarr: no such bucket 'no-such-bucket'" in res.output
    with pytest.raises(StoreError, match="carries credentials"):
        open_dataset(f"s3://key:secret@{BUCKET}/geno.zarr")


def test_store_over_https_read_only(study):
    """A store served by a plain HTTP server (no listing, no ranges) reads as the same dataset."""
    import functools
    import threading
    from http.server import SimpleHTTPRequestHandler, ThreadingHTTPServer

    from widescreen.store import read_block

    root = study["sim"].dataset.path

    class Quiet(SimpleHTTPRequestHandler):
        def log_message(self, *args):
            pass

    handler = functools.partial(Quiet, directory=str(root.parent))
    server = ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/{root.name}"
        ds = open_dataset(url)
        assert ds.fingerprint() == study["sim"].dataset.fingerprint()
        np.testing.assert_array_equal(read_block(ds, 3), study["X"][:, 48:64])
        res = runner.invoke(app, ["import", str(study["root"] / "geno.csv"), url + "2"])
        assert res.exit_code != 0
        assert "http:// is read-only; stores can only be read there" in res.output
    finally:
        server.shutdown()
        server.server_close()


def test_simulate_writes_to_s3(s3_server, tmp_path, monkeypatch):
    """`simulate` to a URL writes the store `simulate` writes on disk (same chunks, same fingerprint);
    the outcome and truth tables, local files, go to the current folder."""
    monkeypatch.chdir(tmp_path)
    args = ["--design", "dosage", "-n", "60", "-p", "100", "--true", "3", "--seed", "5"]
    args += ["--chunk-features", "32", "-q"]
    url = f"s3://{BUCKET}/sim.zarr"
    res = runner.invoke(app, ["simulate", url, *args])
    assert res.exit_code == 0, res.output
    res = runner.invoke(app, ["simulate", str(tmp_path / "local.zarr"), *args])
    assert res.exit_code == 0, res.output
    remote, local = open_dataset(url), open_dataset(tmp_path / "local.zarr")
    assert remote.fingerprint() == local.fingerprint()
    np.testing.assert_array_equal(np.asarray(remote.X[:]), np.asarray(local.X[:]))
    for table in ("outcome", "truth"):
        assert (tmp_path / f"sim.zarr.{table}.tsv").read_text() == (
            tmp_path / f"local.zarr.{table}.tsv"
        ).read_text()
    # the Python function: an existing store is refused unless replaced
    cfg = SimulationConfig(design="dosage", n_samples=60, n_features=100, n_true=3, seed=5)
    with pytest.raises(StoreError, match=rf"^{url}: already exists"):
        simulate(url, cfg)
    sim = simulate(url, cfg, overwrite=True, outcome_path=tmp_path / "y.tsv")
    assert str(sim.dataset.path) == url and sim.outcome_path == tmp_path / "y.tsv"
    assert sim.dataset.shape == (60, 100)


# ------------------------------------------------------------------------------------------------
# a Dask cluster of separate processes, reading the store from the S3 server


@pytest.fixture(scope="module")
def cluster(s3_server, tmp_path_factory):
    """``dask scheduler`` and two ``dask worker`` processes (one thread each, no nanny, so killing
    a worker's process kills the worker)."""
    # the command of the environment running the tests (a virtual environment need not be on PATH)
    beside = Path(sys.executable).with_name("dask")
    dask_cli = str(beside) if beside.exists() else shutil.which("dask")
    if dask_cli is None:
        pytest.skip("the dask command is not installed")
    logs = tmp_path_factory.mktemp("cluster")
    port = free_port()
    address = f"tcp://127.0.0.1:{port}"
    env = {
        **os.environ,
        "OMP_NUM_THREADS": "1",
        "OPENBLAS_NUM_THREADS": "1",
        "MKL_NUM_THREADS": "1",
    }
    procs = {}

    def start(name, args):
        log = open(logs / f"{name}.log", "w")
        procs[name] = subprocess.Popen(
            [dask_cli, *args], stdout=log, stderr=subprocess.STDOUT, env=env, cwd=logs
        )

    start("scheduler", ["scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"])
    for i in (1, 2):
        start(
            f"worker{i}",
            [
                "worker",
                address,
                "--nthreads",
                "1",
                "--no-dashboard",
                "--no-nanny",
                "--host",
                "127.0.0.1",
                "--name",
                f"w{i}",
            ],
        )
    from distributed import Client

    try:
        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=90)
        yield {"address": address, "procs": procs}
    finally:
        for proc in procs.values():
            stop_process(proc)


@pytest.mark.parametrize("command", ["screen", "run"])
def test_cluster_with_store_on_s3_equals_threaded(study, cluster, command):
    out = study["root"] / f"cluster-{command}"
    args = _args(command, study["url"], study["sim"].outcome_path, out)
    res = runner.invoke(app, [*args, "--scheduler", cluster["address"]])
    assert res.exit_code == 0, res.output
    _same_outputs(out, study["refs"][command])
    assert "distributed" in (out / "manifest.json").read_text()


def test_cluster_with_store_and_run_folder_on_s3(study, cluster, monkeypatch, tmp_path):
    """Both on the bucket; the workers (on this host) write their blocks into the run's local copy."""
    import fsspec

    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "copy"))
    url = f"s3://{BUCKET}/runs/cluster"
    args = _args("screen", study["url"], study["sim"].outcome_path, url)  # type: ignore[arg-type]
    res = runner.invoke(app, [*args, "--scheduler", cluster["address"]])
    assert res.exit_code == 0, res.output
    got = tmp_path / "got"
    fsspec.filesystem("s3").get(f"{BUCKET}/runs/cluster", str(got), recursive=True)
    _same_outputs(got, study["refs"]["screen"])


def test_killed_worker_costs_only_its_blocks(study, cluster):
    """SIGKILL one of the two workers mid-pass: the other finishes, the tables are the threaded run's."""
    out = study["root"] / "cluster-killed"
    args = _args("screen", study["url"], study["sim"].outcome_path, out)
    proc = subprocess.Popen(
        [*CLI, *args, "--scheduler", cluster["address"]],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    victim = cluster["procs"]["worker2"]
    t0 = time.monotonic()
    try:
        while _markers(out) < 3 and proc.poll() is None:
            assert time.monotonic() - t0 < 120, "no progress"
            time.sleep(0.002)
        assert proc.poll() is None, "the pass ended before a worker could be killed"
        victim.send_signal(signal.SIGKILL)
        _stdout, stderr = proc.communicate(timeout=180)
    finally:
        stop_process(proc)
    assert victim.wait(timeout=10) == -signal.SIGKILL
    assert proc.returncode == 0, stderr
    _same_outputs(out, study["refs"]["screen"])
