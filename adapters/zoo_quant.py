"""The quantized planted-bug zoo: the numpy quantized convolution with one defect each.

Each entry claims what a correct implementation would (the exact model, int32
accumulator, per-channel weights, every output; the forward direction, and the transposed
one where the defect lives there); ``quantized.*`` invariants must catch
each one in the quick profile on every seed (tests/test_quantized.py). The defects are
the ones integer ports ship (issue 14's list; common practice, no source), labelled
Q01..Q08 in the order below (our own labels: BUG-CLASSES.md lists float classes only):

* ``q_raw_zero_padding``: padding filled with a raw 0 instead of the input zero point;
* ``q_half_up_rounding``: requantization rounds ties up (floor(v + 1/2)) where the model
  says half to even;
* ``q_wrapping_output``: the requantized value is narrowed by a cast that wraps
  (two's complement) instead of saturating;
* ``q_per_input_channel_scales``: the per-channel weight scales and zero points are
  read with the input-channel index instead of the output channel;
* ``q_zero_point_after_multiply``: the product is x*w - x_zp*w_zp, the zero points taken
  off after the multiply instead of (x - x_zp)(w - w_zp);
* ``q_int16_accumulator``: the sum is kept in int16 and wraps on long or large sums.
* ``q_channels_last_weights_reshaped``: the channels-last path moves the activations to
  channels first but only reshapes the ``(C_out, *K, C_in/G)`` weights to
  ``(C_out, C_in/G, *K)`` (a layout-dispatch mismatch, BUG-CLASSES.md C12's kind):
  channels-first calls are right, so only channels-last cases catch it.
* ``q_transposed_raw_zero_holes``: the transposed convolution, computed as a direct one
  over the input with ``s - 1`` holes between neighbours (quant_numpy.as_direct), fills
  the holes with a raw 0 instead of the input zero point (Q01's kind where only a
  transposed convolution with stride > 1 has it).
"""
from __future__ import annotations

import dataclasses
from fractions import Fraction

import numpy as np

from convwitness.geometry.quant import INT_RANGES
from convwitness.geometry.spec import ConvSpec
from convwitness.numerics import reference as ref

from .quant_numpy import QuantNumpy, accumulate, per_out
from .zoo_base import from_cf, to_cf

__all__ = ["QUANT_ZOO", "QUANT_CORRECT"]


class _Bug(QuantNumpy):
    #: the directions claimed: the forward defects are planted in forward code alone
    directions = frozenset({"forward"})

    def __init__(self):
        super().__init__("exact")
        self.name = type(self).name
        caps = self.capabilities
        self.capabilities = caps.replace(quant=dataclasses.replace(caps.quant, directions=self.directions))


class RawZeroPadding(_Bug):
    name = "q_raw_zero_padding"
    bug_class = "Q01"

    def accumulate(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                   w_scale, w_zero_point):
        acc = accumulate(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups,
                         x_zero_point=x_zero_point, w_zero_point=w_zero_point, pad_value=0)
        return _with_bias(self, acc, b, x_scale, w_scale, w.shape[0])


class HalfUpRounding(_Bug):
    name = "q_half_up_rounding"
    bug_class = "Q02"

    def requantize(self, acc, *, x_scale, w_scale, y_scale, y_zero_point, output, clamp):
        ws = per_out(w_scale, acc.shape[1])
        y = np.empty(acc.shape, dtype=np.int64)
        for o in range(acc.shape[1]):
            m = Fraction(x_scale) * Fraction(float(ws[o])) / Fraction(y_scale)
            f = np.frompyfunc(lambda a: (Fraction(int(a)) * m + Fraction(1, 2)).__floor__(), 1, 1)
            y[:, o] = f(acc[:, o]).astype(np.int64) if acc[:, o].size else 0
        lo, hi = clamp if clamp is not None else INT_RANGES[output]
        return np.clip(y + y_zero_point, lo, hi).astype(output)


class WrappingOutput(_Bug):
    name = "q_wrapping_output"
    bug_class = "Q03"

    def requantize(self, acc, *, x_scale, w_scale, y_scale, y_zero_point, output, clamp):
        y = super().requantize(acc, x_scale=x_scale, w_scale=w_scale, y_scale=y_scale,
                               y_zero_point=0, output="int32", clamp=None).astype(np.int64)
        y = (y + y_zero_point).astype(output)            # a narrowing cast wraps
        if clamp is not None:
            y = np.clip(y, *clamp).astype(output)
        return y


