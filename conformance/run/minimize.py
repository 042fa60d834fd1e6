"""1-minimal witnesses: a local pass after hypothesis's shrinking.

Hypothesis shrinks the choices it made, not the geometry, so its minimal case can still
have a parameter that one step lower would fail just the same (``C=15->15 g=15``
where ``C=1->1 g=1`` does). A witness is **1-minimal** when no single geometry
parameter can move one step toward its smallest valid value while the case still
fails the same way. The steps, one parameter at a time:

* batch N -> N-1 (not below the invariant's least batch, never to or from 0);
* C_in -> C_in - G and C_out -> C_out - G (the next smaller multiple of the groups G);
* groups G -> the next smaller common divisor of C_in and C_out (channels kept), and
  G -> G-1 with the channels per group kept;
* per axis: input size L -> L-1, kernel k -> k-1, stride s -> s-1, dilation d -> d-1,
  padding before and after one step toward 0, output padding op -> op-1.

A neighbour must be a valid geometry that the adapter claims and that stays inside the
invariant's needs (a strided-only invariant keeps some stride > 1, say). Its values are
drawn afresh with the failing case's value kind and seed (``cases.values.fill``), and
it "still fails" when the invariant gives the same verdict (fail, error, crash or
timeout) on it. The pass takes the first failing neighbour and starts again, until no
neighbour fails (1-minimal) or the time cap is reached (the witness says so).
Besides the one-step moves it tries, first, each parameter at its smallest value and
then moved by a half, a quarter, ... of the way: they reach the same end in fewer
failing replays (a port that hangs costs a call timeout per failing replay);
1-minimality is still decided by the one-step moves, which are always among those tried.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

from ..cases.case import Case
from ..cases.values import fill
from ..errors import (AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout,
                      SpecError)
from ..geometry.spec import ConvSpec
from ..invariants import Context
from ..invariants.evidence import Evidence

__all__ = ["Minimized", "neighbours", "minimize", "time_cap", "outcome_verdict"]

_ADAPTER_FAULTS = (AdapterRaised, AdapterOutputError, AdapterCrashed, AdapterTimeout)


@dataclass
class Minimized:
    case: Case                 # the smallest failing case found
    what: object               # its Evidence or adapter exception
    minimal: bool              # no one-step neighbour fails the same way
    steps: int                 # one-step moves taken
    tried: int                 # neighbours replayed
    note: str                  # one line for the witness


#: the local pass on a hang: every replay that still hangs costs a probe limit, so it
#: gets a tighter cap of its own
HANG_CAP_S = 12.0


def time_cap(budget_s: float) -> float:
    """Half the invariant's budget, between 5 and 60 s."""
    return min(60.0, max(5.0, float(budget_s) / 2.0))


def _divisors_below(g: int, cin: int, cout: int) -> list[int]:
    return [d for d in range(g - 1, 0, -1) if cin % d == 0 and cout % d == 0]


def _toward(v: int, least: int) -> list[int]:
    """Values from ``v`` toward ``least``, far to near: the least itself, then v moved by
    half the distance, a quarter, ..., and one step last (distinct, never ``v``)."""
    if v == least:
        return []
    sign = 1 if v > least else -1
    dist = abs(v - least)
    out, d = [least], dist // 2
    while d >= 1:
        out.append(v - sign * d)
        d //= 2
    if out[-1] != v - sign:
        out.append(v - sign)
    seen = []
    for c in out:
        if c not in seen:
            seen.append(c)
    return seen


