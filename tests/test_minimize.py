"""1-minimal witnesses (run/minimize.py).

The notion: a failing input is 1-minimal when removing any single unit of it makes the
failure go away (Zeller & Hildebrandt 2002, "Simplifying and Isolating
Failure-Inducing Input", IEEE TSE 28(2), ddmin's 1-minimality -- recalled from
memory). Here a unit is one step of one geometry parameter toward its smallest valid
value. The expected witnesses below are the ones issue 10 names ("a doubled input
gradient"; "a port that hangs on strided calls ... where N=1 C=1->1 S=1 k=1 s=2 would
do") and follow from the planted defects by construction, not from convwitness.
"""
from __future__ import annotations

import numpy as np
import pytest

from convwitness import load_adapter
from convwitness.adapters.reference import ReferenceAdapter
from convwitness.cases.case import Case
from convwitness.cases.profiles import get_profile
from convwitness.cases.values import fill
from convwitness.errors import SpecError
from convwitness.invariants import Context, get
from convwitness.run.minimize import minimize, neighbours
from convwitness.run.runner import run_invariant

QUICK = get_profile("quick")


class DoubledInputGradient(ReferenceAdapter):
    name = "doubled-input-gradient"

    def backward(self, x, w, b, grad_y, **kw):
        gx, gw, gb = super().backward(x, w, b, grad_y, **kw)
        return 2 * gx, gw, gb


class RefusesStrides(ReferenceAdapter):
    """Raises on every strided call (a stand-in for the issue's hanging port: the same
    path, without spending a call timeout per replay)."""
    name = "refuses-strides"

    def forward(self, x, w, b, *, stride, **kw):
        if any(s > 1 for s in stride):
            raise RuntimeError("strided kernels missing")
        return super().forward(x, w, b, stride=stride, **kw)


def _one_step_smaller(spec):
    """Every geometry one step smaller in one parameter, enumerated plainly (the test's
    own list, independent of run/minimize.py's): each int field minus one, each
    per-axis entry minus one, each padding entry one step toward 0."""
    out = []
    for f in ("batch", "in_channels", "out_channels", "groups"):
        out.append({f: getattr(spec, f) - 1})
    for f in ("input_size", "kernel_size", "stride", "dilation", "output_padding"):
        for i, v in enumerate(getattr(spec, f)):
            seq = list(getattr(spec, f))
            seq[i] = v - 1
            out.append({f: tuple(seq)})
    for i, (lo, hi) in enumerate(spec.padding):
        for j, p in enumerate((lo, hi)):
            if p:
                pads = [list(q) for q in spec.padding]
                pads[i][j] = p - (1 if p > 0 else -1)
                out.append({"padding": tuple(map(tuple, pads))})
    specs = []
    for ch in out:
        try:
            specs.append(spec.replace(**ch))
        except SpecError:
            continue
    # the space drawn from: at least one sample, one channel and one position per axis
    # (zero-sized tensors are a separate feature with invariants of their own)
    return [s for s in specs if s.batch >= 1 and min(s.in_channels, s.out_channels) >= 1
            and min(s.input_size) >= 1]


def _witness_spec(adapter_obj, inv_id, verdict):
    """The witness geometry of a shrunk run (checking its verdict and 1-minimal flag)."""
    from convwitness.geometry.spec import ConvSpec
    res = run_invariant(load_adapter(adapter_obj), get(inv_id), QUICK, seed=0, shrink=True)
    assert res.verdict == verdict and res.witness["minimal"] is True, res.witness
    return ConvSpec.from_dict(res.witness["spec"])


def _unit(spec):
    return (spec.batch, spec.in_channels, spec.out_channels, spec.groups, set(spec.input_size),
            set(spec.kernel_size), set(spec.dilation), set(spec.padding))


def test_doubled_input_gradient_shrinks_to_the_smallest_convolution():
    spec = _witness_spec(DoubledInputGradient(), "grad_input.reference", "fail")
    # any convolution shows a doubled gradient, so the witness is the smallest one
    assert _unit(spec) == (1, 1, 1, 1, {1}, {1}, {1}, {(0, 0)}) and set(spec.stride) == {1}


def test_port_failing_on_strides_shrinks_to_one_stride_of_two():
    spec = _witness_spec(RefusesStrides(), "forward.reference", "error")
    assert _unit(spec) == (1, 1, 1, 1, {1}, {1}, {1}, {(0, 0)})
    assert sorted(spec.stride) == [1] * (spec.ndim - 1) + [2]


@pytest.mark.parametrize("adapter_cls,inv_id", [(DoubledInputGradient, "grad_input.reference"),
                                                (RefusesStrides, "forward.reference")])
def test_witness_is_one_minimal_by_plain_enumeration(adapter_cls, inv_id):
    """Every one-step smaller geometry the adapter claims passes the invariant."""
    a = load_adapter(adapter_cls())
    inv = get(inv_id)
    res = run_invariant(a, inv, QUICK, seed=0, shrink=True)
    from convwitness.geometry.spec import ConvSpec
    spec = ConvSpec.from_dict(res.witness["spec"])
    for smaller in _one_step_smaller(spec):
        if not a.capabilities.admits(smaller):
            continue
        arrays = fill(smaller, res.witness["kind"], 0)
        case = Case(smaller, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], res.witness["kind"])
        try:
            ok = inv.check(a, case, Context()).ok
        except Exception:                      # noqa: BLE001 -- a raise is a failure too
            ok = False
        assert ok, f"{smaller.describe()} still fails, so {spec.describe()} is not 1-minimal"


def test_time_cap_is_recorded():
    """A cap of 0 s stops the pass before its first replay: the witness says so."""
    a = load_adapter(DoubledInputGradient())
    from convwitness.geometry.spec import ConvSpec
    spec = ConvSpec(2, 3, 3, (5,), (3,), dtype="float64")
    arrays = fill(spec, "uniform", 1)
    case = Case(spec, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], "uniform", 1)
    inv = get("grad_input.reference")
    ev = inv.check(a, case, Context())
    assert not ev.ok
    m = minimize(a, inv, case, ev, QUICK, cap_s=0.0)
    assert m.minimal is False and "time cap" in m.note and m.case is case


def test_neighbours_move_one_parameter_toward_its_least_value():
    """Each neighbour moves one parameter (groups: with the channels per group) toward
    its least value, and every one-step move of the plain enumeration is among them."""
    from convwitness.geometry.spec import ConvSpec
    spec = ConvSpec(2, 4, 6, (7, 5), (3, 2), stride=(2, 1), padding=((1, -1), (0, 2)),
                    dilation=(1, 2), groups=2)
    got = neighbours(spec)
    for name, n in got:
        diffs = [f for f in ("batch", "in_channels", "out_channels", "groups", "input_size",
                             "kernel_size", "stride", "dilation", "padding", "output_padding")
                 if getattr(n, f) != getattr(spec, f)]
        if name == "groups":
            assert n.groups < spec.groups
        else:
            assert len(diffs) == 1, (name, diffs)
            old, new = getattr(spec, diffs[0]), getattr(n, diffs[0])
            flat = lambda t: [abs(v) for v in (sum(t, ()) if diffs[0] == "padding" else (t if isinstance(t, tuple) else (t,)))]
            assert sum(flat(new)) < sum(flat(old)), (name, old, new)
    specs = {n for _, n in got}
    one_step = [s for s in _one_step_smaller(spec) if s.groups == spec.groups]
    assert one_step and all(s in specs for s in one_step), [s.describe() for s in one_step if s not in specs]
