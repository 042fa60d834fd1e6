"""The runner: every applicable invariant, driven by hypothesis, into results.

One execution path: ``convwitness run`` and the generated pytest suites both call
:func:`hypothesis_test` (the same strategies, settings and seed) and
:meth:`Invariant.check`.
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

from ..errors import (AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout,
                     ConvWitnessError)
from ..invariants.evidence import Evidence, InvariantFailure
from ..invariants import Context, Invariant, catalogue
from ..cases.profiles import Profile, get_profile
from ..cases.features import feature_of, pair_tags, reach_of
from .covering import covering_examples, free_examples, with_examples

__all__ = ["InvariantResult", "run_invariant", "select", "hypothesis_test", "BudgetExhausted"]

MAX_SHARES = 400


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
    phases = list(hypothesis.Phase)
    if not shrink:
        phases = [p for p in phases if p is not hypothesis.Phase.shrink]
    return settings(
        max_examples=profile.examples if max_examples is None else max_examples,
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


class _Tally:
    """What the test body saw: counts, shares, coverage and the last failing case."""

    def __init__(self):
        self.examples = 0
        self.geometries = 0
        self.shares: list[float] = []
        self.worst: Evidence | None = None
        self.failure = None          # (case, evidence or exception)
        self.coverage: Counter = Counter()
        self.started: float | None = None
        self.stopped = False
        self.vacuous = 0
        self.vacuous_why = ""
        self.reach: Counter = Counter()
        self.plan: dict = {}

    def record(self, case, ev: Evidence):
        share = float(ev.share)
        if len(self.shares) < MAX_SHARES:
            self.shares.append(share if share < 1e300 else 1e300)
        if self.worst is None or share > self.worst.share:
            self.worst = ev


def hypothesis_test(adapter, inv: Invariant, profile: Profile, seed: int | None,
                    database_dir: str | None = None, tally: _Tally | None = None,
                    context: Context | None = None, shrink: bool = True):
    """The hypothesis test of one invariant on one adapter (call it to run)."""
    tally = tally if tally is not None else _Tally()
    context = context or Context(profile=profile)
    strategy = inv.strategy(adapter.capabilities, profile)

    def body(cases):
        now = time.perf_counter()
        if tally.started is None:
            tally.started = now
        elif now - tally.started > profile.budget_s:
            tally.stopped = True
            raise BudgetExhausted(f"{inv.id} used its budget of {profile.budget_s:g} s")
        tally.geometries += 1
        spec = cases[0].spec
        for k, v in feature_of(spec).items():
            tally.coverage[f"{k}={v}"] += 1
        tally.reach.update(reach_of(spec) | pair_tags(spec))
        worst = 0.0
        for case in cases:
            tally.coverage[f"kind={case.kind}"] += 1
            tally.reach[f"kind:{case.kind}"] += 1
            tally.examples += 1
            try:
                ev = inv.check(adapter, case, context)
            except (AdapterRaised, AdapterOutputError, AdapterCrashed, AdapterTimeout) as exc:
                tally.failure = (case, exc)
                raise
            except Exception as exc:
                tally.failure = (case, exc)
                raise
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

    test = given(strategy)(body)
    explicit = covering_examples(adapter.capabilities, inv, profile, seed, tally)
    test = with_examples(test, explicit)
    test = hypothesis_settings(profile, database_dir, shrink=shrink,
                               max_examples=free_examples(profile, explicit))(test)
    if seed is not None:
        test = hypothesis.seed(seed)(test)
    return test, tally


def _failure_exception(what):
    return InvariantFailure(what) if isinstance(what, Evidence) else what


def _verdict_of(exc) -> str:
    if isinstance(exc, (InvariantFailure, AdapterOutputError)):
        return "fail"
    if isinstance(exc, AdapterCrashed):
        return "crash"
    if isinstance(exc, AdapterTimeout):
        return "timeout"
    return "error"


def run_invariant(adapter, inv: Invariant, profile, *, seed: int | None = 0,
                  report_dir: str | None = None, refusal: str | None = None,
                  shrink: bool = True, replay_hint: str = "") -> InvariantResult:
    """Run one invariant; failures are shrunk by hypothesis and saved as a witness."""
    profile = get_profile(profile)
    caps = adapter.capabilities
    res = InvariantResult(id=inv.id, statement=inv.statement, property=inv.property,
                          passes=sorted(inv.passes), verdict="pass",
                          informational=inv.informational(caps))
    if refusal:
        res.verdict, res.reason = "not-applicable", refusal
        return res
    db = os.path.join(report_dir, ".hypothesis") if report_dir else None
    test, tally = hypothesis_test(adapter, inv, profile, seed, db, shrink=shrink)
    t0 = time.perf_counter()
    try:
        try:
            with warnings.catch_warnings():
                # overflow and invalid-value warnings are expected on near-maximal and
                # special data; the evidence, not the warning, decides
                warnings.simplefilter("ignore", RuntimeWarning)
                # hypothesis prices the repr of a failing case's arrays; the witness file,
                # not that repr, is what we keep
                warnings.filterwarnings("ignore", message="Generating overly large repr")
                test()
        except BudgetExhausted:
            if tally.failure is None:
                res.reason = (f"stopped at the time budget of {profile.budget_s:g} s after "
                              f"{tally.examples} examples")
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
    except ConvWitnessError as exc:
        res.verdict = "error"
        res.message = f"convwitness could not run this invariant: {exc}"
        res.traceback = traceback.format_exc()
    except Exception as exc:   # a bug of convwitness itself: say so loudly
        res.verdict = "error"
        res.message = (f"internal error in convwitness while checking {inv.id}: "
                       f"{type(exc).__name__}: {exc}")
        res.traceback = traceback.format_exc()
    if tally.failure is not None and res.verdict in ("fail", "error", "crash", "timeout"):
        # the message of the minimal case (the last failing execution), to match the witness
        what = tally.failure[1]
        res.verdict = _verdict_of(what if not isinstance(what, Evidence) else InvariantFailure(what))
        res.message = what.message if isinstance(what, Evidence) else str(what)
        if isinstance(what, AdapterRaised):
            res.traceback = what.traceback_text
    if tally.vacuous:
        res.reason = (f"{tally.vacuous} of {tally.examples} examples had a vacuous bound (n·u >= 1): "
                      f"{tally.vacuous_why}").strip()
    if tally.stopped and tally.failure is not None:
        res.reason = f"shrinking stopped at the time budget of {profile.budget_s:g} s"
    drain = getattr(adapter, "drain_output", None)
    if drain is not None:
        text = drain()
        res.output = (res.output + text)[-20000:] if text else res.output[-20000:]
    res.duration_s = time.perf_counter() - t0
    res.examples, res.geometries = tally.examples, tally.geometries
    res.shares = tally.shares
    res.coverage = dict(tally.coverage)
    if tally.plan:
        res.reach = dict(tally.plan, reached=dict(sorted(tally.reach.items())))
    if tally.worst is not None:
        res.worst_share = float(tally.worst.share)
        res.worst_bound = tally.worst.message.splitlines()[0] if tally.worst.message else ""
    if res.verdict in ("fail", "error", "crash", "timeout") and tally.failure is not None:
        case, what = tally.failure
        if isinstance(what, Evidence):
            res.worst_share = max(res.worst_share, float(what.share))
        if report_dir:
            res.witness = save_witness(case, inv, res, report_dir, seed, adapter, replay_hint)
        else:
            res.witness = {"spec": case.spec.to_dict(), "geometry": case.spec.describe(),
                           "kind": case.kind}
    return res


def save_witness(case, inv, res, report_dir, seed, adapter, replay_hint) -> dict:
    from .witness import write_witness
    return write_witness(case, invariant=inv.id, verdict=res.verdict, message=res.message,
                         report_dir=report_dir, seed=seed, adapter_source=adapter.source,
                         replay_hint=replay_hint)
