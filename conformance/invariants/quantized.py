"""Quantized integer convolution: exact accumulation, zero points, per-channel
parameters, saturation and requantization within the declared model's deviation.

Every check compares the adapter's ``quantized()`` output with the exact reference of
numerics/requant.py (int64 accumulation, exact rational requantization, round half to
even) within the deviation its declared model allows (0 units for ``exact`` and for
int32 output). Each invariant draws the cases where its bug class shows
(cases/quant.py).
"""
from __future__ import annotations

import math

import numpy as np
from hypothesis import strategies as st

from ..cases.quant import QCase, QNeeds, fill, quant_examples
from ..cases.strategies import Needs
from ..geometry.quant import INT_RANGES, QuantSpec
from ..geometry.spec import ConvSpec
from ..numerics import requant as rq
from . import invariant
from .evidence import Evidence, compare

PASSES = ("quantized",)


def _model(adapter) -> str:
    return adapter.capabilities.quant.model


def _needs_quant(outputs=None):
    def requires(caps):
        if caps.quant is None:
            return "the adapter declares no quantized pass (Capabilities.quant is None)"
        if outputs is not None and not set(outputs) & set(caps.quant.outputs):
            return (f"needs output(s) {sorted(outputs)}; the adapter claims outputs "
                    f"{sorted(caps.quant.outputs)}")
        return None
    return requires


def _cases(qn_of):
    return lambda caps, profile: quant_examples(caps, profile, qn_of(caps))


def _wrapped(spec: QuantSpec, actual: np.ndarray, expected: np.ndarray) -> str:
    """A note when the worst difference looks like wrap-around (a jump of about the range)."""
    if not spec.requantized or actual.size == 0:
        return ""
    lo, hi = INT_RANGES[spec.output]
    jump = np.abs(actual.astype(np.int64) - expected) > (hi - lo) // 2
    if jump.any():
        first = [int(i) for i in np.argwhere(jump)[0]]
        return (f"\n  {int(jump.sum())} element(s) differ by more than half the {spec.output} range "
                f"(first at {first}): the output wrapped instead of saturating")
    return ""


def check_reference(adapter, case: QCase, *, criterion: str) -> Evidence:
    """y == the exact reference, within the declared model's deviation."""
    spec = case.spec
    y = adapter.quantized(spec, case.x.copy(), case.w.copy(), None if case.b is None else case.b.copy())
    expected, acc = rq.reference(spec, case.x, case.w, case.b)
    dev, why = rq.deviation(spec, acc, _model(adapter))
    ev = compare(y, expected, dev, what="y", criterion=criterion, explanation=why,
                 exact=not dev.any())
    if not ev.ok:
        ev.message += _wrapped(spec, y, expected)
    return ev


@invariant("quantized.accumulation", passes=PASSES, requires=_needs_quant({"int32"}),
           cases=_cases(lambda caps: QNeeds(outputs=("int32",))),
           statement="the int32 output equals the exact integer sum of (x - x_zp)(w - w_zp) plus the bias")
def accumulation(adapter, case, ctx):
    """y[n,o,p] = sum_{c,t} (x[n,c,p*s+t*d-p_lo] - x_zp)(w[o,c,t] - w_zp[o]) + b[o], exactly
    (int64 reference; a correct int32 accumulator within its claimed max_sum is exact)."""
    return check_reference(adapter, case, criterion="y == exact int64 accumulation")


@invariant("quantized.padding_zero", passes=PASSES, requires=_needs_quant(),
           cases=_cases(lambda caps: QNeeds(geometry=Needs(padding=True), zero_points=("far", "ends"))),
           statement="padded taps contribute exactly zero in real terms (the input zero point, never a raw 0)")
def padding_zero(adapter, case, ctx):
    """With padding and x_zp far from 0: a padded tap reads q = x_zp, so
    (q - x_zp)(w - w_zp) = 0; y equals the reference (within the model's deviation)."""
    return check_reference(adapter, case, criterion="y == reference with padding at the input zero point")


def _per_channel_needs(caps):
    return QNeeds(per_channel=True, geometry=Needs(grouped=True if caps.groups else None))


@invariant("quantized.per_channel", passes=PASSES,
           requires=lambda caps: _needs_quant()(caps) or (
               None if caps.quant.per_channel else "the adapter claims per-tensor weight parameters only"),
           cases=_cases(_per_channel_needs),
           statement="per-channel scales and zero points reach their OUTPUT channel, groups included")
def per_channel(adapter, case, ctx):
    """w_scale[o], w_zp[o] act on output channel o (o in group o // (C_out/G)); distinct
    scales per channel make an input-channel or group-relative indexing visible."""
    return check_reference(adapter, case, criterion="y == reference with per-output-channel parameters")


@invariant("quantized.saturation", passes=PASSES, requires=_needs_quant({"int8", "uint8"}),
           cases=_cases(lambda caps: QNeeds(outputs=("int8", "uint8"), multipliers=("large",),
                                            kinds=("saturating", "extreme"))),
           statement="requantized outputs saturate at the ends of the range (or clamp) and never wrap")
def saturation(adapter, case, ctx):
    """y = clamp(round(acc*M) + y_zp, lo, hi): values beyond the range become lo or hi."""
    return check_reference(adapter, case, criterion="y == saturated reference")


