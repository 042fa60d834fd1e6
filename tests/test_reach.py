"""Coincidences, the covering schedule and claimed corners (issue 11).

Sources beside each check:
- the coincidences are those of shared/BUG-CLASSES.md §4 item 20 and class C27 (which
  says: common practice, no source — libraries dispatch fast kernels on such equalities);
- output sizes from Dumoulin & Visin 2016, Relationship 15 (non-transposed) and 14
  (transposed), as ``ConvSpec.output_size`` computes them, re-derived here by hand;
- the zero-batch finding is the issue's own: a library that raises on N = 0 while
  claiming zero_batch passed ``forward.contract`` because no N = 0 geometry was drawn.
"""
from __future__ import annotations

import io

import numpy as np
import pytest

from convwitness import ConvSpec
from convwitness.adapters.reference import ReferenceAdapter
from convwitness.adapters.zoo_coincidence import (BatchChannelsSwapped, DepthwiseMultiplierOrder,
                                                  PatchKernelTransposed, SquareInputAxesSwapped,
                                                  WeightGradChannelsSwapped)
from convwitness.boundary.loading import load_adapter
from convwitness.cases.draw import COINCIDENCES
from convwitness.cases.features import geometry_tags, reach_of
from convwitness.cases.profiles import get_profile
from convwitness.cases.schedule import schedule, targets
from convwitness.invariants import catalogue, get
from convwitness.numerics import reference as ref
from convwitness.run.runner import run_invariant
from convwitness.run.selftest import parse_seeds, selftest
from convwitness.errors import ConvWitnessError

QUICK = get_profile("quick")


def _spec(**kw):
    base = dict(batch=2, in_channels=3, out_channels=5, input_size=(6, 7), kernel_size=(3, 2),
                stride=1, padding=0, dilation=1, groups=1, bias=False, dtype="float64")
    base.update(kw)
    return ConvSpec(**base)


# -- the classifier against hand-derived geometries (BUG-CLASSES.md §4 item 20) ----------
def test_coincidences_are_read_off_the_geometry():
    assert "coincidence:equal_channels" in reach_of(_spec(in_channels=4, out_channels=4))
    grouped = reach_of(_spec(in_channels=6, out_channels=6, groups=3))     # 2 -> 2 per group
    assert {"coincidence:equal_channels", "coincidence:equal_channels_grouped",
            "grouping:grouped"} <= grouped
    # depthwise: one channel per group is not a coincidence "> 1"
    assert "coincidence:equal_channels" not in reach_of(_spec(in_channels=3, out_channels=3, groups=3))
    assert "grouping:depthwise_multiplier" in reach_of(_spec(in_channels=3, out_channels=6, groups=3))
    assert "coincidence:batch_equals_channels" in reach_of(_spec(batch=3))
    assert "coincidence:square_input" in reach_of(_spec(input_size=(5, 5), kernel_size=(3, 3)))
    assert "coincidence:square_input" not in reach_of(_spec(input_size=(5, 5)))     # k differs
    assert "coincidence:square_kernel" in reach_of(_spec(kernel_size=(2, 2)))
    # s == k > 1 on every axis of a square 2-D/3-D kernel (a patch embedding, BUG-CLASSES C27)
    assert "coincidence:stride_equals_kernel" in reach_of(_spec(kernel_size=(2, 2), stride=(2, 2)))
    assert "coincidence:stride_equals_kernel" not in reach_of(_spec(kernel_size=(2, 3), stride=(2, 3)))
    assert "coincidence:stride_equals_kernel" not in reach_of(
        _spec(input_size=(7,), kernel_size=(2,), stride=(2,)))
    # Relationship 15: L_out = floor((6 + 0 - 6)/1) + 1 = 1 and, with e = 2(4-1)+1 = 7,
    # floor((7 + 0 - 7)/1) + 1 = 1
    one = _spec(kernel_size=(6, 4), dilation=(1, 2))
    assert one.output_size == (1, 1) and "coincidence:output_one" in reach_of(one)
    assert not {t for t in reach_of(_spec()) if t.startswith("coincidence:")}


