"""Command-line options shared by the commands that screen a store (``screen`` and ``run``)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..families import FAMILY_NAMES

DATA = "Data and filters"
RUNNING = "Running"

StoreArg = Annotated[
    Path, typer.Argument(help="Dataset store (made by `widescreen import` or `simulate`).")
]
OutcomeOpt = Annotated[
    Path, typer.Option("--outcome", help="Outcome table (TSV, first column sample id).")
]
ResponseOpt = Annotated[
    str, typer.Option("--response", help="Column of the response (survival: the time).")
]
OutOpt = Annotated[
    Path, typer.Option("--out", help="Run folder for the results (resumed if it exists).")
]
FamilyOpt = Annotated[
    str,
    typer.Option(
        "--family",
        help=f"Outcome family: {', '.join(FAMILY_NAMES)}.",
        rich_help_panel=DATA,
    ),
]
CovariatesOpt = Annotated[
    str | None,
    typer.Option(
        "--covariates", help="Comma-separated columns to adjust for.", rich_help_panel=DATA
    ),
]
EventOpt = Annotated[
    str | None,
    typer.Option("--event", help="Survival: column of the event indicator.", rich_help_panel=DATA),
]
DropMissingOpt = Annotated[
    float | None,
    typer.Option(
        "--drop-missing",
        help="Exclude features missing in more than this share of samples.",
        rich_help_panel=DATA,
    ),
]
DropRareOpt = Annotated[
    float | None,
    typer.Option(
        "--drop-rare",
        help="Dosage stores: exclude features with minor allele frequency below this.",
        rich_help_panel=DATA,
    ),
]
WorkersOpt = Annotated[
    int | None,
    typer.Option(
        "--workers", help="Start a local cluster of N worker processes.", rich_help_panel=RUNNING
    ),
]
SchedulerOpt = Annotated[
    str | None,
    typer.Option(
        "--scheduler", help="Address of an existing Dask scheduler.", rich_help_panel=RUNNING
    ),
]
RestartOpt = Annotated[
    bool,
    typer.Option(
        "--restart",
        help="Discard what the run folder holds and start over.",
        rich_help_panel=RUNNING,
    ),
]
QuietOpt = Annotated[
    bool,
    typer.Option(
        "--quiet", "-q", help="No progress bar; only results and errors.", rich_help_panel=RUNNING
    ),
]
MemoryOpt = Annotated[
    str | None,
    typer.Option(
        "--memory-budget",
        help="Memory the run may use, e.g. 4GB; with --workers N it is shared by the N workers, "
        "with --scheduler ADDRESS it is one worker's.",
        rich_help_panel=RUNNING,
    ),
]
ReportOpt = Annotated[
    bool,
    typer.Option(
        "--report/--no-report",
        help="Write report.html and figures/ into the run folder.",
        rich_help_panel=RUNNING,
    ),
]
