"""``widescreen import`` and ``widescreen inspect``: make a dataset store and look at one."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._app import NOT_RESUMABLE, command
from ._options import QuietOpt, at_least, one_of
from ._progress import progress_display

_VCF = "VCF files"
_TEXT = "CSV/TSV and .npy files"


@command("import", interrupted=NOT_RESUMABLE)
def import_cmd(
    src: Annotated[
        Path,
        typer.Argument(
            metavar="FILE", help="CSV/TSV (optionally .gz), .npy, or VCF (.vcf, .vcf.gz) file."
        ),
    ],
    store: Annotated[
        str,
        typer.Argument(
            metavar="STORE", help="The new store: a folder or a URL (s3://, gs://, az://)."
        ),
    ],
    features_as_rows: Annotated[
        bool,
        typer.Option(
            "--features-as-rows",
            help="Rows are features, columns samples (default: rows are samples).",
            rich_help_panel=_TEXT,
        ),
    ] = False,
    dosage: Annotated[
        bool,
        typer.Option(
            "--dosage",
            help="Values are dosages 0/1/2 (stored as int8).",
            rich_help_panel=_TEXT,
        ),
    ] = False,
    dtype: Annotated[
        str | None,
        typer.Option(
            "--dtype",
            metavar="TYPE",
            help="float32 or float64 for continuous values.",
            callback=one_of("float32", "float64"),
            rich_help_panel=_TEXT,
            show_default="float32; a .npy file of float64 stays float64",
        ),
    ] = None,
    values: Annotated[
        str,
        typer.Option(
            "--vcf-values",
            metavar="FIELD",
            help="'gt': dosages counted from the genotype calls (int8); 'ds': the DS field, the "
            "expected dosage of imputed data (float32), where a site's FORMAT has it, GT elsewhere.",
            callback=one_of("gt", "ds"),
            rich_help_panel=_VCF,
        ),
    ] = "gt",
    pass_only: Annotated[
        bool,
        typer.Option(
            "--vcf-pass-only",
            help="Import only the sites whose FILTER is PASS (default: every site).",
            rich_help_panel=_VCF,
        ),
    ] = False,
    id_from: Annotated[
        str,
        typer.Option(
            "--vcf-ids",
            metavar="FROM",
            help="Feature ids from the 'column' (ID) or the 'position' (chrom:pos:ref:alt).",
            callback=one_of("column", "position"),
            rich_help_panel=_VCF,
        ),
    ] = "column",
    multiallelic: Annotated[
        str,
        typer.Option(
            "--multiallelic",
            metavar="RULE",
            help="Sites with several ALT alleles: 'split' (one feature per ALT), 'nonref' "
            "(count every non-reference allele) or 'skip'.",
            callback=one_of("split", "nonref", "skip"),
            rich_help_panel=_VCF,
        ),
    ] = "split",
    chunk_features: Annotated[
        int | None,
        typer.Option(
            "--chunk-features",
            metavar="N",
            help="Features per chunk of X.",
            callback=at_least(1),
            show_default="about 16 MiB chunks, at most the features",
        ),
    ] = None,
    overwrite: Annotated[
        bool, typer.Option("--overwrite", help="Replace an existing store.")
    ] = False,
    inf_as_missing: Annotated[
        bool,
        typer.Option(
            "--inf-as-missing",
            help="Read infinite values (inf, -Infinity) as missing instead of refusing them.",
            rich_help_panel=_TEXT,
        ),
    ] = False,
    quiet: QuietOpt = False,
) -> None:
    """Convert a matrix file into a dataset store, streaming with bounded memory."""
    name = src.name.lower()
    bar = progress_display("import", quiet, unit="bytes")
    if name.endswith((".vcf", ".vcf.gz", ".vcf.bgz")):
        from ..store._ingest_vcf import import_vcf

        ds = import_vcf(
            src,
            store,
            id_from=id_from,
            multiallelic=multiallelic,
            values=values,
            pass_only=pass_only,
            chunk_features=chunk_features,
            overwrite=overwrite,
            progress=bar,
        )
    elif name.endswith(".npy"):
        from ..store._ingest_npy import import_npy

        # A .npy array is (samples, features) with numbers only: refuse what would be ignored.
        for flag, given in (
            ("--features-as-rows", features_as_rows),
            ("--inf-as-missing", inf_as_missing),
        ):
            if given:
                raise typer.BadParameter(
                    f"applies to CSV/TSV files, not to {src.name}", param_hint=f"'{flag}'"
                )
        ds = import_npy(
            src,
            store,
            value_kind="dosage" if dosage else None,
            dtype=None if dosage else dtype,
            chunk_features=chunk_features,
            overwrite=overwrite,
            progress=bar,
        )
    else:
        from ..store._ingest_text import import_table

        ds = import_table(
            src,
            store,
            features_as_rows=features_as_rows,
            dtype="int8" if dosage else dtype or "float32",
            value_kind="dosage" if dosage else "continuous",
            chunk_features=chunk_features,
            overwrite=overwrite,
            progress=bar,
            nonfinite="missing" if inf_as_missing else "error",
        )
    typer.echo(f"wrote {store}: {ds.n_samples} samples x {ds.n_features} features ({ds.dtype})")


@command("inspect")
def inspect_cmd(
    store: Annotated[
        str, typer.Argument(metavar="STORE", help="Dataset store: a folder or a URL.")
    ],
    sample_blocks: Annotated[
        int | None,
        typer.Option(
            "--sample-blocks",
            metavar="N",
            help="Estimate the missing rate from N blocks spread over the store (default: all).",
            callback=at_least(1),
        ),
    ] = None,
) -> None:
    """Print shape, dtype, chunking, codec, size on disk and missing rate of a store."""
    from ..store._inspect import inspect_dataset

    typer.echo(inspect_dataset(store, sample_blocks=sample_blocks).format())
