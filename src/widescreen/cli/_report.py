"""The ``report`` command: pictures and a self-contained HTML page of a finished run."""

from __future__ import annotations

from typing import Annotated

import typer

from ._app import command, lambda_gc_line, shown_path
from ._options import at_least, run_folder


@command("report")
def report_cmd(
    run: Annotated[
        str,
        typer.Argument(
            metavar="RUN",
            help="Run folder of a finished `screen` or `run` (a folder or an s3:// URL).",
            callback=run_folder,
        ),
    ],
    top: Annotated[
        int,
        typer.Option(
            "--top",
            metavar="N",
            help="Rows of the ranking table shown on the page.",
            callback=at_least(1),
        ),
    ] = 50,
) -> None:
    """Write RUN/report.html (pictures embedded) and the pictures as PNG under RUN/figures/."""
    from ..engine import staged_run_folder
    from ..report._build import make_report

    with staged_run_folder(run) as here:
        files = make_report(here, top)
        typer.echo(f"report: {shown_path(run, here, files.html)}")
        for path in files.figures:
            typer.echo(f"figure: {shown_path(run, here, path)}")
    if files.lambda_gc is not None:
        typer.echo(lambda_gc_line(files.lambda_gc))
