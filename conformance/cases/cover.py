"""The greedy set cover that picks a schedule's geometries (cases/schedule.py).

Each option is a geometry with the targets it reaches. The cover adds the option that
reaches the most unreached targets, per call signature it adds where a *ledger* counts
them (run/covering.py ``_Ledger``: a port that compiles per shape pays for each), then
drops the entries whose targets the others reach as well. The greedy rule for weighted
set cover is the classic one (Chvátal 1979, "A greedy heuristic for the set-covering
problem", Mathematics of Operations Research 4(3); recalled from memory).
"""
from __future__ import annotations

__all__ = ["cover", "prune", "cost"]


def cost(ledger, spec, local: set) -> int:
    """The call signatures ``spec`` adds to the run's and to ``local`` (0 without a ledger)."""
    if ledger is None:
        return 0
    return sum(c not in ledger.calls and c not in local for c in ledger.calls_of(spec))


def cover(specs: list, remaining: list, options: list, ledger=None, limit: int = 28) -> list:
    """Greedy weighted set cover over ``options`` (spec, tags): add the one that reaches the
    most unreached targets (per call signature it adds, where a ``ledger`` counts them),
    until none reaches one more (or ``specs`` holds ``limit``); the targets left unreached."""
    left = set(remaining)
    local = set().union(*(ledger.calls_of(sp) for sp in specs)) if ledger else set()
    while left and len(specs) < limit:
        best, got, _ = max(((sp, tags & left, len(tags & left)) for sp, tags in options),
                           key=lambda c: c[2] and c[2] / max(cost(ledger, c[0], local), 0.5),
                           default=(None, set(), 0))
        if not got:
            break
        specs.append(best)
        if ledger is not None:
            local |= ledger.calls_of(best)
        left -= got
    return [t for t in remaining if t in left]


def prune(specs: list, wanted: set, tags, ledger=None) -> list:
    """``specs`` without the entries whose targets (``tags(spec) & wanted``) the others
    reach as well (a greedy cover keeps some), the costliest first, then the latest."""
    reach = {i: tags(sp) & wanted for i, sp in enumerate(specs)}
    order = sorted(reach, key=lambda i: (-cost(ledger, specs[i], set()), -i))
    for i in order:
        others = set().union(*(reach[j] for j in reach if j != i))
        if reach[i] <= others:
            del reach[i]
    return [specs[i] for i in sorted(reach)]