def test_equalities_count_only_where_they_can_show_an_exchange():
    """An exchange of two equal axes is invisible when only one position of them is read,
    or when some kernel taps never meet the data (zoo classes C27/C05 of BUG-CLASSES.md;
    the tap positions o*s - p_lo + t*d are those of Dumoulin & Visin 2016, section 2)."""
    # 1x1x1 input, k = s = 2, p_lo = 1: only tap 1 of each axis reads the one element
    one = _spec(input_size=(1, 1, 1), kernel_size=(2, 2, 2), stride=(2, 2, 2),
                padding=((1, 0), (1, 0), (1, 0)))
    assert not {"coincidence:stride_equals_kernel", "coincidence:square_kernel"} & reach_of(one)
    # 5x5, k = 1, s = 2, p = (1, -2): only position 1 of each axis is read
    diag = _spec(input_size=(5, 5), kernel_size=(1, 1), stride=(2, 2), padding=((1, -2), (1, -2)))
    assert "coincidence:square_input" not in reach_of(diag)
    assert "coincidence:square_input" in reach_of(_spec(input_size=(5, 5), kernel_size=(1, 1),
                                                        stride=(2, 2)))


def test_tap_counts_agree_with_the_definition():
    """The taps counted as reading data are those with some output o in [0, L_out) whose
    input index o*s - p_lo + t*d lies in [0, L) (the index of tap t of output o, Dumoulin &
    Visin 2016, section 2): the closed form of features.py against the definition."""
    import random
    from convwitness.cases.features import _taps_reading
    rng, checked = random.Random(7), 0
    for _ in range(3000):
        L, k, s, d = rng.randint(1, 9), rng.randint(1, 4), rng.randint(1, 4), rng.randint(1, 3)
        lo, hi = rng.randint(-2, 4), rng.randint(-2, 4)
        try:
            sp = _spec(input_size=(L,), kernel_size=(k,), stride=(s,), dilation=(d,), padding=((lo, hi),))
        except ConvWitnessError:
            continue                    # no output: not a geometry
        n = sp.output_size[0]
        brute = sum(any(0 <= o * s - lo + t * d < L for o in range(n)) for t in range(k))
        assert _taps_reading(sp) == [brute], sp.describe()
        checked += 1
    assert checked > 1000


def test_a_stride_joins_a_pair_only_with_a_window_that_reads_data():
    # A strided depthwise weight gradient that drops its last kernel row (pytorch#50042,
    # BUG-CLASSES C02) shows only with kernel rows > 1 whose taps read data; a one-tap axis
    # reads each input once whatever the stride (common practice, no source).
    from convwitness.cases.features import pair_tags
    tag = "pair:groups×stride=depthwise×strided"
    dw = dict(in_channels=4, out_channels=4, groups=4, stride=(2, 2), input_size=(7, 7))
    assert tag in pair_tags(_spec(kernel_size=(3, 3), **dw))
    assert tag not in pair_tags(_spec(kernel_size=(1, 3), **dw))
    # p_lo = 4 over one row (k = 3, s = 2): two windows, and only the last tap ever reads data
    assert tag not in pair_tags(_spec(kernel_size=(3, 3), padding=((4, 0), (0, 0)),
                                      **{**dw, "input_size": (1, 7)}))
    # an empty input has a shape and a dtype, no values: only the pairs of those
    empty = pair_tags(_spec(kernel_size=(3, 3), **{**dw, "batch": 0}))
    assert empty and {t.split("=")[0] for t in empty} <= {"pair:batch×dtype", "pair:dtype×ndim"}


def test_crop_then_pad_counts_only_where_a_window_reads_the_trailing_padding():
    """corner:crop_then_pad (p_lo < 0 < p_hi <= -p_lo) is reached only where some tap
    reads past the input's end, index o*s - p_lo + t*d >= L (the tap index of Dumoulin &
    Visin 2016, section 2): a bug that reads the cropped head there (BUG-CLASSES C07)
    shows nowhere else. The closed form (remainder < p_hi) against the definition."""
    import random
    rng, checked, reads = random.Random(11), 0, 0
    for _ in range(3000):
        L, k, s, d = rng.randint(1, 12), rng.randint(1, 4), rng.randint(1, 4), rng.randint(1, 3)
        lo = -rng.randint(1, 4)
        hi = rng.randint(1, -lo)
        try:
            sp = _spec(input_size=(L,), kernel_size=(k,), stride=(s,), dilation=(d,), padding=((lo, hi),))
        except ConvWitnessError:
            continue
        brute = any(o * s - lo + t * d >= L for o in range(sp.output_size[0]) for t in range(k))
        assert ("corner:crop_then_pad" in reach_of(sp)) == brute, sp.describe()
        checked, reads = checked + 1, reads + brute
    assert checked > 1000 and 0 < reads < checked


