"""The typer application: command order, help layout, ``--version``, one clear line on error.

Thin on purpose: this module imports typer and nothing heavy, so ``widescreen --help`` starts fast;
each command imports the workflow, the store and the report where it runs.
"""

from __future__ import annotations

import functools
import os
import sys
from pathlib import Path
from typing import Annotated

import typer
from typer.core import TyperCommand, TyperGroup

#: Commands in the order data flows through them (the order of ``widescreen --help``).
ORDER = ("import", "inspect", "simulate", "screen", "run", "report", "demo")


def _plain_flags(params) -> None:
    # A flag takes no value: show none (typer would show "<bool>").
    for p in params:
        if getattr(p, "is_flag", False) and p.metavar is None:
            p.metavar = ""


class Command(TyperCommand):
    """A command whose usage line names its arguments (``STORE``, not ``{STORE}``) and shows no
    value for flags."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        _plain_flags(self.params)

    def collect_usage_pieces(self, ctx) -> list[str]:
        return [p.strip("{}") for p in super().collect_usage_pieces(ctx)]

    def get_help_option(self, ctx):
        opt = super().get_help_option(ctx)
        if opt is not None:
            _plain_flags([opt])
        return opt


def _usage_errors() -> tuple[type[BaseException], ...]:
    # typer's own click exceptions (a missing option, an unknown one): the base of BadParameter.
    return (typer.BadParameter.__mro__[1],)


class Group(TyperGroup):
    """The command group: commands listed in `ORDER`, flags shown without a value."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        _plain_flags(self.params)

    def main(self, *args, standalone_mode: bool = True, **kwargs):
        """Run the command line; a usage error (a bad or missing value) is one line on stderr."""
        if not standalone_mode:
            return super().main(*args, standalone_mode=False, **kwargs)
        try:
            rv = super().main(*args, standalone_mode=False, **kwargs)
        except typer.Abort:
            typer.echo("aborted", err=True)
            sys.exit(1)
        except (typer.BadParameter, *_usage_errors()) as exc:
            hint = f" (see '{exc.ctx.command_path} --help')" if exc.ctx is not None else ""
            typer.echo(f"error: {exc.format_message()}{hint}", err=True)
            sys.exit(exc.exit_code)
        # Without standalone mode typer returns the code of a typer.Exit instead of exiting.
        sys.exit(rv if isinstance(rv, int) else 0)

    def list_commands(self, ctx) -> list[str]:
        names = super().list_commands(ctx)
        return sorted(names, key=lambda n: ORDER.index(n) if n in ORDER else len(ORDER))

    def get_help_option(self, ctx):
        opt = super().get_help_option(ctx)
        if opt is not None:
            _plain_flags([opt])
        return opt


app = typer.Typer(
    name="widescreen",
    cls=Group,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def command(name: str, *, interrupted: str | None = None):
    """Register a command of `app` under ``name`` (with our usage line and error handling).

    ``interrupted``: the line printed on Ctrl-C or SIGTERM (`RESUMABLE` by default).
    """

    def register(fn):
        return app.command(name, cls=Command)(friendly(fn, interrupted=interrupted or RESUMABLE))

    return register


def _print_version(value: bool) -> None:
    if value:
        from .._version import __version__

        typer.echo(f"widescreen {__version__}")
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[
        bool,
        typer.Option(
            "--version", help="Print the version and exit.", callback=_print_version, is_eager=True
        ),
    ] = False,
) -> None:
    """Screen very wide data on disk for features associated with an outcome.

    Commands in the order of the work: import (or simulate) a store, inspect it, screen it or run the whole iterative job, write the report. `widescreen demo` shows all of it on simulated data.
    """


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


def scheduler_of(workers: int | None, scheduler: str | None):
    """The scheduler a command runs on: ``processes:N``, an address, or None (threads)."""
    if workers is not None and scheduler is not None:
        raise typer.BadParameter("give --workers or --scheduler, not both")
    if workers is not None:
        return f"processes:{workers}"
    return scheduler


def budget_of(value: str | None) -> int | None:
    """``--memory-budget`` in bytes (None: no budget)."""
    from ..engine import parse_budget

    try:
        return parse_budget(value)
    except ValueError as exc:
        raise typer.BadParameter(f"--memory-budget: {exc}") from None


def first_lambda_gc(iterations: list[dict]) -> float | None:
    """lambda_GC of a run's first screening pass, as its iteration record holds it."""
    first = iterations[0]["threshold"] if iterations else []
    return first[0].get("lambda_gc") if first else None


def shown_path(out, here, path) -> str:
    """``path`` (a file of the local folder ``here`` a run worked in) as the user names it: under
    ``out``, the run folder as given (a URL for a run folder on object storage)."""
    try:
        return str(out / Path(path).relative_to(here))
    except ValueError:
        return str(path)


def lambda_gc_line(value: float) -> str:
    """The genomic inflation factor of a pass, as the commands print it."""
    note = "" if 0.9 <= value <= 1.1 else " (far from 1: check covariates, structure or the family)"
    return f"lambda_GC = {value:.4f}{note}"


def covariates_of(value: str | None) -> tuple[str, ...]:
    """``--covariates a,b`` as a tuple of names."""
    if not value:
        return ()
    return tuple(c.strip() for c in value.split(",") if c.strip())


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
