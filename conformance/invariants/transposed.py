"""Transposed-convolution invariants: the output contract, agreement with the
reference, and equality with the input gradient of the matching convolution.

Per spatial axis with input length i, kernel k, stride s, dilation d, padding
(p_lo, p_hi) and output padding a, the output length is
``s(i - 1) + d(k - 1) + 1 + a - (p_lo + p_hi)`` (Dumoulin & Visin 2016,
arXiv:1603.07285, Relationship 14, with k replaced by the dilated extent).
"""
from __future__ import annotations

import numpy as np

from .evidence import Evidence, compare
from ..cases.strategies import Needs
from . import invariant
from ._common import (check_output_contract, copies, judge, overflow_possible, pass_bound,
                      run_forward, without_bias)


def _relationship_14(spec) -> tuple[int, ...]:
    return tuple(s * (i - 1) + d * (k - 1) + 1 + a - (lo + hi)
                 for i, k, s, d, a, (lo, hi) in zip(spec.input_size, spec.kernel_size, spec.stride,
                                                    spec.dilation, spec.output_padding, spec.padding))


def _expected(adapter, spec, x, w, b):
    return pass_bound(adapter, spec, "transposed", {"x": x, "w": w, "b": b})


@invariant("transposed.contract", passes=("transposed",), needs=Needs(transposed=True, batch_min=0),
           statement="the transposed output has the size of Relationship 14, the input dtype, is a "
                     "fresh array, and is finite where the exact result is")
def contract(adapter, case, ctx):
    """shape(y) = (N, C_out, s(i-1) + d(k-1) + 1 + a - (p_lo + p_hi), ...), dtype(y) = dtype(x);
    y shares no memory with x, w, b or an earlier y; |y_exact| + bound < max  =>  y finite."""
    spec = case.spec
    size = _relationship_14(spec)
    shape = (spec.batch, *size, spec.out_channels) if spec.layout == "channels_last" \
        else (spec.batch, spec.out_channels, *size)
    ev = check_output_contract(adapter, case, label="transposed contract", shape=shape)
    if ev.ok:
        ev.message = ev.message.replace(f"shape {shape}", f"shape {shape} (Relationship 14)")
    return ev


@invariant("transposed.reference", steer=True, passes=("transposed",), needs=Needs(transposed=True),
           statement="the transposed convolution agrees with the float64 reference within the "
                     "derived bound")
def reference(adapter, case, ctx):
    """|y - y_ref| <= c (|x| *^T |w| + |b|) + u_out |y_ref| elementwise, with c from the
    declared error model (gamma_n, n = C_in/G prod(k) terms at most per output)."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    expected, bound = _expected(adapter, spec, case.x, case.w, case.b)
    return judge(adapter, spec, y, expected, bound, what="y",
                 criterion="transposed.reference: |y - y_ref| <= bound")


def _extend(a: np.ndarray, spec, size) -> np.ndarray:
    """a (N, C, *i) zero-extended at the end of each spatial axis to ``size``."""
    lead = 1 if spec.layout == "channels_last" else 2
    width = [(0, 0)] * a.ndim
    for j, (have, want) in enumerate(zip(spec.input_size, size)):
        width[lead + j] = (0, want - have)
    if not any(hi for _, hi in width):
        return a.copy()
    out = np.zeros(tuple(n + hi for n, (_, hi) in zip(a.shape, width)), dtype=a.dtype)
    out[tuple(slice(0, n) for n in a.shape)] = a
    return out


@invariant("transposed.grad_input_identity",
           derives=lambda spec, caps: [("backward", spec.replace(bias=False).matching_conv())],
           passes=("transposed", "backward"),
           needs=Needs(transposed=True),
           statement="the transposed convolution equals the input gradient of the matching "
                     "convolution, computed by the adapter's own backward")
def matches_grad_input(adapter, case, ctx):
    """convT(x, w; s, p, a, d, G) = GI_conv(g = x zero-extended to L_out_conv; w), where conv is
    the convolution with input size = the transposed output size and in/out channels swapped
    (L_out_conv = i + floor(a/s), so x is extended when a >= s); no bias; within B_T + B_GI."""
    spec = case.spec.replace(bias=False)
    conv = spec.matching_conv()
    if not adapter.capabilities.admits(conv):
        return Evidence.skip(f"matching convolution not admitted: "
                             f"{adapter.capabilities.refusal(conv)}")
    gy = _extend(case.x, spec, conv.output_size)
    x0 = np.zeros(conv.x_shape, dtype=case.x.dtype)
    gx = adapter.backward(conv, x0, case.w.copy(), None, gy.copy())[0]
    call_spec, zb = without_bias(adapter, case.spec, case.b)     # no bias (or a zero one)
    y = run_forward(adapter, call_spec, case.x, case.w, zb)
    _, bt = _expected(adapter, spec, case.x, case.w, None)
    _, bgi = pass_bound(adapter, conv, "grad_input", {"w": case.w, "grad_y": gy})
    return compare(y, gx.astype(np.float64), bt.values + bgi.values, what="y",
                   allow=overflow_possible(spec, adapter, bt) | overflow_possible(conv, adapter, bgi),
                   criterion="transposed == input gradient of the matching convolution, "
                             "within B_T + B_GI",
                   explanation=bt.explain())
