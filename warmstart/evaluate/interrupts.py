"""Ctrl-C and SIGTERM that wait for a result to be written and counted.

A run stopped by Ctrl-C (or by SIGTERM, which ``warmstart tune`` turns into
the same stop) keeps what it finished and prints a summary of it. Should the
signal land between the commit of a trial and the line that counts it, the
archive would hold one trial more than the summary says.
:func:`deferred_interrupts` holds both signals for the few statements that
write and count a result; a signal that came meanwhile is handed to the
handler that was in place, on leaving the block.
"""

from __future__ import annotations

import contextlib
import signal
import threading

__all__ = ["deferred_interrupts"]

_HELD = tuple(s for s in (getattr(signal, "SIGINT", None), getattr(signal, "SIGTERM", None)) if s is not None)


@contextlib.contextmanager
def deferred_interrupts():
    """Within the block, SIGINT and SIGTERM are held; the first that came is
    delivered to the previous handler on exit (a ``KeyboardInterrupt`` for
    Ctrl-C). Outside the main thread (where handlers cannot be set) it does
    nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    came: list[tuple[int, object]] = []

    def hold(signum, frame):
        came.append((signum, frame))

    previous = {}
    try:
        for sig in _HELD:
            if signal.getsignal(sig) is not None:  # None: a handler set outside Python, left alone
                previous[sig] = signal.signal(sig, hold)
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        if came:
            signum, frame = came[0]
            handler = previous[signum]
            if callable(handler):
                handler(signum, frame)
            elif handler == signal.SIG_DFL:
                signal.raise_signal(signum)  # the default action, now that it is back
