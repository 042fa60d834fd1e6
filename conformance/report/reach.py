"""What each invariant reached: targets, holes and feature-pair coverage.

Every invariant's result carries ``reach`` (``run.runner``): the targets it could reach
(``category:name`` tags of :func:`convwitness.cases.features.reach_of`: features,
coincidences, channel structures, dtypes, layouts, ndims, C_in thresholds, claimed
corners and value kinds), the value combinations of each feature pair it admits, and
the count of examples that reached each tag. This module turns that into the report's
``reach`` summary (holes per invariant, pair percentages) and a short Markdown section.
"""
from __future__ import annotations

__all__ = ["invariant_reach", "summarize", "markdown_lines", "shapes_text"]


def invariant_reach(reach: dict) -> dict:
    """Holes and pair percentages of one invariant's ``reach``."""
    reached = reach.get("reached") or {}
    targets = list(reach.get("targets") or [])
    holes = [t for t in targets if not reached.get(t)]
    pairs = {}
    for name, space in (reach.get("pairs") or {}).items():
        if space:
            hit = sum(1 for combo in space if reached.get(f"pair:{name}={combo}"))
            pairs[name] = round(100.0 * hit / len(space), 1)
    return {"targets": len(targets), "reached": len(targets) - len(holes), "holes": holes,
            "pairs": pairs, "scheduled": int(reach.get("scheduled") or 0)}


def summarize(invariants: list[dict]) -> dict | None:
    """The report-level ``reach``: per invariant that ran, its holes and pair coverage."""
    per = {r["id"]: invariant_reach(r["reach"]) for r in invariants
           if r.get("reach") and r.get("verdict") != "not-applicable"}
    if not per:
        return None
    return {
        "targets": sum(p["targets"] for p in per.values()),
        "reached": sum(p["reached"] for p in per.values()),
        "holes": {i: p["holes"] for i, p in per.items() if p["holes"]},
        "pairs": {i: p["pairs"] for i, p in per.items()},
    }


def markdown_lines(doc: dict) -> list[str]:
    """A short 'Reach' section for summary.md ([] when the report has no reach)."""
    reach = doc.get("reach")
    if not reach:
        return []
    holes = reach.get("holes") or {}
    lines = [f"**Reach:** {reach['reached']} of {reach['targets']} admitted targets reached "
             f"(features, coincidences, channel structures, dtypes, layouts, ndims, claimed "
             f"corners, value kinds; summed over invariants)"
             + ("; no holes." if not holes else f"; holes in {len(holes)} invariant(s):")]
    if holes:
        lines.append("")
    for inv, missing in sorted(holes.items()):
        lines.append(f"- `{inv}`: {', '.join(missing)}")
    pairs = reach.get("pairs") or {}
    if pairs:
        names = sorted({n for p in pairs.values() for n in p})
        low = {n: min(p[n] for p in pairs.values() if n in p) for n in names}
        lines += (["", "Feature pairs, lowest coverage over invariants: "
                   + ", ".join(f"{n} {low[n]:g}%" for n in names)] if names else [])
    return lines + [""]


def shapes_text(doc: dict) -> str:
    """How many distinct call signatures the run made, and whether the free search stayed
    on the covering schedule's geometries (the adapter compiles per shape): one sentence
    that summary.md and report.html both print ("" when the report has no count)."""
    if not doc.get("signatures"):
        return ""
    caps = doc.get("adapter", {}).get("capabilities") or {}
    return (f"{doc['signatures']} distinct call signatures"
            + (" (the adapter compiles per shape: the free search drew fresh values on the "
               "covering schedule's geometries, and the invariants that call derived "
               "geometries had lean schedules, their dtypes, widths and pairs left to the "
               "reference checks)" if caps.get("compiles_per_shape") else ""))
