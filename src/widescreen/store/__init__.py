"""The dataset store: on-disk format, block reader and ingest converters."""

from ._conditional import (
    check_conditional,
    create_object,
    delete_object,
    read_object,
    replace_object,
)
from ._format import (
    FORMAT_VERSION,
    MISSING_INT8,
    Dataset,
    DatasetWriter,
    FeatureIdError,
    FormatAttributes,
    StoreError,
    default_chunks,
    default_codec,
    open_dataset,
)
from ._ingest_base import IngestError
from ._ingest_npy import import_npy
from ._ingest_text import import_table
from ._ingest_vcf import import_vcf
from ._inspect import InspectReport, inspect_dataset
from ._location import RemotePath, is_url, place
from ._outcome import (
    CovariateCoding,
    JoinedOutcome,
    OutcomeError,
    OutcomeTable,
    code_covariate_frame,
    code_covariates,
    join_outcome,
    numeric_columns,
    read_outcome_table,
)
from ._reader import Block, ChunkError, ChunkLayout, ReadAhead, prepare_block, read_block

__all__ = [
    "FORMAT_VERSION",
    "MISSING_INT8",
    "Block",
    "ChunkError",
    "ChunkLayout",
    "CovariateCoding",
    "Dataset",
    "DatasetWriter",
    "FeatureIdError",
    "FormatAttributes",
    "IngestError",
    "InspectReport",
    "JoinedOutcome",
    "OutcomeError",
    "OutcomeTable",
    "ReadAhead",
    "RemotePath",
    "StoreError",
    "check_conditional",
    "code_covariate_frame",
    "code_covariates",
    "create_object",
    "default_chunks",
    "default_codec",
    "delete_object",
    "import_npy",
    "import_table",
    "import_vcf",
    "inspect_dataset",
    "is_url",
    "join_outcome",
    "numeric_columns",
    "open_dataset",
    "place",
    "prepare_block",
    "read_block",
    "read_object",
    "read_outcome_table",
    "replace_object",
]
