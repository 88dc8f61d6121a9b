"""A run folder a killed process left half-made can always be resumed or started over.

A SIGKILL during the first manifest write leaves only the lock and a temporary manifest; a corrupt
manifest is named and ``--restart`` starts over; leftover temporary files are removed on resume;
``--restart`` refuses a folder that is not a run folder; a failed last save never leaves a manifest
claiming a live run.
"""

from __future__ import annotations

import errno
import json

import pytest

from widescreen.engine import RunFolderError
from widescreen.workflow._session import RunSession, open_session

CONFIG = {"response": "y", "keep": 5}
DATA = {"path": "x.zarr", "fingerprint": "abc"}


def _open(out, restart=False):
    return open_session(out, "screen", CONFIG, DATA, restart=restart)


def test_kill_during_the_first_manifest_write_leaves_a_usable_folder(tmp_path):
    out = tmp_path / "run"
    out.mkdir()
    # what a SIGKILL inside atomic_write of the first manifest leaves: the lock and the temporary
    (out / ".lock").write_text("{}")
    (out / ".manifest.json.tmp-123-456").write_text('{"command": "scr')
    with _open(out) as s:
        assert not s.resumed
        s.finish()
    assert not list(out.glob(".*.tmp-*"))
    assert json.loads((out / "manifest.json").read_text())["status"] == "complete"


@pytest.mark.parametrize("content", ['{"command": "screen", "conf', "\xff\xfe", "[1, 2]"])
def test_corrupt_manifest_is_named_and_restart_starts_over(tmp_path, content):
    out = tmp_path / "run"
    out.mkdir()
    (out / "manifest.json").write_bytes(content.encode("latin-1"))
    (out / "passes").mkdir()
    (out / "ranking.tsv").write_text("feature\n")
    with pytest.raises(RunFolderError) as err:
        _open(out)
    msg = str(err.value)
    assert str(out / "manifest.json") in msg and "--restart" in msg and "\n" not in msg
    assert (out / "ranking.tsv").exists()  # refused: nothing touched
    with _open(out, restart=True) as s:
        assert not s.resumed
    assert not (out / "ranking.tsv").exists()
    assert json.loads((out / "manifest.json").read_text())["command"] == "screen"


def test_restart_refuses_a_folder_that_is_not_a_run_folder(tmp_path):
    out = tmp_path / "home"
    out.mkdir()
    (out / "thesis.tex").write_text("precious")
    (out / "passes").mkdir()
    with pytest.raises(RunFolderError, match=r"does not look like a run folder \(it holds thesis"):
        _open(out, restart=True)
    assert (out / "thesis.tex").read_text() == "precious"
    assert not (out / ".lock").exists()
    with pytest.raises(RunFolderError, match=r"no manifest\.json; choose an empty folder$"):
        _open(out)


def test_run_folder_without_manifest_is_restartable(tmp_path):
    out = tmp_path / "run"
    (out / "passes" / "screen").mkdir(parents=True)
    with pytest.raises(RunFolderError, match=r"no manifest\.json; .*pass --restart"):
        _open(out)
    with _open(out, restart=True):
        pass
    assert not (out / "passes").exists()


def test_leftover_temporary_files_are_removed_on_resume(tmp_path):
    out = tmp_path / "run"
    with _open(out) as s:
        s.save()
    left = [
        out / ".ranking.tsv.tmp-1-2",
        out / "passes" / "screen" / "done" / ".3.json.tmp-1-2",
        out / "passes" / "screen" / "stats" / "score" / "c" / ".3.tmp-1-2",
        out / "passes" / "screen" / "stats" / "score" / "c" / "3.partial",
    ]
    for f in left:
        f.parent.mkdir(parents=True, exist_ok=True)
        f.write_bytes(b"half")
    keep = out / "passes" / "screen" / "done" / "2.json"
    keep.write_text("{}")
    with _open(out) as s:
        assert s.resumed
    assert not any(f.exists() for f in left)
    assert keep.exists()


def test_failed_final_save_uses_the_reserve(tmp_path, monkeypatch):
    out = tmp_path / "run"
    real = RunSession.save

    def full_disk_until_reserve_is_freed(self):
        if (out / ".reserve").exists():
            raise OSError(errno.ENOSPC, "No space left on device", str(out / "manifest.json"))
        real(self)

    s = _open(out)
    assert (out / ".reserve").stat().st_size >= 1 << 20
    monkeypatch.setattr(RunSession, "save", full_disk_until_reserve_is_freed)
    with pytest.raises(OSError), s:
        s.finish()  # the last save fails with a full disk
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"].startswith("failed: ") and "No space left" in man["status"]
    assert not (out / ".reserve").exists() and not (out / ".lock").exists()


def test_manifest_never_left_running_when_no_save_succeeds(tmp_path, monkeypatch):
    out = tmp_path / "run"
    s = _open(out)

    def no_save(self):
        raise OSError(errno.EIO, "Input/output error")

    monkeypatch.setattr(RunSession, "save", no_save)
    with pytest.raises(KeyboardInterrupt), s:
        raise KeyboardInterrupt
    man = json.loads((out / "manifest.json").read_text())
    assert man["status"] == "stopped"
    # and the next session resumes it, marking the killed one interrupted
    monkeypatch.undo()
    with _open(out) as s2:
        assert s2.resumed
        assert s2.manifest["sessions"][0]["status"] == "interrupted"


def test_full_disk_error_names_the_file(tmp_path, monkeypatch):
    from widescreen.engine import atomic_write

    target = tmp_path / "t.json"
    real_open = open

    class Full:
        def __init__(self, *a, **k):
            self.f = real_open(*a, **k)

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.f.close()

        def write(self, data):
            raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr("builtins.open", Full)
    with pytest.raises(OSError) as err:
        atomic_write(target, "x")
    monkeypatch.undo()
    assert str(target) in str(err.value) and "No space left" in str(err.value)
    assert not list(tmp_path.iterdir())  # no temporary left


def test_truncated_statistics_chunk_is_named_and_recomputed(tmp_path, rng):
    import numpy as np

    from widescreen.engine import RunFolder, read_stats
    from widescreen.workflow import ScreenConfig, screen

    from .conftest import write_outcome, write_store

    X = rng.integers(0, 3, (40, 64)).astype(np.int8)
    ids = [f"s{i}" for i in range(40)]
    ds = write_store(tmp_path / "x.zarr", X, chunk_features=16, sample_ids=ids)
    outcome = write_outcome(tmp_path / "y.tsv", ids, {"y": X[:, 3] + rng.standard_normal(40)})
    out = tmp_path / "run"
    screen(ds.path, outcome, ScreenConfig(response="y"), out)
    want = read_stats(RunFolder(out), "screen")
    chunk = out / "passes" / "screen" / "stats" / "correlation" / "c" / "2"
    chunk.write_bytes(chunk.read_bytes()[:40])  # what a machine crash can leave
    with pytest.raises(RunFolderError, match=r"stats/correlation: cannot be read .*rerun"):
        read_stats(RunFolder(out), "screen")
    res = screen(ds.path, outcome, ScreenConfig(response="y"), out)
    assert (res.pass_result.blocks_reused, res.pass_result.blocks_computed) == (3, 1)
    got = read_stats(RunFolder(out), "screen")
    for c in want:
        assert got[c].tobytes() == want[c].tobytes(), c
