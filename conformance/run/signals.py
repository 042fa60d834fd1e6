"""SIGTERM and SIGHUP end a run the way Ctrl-C does: with a partial report.

CI systems send SIGTERM when a job runs past its time limit, and SIGHUP when the
terminal goes away. Inside :func:`as_interrupt`, either signal raises
:class:`Terminated` (a ``KeyboardInterrupt``) in the main thread, so the run stops at
the next Python instruction, the current invariant is dropped, and the report of the
finished ones is written with status ``partial``. A second signal while the report is
being written is ignored: the report is what the job is waiting for.
"""
from __future__ import annotations

import contextlib
import signal
import threading

__all__ = ["Terminated", "as_interrupt"]

_SIGNALS = tuple(s for s in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)) if s)


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
        raise Terminated(signal.Signals(signum).name)

    previous = {s: signal.signal(s, handler) for s in _SIGNALS}
    try:
        yield fired
    finally:
        # keep ignoring a repeated signal until the caller has written its report
        for s in _SIGNALS:
            signal.signal(s, (lambda *_: None) if fired else previous[s])
