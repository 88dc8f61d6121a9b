"""The run folder: manifest, lock, per-pass statistics and block completion markers.

The layout (where each file lives) is `widescreen.schema.RunLayout`; this module holds the lock, the
manifest's reading and writing, and atomic writes.

Every file that exists is complete: JSON and tables go through `atomic_write`, and a block counts as
finished only when its marker exists, which is written after its statistics.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import socket
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..schema import TABLES, RunFolderError, RunLayout

#: Marks the temporary name of a file being written (``.NAME.tmp-PID-THREAD``).
TMP_MARK = ".tmp-"
#: Entries a run folder may hold besides temporary files: a folder holding only these (and
#: temporaries) is recognisably a run folder, which ``--restart`` may empty. The tables come from
#: the schema, so a new table joins by itself.
RUN_FOLDER_ENTRIES = frozenset(
    {"manifest.json", ".lock", ".reserve", "passes", "report.html", "figures", "traits", *TABLES}
)
#: Bytes set aside while a session runs, released to save the final manifest on a full disk.
RESERVE_BYTES = 1 << 20


def atomic_write(path: Path, data: str | bytes, *, sync: bool = True) -> None:
    """Write to a temporary name in the same folder, flush it to disk, then rename over ``path``.

    The temporary name is unique per process and thread, so two writers of the same file (a task run
    twice on a cluster) never share one. ``sync=False`` skips the flush to disk (the rename alone
    already makes the file whole or absent for any process; the flush guards against a machine crash).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}{TMP_MARK}{os.getpid()}-{threading.get_ident()}")
    mode = "wb" if isinstance(data, bytes) else "w"
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(tmp, mode) as f:
            f.write(data)
            if sync:
                f.flush()
                os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        if exc.filename is None:
            # A full disk reports ENOSPC from write() with no file name: name the file being written.
            raise OSError(exc.errno, exc.strerror or str(exc), str(path)) from exc
        raise
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def is_partial_file(name: str) -> bool:
    """Whether a file name is a temporary that a killed writer can leave (ours or zarr's)."""
    return (name.startswith(".") and TMP_MARK in name) or name.endswith(".partial")


def remove_partial_files(root: Path) -> int:
    """Remove every temporary file a killed writer left under ``root``; return how many.

    Only safe while holding the folder's lock (no other writer is alive).
    """
    n = 0
    for dirpath, _dirs, files in os.walk(root):
        for f in files:
            if is_partial_file(f):
                Path(dirpath, f).unlink(missing_ok=True)
                n += 1
    return n


