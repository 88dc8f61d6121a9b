"""Progress on standard error: a rich progress bar in a terminal, plain log lines otherwise.

The workflow calls a progress object as ``progress(done, total)`` (blocks of a pass, bytes of an
import). In a terminal the bar updates in place; when standard error is a file or a pipe (a batch
job's log) no carriage returns are written: one line when the work starts, one every `LOG_EVERY`
seconds, and one when it ends.
"""

from __future__ import annotations

import atexit
import sys
import time
from typing import ClassVar, TextIO

#: Seconds between two log lines when standard error is not a terminal.
LOG_EVERY = 10.0


def format_bytes(n: float) -> str:
    """``n`` bytes in binary units with three significant digits (``950 B``, ``12.3 KiB``)."""
    for unit in ("B", "KiB", "MiB", "GiB"):
        if abs(n) < 1000 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.3g} {unit}"
        n /= 1024
    raise AssertionError  # pragma: no cover - the loop returns at GiB


def format_seconds(s: float) -> str:
    """``mm:ss`` or ``h:mm:ss``; ``--:--`` when unknown."""
    if s != s or s == float("inf"):  # NaN or infinite: no rate yet
        return "--:--"
    s = round(s)
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m:02d}:{sec:02d}"


class LineProgress:
    """Progress as whole lines on a stream that is not a terminal (no ``\\r``)."""

    def __init__(
        self,
        label: str,
        unit: str = "blocks",
        stream: TextIO | None = None,
        every: float = LOG_EVERY,
    ) -> None:
        self.label, self.unit, self.every = label, unit, every
        self.stream = stream or sys.stderr
        self._t0: float | None = None
        self._done0 = 0
        self._last = 0.0
        self._finished = False

    def _amount(self, done: int, total: int) -> str:
        if self.unit == "bytes":
            return f"{format_bytes(done)} of {format_bytes(total)}"
        return f"{done}/{total} {self.unit}"

    def __call__(self, done: int, total: int) -> None:
        now = time.perf_counter()
        if self._t0 is None:
            self._t0, self._done0, self._last = now, done, now
            self._line(self._amount(done, total))
            if done < total:
                return
        if done >= total:
            if not self._finished:
                self._finished = True
                self._line(f"{self._amount(done, total)}, done in {format_seconds(now - self._t0)}")
            return
        if now - self._last < self.every:
            return
        self._last = now
        rate = (done - self._done0) / (now - self._t0)
        left = (total - done) / rate if rate > 0 else float("nan")
        pct = 100.0 * done / total if total else 100.0
        speed = f"{format_bytes(rate)}/s" if self.unit == "bytes" else f"{rate:.3g} {self.unit}/s"
        self._line(
            f"{self._amount(done, total)} ({pct:.0f}%), {speed}, about {format_seconds(left)} left"
        )

    def _line(self, text: str) -> None:
        self.stream.write(f"{self.label}: {text}\n")
        self.stream.flush()


class RichProgress:
    """Progress as a rich bar that updates in place (a terminal only)."""

    _open: ClassVar[set[RichProgress]] = set()

    def __init__(self, label: str, unit: str = "blocks", stream: TextIO | None = None) -> None:
        self.label, self.unit = label, unit
        self.stream = stream or sys.stderr
        self._bar = None
        self._task = None
        self._closed = False

    def _start(self, done: int, total: int) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            DownloadColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
            TransferSpeedColumn,
        )

        amount = (
            [DownloadColumn(binary_units=True), TransferSpeedColumn()]
            if self.unit == "bytes"
            else [MofNCompleteColumn(), TextColumn(self.unit)]
        )
        self._bar = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            *amount,
            TimeElapsedColumn(),
            TextColumn("elapsed,"),
            TimeRemainingColumn(),
            TextColumn("left"),
            console=Console(file=self.stream),
            auto_refresh=False,  # no refresh thread: we redraw on each update
        )
        self._bar.start()
        self._task = self._bar.add_task(self.label, total=total, completed=done)
        RichProgress._open.add(self)

    def __call__(self, done: int, total: int) -> None:
        if self._closed:
            return
        if self._bar is None:
            self._start(done, total)
        self._bar.update(self._task, completed=done, total=total)
        self._bar.refresh()
        if done >= total:
            self.close()

    def close(self) -> None:
        """Leave the bar as drawn and give the terminal back (the cursor shown again)."""
        if self._bar is not None and not self._closed:
            self._closed = True
            self._bar.stop()
            RichProgress._open.discard(self)


@atexit.register
def _close_open_bars() -> None:
    # A pass interrupted mid-way leaves its bar open: stop it so the terminal gets its cursor back.
    for bar in list(RichProgress._open):
        bar.close()


def progress_display(
    label: str, quiet: bool = False, unit: str = "blocks", stream: TextIO | None = None
) -> LineProgress | RichProgress | None:
    """The progress object for ``label``: None when ``quiet``, a bar in a terminal, lines otherwise."""
    if quiet:
        return None
    stream = stream or sys.stderr
    isatty = getattr(stream, "isatty", None)
    if isatty is not None and isatty():
        return RichProgress(label, unit, stream)
    return LineProgress(label, unit, stream)
