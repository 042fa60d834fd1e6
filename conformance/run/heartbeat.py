"""A heartbeat while an invariant runs, for outputs that are not a terminal.

A CI log shows one line per finished invariant; a nightly invariant can run for up to
an hour, so a slow invariant could not be told from a hung one. While an invariant
runs, :class:`Heartbeat` tells the progress callback every ``interval`` seconds which
invariant it is, how many examples it has checked so far and for how long it has run
(event ``"heartbeat"``). The count comes from the runner's tally (``watch.tally``).
"""
from __future__ import annotations

import threading
import time

__all__ = ["Heartbeat", "HEARTBEAT_S"]

HEARTBEAT_S = 30.0


class Heartbeat:
    def __init__(self, progress, interval: float = HEARTBEAT_S):
        self.progress = progress
        self.interval = float(interval)
        self.tally = None                 # set by run_invariant (watch=)
        self._id = None
        self._since = 0.0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._beat, name="convwitness-heartbeat", daemon=True)
        self._thread.start()

    def begin(self, invariant_id: str) -> None:
        with self._lock:
            self._id, self._since, self.tally = invariant_id, time.perf_counter(), None

    def end(self) -> None:
        with self._lock:
            self._id = None

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2.0)

    def _beat(self) -> None:
        while not self._stop.wait(self.interval):
            with self._lock:
                if self._id is None:
                    continue
                payload = {"id": self._id, "elapsed_invariant": time.perf_counter() - self._since,
                           "examples": getattr(self.tally, "examples", 0)}
            try:
                self.progress("heartbeat", payload)
            except Exception:             # a heartbeat must never break the run
                pass
