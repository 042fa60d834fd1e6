"""The runner: every applicable invariant, driven by hypothesis, into results.

One execution path: ``convwitness run`` and the generated pytest suites both call
:func:`hypothesis_test` (the same strategies, settings and seed) and :meth:`Invariant.check`.
"""
from __future__ import annotations

import fnmatch
import os
import time
import traceback
import warnings
from collections import Counter
from dataclasses import dataclass, field

import hypothesis
from hypothesis import HealthCheck, given, settings
from hypothesis.database import DirectoryBasedExampleDatabase
from hypothesis.errors import Unsatisfiable

from ..boundary.calls import clock_of
from ..errors import AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout
from ..invariants.evidence import Evidence, InvariantFailure, verdict_of as _verdict_of
from ..invariants import Context, Invariant, catalogue
from ..cases.profiles import Profile, get_profile
from ..cases.features import geometry_tags
from ..cases.strategies import independent_of_loaded_modules
from .covering import covering_examples, free_examples, free_strategy, with_examples
from .signals import check as interruption_check

__all__ = ["InvariantResult", "run_invariant", "select", "hypothesis_test", "BudgetExhausted",
           "SKIP_CAP", "DECIDING_FAILURES"]

MAX_SHARES = 400
#: when examples skip, up to SKIP_CAP times the profile's geometries are drawn to reach
#: the profile's count of checked geometries
SKIP_CAP = 2
#: verdicts of a result that go against the adapter (unless information only)
DECIDING_FAILURES = ("fail", "error", "crash", "timeout")


@dataclass
class InvariantResult:
    id: str
    statement: str
    property: str
    passes: list
    verdict: str
    informational: bool = False
    examples: int = 0
    geometries: int = 0
    skipped: int = 0
    skip_reasons: list = field(default_factory=list)
    worst_share: float = 0.0
    worst_bound: str = ""
    shares: list = field(default_factory=list)
    duration_s: float = 0.0
    message: str = ""
    reason: str = ""
    witness: dict | None = None
    traceback: str = ""
    output: str = ""
    coverage: dict = field(default_factory=dict)
    same_cause_as: str = ""      # the invariant whose timeout/crash witness reproduced here
    further: list = field(default_factory=list)   # further causes (run/further.py)
    #: targets the invariant could reach, pair spaces, and what it reached (tag -> count)
    reach: dict = field(default_factory=dict)

    @property
    def counts(self) -> bool:
        """Whether this result decides conformance (informational failures do not)."""
        return not self.informational

    @property
    def examples_per_s(self) -> float:
        return self.examples / self.duration_s if self.duration_s > 0 else 0.0


def select(caps, only=None) -> list[tuple[Invariant, str | None]]:
    """(invariant, refusal) for every invariant matching ``only`` (glob patterns, comma list)."""
    patterns = [p.strip() for p in (only or "").split(",") if p.strip()]
    out = []
    for inv in catalogue():
        if patterns and not any(fnmatch.fnmatchcase(inv.id, p) or inv.id.startswith(p + ".")
                                or inv.id == p for p in patterns):
            continue
        out.append((inv, inv.refusal(caps)))
    return out


def hypothesis_settings(profile: Profile, database_dir: str | None, *, shrink: bool = True,
                        max_examples: int | None = None):
    """Settings of one invariant's test: up to SKIP_CAP x the free search's geometries
    are drawn (``max_examples``, default the profile's); the test body stops (``Enough``)
    once the planned count is checked."""
    phases = list(hypothesis.Phase)
    if not shrink:
        phases = [p for p in phases if p is not hypothesis.Phase.shrink]
    return settings(
        max_examples=(profile.examples if max_examples is None else max_examples) * SKIP_CAP,
        deadline=profile.deadline_ms,
        database=DirectoryBasedExampleDatabase(database_dir) if database_dir else None,
        suppress_health_check=list(HealthCheck),
        report_multiple_bugs=False,
        phases=phases,
        print_blob=False,
        verbosity=hypothesis.Verbosity.quiet,
    )


class BudgetExhausted(BaseException):
    """Raised inside a hypothesis test when an invariant has used its time budget.

    A BaseException, so hypothesis stops instead of treating it as a failure."""


class StopSearch(BaseException):
    """Raised inside a hypothesis test to end the search at once, without shrinking:
    after a call timed out (shrinking a hang costs a full timeout per try).

    A BaseException, so hypothesis stops instead of treating it as a failure."""


