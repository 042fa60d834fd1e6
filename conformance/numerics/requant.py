"""The exact answer of a quantized convolution and how far a declared model may be from it.

* **Accumulation** is exact: ``acc[n,o,p] = sum (x - x_zp) * (w[o] - w_zp[o]) + b_q[o]``
  over the window of output ``p`` (padded taps read the real value 0, i.e. the quantized
  value ``x_zp``, so they add nothing). Computed by the float64 reference engine on the
  integer differences: every partial sum is an integer below 2^53, hence exact
  (IEEE 754: integers up to 2^53 are representable), then held in int64.
* **Requantization** of the exact result, the *exact real rounding* of the ONNX
  QuantizeLinear/QLinearConv rule (round half to even, then add the zero point and
  saturate; ONNX operator specification, from memory):
  ``y = clamp(round_half_even(acc * M_o) + y_zp, lo, hi)`` with the real multiplier
  ``M_o = x_scale * w_scale[o] / y_scale`` taken as the exact rational of the float
  scales (Python ``fractions``: no rounding at all).
* **Allowed deviation per model** (:func:`deviation`), in output units (ulp of the
  integer format): ``exact`` -> 0; ``fixed_point`` (Jacob et al. 2018, CVPR, "Quantization
  and Training of Neural Networks for Efficient Integer-Arithmetic-Only Inference",
  Sec. 2.2: ``M = 2^-n M0`` with ``M0`` in [0.5, 1) held as a Q31 int32, a rounding
  doubling high multiply and a rounding right shift); ``float32`` (multiplier and
  product in binary32). The clamp is 1-Lipschitz, so a deviation before saturation
  bounds the one after it.
"""
from __future__ import annotations

import math
from fractions import Fraction

import numpy as np

from ..errors import SpecError
from ..geometry.quant import INT_RANGES, QuantSpec, worst_sum
from .gamma import U64, gamma
from . import reference as ref

__all__ = ["accumulate", "per_weight", "bias_q", "multipliers", "requantize_exact", "reference", "deviation",
           "dequantized_reference", "quantize_multiplier", "fixed_point_requantize",
           "round_half_even", "U32"]

#: unit roundoff of IEEE binary32 (2^-24)
U32 = 2.0 ** -24


def _geometry(spec: QuantSpec):
    return spec.conv.replace(dtype="float64", bias=False)


