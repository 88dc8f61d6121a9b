"""``widescreen run``: iterative screening (screen, fit, conditional pass, refit, ...) into a run folder."""

from __future__ import annotations

from typing import Annotated

import typer

from ._app import _budget, _covariates, _parse_shortlist, _scheduler, app, friendly
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
    StoreArg,
    WorkersOpt,
)
from ._progress import ProgressBar

_MODEL = "Model and tuning"
_THRESH = "Thresholds"


@app.command("run")
@friendly
def run_cmd(
    store: StoreArg,
    outcome: OutcomeOpt,
    response: ResponseOpt,
    out: OutOpt,
    family: FamilyOpt = "linear",
    covariates: CovariatesOpt = None,
    event: EventOpt = None,
    drop_missing: DropMissingOpt = None,
    drop_rare: DropRareOpt = None,
    penalty: Annotated[
        str,
        typer.Option(
            "--penalty",
            help="Refit penalty: scad, mcp, lasso, enet, adaptive_lasso or dantzig.",
            rich_help_panel=_MODEL,
        ),
    ] = "scad",
    criterion: Annotated[
        str,
        typer.Option(
            "--criterion", help="Tuning of the refit: ebic, bic or cv.", rich_help_panel=_MODEL
        ),
    ] = "ebic",
    shortlist: Annotated[
        str,
        typer.Option(
            "--shortlist",
            help="Size budget d of the selected set: N or 'auto' = floor(n / log n).",
            rich_help_panel=_MODEL,
        ),
    ] = "auto",
    max_iter: Annotated[
        int,
        typer.Option(
            "--max-iter",
            help="Conditional passes at most (0: plain SIS and one fit).",
            rich_help_panel=_MODEL,
        ),
    ] = 5,
    split: Annotated[
        bool,
        typer.Option(
            "--split",
            help="Screen two random halves of the samples; keep features in both top lists.",
            rich_help_panel=_MODEL,
        ),
    ] = False,
    seed: Annotated[
        int,
        typer.Option(
            "--seed", help="Seed of the halves, permutations and CV folds.", rich_help_panel=_MODEL
        ),
    ] = 0,
    threshold: Annotated[
        str,
        typer.Option(
            "--threshold",
            help="Cut within the budget: none, permutation, bonferroni or bh.",
            rich_help_panel=_THRESH,
        ),
    ] = "none",
    permutations: Annotated[
        int,
        typer.Option(
            "--permutations",
            help="Permuted responses per pass (--threshold permutation).",
            rich_help_panel=_THRESH,
        ),
    ] = 100,
    alpha: Annotated[
        float,
        typer.Option(
            "--alpha",
            help="Level: family-wise (permutation, bonferroni) or false discovery rate (bh).",
            rich_help_panel=_THRESH,
        ),
    ] = 0.05,
    workers: WorkersOpt = None,
    scheduler: SchedulerOpt = None,
    restart: RestartOpt = False,
    quiet: QuietOpt = False,
    memory_budget: MemoryOpt = None,
    report: ReportOpt = True,
) -> None:
    """Iterative screening: screen, fit a penalised model, rank the rest given it, refit, repeat.

    Writes model.tsv (the final model), iterations.tsv (one row per iteration), ranking.tsv (the first
    screen's shortlist) and manifest.json into the run folder; rerunning resumes pass by pass.
    """
    from ..workflow._iterate import IterateConfig
    from ..workflow._run import run

    if max_iter < 0:
        raise typer.BadParameter(f"--max-iter must be 0 or more; got {max_iter}")
    config = IterateConfig(
        response=response,
        family=family,
        covariates=_covariates(covariates),
        event=event,
        shortlist=_parse_shortlist(shortlist),
        penalty=penalty,
        criterion=criterion,
        max_iter=max_iter,
        threshold=threshold,
        alpha=alpha,
        n_permutations=permutations,
        split=split,
        seed=seed,
        drop_missing=drop_missing,
        drop_rare=drop_rare,
    )
    result = run(
        store,
        outcome,
        config,
        out,
        scheduler=_scheduler(workers, scheduler),
        progress=lambda name: ProgressBar(name, quiet),
        restart=restart,
        memory_budget=_budget(memory_budget),
    )
    rep = result.problem.samples
    shown = ", ".join(str(f) for f in result.feature_ids[:10])
    more = f" and {result.index.size - 10} more" if result.index.size > 10 else ""
    typer.echo(
        f"{len(result.iterations)} iteration(s) on {rep['n_analysed']} samples, size budget "
        f"{result.budget}; stopped: {result.stop_reason}; selected {result.index.size} "
        f"feature(s){': ' + shown + more if shown else ''}; model in {out / 'model.tsv'}"
    )
    for warning in result.warnings:
        typer.echo(f"warning: {warning}", err=True)
    if report:
        from ..report import build_report

        typer.echo(f"report: {build_report(out)}")
