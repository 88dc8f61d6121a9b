"""Run folders on object storage (``--out s3://...``), against a moto S3 server on localhost.

The run works in a local copy (``WIDESCREEN_CACHE_DIR``) kept in step with the bucket; the lock is a
lease object taken and renewed by conditional PUTs (``If-None-Match`` / ``If-Match``). Checked here:
the bucket's tables and statistics equal a run on local disk byte for byte; a rerun from another local
copy (another machine) resumes every block; a run killed mid-pass resumes from the bucket to identical
results; the lease refuses a second holder, is taken over once expired, is lost when replaced; storage
without conditional writes is refused.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.engine import Lease, LeaseLost, RunFolderError, local_copy_path
from widescreen.simulate import SimulationConfig, simulate
from widescreen.store import place

from .s3_kit import BUCKET, stop_process
from .test_object_storage import _args as _run_args
from .test_object_storage import _same_outputs

pytestmark = pytest.mark.slow
runner = CliRunner()


@pytest.fixture(scope="module")
def study(s3_server, tmp_path_factory):
    """A small simulated study on local disk and the local reference runs."""
    root = tmp_path_factory.mktemp("s3run")
    cfg = SimulationConfig(
        design="dosage",
        n_samples=200,
        n_features=800,
        n_true=6,
        sigma=0.5,
        chunk_features=16,
        seed=5,
    )
    sim = simulate(root / "geno.zarr", cfg)
    refs = {}
    for command in ("screen", "run"):
        refs[command] = root / f"ref-{command}"
        res = runner.invoke(app, _args(command, sim, refs[command]))
        assert res.exit_code == 0, res.output
    return {"root": root, "sim": sim, "refs": refs}


def _args(command: str, sim, out, *extra: str) -> list[str]:
    return _run_args(command, sim.dataset.path, sim.outcome_path, out, *extra)


def _fs():
    import fsspec

    return fsspec.filesystem("s3", use_listings_cache=False)


def _download(url: str, dest: Path) -> Path:
    _fs().get(url.removeprefix("s3://"), str(dest), recursive=True)
    return dest


def _remote_markers(url: str, name: str = "screen") -> int:
    try:
        found = _fs().find(f"{url.removeprefix('s3://')}/passes/{name}/done")
    except FileNotFoundError:
        return 0
    return sum(k.endswith(".json") for k in found)


def test_run_on_s3_equals_local_and_resumes_from_another_copy(study, monkeypatch, tmp_path):
    url = f"s3://{BUCKET}/runs/whole"
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "first"))
    res = runner.invoke(app, _args("run", study["sim"], url))
    assert res.exit_code == 0, res.output
    assert f"model in {url}/model.tsv" in res.output
    got = _download(url, tmp_path / "got")
    _same_outputs(got, study["refs"]["run"])
    assert not (got / ".lease").exists()  # released
    assert not (got / ".lock").exists()  # the local lock stays local
    # Another machine (another local copy): every block is reused, the tables are the same.
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "second"))
    res = runner.invoke(app, _args("run", study["sim"], url))
    assert res.exit_code == 0, res.output
    manifest = json.loads(_fs().cat_file(f"{BUCKET}/runs/whole/manifest.json"))
    assert [s["status"] for s in manifest["sessions"]] == ["complete", "complete"]
    for name, rec in manifest["passes"].items():
        assert rec["blocks_computed"] == 0 and rec["blocks_reused"] > 0, name
    # Another configuration is refused with its difference, read from the bucket's manifest.
    res = runner.invoke(app, _args("run", study["sim"], url, "--shortlist", "20"))
    assert res.exit_code != 0
    assert "was made by another command, configuration or dataset" in res.output
    # The report of a run on the bucket is written to the bucket.
    res = runner.invoke(app, ["report", url])
    assert res.exit_code == 0, res.output
    assert f"report: {url}/report.html" in res.output
    assert _fs().exists(f"{BUCKET}/runs/whole/report.html")
    assert local_copy_path(url) == tmp_path / "second" / "runs" / "s3" / BUCKET / "runs" / "whole"
    # The bucket emptied by hand: the next run starts over, whatever the local copy still holds.
    _fs().rm(f"{BUCKET}/runs/whole", recursive=True)
    res = runner.invoke(app, _args("run", study["sim"], url))
    assert res.exit_code == 0, res.output
    manifest = json.loads(_fs().cat_file(f"{BUCKET}/runs/whole/manifest.json"))
    assert len(manifest["sessions"]) == 1
    assert manifest["passes"]["screen"]["blocks_reused"] == 0


def test_report_of_one_trait_on_s3_stages_the_whole_run(study, monkeypatch, tmp_path):
    """A trait's folder reads its screening statistics from the run's shared pass: its report from a
    fresh local copy stages the run around it."""
    url = f"s3://{BUCKET}/runs/traits"
    outcome = tmp_path / "two.tsv"
    lines = study["sim"].outcome_path.read_text().splitlines()
    outcome.write_text(
        "\n".join([lines[0] + "\tw"] + [f"{r}\t{i % 7}" for i, r in enumerate(lines[1:])]) + "\n"
    )
    args = _args("screen", study["sim"], url)
    args[args.index("--outcome") + 1] = str(outcome)
    args[args.index("--response") + 1] = "y,w"
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "first"))
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "second"))
    res = runner.invoke(app, ["report", f"{url}/traits/w"])
    assert res.exit_code == 0, res.output
    assert f"report: {url}/traits/w/report.html" in res.output
    assert _fs().exists(f"{BUCKET}/runs/traits/traits/w/figures/manhattan.png")


# The killed run's blocks each wait 0.1 s and it uploads every 0.2 s (patched in the child only), so
# the window with some blocks in the bucket and others not lasts seconds on any machine.
SLOW_BLOCKS = (
    "import time\n"
    "import widescreen.engine._pass as p, widescreen.engine._staging as s\n"
    "s.PUSH_SECONDS = 0.2\n"
    "block = p.process_block\n"
    "def slow(*a, **k):\n"
    "    time.sleep(0.1)\n"
    "    return block(*a, **k)\n"
    "p.process_block = slow\n"
    "from widescreen.cli import main\n"
    "main()\n"
)


def test_killed_run_resumes_from_the_bucket_on_another_copy(study, tmp_path, monkeypatch):
    url = f"s3://{BUCKET}/runs/killed"
    env = {**__import__("os").environ, "WIDESCREEN_CACHE_DIR": str(tmp_path / "killed")}
    proc = subprocess.Popen(
        [sys.executable, "-c", SLOW_BLOCKS, *_args("screen", study["sim"], url)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env=env,
    )
    t0 = time.monotonic()
    try:
        while _remote_markers(url) < 5:
            if proc.poll() is not None:
                pytest.fail(f"the run ended before it was killed: {proc.stderr.read().decode()}")
            assert time.monotonic() - t0 < 120, "no upload"
            time.sleep(0.05)
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=60)
    finally:
        stop_process(proc)
    assert proc.returncode == -signal.SIGKILL
    uploaded = _remote_markers(url)
    assert 5 <= uploaded < 50
    assert _fs().exists(f"{BUCKET}/runs/killed/.lease")  # left behind by the killed holder
    # Resumed from a fresh local copy on this host: the dead holder's lease is taken over at once.
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "resumed"))
    res = runner.invoke(app, _args("screen", study["sim"], url))
    assert res.exit_code == 0, res.output
    got = _download(url, tmp_path / "got")
    _same_outputs(got, study["refs"]["screen"])
    manifest = json.loads((got / "manifest.json").read_text())
    assert manifest["sessions"][0]["status"] == "interrupted"
    assert manifest["passes"]["screen"]["blocks_reused"] >= uploaded


def _lease(url: str, **kw) -> Lease:
    return Lease(place(f"{url}/.lease"), **kw)


def test_lease_refuses_a_second_holder_until_released(s3_server):
    url = f"s3://{BUCKET}/runs/leased"
    first = _lease(url)
    first.acquire()
    try:
        assert first.valid()
        with pytest.raises(RunFolderError, match=r"in use by pid \d+ on "):
            _lease(url).acquire()
        res = runner.invoke(app, ["report", url])
        assert res.exit_code != 0 and "in use by" in res.output
    finally:
        first.release()
    assert not _fs().exists(f"{BUCKET}/runs/leased/.lease")
    second = _lease(url)
    second.acquire()
    second.release()


def test_expired_lease_of_another_host_is_taken_over(s3_server):
    url = f"s3://{BUCKET}/runs/expired"
    key = f"{BUCKET}/runs/expired/.lease"
    record = {"owner": "x", "host": "elsewhere", "pid": 1, "renewed": 0.0}
    _fs().pipe_file(key, json.dumps({**record, "expires": time.time() + 60}).encode())
    with pytest.raises(RunFolderError, match="in use by pid 1 on elsewhere"):
        _lease(url, skew=0.0).acquire()
    _fs().pipe_file(key, json.dumps({**record, "expires": time.time() - 1}).encode())
    taker = _lease(url, skew=0.0)
    taker.acquire()
    assert json.loads(_fs().cat_file(key))["owner"] == taker.owner
    taker.release()


def test_a_replaced_lease_is_lost_and_stops_writes(s3_server):
    url = f"s3://{BUCKET}/runs/lost"
    lease = _lease(url, seconds=4.0, margin=1.0)
    lease.acquire()
    try:
        lease.renew()
        assert lease.valid()
        _fs().pipe_file(f"{BUCKET}/runs/lost/.lease", b'{"owner": "someone else"}')
        lease.renew()
        assert not lease.valid()
        with pytest.raises(LeaseLost, match="took the run folder's lease over"):
            lease.check()
    finally:
        lease.release()
    # Released after being lost: the other holder's lease is left alone.
    assert _fs().cat_file(f"{BUCKET}/runs/lost/.lease") == b'{"owner": "someone else"}'


def test_storage_that_ignores_conditions_is_refused(s3_server, monkeypatch):
    import widescreen.engine._lease as lease_module

    real = lease_module.create_object
    # A server that accepts If-None-Match but ignores it: every create succeeds.
    monkeypatch.setattr(
        lease_module, "create_object", lambda where, data: real(where, data) or '"ignored"'
    )
    with pytest.raises(RunFolderError, match="ignores conditional writes"):
        _lease(f"s3://{BUCKET}/runs/ignoring").acquire()
    assert not _fs().exists(f"{BUCKET}/runs/ignoring/.lease")


def test_a_prefix_holding_other_objects_is_refused_before_any_download(
    study, monkeypatch, tmp_path
):
    """A store given as the run folder by mistake: refused without copying it."""
    _fs().pipe_file(f"{BUCKET}/runs/notarun/zarr.json", b"{}")
    _fs().pipe_file(f"{BUCKET}/runs/notarun/X/c/0/0", bytes(1000))
    monkeypatch.setenv("WIDESCREEN_CACHE_DIR", str(tmp_path / "copy"))
    url = f"s3://{BUCKET}/runs/notarun"
    for extra in ((), ("--restart",)):
        res = runner.invoke(app, _args("screen", study["sim"], url, *extra))
        assert res.exit_code != 0
        assert "does not look like a run folder (it holds X, zarr.json)" in res.output
    assert not any(p.is_file() for p in (tmp_path / "copy").rglob("*"))
    assert not _fs().exists(f"{BUCKET}/runs/notarun/.lease")


@pytest.mark.parametrize(
    ("url", "reason"),
    [
        ("gs://some-bucket/run", "needs conditional writes"),
        ("https://example.invalid/run", "read-only"),
    ],
)
def test_run_folder_where_a_lease_cannot_hold_is_refused(study, url, reason):
    res = runner.invoke(app, _args("screen", study["sim"], url))
    assert res.exit_code != 0
    assert reason in res.output