class Enough(BaseException):
    """Raised inside a hypothesis test once the profile's count of checked geometries is
    reached (more are drawn only to make up for skipped ones)."""


class _Tally:
    """What the test body saw: counts, shares, coverage and the last failing case.

    ``examples`` and ``geometries`` count what was checked; ``skipped`` counts examples
    that could not be checked, ``skip_reasons`` why."""

    def __init__(self):
        self.examples = 0
        self.geometries = 0
        self.distinct: set = set()   # the distinct geometries checked (what the report counts)
        self.drawn = 0
        self.skipped = 0
        self.skip_reasons: Counter = Counter()
        self.shares: list[float] = []
        self.worst: Evidence | None = None
        self.failure = None          # (case, evidence or exception)
        self.coverage: Counter = Counter()
        self.started: float | None = None
        self.stopped = False
        self.vacuous = 0
        self.vacuous_why = ""
        self.hung = False
        self.reach: Counter = Counter()
        self.plan: dict = {}
        self.target = 0              # geometries to check (set by hypothesis_test)

    def record(self, case, ev: Evidence):
        share = float(ev.share)
        if len(self.shares) < MAX_SHARES:
            self.shares.append(share if share < 1e300 else 1e300)
        if self.worst is None or share > self.worst.share:
            self.worst = ev


def hypothesis_test(adapter, inv: Invariant, profile: Profile, seed: int | None,
                    database_dir: str | None = None, tally: _Tally | None = None,
                    context: Context | None = None, shrink: bool = True, exclude=None):
    """The hypothesis test of one invariant on one adapter (call it to run)."""
    tally = tally if tally is not None else _Tally()
    context = context or Context(profile=profile)
    explicit = covering_examples(inv.claims(adapter.capabilities), inv, profile, seed, tally)
    strategy = free_strategy(adapter.capabilities, inv, profile, explicit)

    def geometry_checked(spec):
        tally.geometries += 1
        if spec in tally.distinct:      # counted once, however often it is drawn
            return
        tally.distinct.add(spec)
        coverage, reach = geometry_tags(spec, profile.max_elements)
        tally.coverage.update(coverage)
        tally.reach.update(reach)

    def body(cases):
        interruption_check()           # a signal whose exception was swallowed (run/signals.py)
        now = time.perf_counter()
        if tally.started is None:
            tally.started = now
        elif now - tally.started > profile.budget_s:
            tally.stopped = True
            raise BudgetExhausted(f"{inv.id} used its budget of {profile.budget_s:g} s")
        if tally.failure is None and tally.geometries >= tally.target:
            raise Enough()
        tally.drawn += 1
        spec = cases[0].spec
        if exclude is not None and exclude(spec):
            hypothesis.reject()        # a known cause's region (run/further.py)
        checked_here = False
        worst = 0.0
        for case in cases:
            try:
                ev = inv.check(adapter, case, context)
            except AdapterTimeout as exc:
                tally.failure = (case, exc)
                tally.hung = True
                tally.examples += 1
                tally.coverage[f"kind={case.kind}"] += 1
                tally.reach[f"kind:{case.kind}"] += 1
                if not checked_here:
                    geometry_checked(spec)
                raise StopSearch(str(exc)) from None
            except Exception as exc:
                tally.failure = (case, exc)
                tally.examples += 1
                tally.coverage[f"kind={case.kind}"] += 1
                tally.reach[f"kind:{case.kind}"] += 1
                if not checked_here:
                    geometry_checked(spec)
                raise
            if ev.skipped:
                tally.skipped += 1
                tally.skip_reasons[ev.skipped] += 1
                continue
            tally.examples += 1
            tally.coverage[f"kind={case.kind}"] += 1
            tally.reach[f"kind:{case.kind}"] += 1
            if not checked_here:
                checked_here = True
                geometry_checked(spec)
            tally.record(case, ev)
            if ev.details.get("vacuous"):
                tally.vacuous += 1
                tally.vacuous_why = ev.details["vacuous"]
            worst = max(worst, min(float(ev.share), 1e12))
            if not ev.ok:
                tally.failure = (case, ev)
                raise InvariantFailure(ev)
        if inv.steer:
            hypothesis.target(worst, label="share of bound")

    test = with_examples(given(strategy)(body), explicit)
    free = free_examples(profile, explicit)
    tally.target = len(explicit) + free     # checked geometries: the schedule, then the free search
    test = hypothesis_settings(profile, database_dir, shrink=shrink, max_examples=free)(test)
    if seed is not None:
        test = hypothesis.seed(seed)(test)
    return test, tally


