"""A progress line for long work: counts, elapsed time and time left (stderr)."""

from __future__ import annotations

import sys
import time

import click

__all__ = ["Progress"]


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

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        total = max(total, 1)
        tenth = int(10 * done / total)
        if not self.tty and tenth == self._last_tenth and done < total:
            return
        self._last_tenth = tenth
        elapsed = time.monotonic() - self.start
        left = f"{elapsed / done * (total - done):4.0f}s left" if done else "   ? left"
        fill = int(self.width * done / total)
        line = (f"{self.label} [{'#' * fill}{'.' * (self.width - fill)}] {done}/{total}  "
                f"{elapsed:4.0f}s elapsed, {left}")
        if self.tty:
            click.echo("\r" + line, err=True, nl=done >= total)
        else:
            click.echo(line, err=True)
