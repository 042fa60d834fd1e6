"""The greedy set cover that picks schedule geometries (cases/cover.py).

Sources beside each check:
- Chvátal's bound for the greedy set cover: the greedy cover is at most H(d) times the
  smallest cover, d the size of the largest set, H the harmonic number (V. Chvátal, "A
  greedy heuristic for the set-covering problem", Mathematics of Operations Research
  4(3), 1979; recalled from memory);
- an irredundant cover (no entry whose elements the others cover) is the textbook
  definition of a minimal cover: common practice, no source.
"""
from __future__ import annotations

import itertools
import random

from convwitness.cases.cover import cover, prune


def _smallest(universe: set, sets: list) -> int:
    for k in range(1, len(sets) + 1):
        for combo in itertools.combinations(sets, k):
            if set().union(*combo) >= universe:
                return k
    raise AssertionError("no cover")


def test_greedy_cover_is_within_chvatals_bound_and_pruned_covers_are_irredundant():
    rng = random.Random(0)
    for trial in range(150):
        n = rng.randint(4, 12)
        sets = [frozenset(rng.sample(range(n), rng.randint(1, max(1, n // 2)))) for _ in range(rng.randint(3, 9))]
        universe = set().union(*sets)
        options = [(f"s{i}", s) for i, s in enumerate(sets)]
        picked: list = []
        left = cover(picked, sorted(universe), options)
        assert left == []
        chosen = [dict(options)[p] for p in picked]
        assert set().union(*chosen) == universe
        d = max(len(s) for s in sets)
        harmonic = sum(1 / i for i in range(1, d + 1))
        assert len(picked) <= harmonic * _smallest(universe, sets) + 1e-9
        kept = prune(picked, universe, dict(options).__getitem__)
        assert set().union(*(dict(options)[p] for p in kept)) == universe
        for p in kept:      # every kept entry reaches something no other kept entry does
            others = set().union(*(dict(options)[q] for q in kept if q != p))
            assert not dict(options)[p] <= others


def test_cover_stops_at_the_limit_and_reports_what_is_left():
    options = [(i, frozenset({i})) for i in range(10)]
    picked: list = []
    left = cover(picked, list(range(10)), options, limit=4)
    assert len(picked) == 4 and len(left) == 6 and set(left).isdisjoint(picked)