def test_drawn_geometries_read_their_input_and_empty_batches_show_their_shape():
    """No drawn geometry has every output equal to the bias alone (every tap in padding,
    here p_lo = 1, d = 2, k = 3 over one element: taps at -1, 1, 3), and an empty batch
    differs in output shape from its input, padded or not (tensorflow-cpu 2.21.0 returned
    the padded input's shape for N = 0: README findings, scripts/probe_tensorflow.py)."""
    from convwitness.cases.features import empty_shape_tells, reads_input
    assert not reads_input(_spec(input_size=(1, 4), kernel_size=(3, 1), dilation=(2, 1),
                                 padding=((1, 3), (0, 0))))
    assert reads_input(_spec())
    assert not empty_shape_tells(_spec(batch=0, in_channels=3, out_channels=3, input_size=(4, 4),
                                       kernel_size=(1, 1)))
    # the output (0, 3, 5, 4) has the padded input's shape
    assert not empty_shape_tells(_spec(batch=0, in_channels=3, out_channels=3, input_size=(4, 4),
                                       kernel_size=(1, 1), padding=((0, 1), (0, 0))))
    assert empty_shape_tells(_spec(batch=0, in_channels=3, out_channels=5))
    caps = load_adapter("reference").capabilities
    for inv in catalogue():
        if inv.refusal(caps) or inv.cases is not None:
            continue
        for sp in schedule(caps, QUICK, inv.needs_for(caps), seed=0, salt=inv.id):
            assert reads_input(sp) and empty_shape_tells(sp), (inv.id, sp.describe())


def test_corners_are_read_off_the_geometry():
    assert "corner:negative_padding" in reach_of(_spec(padding=((-1, 0), (0, 0))))
    # cropped on one side, padded on the other by no more than the crop (BUG-CLASSES C07:
    # a read past the end lands on the cropped-away head)
    assert "corner:crop_then_pad" in reach_of(_spec(padding=((-2, 1), (0, 0))))
    assert "corner:crop_then_pad" not in reach_of(_spec(padding=((-1, 2), (0, 0))))
    assert "corner:pad_then_crop" in reach_of(_spec(padding=((0, 0), (2, -2))))
    assert not {"corner:crop_then_pad", "corner:pad_then_crop"} & reach_of(_spec(padding=((-1, -1), (0, 0))))
    assert "feature:zero_batch" in reach_of(_spec(batch=0))
    assert "feature:window_in_padding" in reach_of(_spec(padding=((3, 0), (0, 0))))  # p_lo >= e = 3
    # transposed, s = 3, d = 1: the largest legal output padding is max(s, d) - 1 = 2
    tr = _spec(transposed=True, stride=(3, 1), output_padding=(2, 0))
    assert "corner:max_output_padding" in reach_of(tr)
    assert "corner:max_output_padding" not in reach_of(tr.replace(output_padding=(1, 0)))


# -- the covering schedule ---------------------------------------------------------------
@pytest.mark.parametrize("adapter", ["reference", "convwitness.adapters.zoo_numpy:NumpyTapAdapter"])
def test_schedule_reaches_every_target_of_every_invariant(adapter):
    caps = load_adapter(adapter).capabilities
    seen = 0
    for inv in catalogue():
        if inv.refusal(caps) or inv.cases is not None:
            continue
        needs = inv.needs_for(caps)
        specs = schedule(caps, QUICK, needs, seed=0, salt=inv.id)
        reached = set().union(*(geometry_tags(s, QUICK.max_elements)[1] for s in specs))
        wanted = {t for t in targets(caps, needs, QUICK) if not t.startswith("kind:")}
        assert "corner:large_tensor" in wanted or needs.zero_batch
        assert wanted <= reached, (inv.id, sorted(wanted - reached))
        assert all(caps.admits(s) for s in specs)
        seen += 1
    assert seen >= 20


