"""``widescreen screen``: sure independence screening of a store into a run folder."""

from __future__ import annotations

from typing import Annotated

import typer

from ._app import budget_of, command, covariates_of, lambda_gc_line, scheduler_of, shown_path
from ._options import (
    CovariatesOpt,
    DropMissingOpt,
    DropRareOpt,
    EventOpt,
    FamilyOpt,
    MemoryOpt,
    OutcomeOpt,
    OutOpt,
    QuietOpt,
    ReportOpt,
    ResponseOpt,
    RestartOpt,
    SchedulerOpt,
    ShortlistOpt,
    StoreArg,
    WorkersOpt,
    at_least,
)
from ._progress import progress_display


@command("screen")
def screen_cmd(
    store: StoreArg,
    outcome: OutcomeOpt,
    response: ResponseOpt,
    out: OutOpt,
    family: FamilyOpt = "linear",
    covariates: CovariatesOpt = None,
    event: EventOpt = None,
    shortlist: ShortlistOpt = "auto",
    list_top: Annotated[
        int | None,
        typer.Option(
            "--list",
            metavar="N",
            help="Rows in ranking.tsv, when more than the shortlist.",
            callback=at_least(1),
            show_default="the shortlist",
        ),
    ] = None,
    drop_missing: DropMissingOpt = None,
    drop_rare: DropRareOpt = None,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    restart: RestartOpt = False,
    memory_budget: MemoryOpt = None,
    report: ReportOpt = True,
    quiet: QuietOpt = False,
) -> None:
    """Rank every feature by its marginal association with the outcome (SIS) and write the shortlist."""
    from ..workflow._problem import expand_response
    from ..workflow._screen import ScreenConfig, screen

    config = ScreenConfig(
        response=expand_response(response, outcome, covariates_of(covariates), event),
        family=family,
        covariates=covariates_of(covariates),
        event=event,
        shortlist=shortlist,
        list_top=list_top,
        drop_missing=drop_missing,
        drop_rare=drop_rare,
    )
    from ..engine import staged_run_folder

    # A run folder on object storage is worked on in a local copy, uploaded as the run goes.
    with staged_run_folder(out) as here:
        result = screen(
            store,
            outcome,
            config,
            here,
            scheduler=scheduler_of(workers, scheduler),
            progress=progress_display("screen", quiet),
            restart=restart,
            memory_budget=budget_of(memory_budget),
        )
        if hasattr(result, "names"):  # several traits
            from ._traits import echo_traits

            echo_traits(result, out, report, here)
            return
        s = result.pass_result
        rep = result.problem.samples
        typer.echo(
            f"screened {s.n_features} features on {rep['n_analysed']} samples "
            f"({rep['n_dropped_missing']} dropped for missing values, {rep['n_unknown_ids']} unknown ids); "
            f"{s.n_filtered} filtered, {s.n_constant} constant, {s.n_degenerate} degenerate, "
            f"{s.n_nonfinite} not finite; shortlist of {result.index.size} "
            f"in {out / 'ranking.tsv'}"
            + (
                f" [resumed {s.blocks_reused} of {s.blocks_reused + s.blocks_computed} blocks]"
                if s.blocks_reused
                else ""
            )
        )
        if result.lambda_gc is not None:
            typer.echo(lambda_gc_line(result.lambda_gc))
        if result.notice:
            typer.echo(f"note: {result.notice}", err=True)
        if report:
            from ..report import build_report

            typer.echo(f"report: {shown_path(out, here, build_report(here))}")
