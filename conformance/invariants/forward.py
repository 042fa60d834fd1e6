"""Forward-pass invariants: the output contract, agreement with the reference,
exactness on integers, linearity, and the bias as a shift."""
from __future__ import annotations

import numpy as np

from ..numerics import reference as ref
from .evidence import compare, combine
from ..geometry.formats import get_format, to_format
from ..cases.strategies import Needs
from ..cases.values import EXACT_KINDS, SALTS
from . import invariant
from ._linear import near_underflow, power_of_two, products_stay_normal, second_operand
from ._common import (check_output_contract, copies, judge, model_of, overflow_possible, pass_bound,
                      run_forward, self_bound, without_bias)

LINEAR_KINDS = ("small_int", "pow2", "uniform", "wide")


def _expected(adapter, spec, x, w, b):
    return pass_bound(adapter, spec, "transposed" if spec.transposed else "forward",
                      {"x": x, "w": w, "b": b})


@invariant("forward.contract", passes=("forward",), needs=Needs(batch_min=0),
           statement="y has the shape of Relationship 15, the input dtype, is a fresh array, "
                     "and is finite where the exact result is")
def output_contract(adapter, case, ctx):
    """shape(y) = (N, C_out, floor((L + p_lo + p_hi - d(k-1) - 1)/s) + 1, ...),
    dtype(y) = dtype(x); y shares no memory with x, w, b or an earlier y;
    |y_exact| + bound < max  =>  y finite."""
    return check_output_contract(adapter, case, label="output contract")


@invariant("forward.reference", steer=True, passes=("forward",),
           statement="y agrees with the float64 reference within the derived rounding-error bound")
def forward_reference(adapter, case, ctx):
    """|y - y_ref| <= c * (|x| * |w| + |b|) + u_out |y_ref| elementwise, with c from the
    declared error model (gamma_n for direct summation of n = C_in/G prod(k) terms)."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    expected, bound = _expected(adapter, spec, case.x, case.w, case.b)
    return judge(adapter, spec, y, expected, bound, what="y", criterion="forward.reference: |y - y_ref| <= bound")


def _exact_dtypes(caps):
    return tuple(d for d in caps.dtypes if caps.error_model_for(d).algorithm == "direct")


@invariant("forward.exact_integers", passes=("forward",), needs=Needs(kinds=EXACT_KINDS),
           requires=lambda caps: None if _exact_dtypes(caps) else
           "no dtype is declared with direct summation (fast algorithms are not exact on integers)",
           adjust=lambda caps, needs: Needs(kinds=needs.kinds, dtypes=_exact_dtypes(caps)),
           statement="small-integer data give the exact result wherever every partial sum is "
                     "representable")
def forward_exact(adapter, case, ctx):
    """x, w, b integers and |x| * |w| + |b| <= 2^p (p the narrowest precision of the
    declared model) => y == y_ref exactly, in any summation order."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    expected, bound = _expected(adapter, spec, case.x, case.w, case.b)
    exact_here = bound.magnitude <= bound.exact_limit
    values = np.where(exact_here, 0.0, bound.values)
    ev = compare(y, expected, values, what="y",
                 criterion=f"forward.exact_integers: y == y_ref where |x|⋆|w| <= {bound.exact_limit:g}",
                 explanation=f"{int(exact_here.sum())} of {exact_here.size} elements must be exact; "
                             f"elsewhere {bound.explain()}",
                 allow=overflow_possible(spec, adapter, bound))
    return ev