@pytest.mark.parametrize("seed", range(5))
def test_schedule_reaches_every_admitted_feature_pair_on_every_seed(seed):
    """Every admitted combination of the scheduled pairs is in every seed's schedule,
    strided depthwise included (depthwise and strided kernels are separate code paths in
    optimised libraries: common practice, no source)."""
    from convwitness.cases.features import pair_tags
    from convwitness.cases.schedule import pair_targets
    caps = load_adapter("reference").capabilities
    for inv in catalogue():
        if inv.refusal(caps) or inv.cases is not None:
            continue
        needs = inv.needs_for(caps)
        specs = schedule(caps, QUICK, needs, seed=seed, salt=inv.id)
        reached = set().union(*(reach_of(s) | pair_tags(s) for s in specs))
        wanted = set(pair_targets(caps, needs))
        assert wanted <= reached, (inv.id, sorted(wanted - reached))
    wanted = set(pair_targets(caps, get("grad_weight.reference").needs_for(caps)))
    assert "pair:groups×stride=depthwise×strided" in wanted


def test_a_strided_depthwise_weight_gradient_bug_is_caught_on_every_seed():
    """The planted bug needs depthwise, stride > 1 and a kernel row > 1 at once
    (zoo_backward.DepthwiseWeightGradLastRow): the pair schedule puts it on every seed."""
    out = io.StringIO()
    rc = selftest(seeds="0-4", only="depthwise_weight_grad_last_row", stdout=out, stderr=io.StringIO())
    assert rc == 0 and "5 of 5 (bug, seed) cells caught" in out.getvalue(), out.getvalue()


def test_schedule_targets_name_every_coincidence_for_a_plain_2d_claim():
    caps = load_adapter("reference").capabilities
    t = targets(caps, get("forward.reference").needs_for(caps))
    assert {f"coincidence:{c}" for c in COINCIDENCES} <= set(t)
    assert "corner:negative_padding" in t or "negative" not in caps.padding


def test_schedule_is_a_function_of_its_inputs():
    caps = load_adapter("reference").capabilities
    needs = get("forward.reference").needs_for(caps)
    a = schedule(caps, QUICK, needs, seed=3, salt="x")
    assert a == schedule(caps, QUICK, needs, seed=3, salt="x")     # replayable without hypothesis


class _RaisesOnEmptyBatch(ReferenceAdapter):
    """Claims zero_batch (the reference's default) but raises on N = 0, as the library of
    the issue's finding did."""
    name = "raises-on-empty-batch"

    def forward(self, x, w, b, **kw):
        if x.shape[0] == 0:
            raise ValueError("expected a non-empty batch")
        return super().forward(x, w, b, **kw)


@pytest.mark.parametrize("seed", range(5))
def test_claimed_zero_batch_is_reached_by_forward_contract_on_every_seed(seed):
    a = load_adapter(_RaisesOnEmptyBatch())
    assert a.capabilities.zero_batch
    r = run_invariant(a, get("forward.contract"), QUICK, seed=seed, shrink=False)
    assert r.verdict == "error", (r.verdict, r.message)
    assert "non-empty batch" in r.message
    assert r.witness["spec"]["batch"] == 0


@pytest.mark.parametrize("seed", range(3))
def test_no_target_is_reached_only_by_a_skipped_example(seed):
    """forward.shift_equivariance skips geometries along which no shift says anything; its
    schedule no longer spends targets on them: no hole, no skipped example, and one output
    position (where no shift is possible) is not a target. A shift by one stride moves the
    output by one position: shift equivariance of correlation, common practice, no source."""
    caps = load_adapter("reference").capabilities
    inv = get("forward.shift_equivariance")
    assert "coincidence:output_one" not in targets(caps, inv.needs_for(caps))
    r = run_invariant(load_adapter("reference"), inv, QUICK, seed=seed, shrink=False)
    assert r.verdict == "pass", r.message
    from convwitness.report.reach import invariant_reach
    holes = invariant_reach(r.reach)["holes"]
    assert holes == [] and r.skipped == 0, (holes, r.skip_reasons)


