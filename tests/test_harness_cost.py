"""The cheaper harness keeps what it replaced (issue 11, item 6).

The speed itself is a figure of ``python -m convwitness.bench harness``, never a test
here (no verdict depends on timing). These tests check that the cheaper paths give what
the outside reference gives: hypothesis's own ``st.sampled_from`` for the builder's
choices, hypothesis's pretty printer for how a case is shown, and the elementwise
definition |actual - expected| <= bound, computed apart with numpy, for compare().
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, seed, settings, strategies as st

from convwitness.cases.strategies import _HypothesisPicker, make_case
from convwitness.geometry.spec import ConvSpec
from convwitness.invariants.evidence import compare

SEQS = (("a", "b"), tuple(range(7)), ("plain", "remainder", "pointwise"), (1,), tuple(range(200)))


@st.composite
def _choices(draw, use_picker: bool):
    """The draws as the geometry strategy makes them (inside st.composite, labelled)."""
    pick = _HypothesisPicker(draw)
    if use_picker:
        return [pick.choice(list(seq), f"c{i}") for i, seq in enumerate(SEQS)]
    return [draw(st.sampled_from(seq), label=f"c{i}") for i, seq in enumerate(SEQS)]


def _drawn(use_picker: bool, s: int) -> list:
    out = []

    @seed(s)
    @settings(max_examples=60, database=None, deadline=None, suppress_health_check=list(HealthCheck))
    @given(_choices(use_picker))
    def run(values):
        out.append(values)
    run()
    return out


@pytest.mark.parametrize("s", [0, 1, 2])
def test_builder_choice_draws_what_sampled_from_draws(s):
    # Reference: hypothesis's st.sampled_from, which the picker's choice replaced; under
    # the same hypothesis seed both must give the same values in the same order (so the
    # examples a run draws, and how they shrink, are unchanged).
    assert _drawn(True, s) == _drawn(False, s)


def test_case_is_printed_by_hypothesis_without_its_arrays():
    # Reference: hypothesis's pretty printer (hypothesis.vendor.pretty), which prints
    # every explicit and falsifying example; it honours the _repr_pretty_ protocol.
    from hypothesis.vendor.pretty import pretty
    spec = ConvSpec(batch=2, in_channels=3, out_channels=4, input_size=(6, 5), kernel_size=(3, 3),
                    dtype="float32", bias=True)
    case = make_case(spec, "uniform", 7)
    shown = pretty(case)
    assert shown == repr(case)
    assert "seed=7" in shown and "kind='uniform'" in shown
    assert "array(" not in shown


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.float16])
def test_compare_on_finite_data_follows_the_elementwise_definition(dtype):
    # Reference: the share of the bound |actual - expected| / bound elementwise, passing
    # where it is at most 1, computed here apart with numpy (common practice, no source).
    rng = np.random.default_rng(11)
    for trial in range(300):
        shape = tuple(int(n) for n in rng.integers(1, 5, size=rng.integers(1, 4)))
        expected = rng.standard_normal(shape)
        actual = (expected + rng.standard_normal(shape) * 10.0 ** rng.integers(-9, 0)).astype(dtype)
        bound = np.abs(rng.standard_normal(shape)) * 10.0 ** rng.integers(-6, 0)
        ev = compare(actual, expected, bound, what="y", criterion="c")
        diff = np.abs(actual.astype(np.float64) - expected)
        share = diff / bound
        assert ev.ok == bool((share <= 1.0).all())
        assert ev.share == float(share.max())
        assert ev.where == tuple(int(i) for i in np.unravel_index(int(np.argmax(share)), shape))
        assert ev.error == float(diff.max())
