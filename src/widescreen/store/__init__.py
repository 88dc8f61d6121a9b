"""The dataset store: on-disk format, block reader and ingest converters."""

from ._format import (
    FORMAT_VERSION,
    MISSING_INT8,
    Dataset,
    DatasetWriter,
    FormatAttributes,
    StoreError,
    default_chunks,
    default_codec,
    open_dataset,
)
from ._outcome import (
    JoinedOutcome,
    OutcomeError,
    OutcomeTable,
    join_outcome,
    read_outcome_table,
)
from ._reader import Block, ChunkError, ChunkLayout, prepare_block, read_block

__all__ = [
    "FORMAT_VERSION",
    "MISSING_INT8",
    "Block",
    "ChunkError",
    "ChunkLayout",
    "Dataset",
    "DatasetWriter",
    "FormatAttributes",
    "JoinedOutcome",
    "OutcomeError",
    "OutcomeTable",
    "StoreError",
    "default_chunks",
    "default_codec",
    "join_outcome",
    "open_dataset",
    "prepare_block",
    "read_block",
    "read_outcome_table",
]
