"""The pass engine: block sources, Dask graphs over feature blocks, checkpoints, schedulers, top-k."""

from ._pass import (
    ENGINE_COLUMNS,
    FeatureFilter,
    PassResult,
    PassSpec,
    build_pass,
    fetch_columns,
    process_block,
    read_stats,
    run_pass,
)
from ._runfolder import RunFolder, RunFolderError, RunLock, atomic_write, diff_config
from ._scheduler import execute, n_cores
from ._source import ArraySource, BlockSource, StoreSource, as_source
from ._topk import TopK, block_topk, merge_all, merge_topk

__all__ = [
    "ENGINE_COLUMNS",
    "ArraySource",
    "BlockSource",
    "FeatureFilter",
    "PassResult",
    "PassSpec",
    "RunFolder",
    "RunFolderError",
    "RunLock",
    "StoreSource",
    "TopK",
    "as_source",
    "atomic_write",
    "block_topk",
    "build_pass",
    "diff_config",
    "execute",
    "fetch_columns",
    "merge_all",
    "merge_topk",
    "n_cores",
    "process_block",
    "read_stats",
    "run_pass",
]
