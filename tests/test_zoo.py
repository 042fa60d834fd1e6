"""The self-test: the suite on the planted-bug zoo and on correct implementations.

What is checked against outside sources:
- the zoo's correct numpy control against torch.nn.functional (conv{1,2,3}d and
  autograd) in float64, within the float64 bound of convwitness.numerics.bounds (Higham 2002,
  §3.1), so the control is correct by an outside judge and not by our own reference;
- every planted bug is a defect class of shared/BUG-CLASSES.md, each citing the public
  issue of a real library that shipped it (the class id is on the adapter); the test
  checks the suite catches each in the quick profile, and that every invariant of the
  catalogue catches at least one of them (an invariant that catches nothing is unproven).
"""
from __future__ import annotations

import io
import re

import numpy as np
import pytest

from convwitness import ConvSpec
from convwitness.numerics import reference as ref
from convwitness.adapters.zoo import CORRECT, ZOO, bug_class_of
from convwitness.adapters.zoo_numpy import NumpyTapAdapter
from convwitness.numerics.bounds import ErrorModel, derive
from convwitness.invariants import catalogue
from convwitness.run.selftest import ZooOutcome, detection_matrix, run_zoo, selftest


def test_zoo_has_twenty_bugs_or_more_each_with_a_bug_class():
    # the issue asks for at least 20, one per real bug class (C01..C26 of BUG-CLASSES.md)
    assert len(ZOO) >= 20
    classes = {bug_class_of(n) for n in ZOO}
    assert all(re.fullmatch(r"C\d\d", c) for c in classes), classes
    assert len(classes) >= 20


def test_the_suite_on_the_zoo_and_the_controls():
    # one run of the whole zoo (about a minute), checked four ways; one test so that
    # pytest-xdist does not run the zoo once per worker
    # (detection only: the shrunk witnesses are checked in test_selftest_command_exit_codes
    # and, for 1-minimality by plain enumeration, in test_minimize.py)
    outcomes = {o.name: o for o in run_zoo("quick", seed=0, witnesses=False)}

    missed = [n for n in ZOO if not outcomes[n].caught_by]
    assert not missed, f"certified although planted bugs: {missed}"

    flagged = {n: outcomes[n].messages for n in CORRECT if outcomes[n].caught_by}
    assert not flagged, flagged
    # and the controls did run: a control that ran nothing would be clean vacuously
    assert all(outcomes[n].ran >= 20 for n in CORRECT), {n: outcomes[n].ran for n in CORRECT}

    # the quantized invariants are proven by the quantized zoo (adapters/zoo_quant.py),
    # which the self-test runs beside the float zoo
    from convwitness.adapters.zoo_quant import QUANT_ZOO
    caught = {i for n in list(ZOO) + list(QUANT_ZOO) for i in outcomes[n].caught_by}
    unproven = sorted(inv.id for inv in catalogue() if inv.id not in caught)
    assert not unproven, f"invariants that caught no zoo bug: {unproven}"

    text = detection_matrix(list(outcomes.values()))
    row = next(line for line in text.splitlines() if line.startswith("stride_tail_dropped "))
    assert row.rstrip().endswith("ok")
    # the number of X cells is the number of invariants that flagged the bug
    assert row.count(" X") == len(outcomes["stride_tail_dropped"].caught_by) >= 1


def test_selftest_command_exit_codes(monkeypatch):
    out, err = io.StringIO(), io.StringIO()
    assert selftest(only="reference,kernel_flipped", stdout=out, stderr=err) == 0
    assert "1 of 1 planted bugs caught; 1 of 1 correct adapters clean" in out.getvalue()
    # the flipped kernel's witness, shrunk by hypothesis and then by the local pass
    assert "1 of 1 zoo witnesses 1-minimal (100%)" in out.getvalue()
    # a "bug" that is in fact correct must make the self-test fail (exit 1, named)
    import convwitness.adapters.zoo as zoo
    monkeypatch.setitem(zoo.ZOO, "not_a_bug", NumpyTapAdapter)
    out = io.StringIO()
    assert selftest(only="not_a_bug", stdout=out, stderr=io.StringIO()) == 1
    assert "MISSED: not_a_bug" in out.getvalue()


