"""Causes: one failure explains many invariants.

A failure's *signature* is its verdict kind plus the geometry features of its minimal
case (cases/features.py). Two uses:

* **Replay first** (:class:`KnownCauses`). Once an invariant ends in a timeout or a
  crash (the failures whose search is costly: each try of a hang costs a call timeout,
  each crash a new worker), every later invariant that admits the witness's geometry
  first runs its own check once on that geometry, under the call clock's probe limit
  (boundary/calls.py). When the same kind of failure comes back, the invariant records
  it as "same cause as <first invariant>" and skips its search; otherwise it searches
  as usual. Numeric failures are not replayed: their search is cheap, and searching
  afresh is what finds a second, different bug in the same pass.
* **Grouping** (:func:`group_causes`). The report groups failing invariants by
  signature, or by the "same cause as" link, and shows one witness per group; the
  headline counts causes beside invariants.
"""
from __future__ import annotations

import traceback
from dataclasses import dataclass, field

from ..boundary.calls import clock_of
from ..cases.case import Case
from ..cases.features import feature_of
from ..cases.values import fill
from ..errors import AdapterCrashed, AdapterTimeout, ConvWitnessError
from ..geometry.spec import ConvSpec

__all__ = ["KnownCauses", "group_causes", "signature", "spec_meets"]

_REPLAYED = {AdapterTimeout: "timeout", AdapterCrashed: "crash"}
_FAILING = ("fail", "error", "crash", "timeout", "internal")


def signature(verdict: str, spec: ConvSpec | dict) -> str:
    """The verdict kind plus the geometry features of a minimal case (dtype and layout
    included: a port broken in one format is a cause of its own)."""
    if isinstance(spec, dict):
        spec = ConvSpec.from_dict(spec)
    feats = feature_of(spec)
    return verdict + ": " + ", ".join(f"{k}={v}" for k, v in sorted(feats.items()))


def spec_meets(needs, spec: ConvSpec) -> bool:
    """Whether ``spec`` is one that an invariant with ``needs`` could have drawn
    (conservative: an invariant with a drawing recipe of its own takes none)."""
    if needs.features is not None or bool(needs.transposed) != bool(spec.transposed):
        return False
    f = feature_of(spec)
    flags = (("bias", spec.bias), ("stride", f["stride"] == "strided"),
             ("dilation", f["dilation"] == "dilated"),
             ("padding", any(lo or hi for lo, hi in spec.padding)),
             ("grouped", spec.groups > 1),
             ("negative_padding", any(min(lo, hi) < 0 for lo, hi in spec.padding)),
             ("zero_batch", spec.batch == 0))
    for name, has in flags:
        want = getattr(needs, name)
        if want is not None and bool(want) != bool(has):
            return False
    if spec.batch < needs.batch_min:
        return False
    for name, value in (("layouts", spec.layout), ("dtypes", spec.dtype), ("ndims", spec.ndim)):
        allowed = getattr(needs, name)
        if allowed is not None and value not in allowed:
            return False
    return True


@dataclass
class _Cause:
    first: str                 # the invariant that found it
    verdict: str
    spec: ConvSpec
    witness: dict | None
    members: list = field(default_factory=list)


class KnownCauses:
    """Timeouts and crashes found so far in a run, replayed first by later invariants."""

    def __init__(self):
        self.causes: list[_Cause] = []

    def learn(self, res) -> None:
        if res.verdict not in ("timeout", "crash") or not res.witness or res.same_cause_as:
            return
        try:
            spec = ConvSpec.from_dict(res.witness["spec"])
        except (KeyError, TypeError, ConvWitnessError):
            return
        self.causes.append(_Cause(res.id, res.verdict, spec, res.witness, [res.id]))

    def replay(self, adapter, inv, res, profile) -> bool:
        """Try each known cause on ``inv``; True when one reproduced (``res`` filled)."""
        if not self.causes:
            return False
        from ..invariants import Context
        if inv.cases is not None:   # its own drawing recipe (long sums, quantized): no replay
            return False
        clock = clock_of(adapter)
        caps = inv.claims(adapter.capabilities)
        needs = inv.needs_for(adapter.capabilities)
        for cause in self.causes:
            spec = cause.spec
            if not caps.admits(spec) or not spec_meets(needs, spec) or \
                    (needs.applies is not None and not needs.applies(spec, caps)):
                continue
            kind = (cause.witness or {}).get("kind")
            kind = kind if kind in needs.kinds else needs.kinds[0]
            arrays = fill(spec, kind, 0)
            case = Case(spec, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], kind)
            try:
                if clock is not None:
                    with clock.probing():
                        inv.check(adapter, case, Context(profile=profile))
                else:
                    inv.check(adapter, case, Context(profile=profile))
            except (AdapterTimeout, AdapterCrashed) as exc:
                verdict = _REPLAYED[type(exc)]
                if verdict != cause.verdict:
                    continue
                res.verdict = verdict
                res.same_cause_as = cause.first
                res.message = f"same cause as {cause.first}: {exc}"
                res.reason = (f"replayed the {cause.verdict} witness of {cause.first} first; it "
                              "came back, so this invariant was not searched further")
                res.output = getattr(exc, "output", "") or ""
                res.witness = dict(cause.witness or {})
                cause.members.append(inv.id)
                return True
            except Exception:       # anything else: no verdict from the replay; search as usual
                res.output = (res.output + traceback.format_exc(limit=1))[-2000:]
                continue
        return False


def group_causes(invariants: list[dict]) -> list[dict]:
    """Failing invariants grouped by cause: the "same cause as" link first, then the
    signature of the minimal witness. Each group: signature, verdict, invariants
    (ids, the one that found it first), witness (one)."""
    groups: dict[str, dict] = {}
    by_id: dict[str, str] = {}
    entries = []
    for r in invariants:
        entries.append(r)
        for k, extra in enumerate(r.get("further_causes") or (), start=2):
            entries.append(dict(extra, id=f"{r['id']} (cause {k})",
                                informational=r.get("informational", False)))
    for r in entries:
        if r.get("verdict") not in _FAILING or r.get("informational"):
            continue
        w = r.get("witness") or {}
        link = r.get("same_cause_as")
        if link and link in by_id:
            key = by_id[link]
        elif w.get("spec"):
            try:
                key = signature(r["verdict"], w["spec"])
            except (ConvWitnessError, TypeError, KeyError, ValueError):
                key = f"{r['verdict']}: {r['id']}"
        else:
            key = f"{r['verdict']}: {r['id']}"
        by_id[r["id"]] = key
        g = groups.setdefault(key, {"signature": key, "verdict": r["verdict"], "invariants": [],
                                    "witness": w.get("path") or "",
                                    "geometry": w.get("geometry") or ""})
        g["invariants"].append(r["id"])
    return list(groups.values())
