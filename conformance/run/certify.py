"""One certification run: every selected invariant on one adapter, into a report."""
from __future__ import annotations

import contextlib
import os
import time
from typing import Callable

from ..cases.profiles import get_profile
from ..report.document import build_report, write_report
from .causes import KnownCauses
from .further import search_further
from .heartbeat import HEARTBEAT_S, Heartbeat
from .signals import Terminated, as_interrupt, check as interruption_check
from .runner import InvariantResult, run_invariant, select

__all__ = ["certify"]


def certify(adapter, *, profile="quick", only: str | None = None, seed: int | None = 0,
            report_dir: str | None = None, progress: Callable | None = None,
            shrink: bool = True, shard: str | None = None, replay_hint: str = "",
            journal=None, work=None, heartbeat_s: float | None = HEARTBEAT_S):
    """Run the suite; returns (report document, results). Writes the report when
    ``report_dir`` is given. ``progress(event, payload)`` is told of each step.
    ``work`` optionally filters the selected invariants (sharding). While an invariant
    runs, ``progress("heartbeat", ...)`` comes every ``heartbeat_s`` seconds (None: never)."""
    profile = get_profile(profile)
    chosen = select(adapter.capabilities, only)
    if work is not None:
        chosen = work(chosen)
    own_journal = False
    if report_dir:
        os.makedirs(report_dir, exist_ok=True)
        _drop_stale_witnesses(report_dir, [inv.id for inv, _ in chosen])
        if journal is None:
            from .journal import Journal
            journal = Journal.open(report_dir, adapter, profile, seed,
                                   planned=[inv.id for inv, _ in chosen], shard=shard)
            own_journal = True
    started = time.time()
    t0 = time.perf_counter()
    results: list[InvariantResult] = []
    status = "complete"
    known = KnownCauses()
    stop = contextlib.ExitStack()
    stop.enter_context(as_interrupt())
    beat = Heartbeat(progress, heartbeat_s) if progress and heartbeat_s else None
    if beat is not None:
        stop.callback(beat.close)
    try:
        for i, (inv, refusal) in enumerate(chosen):
            interruption_check()
            if progress:
                progress("start", {"index": i, "total": len(chosen), "id": inv.id})
            res = None
            if beat is not None:
                beat.begin(inv.id)
            if refusal is None and known.causes:
                res = _replay_known(adapter, inv, profile, known)
            if res is None:
                res = run_invariant(adapter, inv, profile, seed=seed, report_dir=report_dir,
                                    refusal=refusal, shrink=shrink, replay_hint=replay_hint,
                                    watch=beat)
                res.further = search_further(adapter, inv, profile, res, seed=seed,
                                             report_dir=report_dir, shrink=shrink,
                                             replay_hint=replay_hint, run_invariant=run_invariant)
            if beat is not None:
                beat.end()
            known.learn(res)
            results.append(res)
            if journal is not None:
                journal.append(res)
            if progress:
                progress("done", {"index": i, "total": len(chosen), "result": res,
                                  "elapsed": time.perf_counter() - t0})
    except KeyboardInterrupt as exc:
        status = "partial"
        if progress:
            progress("interrupted", {"done": len(results), "total": len(chosen),
                                     "signal": str(exc) if isinstance(exc, Terminated) else "SIGINT"})
    if own_journal:
        journal.close()
    doc = build_report(adapter, results, profile=profile, seed=seed, started=started,
                       duration_s=time.perf_counter() - t0, shard=shard,
                       status="partial" if shard else status)
    try:
        if report_dir:
            write_report(doc, report_dir)
    finally:
        stop.close()                   # the previous signal handlers come back
    return doc, results


def _replay_known(adapter, inv, profile, known) -> InvariantResult | None:
    """The result of ``inv`` when a known timeout/crash cause reproduces on it, else None."""
    res = InvariantResult(id=inv.id, statement=inv.statement, property=inv.property,
                          passes=sorted(inv.passes), verdict="pass",
                          informational=inv.informational(adapter.capabilities))
    t0 = time.perf_counter()
    if not known.replay(adapter, inv, res, profile):
        return None
    res.duration_s = time.perf_counter() - t0
    res.examples = res.geometries = 1
    return res


def _drop_stale_witnesses(report_dir: str, ids) -> None:
    """Remove the witnesses an earlier run left for the invariants about to run, so a
    passing rerun leaves none behind (a failing one writes its own)."""
    folder = os.path.join(report_dir, "witnesses")
    for inv_id in ids:
        for ext in (".json", ".npz"):
            try:
                os.remove(os.path.join(folder, inv_id + ext))
            except FileNotFoundError:
                pass
