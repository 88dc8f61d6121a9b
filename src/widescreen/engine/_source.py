"""Block sources: where a pass reads its feature blocks from.

A pass only needs to read column block ``i`` of a (samples x features) matrix; the store is one source,
an in-memory numpy or Dask array another (used by the scikit-learn estimators).
"""

from __future__ import annotations

import os
import socket
from abc import ABC, abstractmethod
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..store import (
    MISSING_INT8,
    ChunkError,
    ChunkLayout,
    Dataset,
    ReadAhead,
    RemotePath,
    StoreError,
    read_block,
)
from ._memory import BlockShape


class BlockSource(ABC):
    """A (n_samples, n_features) matrix read one block of whole columns at a time."""

    n_samples: int
    n_features: int
    block_width: int
    value_kind: str

    @property
    def n_blocks(self) -> int:
        return -(-self.n_features // self.block_width)

    def bounds(self, i: int) -> tuple[int, int]:
        start = i * self.block_width
        return start, min(start + self.block_width, self.n_features)

    @abstractmethod
    def read(self, i: int) -> np.ndarray:
        """Raw values of block ``i``: (n_samples, width), NaN or the int8 sentinel for missing."""

    def start_reads(self, order: list[int], depth: int) -> None:
        """A pass is about to read ``order`` on ``depth`` threads of this process (a hint; a source
        in memory or on a file system has nothing to do with it)."""
        return None

    def end_reads(self) -> None:
        """The pass started by `start_reads` ended (or stopped)."""
        return None

    @abstractmethod
    def token(self) -> str:
        """A fingerprint of the data, recorded by checkpoints."""

    def describe(self) -> str:
        return f"{self.n_samples} x {self.n_features} {self.value_kind}"

    @property
    def chunk_shape(self) -> tuple[int, int]:
        """(rows, features) of the unit the source decodes at once."""
        return self.n_samples, self.block_width

    @property
    def itemsize(self) -> int:
        return 8

    def block_shape(self, n_analysed: int | None = None, *, read_ahead: bool = False) -> BlockShape:
        """What one block costs to read, for `widescreen.engine.plan_memory` (``read_ahead``: the pass
        calls `start_reads`)."""
        rows, cols = self.chunk_shape
        return BlockShape(
            n_samples=self.n_samples,
            n_analysed=self.n_samples if n_analysed is None else int(n_analysed),
            chunk_rows=rows,
            chunk_cols=cols,
            itemsize=self.itemsize,
            encoded_columns=self.encoded_columns(read_ahead),
        )

    def encoded_columns(self, read_ahead: bool) -> int:
        """Whole encoded chunk columns one thread holds (0: one chunk file at a time)."""
        return 0

    def location(self) -> Path | None:
        """The folder the workers must reach, or None when the data travel with the tasks."""
        return None

    def absolute(self) -> BlockSource:
        """The same source with absolute paths, for workers whose working folder differs."""
        return self


@dataclass
class StoreSource(BlockSource):
    """A dataset store; blocks are its chunk columns, decoded into reused buffers."""

    dataset: Dataset

    def __post_init__(self) -> None:
        self.layout = ChunkLayout.of(self.dataset)
        self.n_samples = self.dataset.n_samples
        self.n_features = self.dataset.n_features
        self.block_width = self.layout.chunk_cols
        self.value_kind = self.dataset.attrs.value_kind
        self._token: str | None = None
        self._ahead: ReadAhead | None = None

    @property
    def remote(self) -> bool:
        """On object storage, read through `read_block`'s own decoder (objects fetched whole)."""
        return isinstance(self.dataset.path, RemotePath) and self.layout.fast

    def encoded_columns(self, read_ahead: bool) -> int:
        # On object storage a thread holds its block's objects while decoding them, and with reading
        # ahead the next block's too.
        return (2 if read_ahead else 1) if self.remote else 0

    def start_reads(self, order: list[int], depth: int) -> None:
        self.end_reads()
        if self.remote and depth > 0 and order:
            self._ahead = ReadAhead(self.dataset, self.layout, order, depth)

    def end_reads(self) -> None:
        ahead, self._ahead = self._ahead, None
        if ahead is not None:
            ahead.close()

    def read(self, i: int) -> np.ndarray:
        try:
            ahead = self._ahead
            if ahead is not None:
                return ahead.read(i)
            return read_block(self.dataset, i, self.layout)
        except ChunkError:
            if not self.dataset.path.is_dir():
                # Not damage: this machine does not see the store (a cluster worker elsewhere).
                raise StoreError(
                    f"{self.dataset.path}: the store is not reachable from host "
                    f"{socket.gethostname()} (pid {os.getpid()}); cluster workers must see it at "
                    "the same path"
                ) from None
            raise

    @property
    def chunk_shape(self) -> tuple[int, int]:
        return self.layout.chunk_rows, self.layout.chunk_cols

    @property
    def itemsize(self) -> int:
        return int(self.layout.dtype.itemsize)

    def location(self) -> Path | None:
        # A store on object storage is reached by URL from anywhere the credentials are.
        return self.dataset.path if isinstance(self.dataset.path, Path) else None

    def absolute(self) -> StoreSource:
        """The same source with an absolute store path (what cluster workers need)."""
        from ..store import open_dataset

        if self.dataset.path.is_absolute():
            return self
        src = StoreSource(open_dataset(self.dataset.path.resolve()))
        src._token = self._token
        return src

    def token(self) -> str:
        if self._token is None:
            self._token = self.dataset.fingerprint()
        return self._token

    def __getstate__(self) -> dict:
        # Workers reopen nothing: the Dataset handle pickles as its path and attributes. Reading ahead
        # belongs to the process that started it.
        return {**self.__dict__, "_ahead": None}

    def describe(self) -> str:
        return f"{self.dataset.path} ({super().describe()})"


@dataclass
class ArraySource(BlockSource):
    """An in-memory numpy array or a Dask array of shape (n_samples, n_features)."""

    array: object
    width: int = 4096

    def __post_init__(self) -> None:
        shape = tuple(self.array.shape)
        if len(shape) != 2:
            raise ValueError(f"X must be 2-dimensional (n_samples, n_features); got shape {shape}")
        self.n_samples, self.n_features = int(shape[0]), int(shape[1])
        chunks = getattr(self.array, "chunks", None)
        if chunks is not None and isinstance(chunks, tuple) and isinstance(chunks[1], tuple):
            self.block_width = int(max(chunks[1]))  # a Dask array: follow its column chunks
        else:
            self.block_width = int(max(1, min(self.width, self.n_features)))
        dt = np.dtype(self.array.dtype)
        self.value_kind = "dosage" if dt == np.int8 else "continuous"

    @property
    def itemsize(self) -> int:
        dt = np.dtype(self.array.dtype)
        return 8 if dt.kind == "i" and dt != np.int8 else int(dt.itemsize)

    def read(self, i: int) -> np.ndarray:
        start, stop = self.bounds(i)
        block = self.array[:, start:stop]
        if hasattr(block, "compute"):
            block = block.compute()
        block = np.asarray(block)
        if block.dtype.kind not in "fi":
            raise ValueError(f"X must be numeric; got dtype {block.dtype}")
        if block.dtype.kind == "i" and block.dtype != np.int8:
            block = block.astype(np.float64)
        return block

    def token(self) -> str:
        from dask.base import tokenize

        return tokenize(self.array)


def as_source(X) -> BlockSource:
    """A block source for a store, an opened Dataset, a numpy array or a Dask array."""
    from ..store import open_dataset

    if isinstance(X, BlockSource):
        return X
    if isinstance(X, Dataset):
        return StoreSource(X)
    if isinstance(X, str) or hasattr(X, "__fspath__"):
        return StoreSource(open_dataset(X))
    if hasattr(X, "shape") and hasattr(X, "dtype"):
        return ArraySource(X)
    raise TypeError(
        f"cannot screen an object of type {type(X).__name__}; give a store path or an array"
    )


def missing_sentinel(source: BlockSource) -> int | None:
    return MISSING_INT8 if source.value_kind == "dosage" else None