def _linearity(adapter, case, name: str, purpose: str):
    spec, zb = without_bias(adapter, case.spec, case.b)       # no bias (or a zero one)
    x, w = case.x, case.w
    a1 = getattr(case, name)
    a2 = second_operand(case, a1, SALTS[f"{purpose}_second"])
    s = (a1.astype(np.float64) + a2.astype(np.float64))
    a3 = to_format(s, spec.dtype)
    # The rounding error of a floating-point addition is itself representable (barring
    # underflow), so f(a3) = f(a1) + f(a2) + f(delta) exactly, delta = a3 - (a1 + a2).
    delta = a3.astype(np.float64) - s
    delta_d = to_format(delta, spec.dtype)
    if not np.array_equal(delta_d.astype(np.float64), delta):
        delta_d = None
    args = lambda a: (a, w) if name == "x" else (x, a)   # noqa: E731
    y1 = run_forward(adapter, spec, *args(a1), zb)
    y2 = run_forward(adapter, spec, *args(a2), zb)
    y3 = run_forward(adapter, spec, *args(a3), zb)
    b1 = self_bound(adapter, spec, *args(a1), zb, y1)
    b2 = self_bound(adapter, spec, *args(a2), zb, y2)
    b3 = self_bound(adapter, spec, *args(a3), zb, y3)
    tol = b1.values + b2.values + b3.values
    if not delta.any():
        corr = 0.0
    elif delta_d is not None:
        y_d = run_forward(adapter, spec, *args(delta_d), zb)
        corr = y_d.astype(np.float64)
        tol = tol + self_bound(adapter, spec, *args(delta_d), zb, y_d).values
    else:       # underflow in the residual: take it from the reference (tiny)
        corr = ref.forward(spec, *args(delta), zb)
    lhs = y3.astype(np.float64)
    rhs = y1.astype(np.float64) + y2.astype(np.float64) + corr
    tol = tol + 4 * 2.0 ** -53 * (np.abs(rhs) + np.abs(lhs))
    free = overflow_possible(spec, adapter, b1) | overflow_possible(spec, adapter, b2) | overflow_possible(spec, adapter, b3)
    add = compare(y3, rhs, tol, what="y", allow=free,
                  criterion=f"additivity in {name}: |f({name}1+{name}2) - f({name}1) - f({name}2)| <= "
                            "sum of the three bounds", explanation=b1.explain())
    # Homogeneity: f(2^k a) == 2^k f(a) bit for bit.
    k = power_of_two(case, SALTS[f"{purpose}_scale"])
    top = min(get_format(model_of(adapter, spec).resolve(spec.dtype).accumulate).max,
              get_format(spec.dtype).max)
    if (b1.magnitude.size and b1.magnitude.max() * 2.0 ** max(k, 0) * 2 >= top) or \
            np.abs(a1.astype(np.float64)).max(initial=0) * 2.0 ** k >= get_format(spec.dtype).max:
        k = -1
    if not products_stay_normal(adapter, spec, *args(a1), k):
        return add
    scaled = to_format(a1.astype(np.float64) * 2.0 ** k, spec.dtype)
    if not np.array_equal(scaled.astype(np.float64), a1.astype(np.float64) * 2.0 ** k):
        return add                       # the scaled operand is not exact in the dtype
    ys = run_forward(adapter, spec, *args(scaled), zb)
    y1f = y1.astype(np.float64)
    free_h = near_underflow(y1f, ys, k, get_format(spec.dtype).tiny) | ~np.isfinite(y1f) | \
        overflow_possible(spec, adapter, b1)
    deterministic = adapter.capabilities.deterministic
    hom_tol = 0.0 if deterministic else 2 * b1.values * 2.0 ** k
    hom = compare(ys, y1.astype(np.float64) * 2.0 ** k, hom_tol, what="y", allow=free_h,
                  criterion=f"homogeneity in {name}: f(2^{k}·{name}) == 2^{k}·f({name})"
                            + (" bit for bit" if deterministic else " within twice the bound"),
                  explanation="power-of-two scaling commutes with every rounding (no under/overflow)",
                  exact=deterministic)
    return combine(add, hom)


@invariant("forward.input_linearity", passes=("forward",), needs=Needs(kinds=LINEAR_KINDS),
           statement="y is linear in x: additive within the bound, homogeneous under 2^k bit for bit")
def linearity_input(adapter, case, ctx):
    """f(x1 + x2) = f(x1) + f(x2) within B(x1) + B(x2) + B(x1+x2);
    f(2^k x) = 2^k f(x) exactly (no bias)."""
    return _linearity(adapter, case, "x", "input")


@invariant("forward.weight_linearity", passes=("forward",), needs=Needs(kinds=LINEAR_KINDS),
           statement="y is linear in w: additive within the bound, homogeneous under 2^k bit for bit")
def linearity_weight(adapter, case, ctx):
    """f_{w1 + w2}(x) = f_{w1}(x) + f_{w2}(x) within the summed bounds;
    f_{2^k w}(x) = 2^k f_w(x) exactly (no bias)."""
    return _linearity(adapter, case, "w", "weight")


@invariant("forward.bias_shift", passes=("forward",), needs=Needs(bias=True),
           requires=lambda caps: None if caps.bias else "adapter does not claim bias",
           statement="the bias is a pure per-channel shift: f(x, w, b) = f(x, w, 0) + b")
def bias_shift(adapter, case, ctx):
    """f(x, w, b)[n, o, ...] - f(x, w, None)[n, o, ...] = b[o]
    within B(with bias) + B(without bias)."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y_b = run_forward(adapter, spec, x, w, b)
    nb, zb = without_bias(adapter, spec, case.b)        # no bias (or a zero one)
    y_0 = run_forward(adapter, nb, case.x, case.w, zb)
    bd_b = self_bound(adapter, spec, case.x, case.w, case.b, y_b)
    bd_0 = self_bound(adapter, nb, case.x, case.w, zb, y_0)
    shape = (-1,) + (1,) * spec.ndim if spec.layout == "channels_first" else (-1,)
    shifted = y_0.astype(np.float64) + case.b.astype(np.float64).reshape(shape)
    tol = bd_b.values + bd_0.values + 2.0 ** -52 * np.abs(shifted)
    free = overflow_possible(spec, adapter, bd_b) | overflow_possible(nb, adapter, bd_0)
    return compare(y_b, shifted, tol, what="y", allow=free,
                   criterion="bias shift: |f(x,w,b) - (f(x,w,None) + b)| <= B_b + B_0",
                   explanation=bd_b.explain())
