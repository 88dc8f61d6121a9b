"""A progress bar on standard error: blocks done, rate and time left."""

from __future__ import annotations

import sys
import time


class ProgressBar:
    """Callable(done, total) drawing one line that updates in place; silent when ``quiet``."""

    def __init__(
        self, label: str, quiet: bool = False, stream=None, width: int = 28, unit: str = "blocks"
    ) -> None:
        self.label = label
        self.unit = unit
        self.quiet = quiet
        self.stream = stream or sys.stderr
        self.width = width
        self._t0: float | None = None
        self._start_done = 0
        self._last = 0.0

    def __call__(self, done: int, total: int) -> None:
        if self.quiet:
            return
        now = time.perf_counter()
        if self._t0 is None:
            self._t0, self._start_done = now, done
        if done < total and now - self._last < 0.1:
            return
        self._last = now
        frac = done / total if total else 1.0
        filled = round(frac * self.width)
        elapsed = now - self._t0
        rate = (done - self._start_done) / elapsed if elapsed > 0 else 0.0
        left = (total - done) / rate if rate > 0 else float("nan")
        eta = _fmt_time(left) if done < total else _fmt_time(elapsed)
        tag = "left" if done < total else "total"
        if self.unit == "bytes":
            count = f"{done / 2**20:.0f}/{total / 2**20:.0f} MiB {rate / 2**20:.1f} MiB/s"
        else:
            count = f"{done}/{total} {self.unit} {rate:.1f}/s"
        line = f"\r{self.label} [{'#' * filled}{'.' * (self.width - filled)}] {count} {eta} {tag}"
        self.stream.write(line)
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()


def _fmt_time(s: float) -> str:
    if s != s:  # NaN
        return "--:--"
    s = int(s)
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m:02d}:{sec:02d}"
