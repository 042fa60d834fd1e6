"""Signals that end a run: an exception Python swallows must not lose the interruption.

Python reports, and then drops, an exception raised inside a garbage-collector callback
("Exception ignored in gc callback"; Python docs, gc.callbacks and sys.unraisablehook).
A signal handler runs wherever the main thread is, so a SIGTERM/SIGHUP/SIGINT that lands
in such a callback (hypothesis registers one) raised its exception into the void and the
run went on as if nothing had happened. run/signals.py records the signal, and check(),
called between examples and invariants, raises it again.
"""
from __future__ import annotations

import gc
import os
import signal
import sys

import pytest

from convwitness.run.signals import Terminated, as_interrupt, check


def _signal_inside_a_gc_callback(sig):
    """Deliver ``sig`` while a gc callback runs; return the exceptions Python swallowed."""
    swallowed = []
    hook, sys.unraisablehook = sys.unraisablehook, lambda u: swallowed.append(u.exc_type)

    def callback(phase, info):
        if phase == "start" and not swallowed:
            os.kill(os.getpid(), sig)
            for _ in range(10_000):    # bytecode to run the Python-level handler on
                pass

    gc.callbacks.append(callback)
    try:
        gc.collect()
    finally:
        gc.callbacks.remove(callback)
        sys.unraisablehook = hook
    return swallowed


@pytest.mark.parametrize("sig, exc", [(signal.SIGTERM, Terminated), (signal.SIGHUP, Terminated),
                                      (signal.SIGINT, KeyboardInterrupt)],
                         ids=["SIGTERM", "SIGHUP", "SIGINT"])
def test_a_signal_swallowed_in_a_gc_callback_is_raised_again_by_check(sig, exc):
    with as_interrupt() as fired:
        swallowed = _signal_inside_a_gc_callback(sig)
        assert swallowed and issubclass(swallowed[0], exc)   # the set-up: Python dropped it
        assert fired == [sig]
        with pytest.raises(exc):
            check()


def test_check_is_quiet_without_a_signal_and_after_the_context():
    before = signal.getsignal(signal.SIGTERM)
    with as_interrupt():
        check()
    with as_interrupt():
        with pytest.raises(Terminated):
            os.kill(os.getpid(), signal.SIGTERM)
            for _ in range(10_000):
                pass
    check()                            # delivered and the context left: nothing pending
    assert signal.getsignal(signal.SIGTERM) is before   # a long-lived caller gets its handler back
