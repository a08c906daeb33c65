"""A progress line for long work: counts, elapsed time and time left (stderr)."""

from __future__ import annotations

import sys
import time

import click

__all__ = ["Progress", "duration_text", "PROGRESS_TRIALS"]

#: work over this many trials (an ingest, a dedupe, a prune) draws a progress bar; less takes about a second
PROGRESS_TRIALS = 50_000


def duration_text(seconds: float) -> str:
    """A duration people read at a glance: ``42s``, ``7m05s``, ``3h12m``."""
    seconds = max(0, int(round(seconds)))
    if seconds < 60:
        return f"{seconds}s"
    if seconds < 3600:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"


class Progress:
    """Callable ``(done, total)`` that draws a progress bar on stderr.

    On a terminal the bar is redrawn in place; otherwise (logs, CI) a line is
    written at every tenth of the work, so logs stay short.

    Parameters
    ----------
    label : str
        What is being done.
    enabled : bool, default True
        False draws nothing (e.g. with ``--json``).
    """

    def __init__(self, label: str, enabled: bool = True, width: int = 24):
        self.label = label
        self.enabled = enabled
        self.width = width
        self.start = time.monotonic()
        self.tty = sys.stderr.isatty()
        self._last_tenth = -1
        self._shown = 0  # length of the line last drawn in place

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        total = max(total, 1)
        tenth = int(10 * done / total)
        if not self.tty and tenth == self._last_tenth and done < total:
            return
        self._last_tenth = tenth
        elapsed = time.monotonic() - self.start
        left = duration_text(elapsed / done * (total - done)) if done else "?"
        fill = int(self.width * done / total)
        line = (f"{self.label} [{'#' * fill}{'.' * (self.width - fill)}] {done}/{total}  "
                f"{duration_text(elapsed)} elapsed, {left} left")
        if self.tty:  # padded: a shorter line must cover the last one
            click.echo("\r" + line.ljust(self._shown), err=True, nl=done >= total)
            self._shown = len(line)
        else:
            click.echo(line, err=True)
