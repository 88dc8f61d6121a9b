"""Per-chunk checksums of a store (format version 2) and the chunk census behind the fingerprint.

Every chunk file of every array ends with the CRC-32C of the bytes before it: the Zarr v3 ``crc32c``
codec (the last codec of each array, so any Zarr v3 reader verifies it too). That catches bytes changed
inside a chunk. It cannot catch a whole chunk file moved to another position (the file checks out), so
the writer also records every chunk of X's CRC in the array ``checksums/X`` of shape (row chunks, column
chunks): a chunk whose CRC is that of another position has been swapped or copied over.

The fingerprint of a run's dataset reads no chunk: it hashes the attributes, the array metadata, the
table of CRCs and, per chunk file of every array, its size and its last four bytes (the CRC of its
content). A rewrite that keeps sizes and modification times still changes those bytes; it costs one
small read per chunk file (about 120 for 2000 x 1,000,000 int8 dosages).
"""

from __future__ import annotations

import os
from pathlib import Path

import google_crc32c
import numpy as np

#: Name of the codec (Zarr v3 core codec list) and of the array recording X's chunk checksums.
CODEC = "crc32c"
TABLE = "checksums/X"


def crc32c(data) -> int:
    """CRC-32C of a bytes-like object, as the ``crc32c`` codec computes it."""
    return int(google_crc32c.value(bytes(data) if isinstance(data, memoryview) else data))


def tail(path: Path) -> int | None:
    """The stored CRC of a checksummed chunk file (its last four bytes), or None if too short."""
    with open(path, "rb", buffering=0) as fh:
        size = os.fstat(fh.fileno()).st_size
        if size < 4:
            return None
        return int.from_bytes(os.pread(fh.fileno(), 4, size - 4), "little")


def has_checksum(array) -> bool:
    """Whether an array's last codec is the ``crc32c`` codec."""
    codecs = array.metadata.to_dict().get("codecs", [])
    return bool(codecs) and _name(codecs[-1]) == CODEC


def _name(codec) -> str:
    return codec.get("name", "") if isinstance(codec, dict) else getattr(codec, "name", "")


def chunk_files(root: Path, shape: tuple[int, ...], chunks: tuple[int, ...]) -> list[Path]:
    """Every chunk file an array of this shape and chunking has (default '/' chunk keys)."""
    grid = [max(1, -(-s // c)) if s else 0 for s, c in zip(shape, chunks, strict=True)]
    if 0 in grid:
        return []
    idx = np.indices(grid).reshape(len(grid), -1).T
    return [root.joinpath("c", *map(str, i)) for i in idx]


def table_positions(table: np.ndarray, value: int) -> list[tuple[int, int]]:
    """Positions (row chunk, column chunk) whose recorded CRC is ``value``."""
    hit = np.argwhere(table == np.uint32(value))
    return [(int(r), int(c)) for r, c in hit]
