"""A quantized convolution in plain numpy: a known-good control for the quantized pass.

Written apart from convwitness's reference (numerics/requant.py): the input is padded
with its zero point (np.pad), each kernel tap is a strided slice, each group one int64
einsum; channels-last arrays are moved to channels first and back; a transposed
convolution becomes its equivalent direct one (``as_direct``). Requantization follows one of the three declared models:

* ``quant-numpy`` -- exact: the real multiplier as an exact fraction, round half to even
  (the ONNX QLinearConv rule, from memory);
* ``quant-numpy-fixed`` -- Jacob et al. 2018 (CVPR), Sec. 2.2: M = M0 * 2^-n with M0 a
  Q31 int32, a rounding doubling high multiply and a rounding right shift (ties away
  from zero), in vectorised int64 (gemmlowp's semantics, from memory);
* ``quant-numpy-f32`` -- the multiplier, the conversion of the accumulator and the
  product in float32, then np.rint (half to even) and the zero point.
"""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np

from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.quant import INT_RANGES, QuantCapabilities

from .zoo_base import BOTH_LAYOUTS, from_cf, to_cf

__all__ = ["QuantNumpy", "quant_numpy_fixed", "quant_numpy_f32", "accumulate", "per_out", "as_direct"]


def per_out(values, cout: int) -> np.ndarray:
    v = np.asarray(values)
    return np.broadcast_to(v, (cout,)) if v.size == 1 else v


