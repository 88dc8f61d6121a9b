"""Feature ids and annotations written as they arrive, and their checks with memory flat in p.

`DatasetWriter` used to hold every feature id until `finalize` (hundreds of MB at ten million
features). Here each 1-d array (``features/id``, ``features/chrom``, ``features/pos``) is written
whole chunk by whole chunk as blocks arrive (`StreamedColumn`), and the ids' checks run without
holding them: empty and unsafe ids are noted per block, duplicates are found from 64-bit hashes of the
ids (`DuplicateFinder`) that are spilled, once there are many, to bucket files sorted one at a time.
A hash match is confirmed on the ids themselves (read back by coordinate), so a hash collision never
reports a false duplicate.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import zarr

#: Entries per chunk of an id or annotation array (as written before streaming: ten million ids
#: are ten chunks, none a huge object).
ID_CHUNK = 1_048_576
#: Hash records (16 bytes each) held before they are spilled to bucket files.
SPILL_RECORDS = 1 << 20
#: Bucket files of spilled hash records (chosen by the hash's top bits).
N_BUCKETS = 64

_RECORD = np.dtype([("h", "<u8"), ("i", "<i8")])
_FNV_OFFSET = np.uint64(0xCBF29CE484222325)
_FNV_PRIME = np.uint64(0x100000001B3)


class StreamedColumn:
    """A 1-d Zarr array written in whole chunks as values arrive.

    The array is created at the first whole chunk, or by `finish` when fewer values than a chunk
    arrived: then its chunk is the whole array (``chunks`` of ``None`` for numbers: zarr's own choice),
    exactly as the array was written in one piece before.

    Parameters
    ----------
    group : zarr.Group
    name : str
        Node of the array, e.g. ``"features/id"``.
    dtype : str or numpy dtype
        ``str`` for text, else a numeric dtype.
    compressors : list
    chunk : int
        Entries per chunk.
    """

    def __init__(self, group: zarr.Group, name: str, dtype, compressors, chunk: int):
        self.group, self.name, self.dtype = group, name, dtype
        self.compressors, self.chunk = compressors, int(chunk)
        self.array: zarr.Array | None = None
        self._pending: list[np.ndarray] = []
        self._n_pending = 0
        self.n_written = 0

    @property
    def n_held(self) -> int:
        """Values held in memory, waiting for a whole chunk (always fewer than a chunk plus a block)."""
        return self._n_pending

    def add(self, values: np.ndarray) -> None:
        self._pending.append(values)
        self._n_pending += values.size
        if self._n_pending >= self.chunk:
            self._write(whole_chunks=True)

    def finish(self, n: int) -> None:
        """Write what is left; ``n`` is the total number of values (checked)."""
        if self.array is None:
            data = self._take()
            # Text as one chunk of the whole array; numbers in zarr's own chunks (as before).
            extra = {"chunks": (min(max(data.size, 1), self.chunk),)} if self.dtype is str else {}
            self.array = self.group.create_array(
                self.name, shape=data.shape, dtype=self.dtype, compressors=self.compressors, **extra
            )
            self.array[:] = data
            self.n_written = data.size
        else:
            self._write(whole_chunks=False)
        if self.n_written != n:  # pragma: no cover - the writer appends ids with every column
            raise ValueError(f"{self.name}: {self.n_written} values written for {n} features")

    def _take(self) -> np.ndarray:
        if not self._pending:
            return np.empty(0, dtype=self.dtype)
        data = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        self._pending, self._n_pending = [], 0
        return data

    def _write(self, *, whole_chunks: bool) -> None:
        data = self._take()
        take = (data.size // self.chunk) * self.chunk if whole_chunks else data.size
        if self.array is None:
            self.array = self.group.create_array(
                self.name,
                shape=(0,),
                dtype=self.dtype,
                chunks=(self.chunk,),
                compressors=self.compressors,
            )
        if take:
            start, stop = self.n_written, self.n_written + take
            self.array.resize((stop,))
            self.array[start:stop] = data[:take]
            self.n_written = stop
        rest = data[take:]
        if rest.size:
            self._pending, self._n_pending = [rest], rest.size


def hash_ids(ids: np.ndarray) -> np.ndarray:
    """64-bit hashes of text ids, vectorised over the ids (a loop over their characters).

    FNV-1a over the UTF-32 code points, skipping the NUL padding of fixed-width strings (ids hold no
    NUL), then a finaliser that spreads every bit, so equal ids hash equally whatever the array's width.
    """
    ids = np.asarray(ids)
    if ids.dtype.kind != "U":
        ids = ids.astype(str)
    width = ids.dtype.itemsize // 4
    h = np.full(ids.size, _FNV_OFFSET, dtype=np.uint64)
    if width == 0 or ids.size == 0:
        return h
    codes = np.ascontiguousarray(ids).view(np.uint32).reshape(ids.size, width)
    for k in range(width):
        c = codes[:, k].astype(np.uint64)
        h = np.where(c != 0, (h ^ c) * _FNV_PRIME, h)
    # splitmix64 finaliser
    h ^= h >> np.uint64(30)
    h *= np.uint64(0xBF58476D1CE4E5B9)
    h ^= h >> np.uint64(27)
    h *= np.uint64(0x94D049BB133111EB)
    h ^= h >> np.uint64(31)
    return h


class DuplicateFinder:
    """Find a duplicated id among ids seen block by block, holding a bounded number of hashes.

    Hash records (hash, position) stay in memory up to ``spill`` records, then go to ``N_BUCKETS``
    files under ``folder`` by their top bits; `find` sorts one bucket at a time. Memory: ``spill``
    records plus one bucket (16 x p / N_BUCKETS bytes).

    Parameters
    ----------
    folder : Path
        Where bucket files may be written (removed by `close`).
    spill : int, optional
        Records held before spilling (`SPILL_RECORDS`).
    """

    def __init__(self, folder: Path, spill: int | None = None) -> None:
        self.folder = Path(folder)
        self.spill = int(SPILL_RECORDS if spill is None else spill)
        self._held: list[np.ndarray] = []
        self._n_held = 0
        self._spilled = False
        self.n_seen = 0

    def add(self, ids: np.ndarray) -> None:
        rec = np.empty(ids.size, dtype=_RECORD)
        rec["h"] = hash_ids(ids)
        rec["i"] = np.arange(self.n_seen, self.n_seen + ids.size, dtype=np.int64)
        self.n_seen += ids.size
        self._held.append(rec)
        self._n_held += rec.size
        if self._n_held >= self.spill:
            self._spill()

    def _spill(self) -> None:
        if not self._held:
            return
        rec = np.concatenate(self._held)
        self._held, self._n_held = [], 0
        self.folder.mkdir(parents=True, exist_ok=True)
        self._spilled = True
        bucket = (rec["h"] >> np.uint64(64 - 6)).astype(np.intp)  # 6 bits: N_BUCKETS = 64
        order = np.argsort(bucket, kind="stable")
        bounds = np.searchsorted(bucket[order], np.arange(N_BUCKETS + 1))
        for b in range(N_BUCKETS):
            part = rec[order[bounds[b] : bounds[b + 1]]]
            if part.size:
                with open(self.folder / f"{b:02d}", "ab") as fh:
                    fh.write(part.tobytes())

    def _buckets(self):
        if not self._spilled:
            yield np.concatenate(self._held) if self._held else np.empty(0, _RECORD)
            return
        self._spill()
        for b in range(N_BUCKETS):
            f = self.folder / f"{b:02d}"
            if f.is_file():
                yield np.fromfile(f, dtype=_RECORD)

    def find(self, read_at) -> tuple[str, int, int] | None:
        """The duplicated id whose second occurrence comes first, with both positions, or None.

        Parameters
        ----------
        read_at : callable(positions) -> ndarray of str
            Reads the ids at sorted positions (to confirm hash matches).
        """
        best: tuple[str, int, int] | None = None
        for rec in self._buckets():
            if rec.size < 2:
                continue
            rec = rec[np.argsort(rec["h"], kind="stable")]  # positions ascend within a hash
            same = rec["h"][1:] == rec["h"][:-1]
            if not same.any():
                continue
            hit = np.zeros(rec.size, dtype=bool)
            hit[1:] |= same
            hit[:-1] |= same
            cand = rec[hit]
            pos = np.sort(cand["i"])
            ids = np.asarray(read_at(pos)).astype(str)
            order = np.argsort(ids, kind="stable")  # stable: positions ascend within an id
            srt, at = ids[order], pos[order]
            dup = np.flatnonzero(srt[1:] == srt[:-1])
            if not dup.size:
                continue  # only hash collisions
            # The second occurrence of an id is the entry right after its first in sorted order.
            starts = dup[np.r_[True, srt[dup[1:]] != srt[dup[:-1]]]]
            k = int(np.argmin(at[starts + 1]))
            first, second = int(at[starts[k]]), int(at[starts[k] + 1])
            if best is None or second < best[2]:
                best = (str(srt[starts[k]]), first, second)
        return best

    def close(self) -> None:
        self._held = []
        shutil.rmtree(self.folder, ignore_errors=True)
