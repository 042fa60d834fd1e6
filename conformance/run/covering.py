"""The covering schedule in a run: explicit examples before hypothesis's free search.

:func:`covering_examples` turns an invariant's schedule (:mod:`convwitness.cases.schedule`)
into tuples of Cases that the runner and the generated suites add as ``@example``;
:func:`run_schedules` builds the schedules of all admitted invariants over one run-wide
pool of geometries; :func:`free_examples` is what is left to hypothesis's free search and
:func:`free_strategy` what it draws from: fresh geometries, or, for a port that compiles
per shape (``Capabilities.compiles_per_shape``), fresh values on the schedule's geometries,
so that the free search adds no call signature.
"""
from __future__ import annotations

import zlib

import hypothesis

from ..cases.profiles import Profile
# whether the free search stays on the schedule's geometries (the port compiles per shape)
from ..geometry.capabilities import compiles_per_shape as few_shapes
from ..invariants import Invariant, catalogue

__all__ = ["covering_examples", "run_schedules", "free_examples", "free_strategy",
           "with_examples", "few_shapes"]

_SCHEDULES: dict = {}


def run_schedules(caps, profile: Profile, seed) -> dict:
    """The covering schedules of every invariant the capabilities admit, built over one
    run-wide pool of geometries: an invariant first reuses the geometries of the
    invariants before it (:func:`_build`; for a port that compiles per shape, the best of
    ``RESTARTS`` constructions by the calls they make). A function of (capabilities, profile, seed) alone, so ``run``, ``--only``,
    shards and generated suites all get the same schedule for an invariant."""
    key = (caps, profile, seed)
    try:
        if key in _SCHEDULES:
            return _SCHEDULES[key]
    except TypeError:               # unhashable capabilities: build, do not cache
        key = None
    invs = [inv for inv in catalogue() if inv.cases is None and not inv.refusal(caps)]
    if few_shapes(caps):        # the construction that makes the fewest calls
        out = min((_build(caps, profile, seed, invs, v) for v in range(RESTARTS)),
                  key=lambda built: len(built[1]))[0]
    else:
        out = _build(caps, profile, seed, invs, 0)[0]
    if key is not None:
        _SCHEDULES[key] = out
    return out


class _Ledger:
    """The calls (method, geometry) a run's schedules make, kept while one invariant's
    schedule is chosen, for a port that compiles per shape (each new call signature costs
    it a compile): how many new calls a geometry would add (its own and its derived ones),
    and the record of each geometry chosen."""

    def __init__(self, inv: Invariant, caps, calls: set):
        self.inv, self.caps, self.calls = inv, inv.claims(caps), calls
        self._seen: dict = {}

    def _own(self, spec) -> set:
        own = {"transposed" if spec.transposed else "forward"} if self.inv.passes - {"backward"} else set()
        # the call.* invariants check the call itself on every pass the port offers
        every = self.inv.id.startswith("call.") and "backward" in self.caps.claimed_passes
        if ("backward" in self.inv.passes or every) and not spec.transposed:
            own.add("backward")
        return {(m, spec) for m in own}

    def calls_of(self, spec) -> frozenset:
        """(method, geometry) of the calls the invariant makes on ``spec``."""
        if spec not in self._seen:
            self._seen[spec] = frozenset(self._own(spec) | set(self.inv.derived_calls(spec, self.caps)))
        return self._seen[spec]

    def add(self, spec) -> None:
        self.calls |= self.calls_of(spec)

    def sources(self, specs) -> list:
        """The invariant's ``sources`` of ``specs``: geometries whose derived calls land on
        one of them (candidates whose derived calls the run may already make)."""
        if self.inv.sources is None:
            return []
        return list(dict.fromkeys(src for sp in specs for src in self.inv.sources(sp, self.caps)
                                  if src is not None))


#: schedule constructions tried for a port that compiles per shape (the greedy covers
#: differ with the seeds of their fresh candidates; the one making the fewest calls is kept)
RESTARTS = 3


def _build(caps, profile, seed, invs: list, variant: int) -> tuple[dict, set]:
    """(invariant id -> schedule, the (method, geometry) calls they make) of one
    construction: over one pool, in catalogue order, the lean schedules last (they weigh
    their choices by the calls the others make)."""
    from ..cases.schedule import schedule
    pool: list = []
    calls: set = set()
    out = {}
    for inv in sorted(invs, key=lambda inv: inv.needs_for(caps).lean):
        ledger = _Ledger(inv, caps, calls) if few_shapes(caps) else None
        salt = inv.id if not variant else f"{inv.id}#{variant}"
        out[inv.id] = schedule(caps, profile, inv.needs_for(caps), seed, salt, pool, ledger)
    return {inv.id: out[inv.id] for inv in invs}, calls


def free_examples(profile: Profile, explicit: list) -> int:
    """Hypothesis's free search after the schedule: the schedule's geometries replace part
    of it, never more than half."""
    return max(profile.examples - len(explicit), profile.examples // 2)


def free_strategy(caps, inv: Invariant, profile: Profile, explicit: list):
    """What hypothesis's free search draws for ``inv``: its own strategy, or, for a port
    that compiles per shape, fresh values on the geometries of ``explicit`` (the covering
    schedule): every call signature of the free search is then one the schedule made."""
    if few_shapes(caps) and explicit and inv.cases is None:
        from ..cases.strategies import examples_on
        geometries = list(dict.fromkeys(cases[0].spec for cases in explicit))
        return examples_on(geometries, profile, inv.needs_for(inv.claims(caps)))
    return inv.strategy(caps, profile)


def with_examples(test, explicit: list):
    """``test`` (a ``@given`` test) with the schedule as explicit examples, in order."""
    for cases in reversed(explicit):
        test = hypothesis.example(cases)(test)
    return test


def covering_examples(caps, inv: Invariant, profile: Profile, seed, tally=None) -> list:
    """The covering schedule of ``inv`` as tuples of Cases (run before the free search);
    invariants with strategies of their own (``cases=``) have none."""
    if inv.cases is not None:
        return []
    from ..cases.schedule import pair_space, schedule, targets, value_kinds
    from ..cases.strategies import make_case
    needs = inv.needs_for(caps)
    specs = run_schedules(caps, profile, seed).get(inv.id)
    if specs is None:
        specs = schedule(caps, profile, needs, seed, inv.id)
    if tally is not None:           # the runner's tally: what the report's reach needs
        tally.plan = {"targets": targets(caps, needs, profile), "pairs": pair_space(caps, needs),
                      "scheduled": len(specs)}
    out = []
    for i, (spec, kinds) in enumerate(zip(specs, value_kinds(needs, len(specs), profile.values))):
        out.append(tuple(make_case(spec, k, zlib.crc32(f"{inv.id}/{seed}/{i}/{j}".encode()))
                         for j, k in enumerate(kinds)))
    return out