def _enough_outputs(spec, caps) -> bool:
    """At least 16 output elements: with M = 2^-j (the "half" multipliers) an accumulator
    lands on a tie k + 1/2 where it is an odd multiple of 2^(j-1), about one element in
    2^j (j <= 3), so a geometry of one or two outputs would show the rounding rule only
    by luck."""
    return math.prod(spec.y_shape) >= 16


@invariant("quantized.requantization", passes=PASSES, requires=_needs_quant({"int8", "uint8"}),
           cases=_cases(lambda caps: QNeeds(geometry=Needs(applies=_enough_outputs), outputs=("int8", "uint8"),
                                            multipliers=("half", "half", "near_half", "moderate", "tiny"),
                                            zero_points=("any", "far"), clamp=False,
                                            kinds=("near_zero_point",))),
           steer=True,
           statement="requantized outputs within the declared model's derived deviation of exact rounding")
def requantization(adapter, case, ctx):
    """|y - clamp(round_half_even(acc*M_o) + y_zp)| <= D_model (0 for the exact model;
    floor(1 + E) with E from the multiplier's precision otherwise)."""
    return check_reference(adapter, case, criterion="|y - exact requantization| <= model deviation")


@invariant("quantized.zero_points", passes=PASSES, requires=_needs_quant(),
           cases=_cases(lambda caps: QNeeds(zero_points=("ends",), kinds=("uniform", "extreme", "saturating"))),
           statement="zero points at the ends of their range are subtracted before the multiply")
def zero_points(adapter, case, ctx):
    """x_zp, w_zp, y_zp at the ends of their formats: the products are (x - x_zp)(w - w_zp),
    with differences up to 255 that overflow 8 bits (widened before the multiply)."""
    return check_reference(adapter, case, criterion="y == reference with extreme zero points")


@invariant("quantized.dequantized", passes=PASSES, requires=_needs_quant({"int8", "uint8"}),
           cases=_cases(lambda caps: QNeeds(outputs=("int8", "uint8"), multipliers=("moderate",))),
           statement="the dequantized output agrees with the float64 convolution of the dequantized inputs")
def dequantized(adapter, case, ctx):
    """|y - clamp(conv(x_s(x - x_zp), w_s(w - w_zp)) + b_real)/y_s + y_zp)| <= 1/2 + D_model
    (+ 1/2 M for a float bias rounded to the accumulator scale, + the float64 error)."""
    spec = case.spec
    y = adapter.quantized(spec, case.x.copy(), case.w.copy(), None if case.b is None else case.b.copy())
    real, err64 = rq.dequantized_reference(spec, case.x, case.w, case.b)
    acc = rq.accumulate(spec, case.x, case.w, case.b)
    dev, why = rq.deviation(spec, acc, _model(adapter))
    bound = 0.5 + dev + err64
    if spec.bias == "float":
        m = np.asarray([float(v) for v in rq.multipliers(spec)]).reshape(spec.channel_shape())
        bound = bound + 0.5 * m
    return compare(y, real, bound, what="y", criterion="|y - float64 conv of dequantized inputs| <= 1/2 + D",
                   explanation="half an output step for the final rounding; " + why)


# -- accumulator range: the longest sums the claim holds ----------------------------------
@st.composite
def _long_sums(draw, caps, profile):
    qc = caps.quant
    x_dtype = draw(st.sampled_from(sorted(qc.x_dtypes)))
    lo, hi = INT_RANGES[x_dtype]
    x_zp = draw(st.sampled_from((lo, hi)))
    dx, dw = hi - lo, 255 if qc.weight_zero_points else 128
    w_zp = (127,) if qc.weight_zero_points else (0,)
    n_max = min(qc.max_sum // (dx * dw), 2 ** 15)
    k = draw(st.integers(1, 8))
    c = max(1, n_max // k)
    conv = ConvSpec(batch=1, in_channels=c, out_channels=draw(st.integers(1, 2)), input_size=(k,),
                    kernel_size=(k,), bias=False, dtype="float64")
    output = draw(st.sampled_from(sorted(o for o in qc.outputs if o == "int32" or o == x_dtype
                                         or not qc.output_like_input)))
    kw = {}
    if output != "int32":
        kw = {"y_scale": float(2.0 ** math.ceil(math.log2(c * k * dx * dw / 100.0))), "y_zero_point": 0}
    spec = QuantSpec(conv, x_dtype=x_dtype, x_zero_point=x_zp, w_zero_point=w_zp, output=output, **kw)
    if not qc.admits(spec):
        spec = spec.replace(w_zero_point=(0,))
    out = []
    for _ in range(profile.values):
        seed = draw(st.integers(0, 2 ** 32 - 1))
        a = fill(spec, "saturating", seed)
        out.append(QCase(spec, a["x"], a["w"], None, "saturating", seed=seed))
    return tuple(out)


@invariant("quantized.accumulator_range", passes=PASSES, requires=_needs_quant(),
           cases=lambda caps, profile: _long_sums(caps, profile),
           statement="sums up to the claimed max_sum are held exactly (no narrow accumulator overflows)")
def accumulator_range(adapter, case, ctx):
    """With every product at its largest magnitude and the accumulation length as long as
    the claimed max_sum allows: y equals the reference (a narrower accumulator wraps)."""
    if not adapter.capabilities.quant.admits(case.spec):
        return Evidence.skip(f"refused by the claim: {adapter.capabilities.quant.refusal(case.spec)}")
    return check_reference(adapter, case, criterion="y == reference on the longest claimed sums")
