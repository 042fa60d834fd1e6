"""More than one bug per pass: after the first failure, search on with its region excluded.

Shrinking ends at one minimal case, and the first bug found hides any other in the same
pass: a grouped transposed convolution that raises hides a depthwise one whose bias
comes from the wrong channel. In profiles with ``further_causes > 0`` (standard: 2,
nightly: 3), once an invariant has failed and shrunk, its search runs again with the
failure's *region* excluded: every geometry that has all of the witness's distinguishing
features (:func:`region`, the features its minimal case could not shrink away, such as
strided, dilated, grouped or depthwise, padded, zero batch). Each further failure found
is a cause of its own, with its own witness (``witnesses/<id>.cause<k>.json``); its
region is excluded in turn, and so are the features it shares with an earlier region
(the same bug found again with another padding shows that the padding was not needed).
The search ends when a rerun passes, when the witness has no distinguishing feature (the
bug is everywhere), or after ``further_causes`` reruns. Each rerun gets half the
invariant's budget, at least 10 s, and a seed of its own.
"""
from __future__ import annotations

import dataclasses

from ..cases.features import feature_of
from ..geometry.spec import ConvSpec

__all__ = ["region", "in_region", "search_further"]

_FAILING = ("fail", "error", "crash")
#: feature values that every geometry may have: never distinguishing
_PLAIN = {"stride": {"unit"}, "dilation": {"none"}, "groups": {"single"}, "padding": {"none"},
          "remainder": {"zero"}, "batch": {"one", "many"}, "bias": {"nobias", "bias"},
          "transposed": {"conv", "transposed"}}


def region(spec: ConvSpec | dict) -> dict:
    """The distinguishing features of a minimal failing case (empty: none)."""
    if isinstance(spec, dict):
        spec = ConvSpec.from_dict(spec)
    return {k: v for k, v in feature_of(spec).items() if k in _PLAIN and v not in _PLAIN[k]}


def in_region(spec: ConvSpec, regions) -> bool:
    feats = feature_of(spec)
    return any(reg and all(feats.get(k) == v for k, v in reg.items()) for reg in regions)


def search_further(adapter, inv, profile, first, *, seed, report_dir, shrink, replay_hint,
                   run_invariant) -> list[dict]:
    """Further causes of ``first`` (an InvariantResult that failed), as report entries."""
    limit = int(getattr(profile, "further_causes", 0) or 0)
    if limit <= 0 or first.verdict not in _FAILING or not first.witness or first.same_cause_as:
        return []
    if inv.cases is not None:       # its own drawing recipe (long sums, quantized): no regions
        return []
    regions = [region(first.witness["spec"])]
    if not regions[0]:
        return []
    budget = max(10.0, profile.budget_s / 2)
    rerun_profile = dataclasses.replace(profile, budget_s=budget)
    found = []
    for k in range(2, limit + 2):
        res = run_invariant(adapter, inv, rerun_profile, seed=None if seed is None else seed + 7919 * k,
                            report_dir=report_dir, shrink=shrink, replay_hint=replay_hint,
                            exclude=lambda spec, _r=tuple(regions): in_region(spec, _r),
                            witness_name=f"{inv.id}.cause{k}", database=False)
        if res.verdict not in _FAILING or not res.witness:
            break
        reg = region(res.witness["spec"])
        found.append({"verdict": res.verdict, "message": res.message, "witness": res.witness,
                      "region": reg, "excluded": [dict(r) for r in regions],
                      "examples": res.examples})
        if not reg or reg in regions:
            break
        # a region that shares features with an earlier one shows those others were not
        # needed (a padded minimal case, then a cropped one): exclude the shared core too
        cores = [c for c in ({k: v for k, v in r.items() if reg.get(k) == v} for r in regions) if c]
        regions.extend([reg] + [c for c in cores if c not in regions])
    return found
