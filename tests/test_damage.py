"""Damage: a corrupt, truncated or missing chunk stops the pass with an error naming the chunk and its
features, and leaves nothing that looks complete; a missing store or an unusable run folder is named."""

from __future__ import annotations

import json
import os
import shutil

import numpy as np
import pytest
from typer.testing import CliRunner

from widescreen.cli import app
from widescreen.engine import RunFolder, RunFolderError, read_stats
from widescreen.simulate import SimulationConfig, simulate
from widescreen.store import ChunkError, StoreError
from widescreen.workflow import ScreenConfig, screen

CONFIG = ScreenConfig(response="y", covariates=("age", "batch"))


@pytest.fixture
def study(tmp_path):
    # 640 features in chunks of 64: ten blocks; chunk 0/3 holds features 192..255
    cfg = SimulationConfig(design="dosage", n_samples=80, n_features=640, chunk_features=64, seed=1)
    sim = simulate(tmp_path / "x.zarr", cfg)
    return tmp_path, sim


def _chunk(sim, block: int):
    return sim.dataset.path / "X" / "c" / "0" / str(block)


def _damage(path, how: str) -> None:
    data = path.read_bytes()
    if how == "truncated":
        path.write_bytes(data[: len(data) // 2])
    elif how == "corrupt":
        path.write_bytes(np.random.default_rng(0).bytes(len(data)))
    elif how == "flipped":
        # bit rot inside the chunk: 16 bytes inverted in the middle, size and last bytes kept
        mid = len(data) // 2
        path.write_bytes(
            data[:mid] + bytes(b ^ 0xFF for b in data[mid : mid + 16]) + data[mid + 16 :]
        )
    else:
        path.unlink()


@pytest.mark.parametrize(
    ("how", "says"),
    [("truncated", "corrupt chunk"), ("corrupt", "corrupt chunk"), ("missing", "missing chunk")],
)
def test_damage_found_at_start_names_chunk_and_makes_no_run_folder(study, how, says):
    root, sim = study
    _damage(_chunk(sim, 3), how)
    out = root / "run"
    with pytest.raises(ChunkError) as err:
        screen(sim.dataset.path, sim.outcome_path, CONFIG, out)
    msg = str(err.value)
    assert msg.startswith(says)
    assert "chunk 0/3 of" in msg and str(sim.dataset.path / "X") in msg
    assert "(features 192..255)" in msg
    # refused before the run began: the chunk census of the fingerprint reads no chunk's content
    assert not out.exists()


def test_bit_rot_inside_a_chunk_stops_the_pass(study):
    root, sim = study
    _damage(_chunk(sim, 3), "flipped")
    out = root / "run"
    with pytest.raises(ChunkError) as err:
        screen(sim.dataset.path, sim.outcome_path, CONFIG, out)
    msg = str(err.value)
    assert msg.startswith("corrupt chunk 0/3 of " + str(sim.dataset.path / "X"))
    assert "(features 192..255)" in msg and "checksum" in msg
    # nothing looks complete
    assert not (out / "ranking.tsv").exists()
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"].startswith("failed: ") and "chunk 0/3" in man["status"]
    assert man["sessions"][-1]["status"] == man["status"]
    assert 3 not in RunFolder(out).done_blocks("screen")
    with pytest.raises(RunFolderError, match="not finished"):
        read_stats(RunFolder(out), "screen")
    assert not (out / ".lock").exists()  # the failed run let go of the folder


def test_swapped_chunks_are_refused(study):
    root, sim = study
    a, b = _chunk(sim, 2), _chunk(sim, 5)
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)
    with pytest.raises(ChunkError, match=r"chunk 0/2 of .* holds the data recorded for chunk 0/5"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, root / "run")


def test_repaired_store_resumes_to_the_intact_result(study):
    root, sim = study
    intact = root / "intact"
    screen(sim.dataset.path, sim.outcome_path, CONFIG, intact)
    chunk = _chunk(sim, 3)
    good, st = chunk.read_bytes(), os.stat(chunk)
    # bit rot: other bytes, same size and modification time, so the store's fingerprint is unchanged
    _damage(chunk, "flipped")
    os.utime(chunk, ns=(st.st_atime_ns, st.st_mtime_ns))
    out = root / "run"
    with pytest.raises(ChunkError):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, out)
    finished = len(RunFolder(out).done_blocks("screen"))
    assert 0 < finished < 10
    # restored from a copy as `cp -p` would: the same bytes and modification time
    chunk.write_bytes(good)
    os.utime(chunk, ns=(st.st_atime_ns, st.st_mtime_ns))
    res = screen(sim.dataset.path, sim.outcome_path, CONFIG, out)
    assert res.pass_result.blocks_reused == finished
    assert (out / "ranking.tsv").read_bytes() == (intact / "ranking.tsv").read_bytes()
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"] == "complete"
    assert [s["status"].split(":")[0] for s in man["sessions"]] == ["failed", "complete"]


def test_damaged_chunk_on_a_local_cluster(study):
    pytest.importorskip("distributed")
    root, sim = study
    _damage(_chunk(sim, 7), "flipped")
    out = root / "run"
    with pytest.raises(ChunkError, match=r"chunk 0/7 of .*\(features 448\.\.511\)"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, out, scheduler="processes:2")
    assert not (out / "ranking.tsv").exists()
    assert json.loads((out / "manifest.json").read_text())["status"].startswith("failed")


def test_cli_prints_one_line_and_fails(study):
    root, sim = study
    _damage(_chunk(sim, 3), "flipped")
    out = root / "run"
    args = ["screen", str(sim.dataset.path), "--outcome", str(sim.outcome_path)]
    args += ["--response", "y", "--out", str(out), "--quiet"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 1
    err = res.stderr if hasattr(res, "stderr") else res.output
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: corrupt chunk 0/3")
    assert "(features 192..255)" in lines[0]


def test_missing_store_is_named_and_makes_no_run_folder(tmp_path, study):
    _root, sim = study
    out = tmp_path / "run"
    with pytest.raises(StoreError, match=r"nowhere\.zarr: no such store"):
        screen(tmp_path / "nowhere.zarr", sim.outcome_path, CONFIG, out)
    assert not out.exists()
    # a store deleted after an earlier run: the rerun says so too
    screen(sim.dataset.path, sim.outcome_path, CONFIG, out)
    shutil.rmtree(sim.dataset.path)
    with pytest.raises(StoreError, match="no such store"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, out)


def test_unusable_run_folder_is_named(study):
    root, sim = study
    blocker = root / "file"
    blocker.write_text("not a folder")
    with pytest.raises(RunFolderError, match="exists and is not a folder"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, blocker)
    with pytest.raises(RunFolderError, match="cannot create the run folder"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, blocker / "run")
    # a folder with files but no manifest is not taken over
    stray = root / "stray"
    stray.mkdir()
    (stray / "notes.txt").write_text("mine")
    with pytest.raises(RunFolderError, match=r"holds files but no manifest\.json"):
        screen(sim.dataset.path, sim.outcome_path, CONFIG, stray)
    assert (stray / "notes.txt").read_text() == "mine"
