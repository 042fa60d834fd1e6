"""``convwitness selftest``: the suite run on the planted-bug zoo and on correct adapters.

Every zoo adapter (:mod:`convwitness.adapters.zoo`) carries one realistic defect and
claims what a correct implementation of it would claim; the controls (the float64
reference and a plain tap-by-tap numpy convolution) carry none. The self-test runs
every applicable invariant on each, in-process, and prints the detection matrix: one
row per adapter, one column per invariant that flagged anything, ``X`` where that
invariant caught the bug. It exits 0 only when every bug is caught by at least one
invariant that decides conformance and no control is flagged by any; 1 otherwise.

For each caught bug it then shrinks the failure of the first invariant that caught it
(hypothesis, then the local pass of run/minimize.py) and prints the share of these
zoo witnesses that are 1-minimal (the goal is all of them), naming any that are not.

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

__all__ = ["selftest", "run_zoo", "ZooOutcome", "detection_matrix", "seed_matrix", "parse_seeds"]

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
    witness: dict | None = None                         # the shrunk witness of caught_by[0]

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
            on_done=None, witnesses: bool = True,
            compiles_per_shape: bool = False) -> list[ZooOutcome]:
    """Run the suite on every zoo entry and control; ``on_done(outcome)`` after each.
    With ``witnesses``, a caught bug's first catching invariant is run again with
    shrinking and the local minimizing pass, and its witness kept. With
    ``compiles_per_shape``, every entry runs as a port that declares it (the free search
    on the covering schedule's geometries)."""
    profile = get_profile(profile)
    outcomes = []
    for name, cls, control, bug_class in _entries(only):
        adapter = load_adapter(cls())
        if compiles_per_shape:
            adapter.capabilities = adapter.capabilities.replace(compiles_per_shape=True)
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
        if witnesses and out.caught_by and not control:
            from ..invariants import get
            from .runner import run_invariant
            shrunk = run_invariant(adapter, get(out.caught_by[0]), profile, seed=seed, shrink=True)
            out.witness = shrunk.witness
            out.seconds = time.perf_counter() - t0
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


def parse_seeds(text: str) -> list[int]:
    """``"0-4"``, ``"0,2,7"`` or a mix (``"0-2,9"``) as a list of seeds."""
    from ..errors import ConvWitnessError
    out: list[int] = []
    try:
        for part in (p.strip() for p in str(text).split(",")):
            lo, dash, hi = part.partition("-")
            out += list(range(int(lo), int(hi) + 1)) if dash else [int(lo)]
    except ValueError:
        raise ConvWitnessError(f"selftest --seeds={text!r}: expected seeds such as 0-4 or 0,2,7 "
                               f"(non-negative integers and ranges)") from None
    if not out or min(out) < 0:
        raise ConvWitnessError(f"selftest --seeds={text!r}: expected at least one non-negative "
                               f"seed, e.g. 0-4")
    return sorted(set(out))


def seed_matrix(by_seed: dict) -> str:
    """The bug × seed matrix: per seed, how many deciding invariants caught the entry
    (a control shows how many flagged it: it must be 0 everywhere)."""
    seeds = list(by_seed)
    rows = by_seed[seeds[0]]
    width = max([len(o.name) for o in rows] + [8])
    lines = [" " * (width + 6) + " ".join(f"s{sd:<3}" for sd in seeds) + "  all"]
    for i, o in enumerate(rows):
        cells = [by_seed[sd][i] for sd in seeds]
        marks = " ".join(f"{len(c.caught_by):>3} " if c.ok else
                         (" !! " if c.control else " -- ") for c in cells)
        tag = "ctrl" if o.control else (o.bug_class or "bug")
        lines.append(f"{o.name:<{width}} {tag:>4}  {marks}  {'ok' if all(c.ok for c in cells) else 'NO'}")
    return "\n".join(lines)


def _seeds_selftest(profile, seeds, only, stdout, stderr, compiles_per_shape=False) -> int:
    t0 = time.perf_counter()
    by_seed = {}
    for sd in seeds:
        by_seed[sd] = run_zoo(profile, sd, only, compiles_per_shape=compiles_per_shape,
                              on_done=lambda o, sd=sd: print(
            f"selftest: seed {sd}: {o.name}: {len(o.caught_by)} invariants flagged it "
            f"({o.seconds:.1f} s)", file=stderr))
    mode = ", every entry declaring compiles_per_shape" if compiles_per_shape else ""
    print(f"seed × entry matrix ({get_profile(profile).name} profile, shrinking off{mode}): the number "
          f"of deciding invariants that caught each bug; -- a missed bug, !! a flagged control",
          file=stdout)
    print(seed_matrix(by_seed), file=stdout)
    bugs = [o.name for o in by_seed[seeds[0]] if not o.control]
    cells = [(sd, o) for sd in seeds for o in by_seed[sd]]
    missed = [(sd, o.name) for sd, o in cells if not o.control and not o.caught_by]
    flagged = [(sd, o) for sd, o in cells if o.control and o.caught_by]
    full = len(bugs) * len(seeds)
    print(f"\n{full - len(missed)} of {full} (bug, seed) cells caught on seeds "
          f"{','.join(map(str, seeds))}; {len(flagged)} false alarms "
          f"({time.perf_counter() - t0:.0f} s)", file=stdout)
    for sd, name in missed:
        print(f"MISSED: {name} on seed {sd}", file=stdout)
    for sd, o in flagged:
        print(f"FALSE ALARM: {', '.join(o.caught_by)} flagged {o.name} on seed {sd}", file=stdout)
    return 0 if not missed and not flagged else 1


def selftest(profile="quick", seed: int | None = 0, only: str | None = None,
             stdout=None, stderr=None, seeds=None, compiles_per_shape: bool = False) -> int:
    """Run the zoo and print the detection matrix; with ``seeds`` (a list or "0-4"), run
    it once per seed and print the bug × seed matrix instead."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    if seeds is not None:
        seeds = parse_seeds(seeds) if isinstance(seeds, str) else list(seeds)
        return _seeds_selftest(profile, seeds, only, stdout, stderr, compiles_per_shape)
    t0 = time.perf_counter()

    def tell(o: ZooOutcome):
        what = ("clean" if not o.caught_by else f"FLAGGED by {', '.join(o.caught_by)}") if o.control \
            else (f"caught by {len(o.caught_by)}" if o.caught_by else "MISSED")
        print(f"selftest: {o.name}: {what} ({o.ran} invariants, {o.seconds:.1f} s)", file=stderr)

    outcomes = run_zoo(profile, seed, only, on_done=tell, compiles_per_shape=compiles_per_shape)
    print(detection_matrix(outcomes), file=stdout)
    missed = [o.name for o in outcomes if not o.control and not o.caught_by]
    flagged = [o for o in outcomes if o.control and o.caught_by]
    bugs = [o for o in outcomes if not o.control]
    print(f"\n{len(bugs) - len(missed)} of {len(bugs)} planted bugs caught; "
          f"{sum(1 for o in outcomes if o.control) - len(flagged)} of "
          f"{sum(1 for o in outcomes if o.control)} correct adapters clean "
          f"({time.perf_counter() - t0:.0f} s)", file=stdout)
    shrunk = [o for o in bugs if o.witness is not None]
    if shrunk:
        minimal = [o for o in shrunk if o.witness.get("minimal")]
        print(f"{len(minimal)} of {len(shrunk)} zoo witnesses 1-minimal "
              f"({100.0 * len(minimal) / len(shrunk):.0f}%)", file=stdout)
        for o in shrunk:
            if not o.witness.get("minimal"):
                print(f"NOT 1-MINIMAL: {o.name} {o.caught_by[0]}: {o.witness['geometry']} -- "
                      f"{o.witness.get('minimization', 'no local pass')}", file=stdout)
    for name in missed:
        print(f"MISSED: {name} was certified although it carries a planted bug", file=stdout)
    for o in flagged:
        for inv in o.caught_by:
            print(f"FALSE ALARM: {inv} flagged the correct adapter {o.name}: {o.messages[inv]}",
                  file=stdout)
    return 0 if not missed and not flagged else 1