def per_weight(spec: QuantSpec, values) -> np.ndarray:
    """A per-tensor or per-output-channel tuple shaped to broadcast over w: along axis 0
    (C_out) forward; for a transposed w ``(C_in, C_out/G, *K)`` entry ``[c, j]`` holds
    output channel ``g*C_out/G + j`` of the group ``g = c // (C_in/G)`` of input channel c."""
    v = np.asarray(spec.channel(values), dtype=np.float64)
    c, nd = spec.conv, spec.conv.ndim
    if not c.transposed:
        return v.reshape((-1,) + (1,) * (nd + 1))
    opg, ipg = c.out_channels // c.groups, c.in_channels // c.groups
    table = v.reshape(c.groups, opg)[np.arange(c.in_channels) // ipg]        # (C_in, C_out/G)
    if c.layout == "channels_last":
        return table.reshape((c.in_channels,) + (1,) * nd + (opg,))
    return table.reshape((c.in_channels, opg) + (1,) * nd)


def _by_channel(spec: QuantSpec, a: np.ndarray) -> np.ndarray:
    """A view of y-like ``a`` with the output channel on axis 1 (writes reach ``a``)."""
    return np.moveaxis(a, spec.channel_axis, 1)


def round_half_even(num: int, den: int) -> int:
    """The integer nearest num/den (den > 0), ties to even."""
    q, r = divmod(num, den)
    twice = 2 * r
    if twice > den or (twice == den and q % 2):
        q += 1
    return q


def bias_q(spec: QuantSpec, b) -> np.ndarray | None:
    """The int32 bias at scale x_scale * w_scale[o] (zero point 0): b itself when int32; a
    float bias rounded half to even to that scale (exact rationals), saturated to int32."""
    if b is None or spec.bias == "none":
        return None
    if spec.bias == "int32":
        return np.asarray(b, dtype=np.int64)
    lo, hi = INT_RANGES["int32"]
    ws = spec.channel(spec.w_scale)
    out = []
    for o, v in enumerate(np.asarray(b, dtype=np.float64)):
        r = Fraction(float(v)) / (Fraction(spec.x_scale) * Fraction(ws[o]))
        out.append(min(max(round_half_even(r.numerator, r.denominator), lo), hi))
    return np.asarray(out, dtype=np.int64)


def accumulate(spec: QuantSpec, x, w, b=None) -> np.ndarray:
    """The exact accumulator (int64): sum of (x - x_zp)(w - w_zp[o]) plus the int32 bias."""
    if worst_sum(spec) >= 2 ** 53:
        raise SpecError(f"requant: worst sum {worst_sum(spec)} >= 2^53; the exact reference "
                        "holds sums below 2^53 only; use a shorter accumulation")
    g = _geometry(spec)
    xd = np.asarray(x, dtype=np.float64) - float(spec.x_zero_point)
    wd = np.asarray(w, dtype=np.float64) - per_weight(spec, spec.w_zero_point)
    acc = np.rint(ref.forward(g, xd, wd)).astype(np.int64)
    bq = bias_q(spec, b)
    if bq is not None:
        acc = acc + bq.reshape(spec.channel_shape())
    return acc


def multipliers(spec: QuantSpec) -> list[Fraction]:
    """The exact real multiplier of each output channel: x_scale * w_scale[o] / y_scale."""
    return [Fraction(spec.x_scale) * Fraction(ws) / Fraction(spec.y_scale)
            for ws in spec.channel(spec.w_scale)]


def requantize_exact(spec: QuantSpec, acc: np.ndarray) -> np.ndarray:
    """clamp(round_half_even(acc * M_o) + y_zp, lo, hi), exactly (int64)."""
    lo, hi = spec.out_range()
    out = np.empty(acc.shape, dtype=np.int64)
    acc1, out1 = _by_channel(spec, acc), _by_channel(spec, out)
    for o, m in enumerate(multipliers(spec)):
        a = acc1[:, o]
        flat = [round_half_even(int(v) * m.numerator, m.denominator) for v in a.ravel().tolist()]
        out1[:, o] = np.asarray(flat, dtype=np.int64).reshape(a.shape) if flat else 0
    return np.clip(out + spec.y_zero_point, lo, hi)


def reference(spec: QuantSpec, x, w, b=None) -> tuple[np.ndarray, np.ndarray]:
    """(expected output as int64, exact accumulator): the accumulator itself for int32
    output, its exact requantization otherwise."""
    acc = accumulate(spec, x, w, b)
    if not spec.requantized:
        return acc, acc
    return requantize_exact(spec, acc), acc


def deviation(spec: QuantSpec, acc: np.ndarray, model: str) -> tuple[np.ndarray, str]:
    """(allowed |y - y_exact| per element in output units, how it was derived).

    A model computes round'(acc*M + e) with |e| <= E; the exact answer is
    round_half_even(acc*M). Both are integers within 1/2 (+E) of acc*M, so they differ
    by at most floor(1 + E) -- the 1 also covers a tie rule other than half to even.
    """
    if not spec.requantized or model == "exact":
        why = ("int32 output: the exact sum, 0 units" if not spec.requantized else
               "model exact (real multiplier, round half to even, ONNX QuantizeLinear rule): 0 units")
        return np.zeros(acc.shape), why
    m = np.asarray([float(v) for v in multipliers(spec)]).reshape(spec.channel_shape())
    mag = np.abs(acc).astype(np.float64) * m
    if model == "fixed_point":
        shifts = [quantize_multiplier(float(v))[1] for v in multipliers(spec)]
        half_step = np.asarray([0.5 * 2.0 ** -max(s, 0) for s in shifts]).reshape(m.shape)
        e = mag * 2.0 ** -31 + half_step
        why = ("model fixed_point (Jacob et al. 2018, M = 2^-n M0, M0 in [0.5,1) as Q31): E = "
               "|acc|*M*2^-31 (Q31 rounding of M0) + 2^-n/2 (rounded high multiply); allowed "
               "floor(1 + E) units (1 for the final rounding's tie rule)")
    elif model == "float32":
        zp = abs(spec.y_zero_point)
        e = gamma(5, U32) * (mag + zp) * (1 + 4 * U64)
        why = ("model float32 (M = x_scale*w_scale/y_scale in binary32: 2 roundings; acc to "
               "binary32, the product, the zero-point addition: 3 more): E = gamma_5(2^-24)*(|acc|*M "
               "+ |y_zp|); allowed floor(1 + E) units (1 for the final rounding's tie rule)")
    else:
        raise SpecError(f"requant: model={model!r}; expected exact, fixed_point or float32")
    if spec.bias == "float":
        # an inexact model may add a float bias in real terms instead of rounding it to the
        # accumulator scale first: the two differ by at most half a step of that scale
        e = e + 0.5 * m
        why += "; + M/2 (a float bias added unrounded)"
    return np.floor(1.0 + e), why


def dequantized_reference(spec: QuantSpec, x, w, b=None) -> tuple[np.ndarray, np.ndarray]:
    """(clamp(conv64(x_real, w_real) + b_real) / y_scale + y_zp, float64 error bound of it
    in output units): the float64 convolution of the dequantized inputs, in output units."""
    g = _geometry(spec)
    xr = spec.x_scale * (np.asarray(x, dtype=np.float64) - spec.x_zero_point)
    wr = per_weight(spec, spec.w_scale) * (np.asarray(w, dtype=np.float64) - per_weight(spec, spec.w_zero_point))
    y = ref.forward(g, xr, wr)
    mag = ref.forward_magnitude(g, xr, wr)
    if b is not None and spec.bias != "none":
        br = (np.asarray(b, dtype=np.float64) * spec.x_scale * np.asarray(spec.channel(spec.w_scale))
              if spec.bias == "int32" else np.asarray(b, dtype=np.float64))
        shape = spec.channel_shape()
        y = y + br.reshape(shape)
        mag = mag + np.abs(br).reshape(shape)
    n = (g.in_channels // g.groups) * math.prod(g.kernel_size) + 4
    err = gamma(n, U64) * mag / spec.y_scale + 4 * U64 * (np.abs(y) / spec.y_scale + abs(spec.y_zero_point))
    lo, hi = spec.out_range()
    return np.clip(y / spec.y_scale + spec.y_zero_point, lo, hi), err


# -- the integer-only model (Jacob et al. 2018; gemmlowp semantics, from memory) -----------
def quantize_multiplier(m: float) -> tuple[int, int]:
    """(M0 as a Q31 int, n) with m ~= M0 * 2^-31 * 2^-n and M0*2^-31 in [0.5, 1)."""
    if not m > 0:
        raise SpecError(f"quantize_multiplier: m={m!r} must be positive")
    frac, exp = math.frexp(m)            # m = frac * 2^exp, frac in [0.5, 1)
    q = round(frac * 2 ** 31)
    if q == 2 ** 31:
        q //= 2
        exp += 1
    return int(q), -exp


def _srdhm(a: np.ndarray, b: int) -> np.ndarray:
    """SaturatingRoundingDoublingHighMul: (a*b + nudge) / 2^31 truncated toward zero, the
    nudge +2^30 for a*b >= 0 and 1 - 2^30 otherwise: round to nearest, ties away from zero."""
    def one(v: int) -> int:
        t = v * b + ((1 << 30) if v * b >= 0 else 1 - (1 << 30))
        return (abs(t) >> 31) * (1 if t >= 0 else -1)
    return np.asarray([one(int(v)) for v in a.ravel().tolist()], dtype=np.int64).reshape(a.shape)


def _rounding_shift(x: np.ndarray, n: int) -> np.ndarray:
    """RoundingDivideByPOT: x / 2^n rounded to nearest, ties away from zero (n >= 0)."""
    if n <= 0:
        return x << (-n)
    mask = (1 << n) - 1
    rem = x & mask
    thr = (mask >> 1) + (x < 0)
    return (x >> n) + (rem > thr)


def fixed_point_requantize(spec: QuantSpec, acc: np.ndarray) -> np.ndarray:
    """The integer-only requantization of Jacob et al. 2018 (int64 result, saturated)."""
    lo, hi = spec.out_range()
    out = np.empty(acc.shape, dtype=np.int64)
    acc1, out1 = _by_channel(spec, acc), _by_channel(spec, out)
    for o, m in enumerate(multipliers(spec)):
        m0, n = quantize_multiplier(float(m))
        a = np.clip(acc1[:, o], *INT_RANGES["int32"])
        if n < 0:                       # M >= 1: shift left first (saturating)
            a = np.clip(a.astype(object) * (1 << -n), *INT_RANGES["int32"]).astype(np.int64)
            n = 0
        out1[:, o] = _rounding_shift(_srdhm(a, m0), n)
    return np.clip(out + spec.y_zero_point, lo, hi)
