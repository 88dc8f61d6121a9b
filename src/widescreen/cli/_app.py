"""The typer command line. Thin: parse, validate, call the workflow, print one clear line on error."""

from __future__ import annotations

import functools
import os
import sys
from pathlib import Path
from typing import Annotated

import typer

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

app = typer.Typer(
    name="widescreen",
    help="Screen very wide data on disk for features associated with an outcome.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _expected_errors() -> tuple[type[BaseException], ...]:
    # A bad value in a configuration is a ConfigError (a ValueError) naming the field: one line, never
    # reported as a bug.
    from .._config import ConfigError
    from ..engine import RunFolderError
    from ..store import OutcomeError, StoreError

    return (
        ConfigError,
        StoreError,
        OutcomeError,
        RunFolderError,
        ValueError,
        FileNotFoundError,
        PermissionError,
        OSError,
    )


#: What Ctrl-C / SIGTERM leaves, per kind of command.
RESUMABLE = "interrupted; finished blocks are kept, rerun the same command to resume"
NOT_RESUMABLE = "interrupted; the partial store was removed, run the same command again"


def friendly(fn=None, *, interrupted: str = RESUMABLE):
    """Turn the errors a user can cause into one line on stderr and exit code 1.

    ``interrupted`` is the line printed on Ctrl-C or SIGTERM (exit code 130).
    """
    if fn is None:
        return functools.partial(friendly, interrupted=interrupted)

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except typer.Exit:
            raise
        except typer.BadParameter as exc:
            # A bad option value found in the command's body (typer.BadParameter): a usage error.
            typer.echo(f"error: {exc.format_message()}", err=True)
            raise typer.Exit(code=exc.exit_code) from None
        except KeyboardInterrupt:
            _quiet_after_interrupt()
            typer.echo("\n" + interrupted, err=True)
            global _REPORTED
            _REPORTED = True
            raise typer.Exit(code=130) from None
        except _expected_errors() as exc:
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(code=1) from None
        except Exception as exc:
            if os.environ.get("WIDESCREEN_DEBUG"):
                raise
            typer.echo(
                f"error: unexpected {type(exc).__name__}: {exc} "
                "(a bug: rerun with WIDESCREEN_DEBUG=1 for the traceback and report it)",
                err=True,
            )
            raise typer.Exit(code=2) from None

    return wrapper


def _scheduler(workers: int | None, scheduler: str | None):
    if workers is not None and scheduler is not None:
        raise typer.BadParameter("give --workers or --scheduler, not both")
    if workers is not None:
        if workers < 1:
            raise typer.BadParameter(f"--workers must be at least 1; got {workers}")
        return f"processes:{workers}"
    return scheduler


def _budget(value: str | None) -> int | None:
    from ..engine import parse_budget

    try:
        return parse_budget(value)
    except ValueError as exc:
        raise typer.BadParameter(f"--memory-budget: {exc}") from None


def _parse_shortlist(value: str) -> int | str:
    if value == "auto":
        return value
    try:
        k = int(value)
    except ValueError:
        raise typer.BadParameter(f"must be a positive integer or 'auto'; got {value!r}") from None
    if k < 1:
        raise typer.BadParameter(f"must be a positive integer or 'auto'; got {value!r}")
    return k


def _covariates(value: str | None) -> tuple[str, ...]:
    if not value:
        return ()
    return tuple(c.strip() for c in value.split(",") if c.strip())


# ------------------------------------------------------------------------------------------------
# screen


@app.command("screen")
@friendly
def screen_cmd(
    store: StoreArg,
    outcome: OutcomeOpt,
    response: ResponseOpt,
    out: OutOpt,
    family: FamilyOpt = "linear",
    covariates: CovariatesOpt = None,
    event: EventOpt = None,
    shortlist: Annotated[
        str, typer.Option("--shortlist", help="Shortlist size: N or 'auto' = floor(n / log n).")
    ] = "auto",
    list_top: Annotated[
        int | None, typer.Option("--list", help="Rows in ranking.tsv (default: the shortlist).")
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
    from ..workflow._screen import ScreenConfig, screen

    config = ScreenConfig(
        response=response,
        family=family,
        covariates=_covariates(covariates),
        event=event,
        shortlist=_parse_shortlist(shortlist),
        list_top=list_top,
        drop_missing=drop_missing,
        drop_rare=drop_rare,
    )
    result = screen(
        store,
        outcome,
        config,
        out,
        scheduler=_scheduler(workers, scheduler),
        progress=ProgressBar("screen", quiet),
        restart=restart,
        memory_budget=_budget(memory_budget),
    )
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
    if report:
        from ..report import build_report

        typer.echo(f"report: {build_report(out)}")


# ------------------------------------------------------------------------------------------------
# simulate and demo


@app.command("simulate")
@friendly(interrupted=NOT_RESUMABLE)
def simulate_cmd(
    store: Annotated[Path, typer.Argument(help="Path of the new store.")],
    design: Annotated[
        str, typer.Option("--design", help="independent, equicorrelated, hidden or dosage.")
    ] = "independent",
    samples: Annotated[int, typer.Option("--samples", "-n", help="Number of samples.")] = 200,
    features: Annotated[int, typer.Option("--features", "-p", help="Number of features.")] = 1000,
    true: Annotated[
        int,
        typer.Option("--true", help="Number of true features (the hidden design fixes its own)."),
    ] = 8,
    rho: Annotated[
        float, typer.Option("--rho", help="Pairwise correlation (equicorrelated, hidden).")
    ] = 0.5,
    sigma: Annotated[
        float, typer.Option("--sigma", help="Noise sd of a continuous outcome.")
    ] = 1.5,
    family: Annotated[
        str,
        typer.Option(
            "--family",
            help="Model of the outcome: linear (continuous y), logistic (binary y), poisson (counts) "
            "or cox (survival time and event).",
        ),
    ] = "linear",
    seed: Annotated[int, typer.Option("--seed", help="Random seed.")] = 0,
    chunk_features: Annotated[
        int | None, typer.Option("--chunk-features", help="Features per chunk of X.")
    ] = None,
    overwrite: Annotated[
        bool, typer.Option("--overwrite", help="Replace an existing store.")
    ] = False,
    quiet: QuietOpt = False,
) -> None:
    """Write a simulated store plus STORE.outcome.tsv and STORE.truth.tsv (a published design)."""
    from ..simulate import SimulationConfig, simulate

    cfg = SimulationConfig(
        design=design,
        n_samples=samples,
        n_features=features,
        n_true=true,
        rho=rho,
        sigma=sigma,
        family=family,
        seed=seed,
        chunk_features=chunk_features,
    )
    sim = simulate(store, cfg, overwrite=overwrite, progress=ProgressBar("simulate", quiet))
    typer.echo(f"wrote {store} ({samples} x {features}), {sim.outcome_path}, {sim.truth_path}")


@app.command("demo")
@friendly
def demo_cmd(
    out: Annotated[Path, typer.Option("--out", help="Folder for the demo's store and run.")] = Path(
        "widescreen-demo"
    ),
    samples: Annotated[int, typer.Option("--samples", "-n", help="Number of samples.")] = 600,
    features: Annotated[int, typer.Option("--features", "-p", help="Number of features.")] = 50_000,
    seed: Annotated[int, typer.Option("--seed", help="Random seed.")] = 7,
    quiet: QuietOpt = False,
) -> None:
    """Simulate a study, run the whole job on it and compare the model with the truth.

    The scenario: a breeding programme of the fictional 'Saltmarsh reed', 600 plants genotyped at
    50,000 variant sites (dosages 0/1/2), a quantitative salt-tolerance score, age and batch covariates,
    and 8 causal variants hidden among the rest.
    """
    from ._demo import run_demo

    run_demo(out, samples=samples, features=features, seed=seed, quiet=quiet)


# ------------------------------------------------------------------------------------------------
# import and inspect


@app.command("import")
@friendly(interrupted=NOT_RESUMABLE)
def import_cmd(
    src: Annotated[
        Path, typer.Argument(help="CSV/TSV (optionally .gz), .npy, or VCF (.vcf, .vcf.gz) file.")
    ],
    store: Annotated[Path, typer.Argument(help="Path of the new store.")],
    features_as_rows: Annotated[
        bool,
        typer.Option("--features-as-rows", help="CSV/TSV: rows are features, columns samples."),
    ] = False,
    dosage: Annotated[
        bool,
        typer.Option("--dosage", help="CSV/TSV/.npy: values are dosages 0/1/2 (stored as int8)."),
    ] = False,
    dtype: Annotated[
        str, typer.Option("--dtype", help="float32 or float64 for continuous values.")
    ] = "float32",
    id_from: Annotated[
        str,
        typer.Option(
            "--vcf-ids",
            help="VCF: feature ids from the 'column' (ID) or the 'position' (chrom:pos:ref:alt).",
        ),
    ] = "column",
    multiallelic: Annotated[
        str,
        typer.Option(
            "--multiallelic",
            help="VCF sites with several ALT alleles: 'split' (one feature per ALT), 'nonref' "
            "(count every non-reference allele) or 'skip'.",
        ),
    ] = "split",
    chunk_features: Annotated[
        int | None,
        typer.Option(
            "--chunk-features", help="Features per chunk of X (default: about 16 MiB chunks)."
        ),
    ] = None,
    overwrite: Annotated[
        bool, typer.Option("--overwrite", help="Replace an existing store.")
    ] = False,
    inf_as_missing: Annotated[
        bool,
        typer.Option(
            "--inf-as-missing",
            help="CSV/TSV: read infinite values (inf, -Infinity) as missing instead of refusing "
            "them.",
        ),
    ] = False,
    quiet: QuietOpt = False,
) -> None:
    """Convert a matrix file into a dataset store, streaming with bounded memory."""
    name = src.name.lower()
    bar = ProgressBar("import", quiet, unit="bytes")
    if name.endswith((".vcf", ".vcf.gz", ".vcf.bgz")):
        from ..store._ingest_vcf import import_vcf

        ds = import_vcf(
            src,
            store,
            id_from=id_from,
            multiallelic=multiallelic,
            chunk_features=chunk_features,
            overwrite=overwrite,
            progress=bar,
        )
    elif name.endswith(".npy"):
        from ..store._ingest_npy import import_npy

        ds = import_npy(
            src,
            store,
            value_kind="dosage" if dosage else None,
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
            dtype="int8" if dosage else dtype,
            value_kind="dosage" if dosage else "continuous",
            chunk_features=chunk_features,
            overwrite=overwrite,
            progress=bar,
            nonfinite="missing" if inf_as_missing else "error",
        )
    typer.echo(f"wrote {store}: {ds.n_samples} samples x {ds.n_features} features ({ds.dtype})")


@app.command("inspect")
@friendly
def inspect_cmd(
    store: Annotated[Path, typer.Argument(help="Dataset store.")],
    sample_blocks: Annotated[
        int | None,
        typer.Option(
            "--sample-blocks",
            help="Estimate the missing rate from this many blocks (default: all).",
        ),
    ] = None,
) -> None:
    """Print shape, dtype, chunking, codec, size on disk and missing rate of a store."""
    from ..store._inspect import inspect_dataset

    typer.echo(inspect_dataset(store, sample_blocks=sample_blocks).format())


_IN_MAIN = False  # set by `main`: the process is the command (not a caller's test or notebook)
_STOPPING = False  # a first Ctrl-C / SIGTERM arrived
_REPORTED = False  # the interrupt's line was printed


def _quiet_after_interrupt() -> None:
    """As the process's entry point, silence what libraries print while objects are torn down after
    Ctrl-C ("Task was destroyed but it is pending!", ignored exceptions); `main` then leaves without
    the interpreter's finalisation."""
    if not _IN_MAIN:
        return
    import logging

    logging.disable(logging.CRITICAL)
    sys.unraisablehook = lambda _unraisable: None


def _on_signal(signum, frame) -> None:
    """Ctrl-C and SIGTERM (what batch schedulers send at a time limit) stop like Ctrl-C: the session
    is recorded as interrupted and finished blocks are kept. A second one while stopping ends the
    process at once, which is as safe as SIGKILL (every file in the run folder is whole)."""
    global _STOPPING
    if _STOPPING:
        os._exit(130)
    _STOPPING = True
    raise KeyboardInterrupt


def main() -> None:
    """Entry point of the ``widescreen`` command."""
    import signal

    global _IN_MAIN
    _IN_MAIN = True
    signal.signal(signal.SIGTERM, _on_signal)
    signal.signal(signal.SIGINT, _on_signal)
    try:
        app(prog_name="widescreen")
    except SystemExit as exc:
        if exc.code == 130:
            # Interrupted, and the run folder is already consistent: leave without finalising the
            # interpreter, whose teardown of half-stopped threads and event loops printed library
            # noise and, in native code, could abort the process (SIGABRT).
            if not _REPORTED:  # stopped while the command line was parsed (click exits 130)
                sys.stderr.write("interrupted\n")
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(130)
        raise
    except KeyboardInterrupt:  # before a command started (while parsing or importing)
        sys.stderr.write("\ninterrupted\n")
        sys.stderr.flush()
        os._exit(130)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