def _moves(spec: ConvSpec, batch_min: int):
    """(parameter name, changes) for each move of one parameter toward its smallest
    value, far to near (the one-step moves decide 1-minimality; the longer ones only
    get there in fewer failing replays, which counts where one costs a call timeout)."""
    g = spec.groups
    if spec.batch >= 1:
        for v in _toward(spec.batch, max(1, batch_min)):
            yield "batch", {"batch": v}
    if g > 1:
        per_in, per_out = spec.in_channels // g, spec.out_channels // g
        for v in _toward(g, 1):
            yield "groups", {"groups": v, "in_channels": per_in * v, "out_channels": per_out * v}
        smaller = _divisors_below(g, spec.in_channels, spec.out_channels)
        if smaller:
            yield "groups", {"groups": smaller[0]}
    for v in _toward(spec.in_channels // g, 1) if spec.in_channels >= g else ():
        yield "in_channels", {"in_channels": v * g}
    for v in _toward(spec.out_channels // g, 1) if spec.out_channels >= g else ():
        yield "out_channels", {"out_channels": v * g}
    for i in range(spec.ndim):
        def axis(field, value, i=i):
            seq = list(getattr(spec, field))
            seq[i] = value
            return {field: tuple(seq)}
        if spec.input_size[i] == 0:     # an empty axis is a corner, not a simplification:
            yield f"input_size[{i}]", axis("input_size", 1)     # a non-empty one reads better
        for field, least in (("input_size", 1), ("kernel_size", 1), ("stride", 1),
                             ("dilation", 1), ("output_padding", 0)):
            if getattr(spec, field)[i] >= least:
                for v in _toward(getattr(spec, field)[i], least):
                    yield f"{field}[{i}]", axis(field, v)
        lo, hi = spec.padding[i]
        for v in _toward(lo, 0):
            yield f"padding[{i}].before", axis("padding", (v, hi))
        for v in _toward(hi, 0):
            yield f"padding[{i}].after", axis("padding", (lo, v))


def _inside(spec: ConvSpec, needs) -> bool:
    """Whether ``spec`` keeps the properties the invariant's needs force."""
    if needs is None:
        return True
    pads = [p for pair in spec.padding for p in pair]
    forced = {
        "stride": any(s > 1 for s in spec.stride),
        "dilation": any(d > 1 for d in spec.dilation),
        "padding": any(pads),
        "negative_padding": any(p < 0 for p in pads),
        "grouped": spec.groups > 1,
        "zero_batch": spec.batch == 0,
    }
    for name, has in forced.items():
        want = getattr(needs, name, None)
        if want is not None and bool(want) != has:
            return False
    return spec.batch >= getattr(needs, "batch_min", 0) or spec.batch == 0


def neighbours(spec: ConvSpec, caps=None, needs=None) -> list[tuple[str, ConvSpec]]:
    """The valid one-step neighbours of ``spec`` (claimed by ``caps`` and inside
    ``needs`` where given), each with the name of the parameter that moved."""
    out = []
    for name, changes in _moves(spec, getattr(needs, "batch_min", 1) if needs is not None else 1):
        try:
            cand = spec.replace(**changes)
        except SpecError:
            continue
        if caps is not None and not caps.admits(cand):
            continue
        if not _inside(cand, needs):
            continue
        applies = getattr(needs, "applies", None)
        if applies is not None and caps is not None and not applies(cand, caps):
            continue                # a geometry the invariant would only skip
        out.append((name, cand))
    return out


def outcome_verdict(what) -> str:
    """The verdict a check's outcome stands for (the runner's own mapping)."""
    from ..invariants.evidence import verdict_of as _verdict_of
    if isinstance(what, Evidence):
        return "pass" if what.ok else "fail"
    if not isinstance(what, _ADAPTER_FAULTS):
        return "internal"
    return _verdict_of(what)


def _replay(adapter, inv, case: Case, profile):
    """The invariant's Evidence on ``case``, or the adapter fault it raised."""
    try:
        return inv.check(adapter, case, Context(profile=profile))
    except _ADAPTER_FAULTS as exc:
        return exc


def minimize(adapter, inv, case: Case, what, profile, *, cap_s: float | None = None,
             needs=None, exclude=None) -> Minimized:
    """Walk from the failing ``case`` (whose outcome is ``what``) to a 1-minimal one."""
    want = outcome_verdict(what)
    cap = time_cap(profile.budget_s) if cap_s is None else float(cap_s)
    if want == "timeout":
        cap = min(cap, HANG_CAP_S)
    if want in ("pass", "internal"):
        return Minimized(case, what, False, 0, 0, "not minimized: the case does not fail "
                         "through the adapter")
    if not isinstance(case, Case):      # a quantized case (cases/quant.py): not covered yet
        return Minimized(case, what, False, 0, 0, "not minimized: the local pass covers float "
                         "cases; this quantized witness is as hypothesis shrank it")
    if needs is None and inv.cases is None:
        needs = inv.needs_for(adapter.capabilities)
    t0 = time.perf_counter()
    steps = tried = 0
    moved: list[str] = []
    while True:
        found = False
        for name, spec in neighbours(case.spec, inv.claims(adapter.capabilities), needs):
            if exclude is not None and exclude(spec):
                continue                # a known cause's region (run/further.py)
            if time.perf_counter() - t0 > cap:
                return Minimized(case, what, False, steps, tried,
                                 f"1-minimality not reached: the time cap of {cap:g} s stopped "
                                 f"the local pass after {steps} step(s) and {tried} replays")
            arrays = fill(spec, case.kind, case.seed)
            cand = Case(spec, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], case.kind,
                        seed=case.seed)
            tried += 1
            got = _replay(adapter, inv, cand, profile)
            if outcome_verdict(got) == want:
                case, what, found = cand, got, True
                steps += 1
                moved.append(name)
                break
        if not found:
            note = (f"1-minimal: no one-step smaller geometry fails ({tried} neighbours replayed"
                    + (f"; {steps} step(s) after hypothesis's shrinking)" if steps else ")"))
            return Minimized(case, what, True, steps, tried, note)