def _failure_exception(what):
    return InvariantFailure(what) if isinstance(what, Evidence) else what


def run_invariant(adapter, inv: Invariant, profile, *, seed: int | None = 0,
                  report_dir: str | None = None, refusal: str | None = None,
                  shrink: bool = True, replay_hint: str = "", watch=None, exclude=None,
                  witness_name: str | None = None, database: bool = True) -> InvariantResult:
    """Run one invariant; failures are shrunk by hypothesis and saved as a witness."""
    profile = get_profile(profile)
    caps = adapter.capabilities
    res = InvariantResult(id=inv.id, statement=inv.statement, property=inv.property,
                          passes=sorted(inv.passes), verdict="pass",
                          informational=inv.informational(caps))
    if refusal:
        res.verdict, res.reason = "not-applicable", refusal
        return res
    db = os.path.join(report_dir, ".hypothesis") if report_dir and database else None
    test, tally = hypothesis_test(adapter, inv, profile, seed, db, shrink=shrink, exclude=exclude)
    if watch is not None:
        watch.tally = tally          # the heartbeat reads the running count of examples
    t0 = time.perf_counter()
    try:
        try:
            with warnings.catch_warnings(), independent_of_loaded_modules():
                # overflow and invalid-value warnings are expected on near-maximal and
                # special data; the evidence, not the warning, decides
                warnings.simplefilter("ignore", RuntimeWarning)
                # hypothesis prices the repr of a failing case's arrays; the witness file,
                # not that repr, is what we keep
                warnings.filterwarnings("ignore", message="Generating overly large repr")
                test()
        except StopSearch:
            raise _failure_exception(tally.failure[1]) from None
        except Enough:
            pass
        except BudgetExhausted:
            if tally.failure is None:
                res.reason = (f"stopped at the time budget of {profile.budget_s:g} s after "
                              f"{tally.examples} checked examples")
            else:
                raise _failure_exception(tally.failure[1]) from None
    except Unsatisfiable as exc:
        res.verdict = "not-applicable"
        res.reason = f"no admitted geometry could be drawn: {exc}"
    except (InvariantFailure, AdapterOutputError, AdapterRaised, AdapterCrashed, AdapterTimeout) as exc:
        res.verdict = _verdict_of(exc)
        res.message = str(exc)
        if isinstance(exc, AdapterRaised):
            res.traceback = exc.traceback_text
        res.output = getattr(exc, "output", "") or ""
    except Exception as exc:   # a bug of convwitness itself: never the adapter's verdict
        res.verdict = "internal"
        res.message = f"{type(exc).__name__}: {exc}"
        res.traceback = traceback.format_exc()
    if tally.failure is not None and res.verdict in DECIDING_FAILURES + ("internal",):
        # the message of the minimal case (the last failing execution), to match the witness
        what = tally.failure[1]
        res.verdict = _verdict_of(what if not isinstance(what, Evidence) else InvariantFailure(what))
        res.message = what.message if isinstance(what, Evidence) else str(what)
        if isinstance(what, AdapterRaised):
            res.traceback = what.traceback_text
        elif not isinstance(what, Evidence) and _verdict_of(what) == "internal":
            res.message = f"{type(what).__name__}: {what}"
            res.traceback = "".join(traceback.format_exception(what))
    if res.verdict == "internal":
        res.message = (f"internal error in convwitness (a bug in convwitness, not in the adapter) "
                       f"while checking {inv.id}: {res.message}")
        saved = _save_traceback(report_dir, inv.id, res.traceback)
        if saved:
            res.message += f" (traceback saved to {saved})"
    if tally.vacuous:
        res.reason = (f"{tally.vacuous} of {tally.examples} examples had a vacuous bound (n·u >= 1): "
                      f"{tally.vacuous_why}").strip()
    if tally.stopped and tally.failure is not None:
        res.reason = f"shrinking stopped at the time budget of {profile.budget_s:g} s"
    if tally.hung:
        res.reason = ("not shrunk by hypothesis: the search stopped at the first call that hung "
                      "(each try of a hang costs a full call timeout); smaller neighbours were "
                      "probed under the tight probe limit instead")
    drain = getattr(adapter, "drain_output", None)
    if drain is not None:
        text = drain()
        res.output = (res.output + text)[-20000:] if text else res.output[-20000:]
    res.duration_s = time.perf_counter() - t0
    res.examples, res.geometries = tally.examples, len(tally.distinct)
    res.skipped = tally.skipped
    res.skip_reasons = [{"reason": why, "examples": n} for why, n in tally.skip_reasons.most_common(3)]
    res.shares = tally.shares
    res.coverage = dict(tally.coverage)
    _account_for_skips(res, tally, profile)
    if tally.plan:
        res.reach = dict(tally.plan, reached=dict(sorted(tally.reach.items())))
    if tally.worst is not None:
        res.worst_share = float(tally.worst.share)
        res.worst_bound = tally.worst.message.splitlines()[0] if tally.worst.message else ""
    if res.verdict in DECIDING_FAILURES + ("internal",) and tally.failure is not None:
        case, what = tally.failure
        if isinstance(what, Evidence):
            res.worst_share = float(what.share)
        minimal = None
        if shrink:                      # the local pass after hypothesis's shrinking
            from .minimize import minimize
            clock = clock_of(adapter)
            if isinstance(what, AdapterTimeout) and clock is not None:
                with clock.probing():   # a hang is probed under the tight limit, not rerun in full
                    minimal = minimize(adapter, inv, case, what, profile, exclude=exclude)
            else:
                minimal = minimize(adapter, inv, case, what, profile, exclude=exclude)
            if minimal.steps:           # the case moved: its message is the one to show
                case, what = minimal.case, minimal.what
                res.message = what.message if isinstance(what, Evidence) else str(what)
        if isinstance(what, Evidence):
            # the share of the minimal case, the one the message and the witness show
            res.worst_share = float(what.share)
            res.worst_bound = what.message.splitlines()[0] if what.message else res.worst_bound
        if report_dir:
            res.witness = save_witness(case, inv, res, report_dir, seed, adapter, replay_hint,
                                       name=witness_name)
        else:
            res.witness = {"spec": case.spec.to_dict(), "geometry": case.spec.describe(),
                           "kind": case.kind}
        if minimal is not None:
            res.witness.update(minimal=minimal.minimal, minimization=minimal.note)
    res.duration_s = time.perf_counter() - t0
    return res


