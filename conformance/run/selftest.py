"""``convwitness selftest``: the suite run on the planted-bug zoo and on correct adapters.

Every zoo adapter (:mod:`convwitness.adapters.zoo`) carries one realistic defect and
claims what a correct implementation of it would claim; the controls (the float64
reference and a plain tap-by-tap numpy convolution) carry none. The self-test runs
every applicable invariant on each, in-process, and prints the detection matrix: one
row per adapter, one column per invariant that flagged anything, ``X`` where that
invariant caught the bug. It exits 0 only when every bug is caught by at least one
invariant that decides conformance and no control is flagged by any; 1 otherwise.

A bug counts as caught when an invariant that is not merely informational ends in
``fail``, ``error``, ``crash`` or ``timeout`` on it. Informational results (special
values on an adapter that does not claim IEEE semantics) never count, either way.
"""
from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field

from .certify import certify
from ..boundary.loading import load_adapter
from ..cases.profiles import get_profile

__all__ = ["selftest", "run_zoo", "ZooOutcome", "detection_matrix"]

FLAGGED = ("fail", "error", "crash", "timeout")


@dataclass
class ZooOutcome:
    """What the suite made of one zoo entry or control."""
    name: str
    bug_class: str
    control: bool
    caught_by: list = field(default_factory=list)       # invariant ids that flagged it
    messages: dict = field(default_factory=dict)        # id -> first line of the anatomy
    ran: int = 0                                        # invariants that ran (not n/a)
    seconds: float = 0.0

    @property
    def ok(self) -> bool:
        return not self.caught_by if self.control else bool(self.caught_by)


def _entries(only: str | None):
    from ..adapters.zoo import CORRECT, ZOO, bug_class_of
    from ..adapters.zoo_quant import QUANT_CORRECT, QUANT_ZOO
    rows = [(name, cls, True) for name, cls in CORRECT.items()]
    rows += [(name, cls, False) for name, cls in ZOO.items()]
    # the quantized zoo and its controls (adapters/zoo_quant.py, bug classes Q01..)
    rows += [(name, cls, True) for name, cls in QUANT_CORRECT.items()]
    rows += [(name, cls, False) for name, cls in QUANT_ZOO.items()]
    quant_class = {name: getattr(cls, "bug_class", "") for name, cls in QUANT_ZOO.items()}
    if only:
        wanted = [w.strip() for w in only.split(",") if w.strip()]
        known = {name for name, _, _ in rows}
        unknown = [w for w in wanted if w not in known]
        if unknown:
            from ..errors import ConvWitnessError
            raise ConvWitnessError(
                f"selftest --only={','.join(unknown)}: no such zoo entry; expected names from "
                f"{', '.join(sorted(known))}")
        rows = [r for r in rows if r[0] in wanted]
    return [(name, cls, control, quant_class.get(name) or bug_class_of(name))
            for name, cls, control in rows]


def run_zoo(profile="quick", seed: int | None = 0, only: str | None = None,
            on_done=None) -> list[ZooOutcome]:
    """Run the suite on every zoo entry and control; ``on_done(outcome)`` after each."""
    profile = get_profile(profile)
    outcomes = []
    for name, cls, control, bug_class in _entries(only):
        adapter = load_adapter(cls())
        t0 = time.perf_counter()
        _, results = certify(adapter, profile=profile, seed=seed, report_dir=None, shrink=False)
        out = ZooOutcome(name=name, bug_class=bug_class, control=control,
                         seconds=time.perf_counter() - t0)
        for r in results:
            if r.verdict != "not-applicable":
                out.ran += 1
            if r.verdict in FLAGGED and not r.informational:
                out.caught_by.append(r.id)
                out.messages[r.id] = (r.message or r.verdict).splitlines()[0][:160]
        outcomes.append(out)
        if on_done is not None:
            on_done(out)
    return outcomes


def detection_matrix(outcomes: list[ZooOutcome]) -> str:
    """The bug × invariant matrix as text: invariant columns are numbered, with a key."""
    columns = sorted({i for o in outcomes for i in o.caught_by})
    width = max([len(o.name) for o in outcomes] + [8])
    lines = ["columns: " + "  ".join(f"{k + 1}={c}" for k, c in enumerate(columns))]
    head = " " * (width + 6) + " ".join(f"{k + 1:>2}" for k in range(len(columns)))
    lines.append(head)
    for o in outcomes:
        cells = " ".join(" X" if c in o.caught_by else " ." for c in columns)
        tag = "ctrl" if o.control else (o.bug_class or "bug")
        state = "ok" if o.ok else ("FLAGGED" if o.control else "MISSED")
        lines.append(f"{o.name:<{width}} {tag:>4}  {cells}  {state}")
    return "\n".join(lines)


def selftest(profile="quick", seed: int | None = 0, only: str | None = None,
             stdout=None, stderr=None) -> int:
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    t0 = time.perf_counter()

    def tell(o: ZooOutcome):
        what = ("clean" if not o.caught_by else f"FLAGGED by {', '.join(o.caught_by)}") if o.control \
            else (f"caught by {len(o.caught_by)}" if o.caught_by else "MISSED")
        print(f"selftest: {o.name}: {what} ({o.ran} invariants, {o.seconds:.1f} s)", file=stderr)

    outcomes = run_zoo(profile, seed, only, on_done=tell)
    print(detection_matrix(outcomes), file=stdout)
    missed = [o.name for o in outcomes if not o.control and not o.caught_by]
    flagged = [o for o in outcomes if o.control and o.caught_by]
    bugs = [o for o in outcomes if not o.control]
    print(f"\n{len(bugs) - len(missed)} of {len(bugs)} planted bugs caught; "
          f"{sum(1 for o in outcomes if o.control) - len(flagged)} of "
          f"{sum(1 for o in outcomes if o.control)} correct adapters clean "
          f"({time.perf_counter() - t0:.0f} s)", file=stdout)
    for name in missed:
        print(f"MISSED: {name} was certified although it carries a planted bug", file=stdout)
    for o in flagged:
        for inv in o.caught_by:
            print(f"FALSE ALARM: {inv} flagged the correct adapter {o.name}: {o.messages[inv]}",
                  file=stdout)
    return 0 if not missed and not flagged else 1
