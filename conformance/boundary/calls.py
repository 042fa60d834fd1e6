"""The call clock of an isolated adapter: how long each call may take.

Three rules keep a run on a hanging or slow port bounded and its verdicts honest:

* **First-call allowance.** Ports that compile per shape (JIT libraries, accelerator
  compilers, emulators) are slow the first time they see a call signature (method,
  argument shapes and dtypes, geometry) and quick after. A call whose signature is new
  may take ``first_call_allowance`` times the call timeout; a repeated one gets the
  plain timeout. Default 1 (no allowance); ``--first-call-allowance`` sets it.
* **A hang is never rerun.** A call that ran past its limit is remembered by its
  signature; calling it again raises :class:`AdapterTimeout` at once, saying when it hung.
* **Probes run tight.** While :meth:`CallClock.probing` is active (replaying a known
  cause in a later invariant, or probing smaller neighbours of a hang), every call gets
  the probe limit: three times the slowest call the port has answered so far, at least
  ``PROBE_FLOOR_S`` and at most the call timeout. A slow but correct port answered
  slowly before, so its probes get as long.
* **Once a port has hung**, a call with a new signature no longer gets the first-call
  allowance: it gets the probe limit (a port that compiles slowly has answered slowly
  before, so that limit is as long as its compiles were).
"""
from __future__ import annotations

import contextlib

import numpy as np

from ..errors import AdapterTimeout

__all__ = ["CallClock", "call_signature", "PROBE_FLOOR_S"]

PROBE_FLOOR_S = 5.0


def call_signature(op: str, args, kwargs) -> tuple:
    """What a compile-per-shape port keys its compiled code on: the method, each
    array's shape and dtype (other arguments by value), and the keyword arguments."""
    parts = [op]
    for a in args:
        if isinstance(a, np.ndarray):
            parts.append((a.shape, a.dtype.str))
        elif a is None or isinstance(a, (bool, int, float, str)):
            parts.append(a)
        else:
            parts.append(repr(a))
    parts.append(repr(sorted(kwargs.items())))
    return tuple(parts)


class CallClock:
    def __init__(self, call_timeout: float, first_call_allowance: float = 1.0):
        if not first_call_allowance >= 1.0:
            raise ValueError(f"first_call_allowance: expected a factor >= 1, got {first_call_allowance!r}")
        self.call_timeout = float(call_timeout)
        self.first_call_allowance = float(first_call_allowance)
        self.seen: set = set()
        self.hangs: dict = {}          # signature -> the message of its first hang
        self.slowest_ok = 0.0
        self._probe = 0

    def limit(self, sig) -> float:
        """Seconds this call may take; raises AdapterTimeout for a known hang."""
        if sig in self.hangs:
            raise AdapterTimeout(f"{self.hangs[sig]}; this exact call (same method, shapes and "
                                 "geometry) already hung once and is not run again")
        if self._probe:
            return self.probe_limit()
        if sig not in self.seen:
            if self.hangs:          # the port hangs: a new signature is probed, not allowed more
                return min(self.call_timeout * self.first_call_allowance, self.probe_limit())
            return self.call_timeout * self.first_call_allowance
        return self.call_timeout

    def probe_limit(self) -> float:
        return min(self.call_timeout, max(PROBE_FLOOR_S, 3.0 * self.slowest_ok))

    def answered(self, sig, seconds: float) -> None:
        self.seen.add(sig)
        self.slowest_ok = max(self.slowest_ok, seconds)

    def hung(self, sig, what: str, limit: float) -> str:
        """Remember a hang; returns the timeout message."""
        how = "the probe limit" if self._probe else (
            "the first-call limit" if limit > self.call_timeout else "the call timeout")
        msg = (f"{what} did not answer within {limit:g} s ({how}; --call-timeout "
               f"{self.call_timeout:g} s); the worker was killed and will be replaced")
        self.hangs[sig] = f"{what} hung past {limit:g} s before"
        return msg

    @contextlib.contextmanager
    def probing(self):
        self._probe += 1
        try:
            yield self
        finally:
            self._probe -= 1


def clock_of(adapter) -> CallClock | None:
    """The call clock behind an adapter, or None (in-process adapters have none)."""
    target = getattr(adapter, "target", adapter)
    clock = getattr(target, "clock", None)
    return clock if isinstance(clock, CallClock) else None