class _RaisesOnEmptyAxis(ReferenceAdapter):
    """Claims zero_spatial (as the reference does) but raises on an input axis of length 0,
    as torch 2.13's conv1d does ("Only zero batch or zero channel inputs are supported";
    seen with python3 -c "import torch, torch.nn.functional as F;
    F.conv1d(torch.zeros(1,1,0), torch.ones(1,1,1), padding=1)" on this CPU machine)."""
    name = "raises-on-empty-axis"

    def forward(self, x, w, b, **kw):
        if x.size == 0 and x.shape[0] > 0:      # either layout: channels are never 0 here
            raise ValueError("expected every spatial axis to be non-empty")
        return super().forward(x, w, b, **kw)


@pytest.mark.parametrize("seed", range(5))
def test_claimed_zero_size_axis_is_reached_on_every_seed(seed):
    a = load_adapter(_RaisesOnEmptyAxis())
    assert a.capabilities.zero_spatial
    r = run_invariant(a, get("forward.reference"), QUICK, seed=seed, shrink=False)
    assert r.verdict == "error", (r.verdict, r.message)
    assert "non-empty" in r.message and 0 in r.witness["spec"]["input_size"]


def test_zero_size_axis_is_outside_a_claim_that_does_not_name_it():
    """Off by default: a certificate never covers a zero-size axis no example reached."""
    from convwitness.geometry.capabilities import Capabilities
    spec = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(0,), kernel_size=(1,),
                    padding=1, dtype="float64")
    assert "zero_spatial=False" in Capabilities().refusal(spec)
    assert Capabilities(zero_spatial=True).admits(spec)
    caps = load_adapter("torch").capabilities if _has("torch") else Capabilities()
    assert not caps.zero_spatial
    assert "corner:zero_spatial" not in targets(caps, get("forward.reference").needs_for(caps))


def _has(module: str) -> bool:
    import importlib.util
    return importlib.util.find_spec(module) is not None


def test_report_reach_of_a_run_names_targets_and_what_was_reached():
    r = run_invariant(load_adapter("reference"), get("forward.contract"), QUICK, seed=0)
    assert r.verdict == "pass"
    assert set(r.reach["targets"]) - {"feature:plain"} <= set(r.reach["reached"])
    assert r.reach["reached"]["feature:zero_batch"] >= 1


