"""Describe a dataset store: shape, storage, missing values and provenance."""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from ._format import MISSING_INT8, open_dataset
from ._location import RemotePath
from ._reader import ChunkLayout, ReadAhead, read_block


@dataclass(frozen=True)
class InspectReport:
    """What `inspect_dataset` found.

    Attributes
    ----------
    path : str
    n_samples, n_features : int
    dtype : str
    value_kind : str
        "dosage" or "continuous".
    chunks : (int, int)
        Chunk shape of X (samples, features).
    chunk_grid : (int, int)
        Number of chunks along each axis.
    codec : str
        The codec chain of X, e.g. ``bytes -> blosc(lz4, clevel=5, bitshuffle)``.
    size_bytes : int
        Sum of the sizes of all files of the store.
    missing_rate : float
        Fraction of missing entries of X (NaN, or -128 in a dosage store).
    missing_estimated : bool
        True when only ``blocks_read`` of ``n_blocks`` feature blocks were read.
    blocks_read, n_blocks : int
    format_version : int
    creator : str
    source : str
        Where the data were imported from.
    has_annotations : bool
        The store has chromosome and position per feature.
    """

    path: str
    n_samples: int
    n_features: int
    dtype: str
    value_kind: str
    chunks: tuple[int, int]
    chunk_grid: tuple[int, int]
    codec: str
    size_bytes: int
    missing_rate: float
    missing_estimated: bool
    blocks_read: int
    n_blocks: int
    format_version: int
    creator: str
    source: str
    has_annotations: bool
    integrity: str = ""

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n_samples, self.n_features)

    @property
    def raw_bytes(self) -> int:
        """Bytes of X when decoded."""
        return self.n_samples * self.n_features * np.dtype(self.dtype).itemsize

    def format(self) -> str:
        """A few aligned lines for a terminal."""
        missing = "NaN" if self.dtype != "int8" else str(MISSING_INT8)
        ratio = self.raw_bytes / self.size_bytes if self.size_bytes else float("nan")
        miss = f"{100 * self.missing_rate:.3g} %"
        if self.missing_estimated:
            miss += f" (estimated from {self.blocks_read} of {self.n_blocks} feature blocks)"
        rows = [
            ("store", self.path),
            ("shape", f"{self.n_samples:,} samples x {self.n_features:,} features"),
            ("values", f"{self.value_kind}, {self.dtype} (missing = {missing})"),
            (
                "chunks",
                f"{self.chunks[0]:,} x {self.chunks[1]:,} "
                f"({self.chunk_grid[0]} x {self.chunk_grid[1]} chunks)",
            ),
            ("codec", self.codec),
            (
                "on disk",
                f"{_human(self.size_bytes)} (decoded {_human(self.raw_bytes)}, {ratio:.2f}x)",
            ),
            ("missing", miss),
            ("annotations", "chrom, pos" if self.has_annotations else "none"),
            ("format", f"version {self.format_version}, written by {self.creator}"),
            ("source", self.source or "(not recorded)"),
            ("integrity", self.integrity),
        ]
        width = max(len(k) for k, _ in rows)
        return "\n".join(f"{k.ljust(width)}  {v}" for k, v in rows)


def _human(n: int) -> str:
    size = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if size < 1024 or unit == "TiB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    raise AssertionError("unreachable")


def _codec(meta: dict) -> str:
    parts = []
    for c in meta.get("codecs", []):
        name = c["name"] if isinstance(c, dict) else str(c)
        conf = (c.get("configuration") or {}) if isinstance(c, dict) else {}
        if name == "blosc":
            parts.append(
                f"blosc({conf.get('cname')}, clevel={conf.get('clevel')}, {conf.get('shuffle')})"
            )
        elif conf:
            parts.append(f"{name}({', '.join(f'{k}={v}' for k, v in sorted(conf.items()))})")
        else:
            parts.append(name)
    return " -> ".join(parts) or "none"


def _disk_size(path) -> int:
    if isinstance(path, RemotePath):  # the sizes of its objects, from one listing
        return sum(path.sizes([]).values()) if not path.read_only else 0
    total = 0
    for dirpath, _, files in os.walk(path):
        for f in files:
            total += os.path.getsize(os.path.join(dirpath, f))
    return total


def inspect_dataset(path: str | os.PathLike, *, sample_blocks: int | None = None) -> InspectReport:
    """Open a complete store and describe it.

    The missing rate is counted over every feature block (one chunk column of X at a time, so memory
    stays at one block); with ``sample_blocks`` only that many evenly spaced blocks are read and the
    rate is an estimate, flagged as such.

    Parameters
    ----------
    path : path
        The store folder.
    sample_blocks : int, optional
        Read at most this many feature blocks.

    Raises
    ------
    StoreError
        The path is not a complete dataset store.
    """
    ds = open_dataset(path)
    layout = ChunkLayout.of(ds)
    n_blocks = -(-ds.n_features // layout.chunk_cols)
    n_row_chunks = -(-ds.n_samples // layout.chunk_rows)
    if sample_blocks is not None and sample_blocks < 1:
        raise ValueError(f"sample_blocks must be a positive integer; got {sample_blocks!r}")
    if sample_blocks is None or sample_blocks >= n_blocks:
        chosen = np.arange(n_blocks)
    else:
        chosen = np.unique(np.linspace(0, n_blocks - 1, sample_blocks).round().astype(int))
    missing, seen = 0, 0
    # On object storage the next block is fetched while this one is counted.
    remote = isinstance(ds.path, RemotePath) and layout.fast
    ahead = ReadAhead(ds, layout, chosen, depth=1) if remote else None
    try:
        for b in chosen:
            block = read_block(ds, int(b), layout) if ahead is None else ahead.read(int(b))
            missing += int(
                np.count_nonzero(block == MISSING_INT8 if ds.dtype == np.int8 else np.isnan(block))
            )
            seen += block.size
    finally:
        if ahead is not None:
            ahead.close()
    return InspectReport(
        path=str(ds.path),
        n_samples=ds.n_samples,
        n_features=ds.n_features,
        dtype=ds.dtype.name,
        value_kind=ds.attrs.value_kind,
        chunks=(layout.chunk_rows, layout.chunk_cols),
        chunk_grid=(n_row_chunks, n_blocks),
        codec=_codec(ds.X.metadata.to_dict()),
        size_bytes=_disk_size(ds.path),
        missing_rate=missing / seen if seen else 0.0,
        missing_estimated=len(chosen) < n_blocks,
        blocks_read=len(chosen),
        n_blocks=n_blocks,
        format_version=ds.attrs.format_version,
        creator=ds.attrs.creator,
        source=ds.attrs.source,
        has_annotations=ds.has_annotations,
        integrity=(
            "CRC-32C per chunk, chunk positions recorded"
            if ds.checksummed
            else "no chunk checksums (format version 1): import again to add them"
        ),
    )