def pid_alive(pid: int) -> bool:
    """Whether a process ``pid`` runs on this host (one we may not signal counts as running; so does
    a number no process can have, rather than let a garbled record free a lock)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True
    return True


@dataclass
class RunLock:
    """An exclusive lock on a run folder that a killed process does not leave stuck.

    The lock is an advisory ``flock`` on the file ``path``, which the operating system drops when its
    process ends in any way (also SIGKILL or the out-of-memory killer), so there is no stale lock to
    clear. The file records pid, host and start time, for the message another process gets. Where the
    file system has no ``flock``, the lock falls back to creating the file exclusively, and a lock
    whose process is gone (same host) is taken over.
    """

    path: Path
    _fd: int | None = field(default=None, init=False, repr=False)

    def acquire(self) -> None:
        if self._fd is not None:
            raise RunFolderError(f"{self.path.parent}: this lock is already held")
        info = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()}
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                raise self._busy() from None
            except OSError:
                os.close(fd)
                self._acquire_exclusive(info)
                return
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:
                # The holder released (and removed) the file between our open and our lock: retry.
                os.close(fd)
                continue
            os.ftruncate(fd, 0)
            os.pwrite(fd, json.dumps(info).encode(), 0)
            self._fd = fd
            return
        raise RunFolderError(f"{self.path.parent}: could not take the lock")

    def _busy(self) -> RunFolderError:
        holder = self._holder()
        who = f"pid {holder.get('pid')} on {holder.get('host')}" if holder else "another process"
        return RunFolderError(
            f"{self.path.parent}: in use by {who}; wait for it to finish or use another folder"
        )

    def _acquire_exclusive(self, info: dict) -> None:
        """Fallback without flock: O_EXCL creation, taking over a lock of a dead process."""
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._holder()
                if (
                    holder is not None
                    and holder.get("host") == info["host"]
                    and not pid_alive(int(holder.get("pid", -1)))
                ):
                    self.path.unlink(missing_ok=True)  # stale: its process was killed
                    continue
                raise self._busy() from None
            with os.fdopen(fd, "w") as f:
                json.dump(info, f)
            self._fd = -1
            return
        raise RunFolderError(f"{self.path.parent}: could not take the lock")

    def _holder(self) -> dict | None:
        try:
            return json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None

    @property
    def held(self) -> bool:
        return self._fd is not None

    def release(self) -> None:
        if self._fd is None:
            return
        fd, self._fd = self._fd, None
        # Remove the file while still holding it: a process waiting on the old file sees it is gone.
        self.path.unlink(missing_ok=True)
        if fd >= 0:
            os.close(fd)

    def __enter__(self) -> RunLock:
        self.acquire()
        return self

    def __exit__(self, *exc) -> None:
        self.release()


def run_folder_path(target: str | os.PathLike) -> Path:
    """The local folder of a run, refusing a URL.

    A `RunFolder`'s guarantees rest on an ``flock`` held for the life of the process (dropped by the
    kernel when it dies) and on atomic renames (a table, a manifest or a statistics chunk is whole or
    absent), so it is always a local or shared folder. A run folder on object storage is worked on
    in a local copy (`widescreen.engine.staged_run_folder`, which `open_session` and the CLI use).
    """
    from ..store import is_url

    if is_url(str(target)):
        raise RunFolderError(
            f"{target}: a RunFolder is a local or shared folder; a run folder on object storage is "
            "worked on through its local copy (widescreen.engine.staged_run_folder)"
        )
    return Path(target)


class RunFolder:
    """Access to one run folder. Creates it on first use."""

    def __init__(self, path: str | os.PathLike) -> None:
        self.path = run_folder_path(path)
        self.layout = RunLayout(self.path)

    @property
    def manifest_path(self) -> Path:
        return self.layout.manifest

    def lock(self) -> RunLock:
        self.path.mkdir(parents=True, exist_ok=True)
        return RunLock(self.layout.lock)

    def read_manifest(self) -> dict | None:
        if not self.manifest_path.exists():
            return None
        try:
            manifest = json.loads(self.manifest_path.read_text(encoding="utf-8"))
        except (ValueError, UnicodeDecodeError) as exc:
            raise RunFolderError(
                f"{self.manifest_path}: unreadable manifest ({exc}); --restart starts the run over"
            ) from None
        if not isinstance(manifest, dict):
            raise RunFolderError(
                f"{self.manifest_path}: not a run manifest (a JSON {type(manifest).__name__}); "
                "--restart starts the run over"
            )
        return manifest

    def foreign_entries(self) -> list[str]:
        """Names in the folder that a run does not write (temporary files aside), sorted."""
        if not self.path.is_dir():
            return []
        return sorted(
            p.name
            for p in self.path.iterdir()
            if p.name not in RUN_FOLDER_ENTRIES and not is_partial_file(p.name)
        )

    def holds_results(self) -> bool:
        """Whether the folder holds anything besides the lock, the reserve and temporary files."""
        keep = {".lock", ".reserve"}
        return any(p.name not in keep and not is_partial_file(p.name) for p in self.path.iterdir())

    def clear(self) -> None:
        """Remove everything but the lock (the caller holds it)."""
        for child in self.path.iterdir():
            if child.name == ".lock":
                continue
            if child.is_dir() and not child.is_symlink():
                shutil.rmtree(child)
            else:
                child.unlink(missing_ok=True)

    def reserve(self, size: int = RESERVE_BYTES) -> None:
        """Set ``size`` bytes aside (``.reserve``), so a full disk still leaves room for the last
        manifest save (`release_reserve` frees it first). Best effort: a file system without
        preallocation gets a file of zeros."""
        path = self.path / ".reserve"
        try:
            fd = os.open(path, os.O_WRONLY | os.O_CREAT, 0o644)
            try:
                if hasattr(os, "posix_fallocate"):
                    os.posix_fallocate(fd, 0, size)
                else:  # pragma: no cover - not on Linux
                    os.pwrite(fd, bytes(size), 0)
            finally:
                os.close(fd)
        except OSError:
            path.unlink(missing_ok=True)  # no room even for that: the run fails on its own writes

    def release_reserve(self) -> bool:
        """Free the reserved bytes; whether there were any."""
        path = self.path / ".reserve"
        existed = path.exists()
        path.unlink(missing_ok=True)
        return existed

    def write_manifest(self, manifest: dict) -> None:
        atomic_write(
            self.manifest_path,
            json.dumps(manifest, indent=2, sort_keys=True, default=_json_default),
        )

    def pass_dir(self, name: str) -> Path:
        return self.layout.pass_(name).root

    def marker(self, pass_name: str, block: int) -> Path:
        return self.layout.pass_(pass_name).marker(block)

    def done_blocks(self, pass_name: str) -> set[int]:
        return self.layout.pass_(pass_name).done_blocks()

    def write_table(self, name: str, text: str) -> Path:
        path = self.layout.table(name)
        atomic_write(path, text)
        return path


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot record {type(obj).__name__} in a manifest")


def diff_config(old: dict, new: dict, prefix: str = "") -> list[str]:
    """Human-readable differences between two recorded configurations."""
    out = []
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key, "<unset>"), new.get(key, "<unset>")
        if isinstance(a, dict) and isinstance(b, dict):
            out.extend(diff_config(a, b, f"{prefix}{key}."))
        elif a != b:
            out.append(f"{prefix}{key}: {a!r} -> {b!r}")
    return out