# -- the coincidence bugs are hidden behind their coincidence ----------------------------
def _arrays(spec, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(spec.x_shape)
    w = rng.standard_normal(spec.w_shape)
    g = rng.standard_normal(spec.y_shape)
    return x, w, g


def _forward_differs(cls, spec) -> bool:
    x, w, _ = _arrays(spec)
    kw = dict(stride=spec.stride, padding=spec.padding, dilation=spec.dilation, groups=spec.groups)
    return not np.allclose(cls().forward(x, w, None, **kw), ref.forward(spec, x, w, None))


def _grad_weight_differs(cls, spec) -> bool:
    x, w, g = _arrays(spec)
    kw = dict(stride=spec.stride, padding=spec.padding, dilation=spec.dilation, groups=spec.groups)
    return not np.allclose(cls().backward(x, w, None, g, **kw)[1], ref.grad_weight(spec, x, g))


@pytest.mark.parametrize("cls, differs, with_it, without_it", [
    (WeightGradChannelsSwapped, _grad_weight_differs,
     _spec(in_channels=6, out_channels=6, groups=3), _spec(in_channels=6, out_channels=9, groups=3)),
    (WeightGradChannelsSwapped, _grad_weight_differs,
     _spec(in_channels=4, out_channels=4), _spec(in_channels=4, out_channels=5)),
    (SquareInputAxesSwapped, _forward_differs,
     _spec(input_size=(5, 5), kernel_size=(3, 3)), _spec(input_size=(5, 6), kernel_size=(3, 3))),
    (DepthwiseMultiplierOrder, _forward_differs,
     _spec(in_channels=3, out_channels=6, groups=3), _spec(in_channels=3, out_channels=3, groups=3)),
    (BatchChannelsSwapped, _forward_differs, _spec(batch=3), _spec(batch=2)),
    (PatchKernelTransposed, _forward_differs,
     _spec(kernel_size=(2, 2), stride=(2, 2)), _spec(kernel_size=(2, 2), stride=(1, 2))),
])
def test_coincidence_bug_shows_only_with_its_coincidence(cls, differs, with_it, without_it):
    # the correct answer is the float64 reference; every shape is right in both geometries
    assert differs(cls, with_it)
    assert not differs(cls, without_it)


# -- the seed matrix -----------------------------------------------------------------------
def test_parse_seeds():
    assert parse_seeds("0-4") == [0, 1, 2, 3, 4]
    assert parse_seeds("0-2,9,1") == [0, 1, 2, 9]
    with pytest.raises(ConvWitnessError, match="expected seeds such as 0-4"):
        parse_seeds("zero")


def test_seed_matrix_of_coincidence_bugs_is_full():
    out = io.StringIO()
    rc = selftest(seeds="0-1", only="reference,batch_channels_swapped,weight_grad_channels_swapped",
                  stdout=out, stderr=io.StringIO())
    text = out.getvalue()
    assert rc == 0, text
    assert "4 of 4 (bug, seed) cells caught" in text


def test_schedule_alone_catches_corner_and_patch_bugs_on_every_seed():
    """With the free search kept on the schedule's geometries (compiles_per_shape), only
    the schedule can catch a bug: negative padding read past the crop (BUG-CLASSES C07),
    the flattened-patch path of stride == kernel (C27) and an output index kept in too
    narrow a counter (C15: only a large output shows it) must be on its path."""
    out = io.StringIO()
    rc = selftest(seeds="0-4", only="negative_padding_wraps,patch_kernel_transposed,narrow_output_index",
                  stdout=out, stderr=io.StringIO(), compiles_per_shape=True)
    text = out.getvalue()
    assert rc == 0, text
    assert "15 of 15 (bug, seed) cells caught" in text and "compiles_per_shape" in text


# -- the report's reach section -------------------------------------------------------------
def test_report_reach_validates_against_its_json_schema_and_shows_in_summary_md():
    # JSON Schema draft 2020-12 (json-schema.org), checked by the jsonschema library
    from convwitness.report.document import validate_report
    from convwitness.report.markdown import render
    from convwitness.run.certify import certify
    doc, _ = certify(load_adapter("reference"), profile="quick", seed=0,
                     only="forward.contract,grad_weight.reference")
    validate_report(doc)
    assert doc["reach"]["targets"] == doc["reach"]["reached"] > 0 and doc["reach"]["holes"] == {}
    for r in doc["invariants"]:
        assert set(r["reach"]["targets"]) <= set(r["reach"]["reached"])
        for pct in doc["reach"]["pairs"][r["id"]].values():
            assert 0 < pct <= 100
    assert "no holes." in render(doc)


def test_report_names_a_hole():
    from convwitness.report.reach import invariant_reach, markdown_lines
    r = invariant_reach({"targets": ["feature:zero_batch", "dtype:float32"], "scheduled": 1,
                         "pairs": {"stride×dilation": ["unit×none", "strided×none"]},
                         "reached": {"dtype:float32": 3, "pair:stride×dilation=unit×none": 3}})
    assert r["holes"] == ["feature:zero_batch"] and r["pairs"] == {"stride×dilation": 50.0}
    text = "\n".join(markdown_lines({"reach": {"targets": 2, "reached": 1, "pairs": {},
                                               "holes": {"forward.contract": r["holes"]}}}))
    assert "`forward.contract`: feature:zero_batch" in text


def test_run_wide_pool_keeps_every_target_and_shares_geometries():
    from convwitness.run.covering import run_schedules
    caps = load_adapter("reference").capabilities
    sched = run_schedules(caps, QUICK, 0)
    distinct = {s for specs in sched.values() for s in specs}
    assert len(distinct) < sum(map(len, sched.values()))          # geometries are shared
    for inv_id, specs in sched.items():
        inv = get(inv_id)
        needs = inv.needs_for(caps)
        wanted = {t for t in targets(caps, needs, QUICK) if not t.startswith("kind:")}
        assert wanted <= set().union(*(geometry_tags(s, QUICK.max_elements)[1] for s in specs)), inv_id
        # a shared geometry still meets this invariant's needs
        assert all(s.transposed == needs.transposed and s.batch >= needs.batch_min for s in specs)
