"""Read feature blocks of X into reused buffers.

zarr-python allocates fresh arrays and decodes through several layers for every read; on a pass that
touches every byte once, that costs more than the arithmetic. For the codec this project writes (Blosc,
regular chunk grid, default "/" chunk keys on a local folder) the reader decodes each chunk file
straight into a buffer kept per thread. Any other store goes through zarr's own reader.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from pathlib import Path

import numcodecs.blosc as blosc
import numpy as np

from ._format import Dataset, StoreError

# Decoding runs inside Dask worker threads; Blosc's own thread pool would oversubscribe the cores.
blosc.use_threads = False


class ChunkError(StoreError):
    """A chunk file of X is missing, truncated or cannot be decoded."""


@dataclass(frozen=True)
class ChunkLayout:
    """Where the chunk files of X live and how they decode."""

    root: Path
    chunk_rows: int
    chunk_cols: int
    n_rows: int
    n_cols: int
    dtype: np.dtype
    fast: bool  # True when chunks are plain Blosc frames readable without zarr

    @classmethod
    def of(cls, ds: Dataset) -> ChunkLayout:
        meta = ds.X.metadata.to_dict()
        codecs = [
            c["name"] if isinstance(c, dict) else getattr(c, "name", "") for c in meta["codecs"]
        ]
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
        )


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


def read_block(ds: Dataset, col_chunk: int, layout: ChunkLayout | None = None) -> np.ndarray:
    """Read one column of chunks of X (all samples, the features of chunk column ``col_chunk``).

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
        return np.asarray(ds.X[:, start:stop])
    buf = _scratch((n_row_chunks * layout.chunk_rows, layout.chunk_cols), layout.dtype, "block")
    for r in range(n_row_chunks):
        path = layout.root / "c" / str(r) / str(col_chunk)
        rows = slice(r * layout.chunk_rows, (r + 1) * layout.chunk_rows)
        _decode_chunk(path, buf[rows], start, stop)
    return buf[: layout.n_rows, : stop - start]


def _decode_chunk(path: Path, out: np.ndarray, start: int, stop: int) -> None:
    where = f"chunk {path.parent.name}/{path.name} of {path.parent.parent.parent} (features {start}..{stop - 1})"
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ChunkError(f"missing {where}: the store is damaged; import it again") from None
    try:
        # Blosc header: bytes 4-8 hold the decoded size, 12-16 the frame size (little endian).
        if len(raw) < 16:
            raise ValueError(f"{len(raw)} bytes is shorter than a Blosc header")
        nbytes = int.from_bytes(raw[4:8], "little")
        cbytes = int.from_bytes(raw[12:16], "little")
        if cbytes != len(raw):
            raise ValueError(f"truncated: {len(raw)} bytes on disk, the header says {cbytes}")
        if nbytes != out.nbytes:
            raise ValueError(f"decodes to {nbytes} bytes, expected {out.nbytes}")
        blosc.decompress(raw, out)
    except Exception as exc:
        raise ChunkError(f"corrupt {where}: {exc}") from None


@dataclass(frozen=True)
class Block:
    """One feature block ready for a kernel.

    Attributes
    ----------
    start : int
        Index of the first feature in the store.
    values : ndarray of shape (n_samples, width), float64
        Missing values imputed by the feature's observed mean, then every column centred
        (so imputed entries are exactly 0).
    mean : ndarray of shape (width,)
        Observed mean of each feature before centring.
    sumsq : ndarray of shape (width,)
        Sum of squares of the centred column.
    missing_rate : ndarray of shape (width,)
    constant : ndarray of shape (width,), bool
        No variation among observed values; kernels must give such a feature score 0.
    """

    start: int
    values: np.ndarray
    mean: np.ndarray
    sumsq: np.ndarray
    missing_rate: np.ndarray
    constant: np.ndarray

    @property
    def width(self) -> int:
        return self.values.shape[1]

    @property
    def stop(self) -> int:
        return self.start + self.width


def prepare_block(raw: np.ndarray, start: int, rows: np.ndarray | None = None) -> Block:
    """Turn raw stored values into an imputed, centred float64 block.

    Parameters
    ----------
    raw : ndarray of shape (n_store_samples, width)
        int8 dosages with the -128 sentinel, or floats with NaN, for missing.
    start : int
        Store index of the first column.
    rows : ndarray of int, optional
        Samples to keep (the outcome table's join), in the order wanted; all when None.
    """
    from ._format import MISSING_INT8

    if rows is not None:
        raw = raw[rows]
    n, width = raw.shape
    x = _scratch((n, width), np.float64, "values")
    np.copyto(x, raw, casting="unsafe")
    if raw.dtype == np.int8:
        mask = raw == MISSING_INT8
    else:
        mask = np.isnan(x)
    n_missing = mask.sum(axis=0)
    any_missing = bool(n_missing.any())
    if any_missing:
        x[mask] = 0.0
    n_obs = n - n_missing
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x.sum(axis=0) / n_obs
    mean = np.where(n_obs > 0, mean, 0.0)
    x -= mean
    if any_missing:
        x[mask] = 0.0
    sumsq = np.einsum("ij,ij->j", x, x)
    # A column is constant when its spread is below rounding noise relative to its level.
    scale = np.maximum(np.abs(mean), 1.0)
    constant = (n_obs < 2) | (sumsq <= (1e-12 * scale) ** 2 * np.maximum(n_obs, 1))
    return Block(
        start=start,
        values=x,
        mean=mean,
        sumsq=sumsq,
        missing_rate=n_missing / n,
        constant=constant,
    )
