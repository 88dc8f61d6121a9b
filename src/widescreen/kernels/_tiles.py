"""Tiles of a block and the per-thread buffers their Newton iterations reuse.

A block is worked on in tiles of columns (`TILE_BYTES`): each tile's iterations run on arrays that stay
in cache instead of streaming the whole block through memory once per array operation, and a tile's
working columns shrink as features converge (`SHRINK`).
"""

from __future__ import annotations

import threading

import numpy as np

#: Columns per tile: each tile's Newton iterations run on arrays of about this many bytes, which stay in
#: cache, instead of streaming the whole block through memory once per array operation.
TILE_BYTES = 4 * 2**20
#: A tile's working columns are copied smaller once fewer than this fraction still iterate: one copy
#: costs less than a Newton evaluation of the converged columns.
SHRINK = 0.8


def tiles(n: int, width: int, parts: int = 1) -> list[slice]:
    """Column ranges of about `TILE_BYTES` of float64 each (one empty range for an empty block).

    ``parts`` > 1 narrows the tiles for kernels that keep that many (n, c) arrays per tile.
    """
    step = max(4, TILE_BYTES // (8 * max(n, 1) * max(parts, 1)))
    return [slice(lo, min(lo + step, width)) for lo in range(0, width, step)] or [slice(0, 0)]


_local = threading.local()


class Workspace:
    """Per-thread buffers of one tile: its columns still being iterated, their squares, two scratch arrays.

    Fresh arrays of a block's size cost a page fault per 4 KiB on every use, and a whole-block array
    streams through memory once per operation; tile-sized buffers reused for every step stay in cache.
    """

    def __init__(self, n: int, tile: int):
        self.n, self.tile = n, tile
        self._flat = [np.empty(n * tile) for _ in range(4)]
        self.idx = np.arange(0)
        self.x = self.xx = self._view(0, 0)

    @classmethod
    def get(cls, n: int, tile: int) -> Workspace:
        ws = getattr(_local, "workspace", None)
        if ws is None or ws.n != n or ws.tile < tile:
            ws = _local.workspace = cls(n, tile)
        return ws

    def _view(self, i: int, c: int) -> np.ndarray:
        return self._flat[i][: self.n * c].reshape(self.n, c)

    def load(self, x: np.ndarray, square: bool) -> np.ndarray:
        """Copy a tile (n, c) of a block into the workspace, its square into `xx` if asked.

        A tile is a strided view whose rows lie a block's width apart: every pass over it would touch
        a new memory page per row. The contiguous copy costs one such pass and saves the others.
        """
        self.idx, self.x = np.arange(x.shape[1]), self._view(0, x.shape[1])
        np.copyto(self.x, x)
        self.xx = self._view(3, x.shape[1] if square else 0)
        if square:
            np.multiply(self.x, self.x, out=self.xx)
        return self.x

    def release(self) -> None:
        """Forget the current tile."""
        self.idx, self.x = np.arange(0), self._view(0, 0)

    def take(self, cols: np.ndarray) -> np.ndarray:
        """Positions of ``cols`` in `x`, after shrinking `x` when they are under `SHRINK` of it."""
        if cols.size < SHRINK * self.idx.size:
            keep = np.searchsorted(self.idx, cols)
            square = self.xx.shape[1] > 0
            kept, kept_sq = self.x[:, keep], self.xx[:, keep] if square else None
            self.idx, self.x = cols, self._view(0, cols.size)
            np.copyto(self.x, kept)
            self.xx = self._view(3, cols.size if square else 0)
            if square:
                np.copyto(self.xx, kept_sq)
        return np.searchsorted(self.idx, cols)

    def scratch(self, i: int) -> np.ndarray:
        """Scratch array ``i`` (1, 2, or 3 when no square was loaded) of the working shape (n, c)."""
        return self._view(i, self.x.shape[1])


def sum_log(a: np.ndarray) -> np.ndarray:
    """Column sums of ``log(a)`` for positive ``a`` of shape (r, m), with one log per 16 rows.

    A logarithm costs several multiplies, so rows are multiplied in groups of 16 first; a group product
    that leaves the safe range of float64 sends its column to the direct sum.
    """
    r = a.shape[0] - a.shape[0] % 16
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        out = np.log(a[r:]).sum(axis=0) if r < a.shape[0] else np.zeros(a.shape[1])
        if r:
            prod = a[:r].reshape(r // 16, 16, -1).prod(axis=1)
            bad = ~np.all((prod > 1e-290) & (prod < 1e290), axis=0)
            out += np.log(prod, out=prod).sum(axis=0)
            if bad.any():
                out[bad] = np.log(a[:, bad]).sum(axis=0)
    return out
