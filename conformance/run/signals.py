"""SIGTERM and SIGHUP end a run the way Ctrl-C does: with a partial report.

CI systems send SIGTERM when a job runs past its time limit, and SIGHUP when the
terminal goes away. Inside :func:`as_interrupt`, either signal raises
:class:`Terminated` (a ``KeyboardInterrupt``) in the main thread, so the run stops at
the next Python instruction, the current invariant is dropped, and the report of the
finished ones is written with status ``partial``. A second signal while the report is
being written is ignored (callers leave the context once it is written): the report is
what the job is waiting for. Leaving the context puts the previous handlers back.

Python swallows an exception raised where it cannot propagate (a garbage-collector
callback, a ``__del__`` method, a weakref callback: "Exception ignored in ..."), and a
signal handler runs wherever the main thread happens to be. So the signal is also
recorded, and :func:`check`, called between examples and between invariants, raises it
again: a signal that lands in such a place stops the run one example later instead of
being lost.
"""
from __future__ import annotations

import contextlib
import signal
import threading

__all__ = ["Terminated", "as_interrupt", "check"]

_SIGNALS = tuple(s for s in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)) if s)


#: the signal received inside the active :func:`as_interrupt`, until the context ends
_received: list[int] = []


def check() -> None:
    """Raise :class:`Terminated` when SIGTERM/SIGHUP arrived inside :func:`as_interrupt`
    (its exception may have been swallowed where it was raised); a no-op otherwise."""
    if _received:
        if _received[0] == signal.SIGINT:
            raise KeyboardInterrupt
        raise Terminated(signal.Signals(_received[0]).name)


class Terminated(KeyboardInterrupt):
    """The run received SIGTERM or SIGHUP; its one argument is the signal's name (plain
    args, so that code which re-creates an exception from its args keeps it intact)."""


@contextlib.contextmanager
def as_interrupt():
    """Turn SIGTERM/SIGHUP into :class:`Terminated` for the duration (main thread only;
    elsewhere a no-op)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    fired = []

    def handler(signum, frame):
        if fired:                      # the report is being written: let it finish
            return
        fired.append(signum)
        _received.append(signum)
        if signum == signal.SIGINT:
            raise KeyboardInterrupt
        raise Terminated(signal.Signals(signum).name)

    ours = _SIGNALS
    if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
        ours = ours + (signal.SIGINT,)         # Ctrl-C: recorded too, same exception as Python's
    previous = {s: signal.signal(s, handler) for s in ours}
    try:
        yield fired
    finally:
        _received.clear()              # delivered, and the caller has written its report
        for s in ours:
            signal.signal(s, previous[s])
