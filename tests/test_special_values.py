"""forward.special_values on the float64 reference, a known-good control: NaN and ±inf
follow IEEE 754 arithmetic (IEEE Std 754-2019, 6.2 and 7.2: 0·inf is invalid, giving
NaN). A case with no input element (a zero-size spatial axis) is all padding and may
skip the work: it must neither set nor break the padded-tap convention of the other
shapes. Seen as a false alarm on the reference at quick seed 1 and standard seed 0."""
from __future__ import annotations

import pytest

from convwitness import load_adapter
from convwitness.run.runner import run_invariant
from convwitness.invariants import get


@pytest.mark.parametrize("profile,seed", [("quick", s) for s in range(5)] + [("standard", 0)])
def test_reference_keeps_one_convention_on_every_seed(profile, seed):
    res = run_invariant(load_adapter("reference"), get("forward.special_values"), profile, seed=seed)
    assert res.verdict == "pass", res.message


def test_zero_input_case_sets_no_convention():
    import numpy as np
    from convwitness.cases.case import Case
    from convwitness.geometry.spec import ConvSpec
    from convwitness.invariants import Context
    adapter = load_adapter("reference")
    inv, ctx = get("forward.special_values"), Context()
    empty = ConvSpec(1, 1, 1, (0,), (1,), padding=((1, 1),), bias=False, dtype="float64")
    w = np.array([[[np.inf]]])
    ev = inv.check(adapter, Case(empty, np.zeros((1, 1, 0)), w, kind="inf"), ctx)
    assert ev.ok and "padded_tap" not in ctx.state
    # a shape that reads input: 0*inf on its padded taps is NaN (the reference multiplies)
    padded = ConvSpec(1, 1, 1, (1,), (1,), padding=((1, 1),), bias=False, dtype="float64")
    ev = inv.check(adapter, Case(padded, np.ones((1, 1, 1)), w, kind="inf"), ctx)
    assert ev.ok and ctx.state["padded_tap"][0] == "multiply"