def test_selftest_unknown_entry_is_a_usage_error():
    from convwitness.cli.main import parse_args, run
    err = io.StringIO()
    rc = run(parse_args(["selftest", "--only", "no_such_bug"]), stdout=io.StringIO(), stderr=err)
    assert rc == 2
    assert "no_such_bug" in err.getvalue() and "expected names from" in err.getvalue()


def test_outcome_ok_semantics():
    assert ZooOutcome("a", "C01", control=False, caught_by=["x"]).ok
    assert not ZooOutcome("a", "C01", control=False).ok
    assert ZooOutcome("r", "", control=True).ok
    assert not ZooOutcome("r", "", control=True, caught_by=["x"]).ok


# -- the numpy control against an outside implementation --------------------------------
torch = pytest.importorskip("torch")
F = torch.nn.functional
CASES = [
    dict(batch=2, in_channels=4, out_channels=6, input_size=(9,), kernel_size=(3,), stride=2,
         padding=((2, 1),), dilation=2, groups=2, bias=True),
    dict(batch=1, in_channels=3, out_channels=3, input_size=(7, 6), kernel_size=(3, 2),
         stride=(2, 1), padding=((1, 0), (0, 1)), dilation=(1, 2), groups=3, bias=True),
    dict(batch=2, in_channels=2, out_channels=4, input_size=(4, 5, 3), kernel_size=(2, 3, 1),
         stride=(1, 2, 2), padding=((1, 1), (0, 0), (1, 0)), dilation=1, groups=1, bias=False),
]


def _torch_conv(spec, x, w, b, g):
    conv = {1: F.conv1d, 2: F.conv2d, 3: F.conv3d}[spec.ndim]
    pad = [p for lo_hi in reversed(spec.padding) for p in lo_hi]
    xt = torch.tensor(x, requires_grad=True)
    wt = torch.tensor(w, requires_grad=True)
    bt = None if b is None else torch.tensor(b, requires_grad=True)
    y = conv(F.pad(xt, pad), wt, bt, stride=spec.stride, dilation=spec.dilation, groups=spec.groups)
    y.backward(torch.tensor(g))
    return (y.detach().numpy(), xt.grad.numpy(), wt.grad.numpy(),
            None if bt is None else bt.grad.numpy())


@pytest.mark.parametrize("geometry", CASES, ids=["1d", "2d", "3d"])
def test_numpy_control_matches_torch_in_float64(geometry):
    # outside source: torch.nn.functional.conv{1,2,3}d with autograd (float64)
    spec = ConvSpec(dtype="float64", **geometry)
    rng = np.random.default_rng(7)
    x = rng.standard_normal(spec.x_shape)
    w = rng.standard_normal(spec.w_shape)
    b = rng.standard_normal(spec.out_channels) if spec.bias else None
    g = rng.standard_normal(spec.y_shape)
    ty, tgx, tgw, tgb = _torch_conv(spec, x, w, b, g)
    ctl = NumpyTapAdapter()
    kw = dict(stride=spec.stride, padding=spec.padding, dilation=spec.dilation, groups=spec.groups)
    y = ctl.forward(x, w, b, **kw)
    gx, gw, gb = ctl.backward(x, w, b, g, **kw)
    model = ErrorModel(accumulate="float64")
    ax, aw, ag = np.abs(x), np.abs(w), np.abs(g)
    for pass_, mine, theirs, mag, with_bias in (
            ("forward", y, ty, ref.forward_magnitude(spec, x, w, b), b is not None),
            ("grad_input", gx, tgx, ref.grad_input_magnitude(spec, aw, ag), False),
            ("grad_weight", gw, tgw, ref.grad_weight_magnitude(spec, ax, ag), False)):
        bound = derive(spec, model, pass_, mag, theirs, with_bias=with_bias)
        # both sides round: twice the derived bound covers torch's error and ours
        assert np.all(np.abs(mine - theirs) <= 2 * bound.values), pass_
    if b is not None:
        np.testing.assert_allclose(gb, tgb, rtol=1e-12, atol=1e-12)