def accumulate(x, w, *, stride, padding, dilation, groups, x_zero_point, w_zero_point,
               pad_value=None, acc_dtype=np.int64):
    """int sum of (x - x_zp)(w - w_zp[o]) over each window; padding holds ``pad_value``
    (the zero point unless told otherwise: the zoo plants a raw 0 through it)."""
    nd = x.ndim - 2
    cout, cpg = w.shape[0], w.shape[1]
    fill = x_zero_point if pad_value is None else pad_value
    xp = np.pad(x.astype(np.int64), [(0, 0), (0, 0)] + [tuple(p) for p in padding], constant_values=fill)
    xd = xp - x_zero_point
    wd = w.astype(np.int64) - per_out(w_zero_point, cout).reshape((-1,) + (1,) * (nd + 1))
    out_size = [(xp.shape[2 + i] - dilation[i] * (w.shape[2 + i] - 1) - 1) // stride[i] + 1 for i in range(nd)]
    y = np.zeros((x.shape[0], cout, *out_size), dtype=acc_dtype)
    opg = cout // groups
    for tap in itertools.product(*[range(k) for k in w.shape[2:]]):
        sl = tuple(slice(t * d, t * d + s * (lo - 1) + 1, s)
                   for t, d, s, lo in zip(tap, dilation, stride, out_size))
        window = xd[(slice(None), slice(None)) + sl]
        for g in range(groups):
            xs = window[:, g * cpg:(g + 1) * cpg]
            ws = wd[(slice(g * opg, (g + 1) * opg), slice(None)) + tuple(tap)]
            part = np.einsum("nc...,oc->no...", xs, ws).astype(acc_dtype)
            y[:, g * opg:(g + 1) * opg] = (y[:, g * opg:(g + 1) * opg] + part).astype(acc_dtype)
    return y


def as_direct(x, w, stride, padding, dilation, groups, output_padding, hole):
    """A transposed convolution as a direct one (common practice, no source; the
    relation of Dumoulin & Visin 2016, Sec. 4): x with s - 1 holes between neighbours
    (holding ``hole``), padded by d(k-1) - p_lo before and d(k-1) - p_hi + output_padding
    after (cropped where negative), and the weights regrouped to (C_out, C_in/G, *K) and
    flipped. Returns (x', w', padding')."""
    nd = x.ndim - 2
    cin, opg, kernel = w.shape[0], w.shape[1], w.shape[2:]
    ipg = cin // groups
    wc = np.swapaxes(w.reshape((groups, ipg, opg) + kernel), 1, 2).reshape((groups * opg, ipg) + kernel)
    wc = np.flip(wc, axis=tuple(range(2, 2 + nd)))
    up = np.full(x.shape[:2] + tuple((n - 1) * s + 1 if n else 0 for n, s in zip(x.shape[2:], stride)),
                 hole, dtype=np.int64)
    up[(slice(None), slice(None)) + tuple(slice(None, None, s) for s in stride)] = x
    pads = []
    for i in range(nd):
        e = dilation[i] * (kernel[i] - 1)
        lo, hi = e - padding[i][0], e - padding[i][1] + output_padding[i]
        crop = slice(max(-lo, 0), up.shape[2 + i] - max(-hi, 0))
        up = up[(slice(None),) * (2 + i) + (crop,)]
        pads.append((max(lo, 0), max(hi, 0)))
    return up, np.ascontiguousarray(wc), tuple(pads)


def _bias_int(b, x_scale, w_scale, cout):
    if b is None:
        return None
    if b.dtype == np.int32:
        return b.astype(np.int64)
    ws = per_out(w_scale, cout)
    out = []
    for v, s in zip(b.tolist(), ws.tolist()):
        r = Fraction(v) / (Fraction(x_scale) * Fraction(s))
        out.append(round(r))            # Python's round of a Fraction: half to even
    return np.clip(np.asarray(out, dtype=np.int64), *INT_RANGES["int32"])


def _exact(acc, m: Fraction):
    f = np.frompyfunc(lambda a: round(Fraction(int(a)) * m), 1, 1)
    return f(acc).astype(np.int64) if acc.size else acc


def _fixed(acc, m: float):
    frac, exp = math.frexp(m)
    m0 = round(frac * 2 ** 31)
    if m0 == 2 ** 31:
        m0, exp = m0 // 2, exp + 1
    shift = -exp
    a = np.clip(acc, -2 ** 31, 2 ** 31 - 1).astype(np.int64)
    if shift < 0:
        a = np.clip(a * (1 << -shift), -2 ** 31, 2 ** 31 - 1)
        shift = 0
    # SaturatingRoundingDoublingHighMul in exact Python ints (a*m0 needs 62 bits + sign)
    prod = a.astype(object) * m0
    nudge = np.where(a >= 0, 1 << 30, 1 - (1 << 30)).astype(object)
    t = prod + nudge
    hi = np.asarray([(abs(v) >> 31) * (1 if v >= 0 else -1) for v in t.ravel().tolist()],
                    dtype=np.int64).reshape(a.shape)
    if shift == 0:
        return hi
    mask = (1 << shift) - 1
    rem = hi & mask
    thr = (mask >> 1) + (hi < 0)
    return (hi >> shift) + (rem > thr)


def _float32(acc, x_scale, w_scale, y_scale):
    m = np.float32(np.float32(np.float32(x_scale) * np.float32(w_scale)) / np.float32(y_scale))
    return np.rint(acc.astype(np.float32) * m).astype(np.int64)


class QuantNumpy:
    """Quantized convolution in numpy with a declared requantization model."""

    name = "quant-numpy"

    def __init__(self, model: str = "exact"):
        import convwitness
        self.version = convwitness.__version__
        self.model = model
        if model != "exact":
            self.name = {"fixed_point": "quant-numpy-fixed", "float32": "quant-numpy-f32"}[model]
        self.capabilities = Capabilities(passes=frozenset({"quantized"}), quant=QuantCapabilities(
            model=model, layouts=BOTH_LAYOUTS, directions=frozenset({"forward", "transposed"})))

    def accumulate(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                   w_scale, w_zero_point):
        acc = accumulate(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups,
                         x_zero_point=x_zero_point, w_zero_point=w_zero_point)
        bq = _bias_int(b, x_scale, w_scale, w.shape[0])
        if bq is not None:
            acc = acc + bq.reshape((-1,) + (1,) * (acc.ndim - 2))
        return acc

    def requantize(self, acc, *, x_scale, w_scale, y_scale, y_zero_point, output, clamp):
        cout = acc.shape[1]
        ws = per_out(w_scale, cout)
        y = np.empty(acc.shape, dtype=np.int64)
        for o in range(cout):
            a = acc[:, o]
            if self.model == "exact":
                y[:, o] = _exact(a, Fraction(x_scale) * Fraction(float(ws[o])) / Fraction(y_scale))
            elif self.model == "fixed_point":
                y[:, o] = _fixed(a, x_scale * float(ws[o]) / y_scale)
            else:
                y[:, o] = _float32(a, x_scale, float(ws[o]), y_scale)
        lo, hi = clamp if clamp is not None else INT_RANGES[output]
        return np.clip(y + y_zero_point, lo, hi).astype(output)

    #: what a transposed convolution's inserted holes hold: None is the input zero point
    #: (real 0); the zoo plants a raw 0 through it
    hole = None

    def quantized(self, x, w, b, *, layout="channels_first", transposed=False, output_padding=None, **kw):
        """Channels-last arrays are moved to channels first, computed, and moved back. A
        transposed convolution is computed as its equivalent direct one (as_direct)."""
        x, w = to_cf(x, layout), to_cf(w, layout)
        if transposed:
            hole = kw["x_zero_point"] if self.hole is None else self.hole
            x, w, kw["padding"] = as_direct(x, w, kw["stride"], kw["padding"], kw["dilation"],
                                            kw["groups"], output_padding, hole)
            kw["stride"] = (1,) * (x.ndim - 2)
        return from_cf(self.compute(x, w, b, **kw), layout)

    def compute(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                w_scale, w_zero_point, y_scale, y_zero_point, output, clamp):
        """The channels-first quantized convolution."""
        acc = self.accumulate(x, w, b, stride=stride, padding=padding, dilation=dilation,
                              groups=groups, x_scale=x_scale, x_zero_point=x_zero_point,
                              w_scale=w_scale, w_zero_point=w_zero_point)
        if output == "int32":
            return acc.astype(np.int32)
        return self.requantize(acc, x_scale=x_scale, w_scale=w_scale, y_scale=y_scale,
                               y_zero_point=y_zero_point, output=output, clamp=clamp)


def quant_numpy_fixed():
    return QuantNumpy("fixed_point")


def quant_numpy_f32():
    return QuantNumpy("float32")
