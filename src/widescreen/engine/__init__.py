"""The pass engine: block sources, Dask graphs over feature blocks, checkpoints, schedulers, top-k,
memory plans."""

from ._block import process_block, read_marker
from ._columns import Columns, read_columns
from ._lease import Lease, LeaseLost
from ._memory import (
    BASELINE_BYTES,
    BlockShape,
    MemoryBudgetError,
    MemoryPlan,
    parse_budget,
    plan_memory,
    process_baseline,
    thread_bytes,
)
from ._pass import build_pass, read_stats, run_pass
from ._reduce import add_tree, reduce_blocks, stream_combine, sum_arrays, tree_combine
from ._runfolder import (
    RESERVE_BYTES,
    RunFolder,
    RunFolderError,
    RunLock,
    atomic_write,
    diff_config,
    remove_partial_files,
    run_folder_path,
)
from ._scheduler import Executor, WorkerAccessError, execute, n_cores, open_executor
from ._source import ArraySource, BlockSource, StoreSource, as_source
from ._spec import ENGINE_COLUMNS, FeatureFilter, PassResult, PassSpec
from ._staging import StagedRun, local_copy_path, run_folder_target, staged_run_folder
from ._topk import MultiTopK, TopK, block_topk, block_topk_multi, merge_all, merge_multi, merge_topk

__all__ = [
    "BASELINE_BYTES",
    "ENGINE_COLUMNS",
    "RESERVE_BYTES",
    "ArraySource",
    "BlockShape",
    "BlockSource",
    "Columns",
    "Executor",
    "FeatureFilter",
    "Lease",
    "LeaseLost",
    "MemoryBudgetError",
    "MemoryPlan",
    "MultiTopK",
    "PassResult",
    "PassSpec",
    "RunFolder",
    "RunFolderError",
    "RunLock",
    "StagedRun",
    "StoreSource",
    "TopK",
    "WorkerAccessError",
    "add_tree",
    "as_source",
    "atomic_write",
    "block_topk",
    "block_topk_multi",
    "build_pass",
    "diff_config",
    "execute",
    "local_copy_path",
    "merge_all",
    "merge_multi",
    "merge_topk",
    "n_cores",
    "open_executor",
    "parse_budget",
    "plan_memory",
    "process_baseline",
    "process_block",
    "read_columns",
    "read_marker",
    "read_stats",
    "reduce_blocks",
    "remove_partial_files",
    "run_folder_path",
    "run_folder_target",
    "run_pass",
    "staged_run_folder",
    "stream_combine",
    "sum_arrays",
    "thread_bytes",
    "tree_combine",
]
