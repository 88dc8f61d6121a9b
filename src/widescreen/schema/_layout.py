"""Where everything lives in a run folder.

Layout::

    RUN/
      manifest.json                 config, dataset fingerprint, versions, sessions, passes, iterations
      .lock                         flock-ed while a process works on the folder
      passes/NAME/pass.json         the pass's input token, statistic names and block plan (`PassMeta`)
      passes/NAME/stats/            Zarr v3 group: one (n_features,) float64 array per statistic,
                                    one uncompressed chunk per block, element j = the store's feature j
      passes/NAME/stats/COL/c/BLOCK the chunk file of one block of one statistic
      passes/NAME/stats/COL/c/BLOCK/0  the same of a statistic of K responses (a response-matrix
                                    pass: arrays of shape (n_features, K), one chunk per block)
      passes/NAME/done/BLOCK.json   completion marker of one block (`BlockMarker`), after its statistics
      passes/NAME/done/BLOCK.kept.npz  stored values of the block's top-k columns, before the marker
      passes/PASS-PRE/              checkpoints of a family's pre-pass (a tree reduction, `ReduceLayout`):
                                    reduce.json (its inputs), G.npy per finished group, result.npy
      ranking.tsv, model.tsv, iterations.tsv, entries.tsv   the tables (`widescreen.schema.TABLES`)
      report.html, figures/NAME.png the report

    Several traits (``--response a,b,c``) in one run folder:

      passes/screen/                the one pass over the store for all K traits (statistics of
                                    shape (n_features, K), column k = trait k)
      traits.tsv                    one row per trait (`widescreen.schema.TRAITS`)
      traits/NAME/                  a run folder per trait: manifest.json, ranking.tsv (and for run
                                    model.tsv, iterations.tsv, entries.tsv, its own passes iter1, ...,
                                    report.html)
      traits/NAME/passes/screen/shared.json   its screening pass is the shared one: {"run": the
                                    folder holding it, relative ("../.."), "response": its column}

Only this module spells these paths; the engine, the workflow and the report ask it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path


class RunFolderError(RuntimeError):
    """The run folder cannot be used as asked: held by another process, made by another config, or
    missing what was asked of it (the message names the folder or file)."""


@dataclass(frozen=True)
class PassLayout:
    """The folder of one pass (``RUN/passes/NAME``); also what a block task on a worker is given."""

    root: Path

    @property
    def meta(self) -> Path:
        return self.root / "pass.json"

    @property
    def stats(self) -> Path:
        return self.root / "stats"

    @property
    def done(self) -> Path:
        return self.root / "done"

    def stats_chunk(self, column: str, block: int, wide: bool = False) -> Path:
        """File of one block's chunk of a statistic (arrays are made with '/'-separated chunk keys;
        ``wide``: a statistic of shape (n_features, K), whose chunks are (block, K))."""
        path = self.stats / column / "c" / str(block)
        return path / "0" if wide else path

    def marker(self, block: int) -> Path:
        return self.done / f"{block}.json"

    def kept(self, block: int) -> Path:
        return self.done / f"{block}.kept.npz"

    @property
    def shared(self) -> Path:
        """``shared.json``: this pass is column ``response`` of another run folder's pass."""
        return self.root / "shared.json"

    def done_blocks(self) -> set[int]:
        if not self.done.is_dir():
            return set()
        return {int(p.stem) for p in self.done.glob("*.json") if p.stem.isdigit()}

    def has_stats(self) -> bool:
        return (self.stats / "zarr.json").is_file()


@dataclass(frozen=True)
class ReduceLayout:
    """The checkpoint folder of a tree reduction over blocks (for example HOLP's Gram pre-pass)."""

    root: Path

    @property
    def meta(self) -> Path:
        return self.root / "reduce.json"

    def group(self, g: int) -> Path:
        """The combined record of one finished group of blocks."""
        return self.root / f"{g}.npy"

    @property
    def result(self) -> Path:
        return self.root / "result.npy"


@dataclass(frozen=True)
class RunLayout:
    """The paths of a run folder."""

    root: Path

    def __init__(self, root: str | os.PathLike) -> None:
        object.__setattr__(self, "root", Path(root))

    @property
    def manifest(self) -> Path:
        return self.root / "manifest.json"

    @property
    def lock(self) -> Path:
        return self.root / ".lock"

    @property
    def passes(self) -> Path:
        return self.root / "passes"

    def pass_(self, name: str) -> PassLayout:
        return PassLayout(self.passes / name)

    def reduction(self, name: str) -> ReduceLayout:
        return ReduceLayout(self.passes / name)

    def table(self, file: str) -> Path:
        return self.root / file

    @property
    def figures(self) -> Path:
        return self.root / "figures"

    def figure(self, name: str) -> Path:
        return self.figures / f"{name}.png"

    @property
    def report(self) -> Path:
        return self.root / "report.html"

    @property
    def traits(self) -> Path:
        """The folder of the per-trait run folders (several traits in one run)."""
        return self.root / "traits"

    def trait(self, name: str) -> Path:
        """The run folder of one trait (``traits/NAME``); names are checked by `check_trait_name`."""
        return self.traits / check_trait_name(name)

    def pass_names(self) -> list[str]:
        """Passes that hold a statistics group (or share another folder's), sorted by name."""
        if not self.passes.is_dir():
            return []
        return sorted(
            p.name
            for p in self.passes.iterdir()
            if PassLayout(p).has_stats() or PassLayout(p).shared.is_file()
        )


def check_trait_name(name: str) -> str:
    """A trait's name as a folder name: refuse one that is empty, hidden or holds a path separator."""
    if not name or name.startswith(".") or "/" in name or "\\" in name or "\0" in name:
        raise ValueError(
            f"trait {name!r} cannot name a folder (empty, starting with '.', or holding '/' or "
            "'\\'); rename the column of the outcome table"
        )
    return name


__all__ = ["PassLayout", "ReduceLayout", "RunFolderError", "RunLayout", "check_trait_name"]
