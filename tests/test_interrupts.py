"""Ctrl-C and SIGTERM wait while a result is written and counted
(``warmstart.evaluate.interrupts``). Signals per POSIX: a handler set with
``signal.signal`` runs in the main thread; ``signal.raise_signal`` delivers
one to this process."""

from __future__ import annotations

import signal
import threading

import pytest

from warmstart.evaluate.interrupts import deferred_interrupts

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGTERM"), reason="POSIX signals")


def test_ctrl_c_inside_the_block_lands_after_it():
    done = []
    with pytest.raises(KeyboardInterrupt):
        with deferred_interrupts():
            signal.raise_signal(signal.SIGINT)
            done.append("written")  # still runs: the signal waits
            done.append("counted")
    assert done == ["written", "counted"]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # the handler is back


def test_sigterm_goes_to_the_handler_in_place_once_and_nothing_without_a_signal():
    calls = []
    previous = signal.signal(signal.SIGTERM, lambda signum, frame: calls.append(signum))
    try:
        with deferred_interrupts():
            signal.raise_signal(signal.SIGTERM)
            signal.raise_signal(signal.SIGTERM)
            assert calls == []
        assert calls == [signal.SIGTERM]  # the first that came, delivered on leaving
        with deferred_interrupts():
            pass
        assert calls == [signal.SIGTERM]
    finally:
        signal.signal(signal.SIGTERM, previous)


def test_outside_the_main_thread_it_changes_nothing():
    seen = []

    def work():
        with deferred_interrupts():
            seen.append(signal.getsignal(signal.SIGINT))

    t = threading.Thread(target=work)
    t.start()
    t.join(10)
    assert seen == [signal.default_int_handler]