def _account_for_skips(res: InvariantResult, tally: _Tally, profile: Profile) -> None:
    """A passing invariant that checked nothing is not applicable (with the commonest
    reason); one that checked fewer geometries than the profile asks says so."""
    if res.verdict != "pass":
        return
    if tally.examples == 0:
        res.verdict = "not-applicable"
        if tally.skipped:
            why, n = tally.skip_reasons.most_common(1)[0]
            res.reason = (f"every example skipped ({tally.skipped} of {tally.skipped}, "
                          f"{n} because {why})")
        else:
            res.reason = "no example was checked" + (f" ({res.reason})" if res.reason else "")
        return
    planned = tally.target or profile.examples
    if tally.skipped and tally.geometries < planned and not tally.stopped:
        short = (f"checked {tally.geometries} of the {planned} planned geometries: "
                 f"{tally.skipped} example(s) skipped in {tally.drawn} drawn (cap {SKIP_CAP}x)")
        res.reason = f"{short}; {res.reason}" if res.reason else short


def _save_traceback(report_dir: str | None, inv_id: str, text: str) -> str:
    """Write an internal error's traceback to ``report_dir/internal/<id>.txt``
    (or a temporary file without a report folder); returns the path."""
    import tempfile
    try:
        if report_dir:
            folder = os.path.join(report_dir, "internal")
            os.makedirs(folder, exist_ok=True)
            path = os.path.join(folder, f"{inv_id}.txt")
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(text)
            return path
        fd, path = tempfile.mkstemp(prefix=f"convwitness-internal-{inv_id}-", suffix=".txt")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        return path
    except OSError:
        return ""


def save_witness(case, inv, res, report_dir, seed, adapter, replay_hint, name=None) -> dict:
    from .witness import write_witness
    return write_witness(case, invariant=inv.id, verdict=res.verdict, message=res.message,
                         report_dir=report_dir, seed=seed, adapter_source=adapter.source,
                         replay_hint=replay_hint, name=name)