class PerInputChannelScales(_Bug):
    name = "q_per_input_channel_scales"
    bug_class = "Q04"

    def compute(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                w_scale, w_zero_point, y_scale, y_zero_point, output, clamp):
        cout, cpg = w.shape[0], w.shape[1]
        ws, wz = per_out(w_scale, cout), per_out(w_zero_point, cout)
        # the per-channel arrays read with the (global) input-channel index of the tap
        cin_index = np.asarray([(o // (cout // groups)) * cpg + c for o in range(cout) for c in range(cpg)])
        idx = (cin_index % cout).reshape(cout, cpg)
        shape = (cout, cpg) + (1,) * (w.ndim - 2)
        w_real = ws[idx].reshape(shape) * (w.astype(np.float64) - wz[idx].reshape(shape))
        spec = ConvSpec(batch=x.shape[0], in_channels=x.shape[1], out_channels=cout,
                        input_size=x.shape[2:], kernel_size=w.shape[2:], stride=stride,
                        padding=padding, dilation=dilation, groups=groups, bias=False, dtype="float64")
        xr = x_scale * (x.astype(np.float64) - x_zero_point)
        # padding of the reference is a real 0 (= the zero point): only the scales are wrong
        y = ref.forward(spec, xr, w_real)
        if b is not None:
            bq = _bias_int(b, x_scale, ws)
            y = y + (bq * x_scale * ws).reshape((-1,) + (1,) * (y.ndim - 2))
        if output == "int32":
            return np.rint(y / (x_scale * ws.reshape((-1,) + (1,) * (y.ndim - 2)))).astype(np.int32)
        lo, hi = clamp if clamp is not None else INT_RANGES[output]
        return np.clip(np.rint(y / y_scale) + y_zero_point, lo, hi).astype(output)


class ZeroPointAfterMultiply(_Bug):
    name = "q_zero_point_after_multiply"
    bug_class = "Q05"

    def accumulate(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                   w_scale, w_zero_point):
        cout = w.shape[0]
        raw = accumulate(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups,
                         x_zero_point=0, w_zero_point=0, pad_value=x_zero_point)
        n = w.shape[1] * int(np.prod(w.shape[2:]))
        zz = x_zero_point * per_out(w_zero_point, cout).astype(np.int64) * n
        acc = raw - zz.reshape((-1,) + (1,) * (raw.ndim - 2))
        return _with_bias(self, acc, b, x_scale, w_scale, cout)


class Int16Accumulator(_Bug):
    name = "q_int16_accumulator"
    bug_class = "Q06"

    def accumulate(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                   w_scale, w_zero_point):
        with np.errstate(over="ignore"):
            acc = accumulate(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups,
                             x_zero_point=x_zero_point, w_zero_point=w_zero_point,
                             acc_dtype=np.int16).astype(np.int64)
        return _with_bias(self, acc, b, x_scale, w_scale, w.shape[0])


class ChannelsLastWeightsReshaped(_Bug):
    name = "q_channels_last_weights_reshaped"
    bug_class = "Q07"

    def quantized(self, x, w, b, *, layout="channels_first", **kw):
        if layout != "channels_last":
            return super().quantized(x, w, b, **kw)
        # the activations are moved to channels first, but the (C_out, *K, C_in/G) weights
        # are only reshaped to (C_out, C_in/G, *K): the same bytes read in the wrong order
        wr = w.reshape((w.shape[0], w.shape[-1]) + w.shape[1:-1])
        return from_cf(self.compute(to_cf(x, layout), wr, b, **kw), layout)


class TransposedRawZeroHoles(_Bug):
    name = "q_transposed_raw_zero_holes"
    bug_class = "Q08"
    directions = frozenset({"forward", "transposed"})
    hole = 0            # the stride's inserted holes hold a raw 0, not the input zero point


def _bias_int(b, x_scale, ws):
    from .quant_numpy import _bias_int as bias_int
    return bias_int(b, x_scale, ws, len(ws))


def _with_bias(adapter, acc, b, x_scale, w_scale, cout):
    bq = None if b is None else _bias_int(b, x_scale, per_out(w_scale, cout))
    return acc if bq is None else acc + bq.reshape((-1,) + (1,) * (acc.ndim - 2))


_BUGS = (RawZeroPadding, HalfUpRounding, WrappingOutput, PerInputChannelScales,
         ZeroPointAfterMultiply, Int16Accumulator, ChannelsLastWeightsReshaped, TransposedRawZeroHoles)
QUANT_ZOO: dict[str, type] = {cls.name: cls for cls in _BUGS}
QUANT_CORRECT: dict[str, object] = {
    "quant-numpy": QuantNumpy,
    "quant-numpy-fixed": lambda: QuantNumpy("fixed_point"),
    "quant-numpy-f32": lambda: QuantNumpy("float32"),
}
