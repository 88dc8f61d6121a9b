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
import socket
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..schema import RunFolderError, RunLayout


def atomic_write(path: Path, data: str | bytes, *, sync: bool = True) -> None:
    """Write to a temporary name in the same folder, flush it to disk, then rename over ``path``.

    The temporary name is unique per process and thread, so two writers of the same file (a task run
    twice on a cluster) never share one. ``sync=False`` skips the flush to disk (the rename alone
    already makes the file whole or absent for any process; the flush guards against a machine crash).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}-{threading.get_ident()}")
    mode = "wb" if isinstance(data, bytes) else "w"
    try:
        with open(tmp, mode) as f:
            f.write(data)
            if sync:
                f.flush()
                os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
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
                    and not _pid_alive(int(holder.get("pid", -1)))
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


class RunFolder:
    """Access to one run folder. Creates it on first use."""

    def __init__(self, path: str | os.PathLike) -> None:
        self.path = Path(path)
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
            return json.loads(self.manifest_path.read_text())
        except ValueError as exc:
            raise RunFolderError(f"{self.manifest_path}: unreadable manifest: {exc}") from None

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
