"""Read feature blocks of X into reused buffers.

zarr-python allocates fresh arrays and decodes through several layers for every read; on a pass that
touches every byte once, that costs more than the arithmetic. For the codec this project writes (Blosc,
regular chunk grid, default "/" chunk keys on a local folder) the reader decodes each chunk file
straight into a buffer kept per thread. Any other store goes through zarr's own reader.

On object storage (a store given by URL, see `_location`) the same decoding applies: the row chunks of
a chunk column are requested together (fsspec's concurrent ``cat``), each object's bytes verified
(CRC-32C, position) and decoded into the thread's reused buffer. A pass reads through `ReadAhead`:
while a thread computes a block, the objects of the next block in the scheduler's order are already
in flight (at most one block ahead per worker thread).
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numcodecs.blosc as blosc
import numpy as np

from . import _accel, _checksum
from ._format import MISSING_INT8, ChunkError, Dataset
from ._location import PendingObjects, RemotePath, describe_error

# Decoding runs inside Dask worker threads; Blosc's own thread pool would oversubscribe the cores.
blosc.use_threads = False


@dataclass(frozen=True)
class ChunkLayout:
    """Where the chunk files of X live and how they decode."""

    root: Path | RemotePath
    chunk_rows: int
    chunk_cols: int
    n_rows: int
    n_cols: int
    dtype: np.dtype
    fast: bool  # True when chunks are plain Blosc frames readable without zarr
    checksummed: bool = False  # each chunk file ends with the CRC-32C of the frame before it
    dosage: bool = False  # values must be 0, 1, 2 or the missing sentinel
    checksums: np.ndarray | None = field(default=None, repr=False)  # recorded CRC per chunk

    @classmethod
    def of(cls, ds: Dataset) -> ChunkLayout:
        meta = ds.X.metadata.to_dict()
        codecs = [
            c["name"] if isinstance(c, dict) else getattr(c, "name", "") for c in meta["codecs"]
        ]
        checksummed = bool(codecs) and codecs[-1] == _checksum.CODEC
        if checksummed:
            codecs = codecs[:-1]
        key = meta.get("chunk_key_encoding", {})
        key_name = key.get("name") if isinstance(key, dict) else getattr(key, "name", "")
        sep = (
            (key.get("configuration", {}) or {}).get("separator", "/")
            if isinstance(key, dict)
            else "/"
        )
        fast = codecs == ["bytes", "blosc"] and key_name == "default" and sep == "/"
        rows, cols = ds.X.chunks
        return cls(
            root=ds.path / "X",
            chunk_rows=int(rows),
            chunk_cols=int(cols),
            n_rows=ds.n_samples,
            n_cols=ds.n_features,
            dtype=ds.dtype,
            fast=fast,
            checksummed=checksummed,
            # int8 counts only: imputed (float32) dosages take any value from 0 to the ploidy
            dosage=ds.attrs.value_kind == "dosage" and ds.dtype == np.int8,
            checksums=ds.checksum_table() if checksummed else None,
        )

    def where(self, r: int, c: int) -> str:
        start = c * self.chunk_cols
        stop = min(start + self.chunk_cols, self.n_cols)
        return f"chunk {r}/{c} of {self.root} (features {start}..{stop - 1})"


_local = threading.local()


def _scratch(shape: tuple[int, int], dtype: np.dtype, name: str) -> np.ndarray:
    """A per-thread buffer reused across blocks of the same shape."""
    key = (name, shape, np.dtype(dtype).str)
    bufs = getattr(_local, "bufs", None)
    if bufs is None:
        bufs = _local.bufs = {}
    buf = bufs.get(key)
    if buf is None:
        # One buffer per name per thread: drop any of another shape first to keep memory bounded.
        for k in [k for k in bufs if k[0] == name]:
            del bufs[k]
        buf = bufs[key] = np.empty(shape, dtype=dtype)
    return buf


def _claim(shape: tuple[int, int], dtype, name: str) -> tuple[np.ndarray, tuple[int, int]]:
    """A per-thread buffer and a claim on it that is void once another block takes the buffer."""
    buf = _scratch(shape, dtype, name)
    counters = getattr(_local, "claims", None)
    if counters is None:
        counters = _local.claims = {}
    counters[name] = counters.get(name, 0) + 1
    return buf, (threading.get_ident(), counters[name])


def _claim_valid(claim: tuple[int, int], name: str) -> bool:
    counters = getattr(_local, "claims", None) or {}
    return claim == (threading.get_ident(), counters.get(name, 0))


def _claim_values(shape: tuple[int, int]) -> tuple[np.ndarray, tuple[int, int]]:
    return _claim(shape, np.float64, "values")


def _source_buffer(size: int) -> memoryview:
    """A per-thread byte buffer of at least ``size`` bytes for the compressed chunk file."""
    buf = getattr(_local, "src", None)
    if buf is None or len(buf) < size:
        buf = _local.src = bytearray(max(size, int(1.25 * len(buf or b""))))
    return memoryview(buf)[:size]


def read_block(
    ds: Dataset,
    col_chunk: int,
    layout: ChunkLayout | None = None,
    *,
    pending: PendingObjects | None = None,
) -> np.ndarray:
    """Read one column of chunks of X (all samples, the features of chunk column ``col_chunk``).

    Parameters
    ----------
    ds : Dataset
    col_chunk : int
    layout : ChunkLayout, optional
    pending : PendingObjects, optional
        The chunk column's objects already requested (`chunk_objects`; a store on object storage).

    Returns
    -------
    ndarray of shape (n_samples, width), the store's dtype
        A view of a per-thread buffer: valid until the same thread reads its next block.
    """
    layout = layout or ChunkLayout.of(ds)
    start = col_chunk * layout.chunk_cols
    if start >= layout.n_cols or col_chunk < 0:
        raise IndexError(f"chunk column {col_chunk} is outside X")
    stop = min(start + layout.chunk_cols, layout.n_cols)
    n_row_chunks = -(-layout.n_rows // layout.chunk_rows)
    if not layout.fast:
        try:
            block = np.asarray(ds.X[:, start:stop])
        except Exception as exc:  # zarr's own reader: a checksum mismatch, a bad frame, ...
            raise ChunkError(
                f"corrupt chunk column {col_chunk} of {layout.root} (features {start}..{stop - 1}): "
                f"{exc}"
            ) from None
        if layout.dosage:
            _check_dosages(block, layout, 0, col_chunk, 0)
        return block
    # zarr stores edge chunks at the full chunk shape, so every chunk decodes to the same size.
    buf = _scratch((n_row_chunks * layout.chunk_rows, layout.chunk_cols), layout.dtype, "block")
    paths = [layout.root / "c" / str(r) / str(col_chunk) for r in range(n_row_chunks)]
    fetched = None
    if isinstance(layout.root, RemotePath):
        got = pending.result() if pending is not None else paths[0].cat_many(paths)
        fetched = _check_objects(got, paths, layout, col_chunk)
    for r in range(n_row_chunks):
        rows = slice(r * layout.chunk_rows, (r + 1) * layout.chunk_rows)
        if fetched is None:
            _decode_chunk(paths[r], buf[rows], layout, r, col_chunk)
        else:
            data = memoryview(fetched[r])
            _decode_frame(data, len(data), buf[rows], layout, r, col_chunk)
        if layout.dosage:
            _check_dosages(buf[rows], layout, r, col_chunk, r * layout.chunk_rows)
    return buf[: layout.n_rows, : stop - start]


def _check_dosages(values: np.ndarray, layout: ChunkLayout, r: int, c: int, row0: int) -> None:
    """Refuse a decoded dosage chunk holding anything but 0, 1, 2 and the missing sentinel.

    Such values cannot come from an import: the chunk is damaged (or was written by another program).
    """
    bad = _accel.count_invalid_dosages(values)
    if not bad:
        return
    i, j = np.argwhere(~np.isin(values, (0, 1, 2, MISSING_INT8)))[0]
    raise ChunkError(
        f"damaged {layout.where(r, c)}: {bad} value(s) that are not dosages (0, 1, 2 or missing), "
        f"first {int(values[i, j])} at sample {row0 + int(i)}, feature {c * layout.chunk_cols + int(j)}"
    )


def chunk_objects(layout: ChunkLayout, col_chunk: int) -> PendingObjects:
    """Request the objects of a chunk column of a store on object storage, for `read_block` later."""
    n_row_chunks = -(-layout.n_rows // layout.chunk_rows)
    paths = [layout.root / "c" / str(r) / str(col_chunk) for r in range(n_row_chunks)]
    return paths[0].cat_many_later(paths)


class ReadAhead:
    """Chunk columns of a store on object storage requested before a worker thread asks for them.

    A pass gives the blocks it will read in the order it is likely to read them (``order``) and its
    number of worker threads (``depth``). Reading a block takes its objects if they were requested
    already (else requests them first), then requests the next blocks of the order not yet requested
    while fewer than ``depth`` are held ahead: at most one block ahead per worker thread, so a thread's
    next block is in flight while it computes the current one. Only the encoded bytes are held ahead
    (at most ``depth`` chunk columns of them, counted in the memory plan); each thread still verifies
    and decodes its block into its own reused buffers, so the values are those of `read_block`.
    """

    def __init__(self, ds: Dataset, layout: ChunkLayout, order, depth: int) -> None:
        if not isinstance(layout.root, RemotePath) or not layout.fast:
            raise ValueError("reading ahead is for stores on object storage in the fast format")
        self.ds = ds
        self.layout = layout
        self.depth = max(0, int(depth))
        self._order = [int(c) for c in order]
        self._next = 0  # position in the order of the next block that may be requested ahead
        self._requested: set[int] = set()
        self._ahead: dict[int, PendingObjects] = {}
        self._lock = threading.Lock()
        self._closed = False
        self.reads = self.hits = 0  # blocks read, and those among them that were requested ahead

    def read(self, col_chunk: int) -> np.ndarray:
        """`read_block` of ``col_chunk`` (the same view of the thread's reused buffer)."""
        with self._lock:
            pending = self._ahead.pop(col_chunk, None)
            self.reads += 1
            self.hits += pending is not None
            if pending is None:  # not guessed: requested before the blocks ahead, waited for first
                pending = chunk_objects(self.layout, col_chunk)
                self._requested.add(col_chunk)
            self._fill()
        return read_block(self.ds, col_chunk, self.layout, pending=pending)

    def _fill(self) -> None:
        while not self._closed and len(self._ahead) < self.depth and self._next < len(self._order):
            c = self._order[self._next]
            self._next += 1
            if c not in self._requested:
                self._requested.add(c)
                self._ahead[c] = chunk_objects(self.layout, c)

    @property
    def held(self) -> int:
        """Chunk columns requested ahead and not yet read."""
        return len(self._ahead)

    def close(self) -> None:
        """Stop the requests ahead and drop their bytes (the pass ended, or stopped early)."""
        with self._lock:
            self._closed = True
            for pending in self._ahead.values():
                pending.cancel()
            self._ahead.clear()


def _check_objects(
    got: list[bytes | BaseException], paths: list[RemotePath], layout: ChunkLayout, c: int
) -> list[bytes]:
    """The bytes of each chunk object of a chunk column, or the error naming the first unreadable."""
    for r, item in enumerate(got):
        if isinstance(item, FileNotFoundError):
            raise ChunkError(f"missing {layout.where(r, c)}: the store is damaged; import it again")
        if isinstance(item, BaseException):
            err = describe_error(item, paths[r])
            if err is not None:  # credentials, bucket, access, network: not damage
                raise err from None
            raise ChunkError(f"{layout.where(r, c)} cannot be read: {item}") from None
    return got


def _decode_chunk(path: Path, out: np.ndarray, layout: ChunkLayout, r: int, c: int) -> None:
    where = layout.where(r, c)
    try:
        # Read into a reused buffer: a fresh bytes object per chunk costs an allocation and page faults.
        with open(path, "rb", buffering=0) as fh:
            size = os.fstat(fh.fileno()).st_size
            raw = _source_buffer(size)
            got = fh.readinto(raw)
    except FileNotFoundError:
        raise ChunkError(f"missing {where}: the store is damaged; import it again") from None
    _decode_frame(raw, got, out, layout, r, c)


def _decode_frame(
    raw: memoryview, got: int, out: np.ndarray, layout: ChunkLayout, r: int, c: int
) -> None:
    """Verify a chunk's bytes (checksum, position, Blosc header) and decode them into ``out``."""
    where = layout.where(r, c)
    try:
        # Blosc header: bytes 4-8 hold the decoded size, 12-16 the frame size (little endian).
        if layout.checksummed:
            got = _verify_checksum(raw, got, layout, r, c)
        if got < 16:
            raise ValueError(f"{got} bytes is shorter than a Blosc header")
        nbytes = int.from_bytes(raw[4:8], "little")
        cbytes = int.from_bytes(raw[12:16], "little")
        if cbytes != got:
            raise ValueError(f"truncated: {got} bytes on disk, the header says {cbytes}")
        if nbytes != out.nbytes:
            raise ValueError(f"decodes to {nbytes} bytes, expected {out.nbytes}")
        blosc.decompress(raw[:got], out)
    except ChunkError:
        raise
    except Exception as exc:
        raise ChunkError(f"corrupt {where}: {exc}") from None


def _verify_checksum(raw: memoryview, got: int, layout: ChunkLayout, r: int, c: int) -> int:
    """Check a chunk file's CRC-32C (its last four bytes) and its position; return the frame size."""
    if got < 20:
        raise ValueError(f"{got} bytes is shorter than a Blosc header and a checksum")
    cbytes = int.from_bytes(raw[12:16], "little")
    if cbytes + 4 != got:
        raise ValueError(f"truncated: {got} bytes on disk, the header says {cbytes} + 4")
    stored = int.from_bytes(raw[got - 4 : got], "little")
    if _checksum.crc32c(raw[: got - 4]) != stored:
        raise ChunkError(
            f"corrupt {layout.where(r, c)}: its bytes do not match its CRC-32C checksum (changed "
            "on disk: bit rot or a partial write); the store is damaged: import it again"
        )
    table = layout.checksums
    if table is not None and r < table.shape[0] and c < table.shape[1] and table[r, c] != stored:
        others = _checksum.table_positions(table, stored)
        what = (
            f"holds the data of chunk {others[0][0]}/{others[0][1]} (chunks were moved or swapped)"
            if others
            else "is not the chunk written at import (its checksum differs from the recorded one)"
        )
        raise ChunkError(f"damaged {layout.where(r, c)}: it {what}; import the store again")
    return got - 4


@dataclass(frozen=True, eq=False)
class Block:
    """One feature block ready for a kernel.

    The per-feature summaries are computed when the block is made; the float64 values only when asked
    for (`values`), since a kernel that needs cross-products alone gets them from `cross` straight from
    the stored values.

    Attributes
    ----------
    start : int
        Index of the first feature in the store.
    mean : ndarray of shape (width,)
        Observed mean of each feature before centring.
    sumsq : ndarray of shape (width,)
        Sum of squares of the centred column (imputed entries contribute 0).
    missing_rate : ndarray of shape (width,)
    constant : ndarray of shape (width,), bool
        No variation among observed values; kernels must give such a feature score 0.
    raw : ndarray of shape (n_samples, width)
        The stored values of the analysed samples (int8 with the -128 sentinel, or floats with NaN).
        A view of a per-thread buffer, like `values`.
    n_missing : ndarray of shape (width,), int64

    A block lives as long as the buffers behind it: until the same thread reads its next chunk or
    prepares its next block. Asking a stale block for values raises rather than answering wrongly.
    """

    start: int
    mean: np.ndarray
    sumsq: np.ndarray
    missing_rate: np.ndarray
    constant: np.ndarray
    raw: np.ndarray = field(repr=False)
    n_missing: np.ndarray = field(repr=False)
    _memo: dict = field(default_factory=dict, repr=False)

    @property
    def width(self) -> int:
        return self.mean.shape[0]

    @property
    def n_samples(self) -> int:
        return self.raw.shape[0]

    @property
    def stop(self) -> int:
        return self.start + self.width

    @property
    def any_missing(self) -> bool:
        return bool(self.n_missing.any())

    @property
    def values(self) -> np.ndarray:
        """ndarray of shape (n_samples, width), float64: missing values imputed by the feature's
        observed mean, then every column centred (so imputed entries are exactly 0).

        A per-thread reused buffer: valid until the same thread prepares its next block's values.
        """
        x = self._cached_values()
        if x is None:
            self._check_raw()
            x, claim = _claim_values(self.raw.shape)
            _accel.centre_into(self.raw, self.mean, x)
            self._memo["values"] = (x, claim)
        return x

    def _cached_values(self) -> np.ndarray | None:
        held = self._memo.get("values")
        # The buffer is shared by the thread's blocks: use it only if no later block has taken it.
        return held[0] if held is not None and _claim_valid(held[1], "values") else None

    def _check_raw(self) -> None:
        held = self._memo.get("raw")
        if held is not None and not _claim_valid(held, "rows"):
            raise RuntimeError(
                f"block at feature {self.start}: its stored values were a per-thread copy that a "
                "later block on this thread has overwritten; use a block before preparing the next"
            )

    def cross(self, lhs_t: np.ndarray) -> np.ndarray:
        """``lhs_t @ values`` of shape (m, width), computed without writing the values out.

        Parameters
        ----------
        lhs_t : ndarray of shape (m, n_samples), float64
        """
        lhs_t = np.ascontiguousarray(lhs_t, dtype=np.float64)
        if lhs_t.ndim != 2 or lhs_t.shape[1] != self.n_samples:
            raise ValueError(
                f"block at feature {self.start} has {self.n_samples} samples; "
                f"the left factor has shape {lhs_t.shape}"
            )
        x = self._cached_values()
        if x is not None:
            return lhs_t @ x
        self._check_raw()
        tile = _scratch((self.n_samples, _accel.TILE), np.float64, "tile")
        return _accel.cross(self.raw, self.mean, lhs_t, self.any_missing, tile)

    def columns(self, index: np.ndarray) -> np.ndarray:
        """Imputed, centred float64 values of the given columns, of shape (n_samples, len(index)).

        A new array (not a per-thread buffer), element for element equal to ``values[:, index]``.
        """
        index = np.asarray(index, dtype=np.intp)
        self._check_raw()
        # np.take gathers columns several times faster than fancy indexing; the result is converted
        # and centred straight into the Fortran-ordered output.
        src = np.take(self.raw, index, axis=1)
        out = np.empty(src.shape, np.float64, order="F")
        np.copyto(out, src, casting="unsafe")
        out -= self.mean[index]
        missing = src == MISSING_INT8 if src.dtype == np.int8 else np.isnan(src)
        if missing.any():
            out[missing] = 0.0
        return out


def prepare_block(raw: np.ndarray, start: int, rows: np.ndarray | None = None) -> Block:
    """Summarise raw stored values into a `Block`: missing rate, observed mean, centred sum of squares.

    Parameters
    ----------
    raw : ndarray of shape (n_store_samples, width)
        int8 dosages with the -128 sentinel, or floats with NaN, for missing.
    start : int
        Store index of the first column.
    rows : ndarray of int, optional
        Samples to keep (the outcome table's join), in the order wanted; all when None.
    """
    raw = np.asarray(raw)
    if raw.ndim != 2:
        raise ValueError(
            f"a block must be 2-dimensional (samples, features); got shape {raw.shape}"
        )
    if raw.dtype != np.int8 and raw.dtype not in (np.float32, np.float64):
        if raw.dtype.kind not in "biuf":
            raise ValueError(f"block at feature {start}: values must be numeric, not {raw.dtype}")
        raw = raw.astype(np.float64)
    raw_claim = None
    if rows is not None:
        rows = np.asarray(rows, dtype=np.intp)
        if rows.size and (rows.min() < 0 or rows.max() >= raw.shape[0]):
            raise IndexError(f"block at feature {start}: sample rows outside 0..{raw.shape[0] - 1}")
        sel, raw_claim = _claim((rows.size, raw.shape[1]), raw.dtype, "rows")
        raw = np.take(raw, rows, axis=0, out=sel, mode="clip")
    elif raw.dtype != np.int8 and not raw.flags.c_contiguous:
        # A float sub-block sliced from a chunk has rows of a few KiB at a stride of a power of two:
        # streaming such rows runs at a third of the speed of contiguous ones, and the block is read
        # twice more (moments, cross-products), so one contiguous copy pays for itself.
        sel, raw_claim = _claim(raw.shape, raw.dtype, "rows")
        np.copyto(sel, raw)
        raw = sel
    n = raw.shape[0]
    memo: dict = {} if raw_claim is None else {"raw": raw_claim}
    # The numpy route for floats computes the centred values on the way: keep them.
    values, claim = (
        (None, None) if raw.dtype == np.int8 or _accel.use_numba else _claim_values(raw.shape)
    )
    n_missing, mean, sumsq, exact_zero, filled = _accel.moments(raw, values)
    if filled:
        memo["values"] = (values, claim)
    n_obs = n - n_missing
    if raw.dtype == np.int8:
        constant = exact_zero | (n_obs < 2)
    else:
        # A column is constant when its spread is below rounding noise relative to its level.
        scale = np.maximum(np.abs(mean), 1.0)
        constant = (n_obs < 2) | (sumsq <= (1e-12 * scale) ** 2 * np.maximum(n_obs, 1))
    return Block(
        start=start,
        mean=mean,
        sumsq=sumsq,
        missing_rate=n_missing / max(n, 1),
        constant=constant,
        raw=raw,
        n_missing=n_missing,
        _memo=memo,
    )
