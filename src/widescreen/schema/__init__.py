"""The run folder's schema: where things live, what its JSON records hold, the columns of its tables.

The one place the engine, the workflow and the report learn the run folder from:

- `RunLayout` / `PassLayout` / `ReduceLayout`: every path (manifest, passes, statistics chunks,
  markers, pre-pass checkpoints, tables, report).
- Typed records with ``to_dict`` / ``from_dict``: `PassMeta` (pass.json), `PassSummary`,
  `FitRecord` and `PathRecord`, `IterationRecord`, `ModelRecord`, `SessionRecord`, and
  `ManifestRecord` for the whole manifest.
- Table specs (`RANKING`, `MODEL`, `ITERATIONS`, `ENTRIES`, `STATS`): name, dtype and meaning of each
  column; `format_table` writes them, `read_table` reads them into pandas with those dtypes.
- `PassStats`: a pass's statistics by range or at coordinates; `stats_frame` joins the feature ids.

Imports only numpy here; zarr and pandas load when statistics or typed tables are read.
"""

from ._layout import PassLayout, ReduceLayout, RunFolderError, RunLayout, check_trait_name
from ._records import (
    FitRecord,
    IterationRecord,
    ManifestRecord,
    ModelRecord,
    PassMeta,
    PassSummary,
    PathRecord,
    SessionRecord,
)
from ._stats import (
    PassStats,
    create_stats,
    read_pass_meta,
    read_stats,
    read_stats_at,
    shared_record,
    stats_chunk_bytes,
    stats_frame,
)
from ._tables import (
    CV,
    ENTRIES,
    FIT_SLOT,
    ITERATION_SLOT,
    ITERATIONS,
    MODEL,
    RANKING,
    STABILITY,
    STATISTICS,
    STATISTICS_SLOT,
    STATS,
    TABLES,
    TRAITS,
    Column,
    Slot,
    TableSpec,
    format_table,
    format_value,
    pandas_dtypes,
    read_table,
    read_tsv,
    statistic_column,
    statistic_columns,
    tsv,
)

__all__ = [
    "CV",
    "ENTRIES",
    "FIT_SLOT",
    "ITERATIONS",
    "ITERATION_SLOT",
    "MODEL",
    "RANKING",
    "STABILITY",
    "STATISTICS",
    "STATISTICS_SLOT",
    "STATS",
    "TABLES",
    "TRAITS",
    "Column",
    "FitRecord",
    "IterationRecord",
    "ManifestRecord",
    "ModelRecord",
    "PassLayout",
    "PassMeta",
    "PassStats",
    "PassSummary",
    "PathRecord",
    "ReduceLayout",
    "RunFolderError",
    "RunLayout",
    "SessionRecord",
    "Slot",
    "TableSpec",
    "check_trait_name",
    "create_stats",
    "format_table",
    "format_value",
    "pandas_dtypes",
    "read_pass_meta",
    "read_stats",
    "read_stats_at",
    "read_table",
    "read_tsv",
    "shared_record",
    "statistic_column",
    "statistic_columns",
    "stats_chunk_bytes",
    "stats_frame",
    "tsv",
]
