"""Planted forward-pass bugs of the zoo: geometry, channel mapping and precision.

Each class wraps the float64 reference with one defect, described in its docstring
together with the bug class of shared/BUG-CLASSES.md it stands for. Hooks see
channels-first arrays and a channels-first spec (see :mod:`.zoo_base`).
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import ErrorModel

from .zoo_base import ZooAdapter, fit
from .zoo_numpy import forward_taps

__all__ = [
    "KernelFlipped", "PaddingSidesSwapped", "DilationIgnoredWhenStrided", "GroupChannelsMixed",
    "BatchSampleZeroReused", "OperandsFloat16", "AccumulateFloat16", "BiasMissingLastChannel",
    "DilationAxesSwapped", "StrideAxesSwapped", "ChannelThresholdSkip", "NegativePaddingWraps",
    "DepthwiseDilatedStridedShape", "NarrowOutputIndex", "IntermediateOverflow",
]


def _spatial(ndim: int) -> tuple:
    return tuple(range(2, 2 + ndim))


def _swap01(t: tuple) -> tuple:
    return (t[1], t[0]) + tuple(t[2:]) if len(t) >= 2 else t


class KernelFlipped(ZooAdapter):
    """C04-like tap placement (no class of its own; closest C04/C22): a true convolution.

    The kernel is flipped along every spatial axis (``w[..., k-1-t]``), as code ported
    from a signal-processing library does; the backward is consistent with that forward
    (the exact gradients of the flipped map), so only comparisons with the
    cross-correlation convention see it. Invisible for symmetric kernels and k = 1."""

    name = "kernel_flipped"
    bug_class = "C04"
    passes = ("forward", "backward")

    def fwd(self, spec, x, w, b):
        return ref.forward(spec, x, np.flip(w, _spatial(spec.ndim)), b)

    def bwd(self, spec, x, w, b, g):
        wf = np.flip(w, _spatial(spec.ndim))
        gw = np.flip(ref.grad_weight(spec, x, g), _spatial(spec.ndim))
        return ref.grad_input(spec, wf, g), gw, None if b is None else ref.grad_bias(spec, g)


class PaddingSidesSwapped(ZooAdapter):
    """C06 'same'/asymmetric padding split: ``(p_lo, p_hi)`` applied as ``(p_hi, p_lo)``.

    The extra pixel of an odd total pad goes to the wrong side (SAME_UPPER taken for
    SAME_LOWER). Forward and backward agree with each other; the output size is right
    (it depends on p_lo + p_hi only), so only asymmetric padding shows the shift."""

    name = "padding_sides_swapped"
    bug_class = "C06"
    passes = ("forward", "backward")

    @staticmethod
    def _swapped(spec):
        return spec.replace(padding=tuple((hi, lo) for lo, hi in spec.padding))

    def fwd(self, spec, x, w, b):
        return ref.forward(self._swapped(spec), x, w, b)

    def bwd(self, spec, x, w, b, g):
        return ref.backward(self._swapped(spec), x, w, g, bias=b is not None)


class DilationIgnoredWhenStrided(ZooAdapter):
    """C04 dilation arithmetic: the strided code path places taps at ``t`` instead of ``t*d``.

    The output buffer is sized correctly (Relationship 15 with the dilated extent), but
    the strided kernel computes every window with dilation 1; the stride-1 path is right."""

    name = "dilation_ignored_when_strided"
    bug_class = "C04"

    def fwd(self, spec, x, w, b):
        if all(s == 1 for s in spec.stride) or all(d == 1 for d in spec.dilation):
            return ref.forward(spec, x, w, b)
        return fit(ref.forward(spec.replace(dilation=1), x, w, b), spec.y_shape)


class GroupChannelsMixed(ZooAdapter):
    """C03 group/channel mapping: group g reads the input channels of group g+1 (mod G).

    An off-by-one in the group's input-channel offset; the weights and the output slice
    of each group are right, so only G > 1 shows it."""

    name = "group_channels_mixed"
    bug_class = "C03"

    def fwd(self, spec, x, w, b):
        if spec.groups == 1:
            return ref.forward(spec, x, w, b)
        return ref.forward(spec, np.roll(x, -(spec.in_channels // spec.groups), axis=1), w, b)


class BatchSampleZeroReused(ZooAdapter):
    """C14 batch dependence: every sample is computed from sample 0 (batch stride 0).

    The batch loop forgets to advance the input pointer; N = 1 is right."""

    name = "batch_sample0_reused"
    bug_class = "C14"

    def fwd(self, spec, x, w, b):
        if spec.batch < 2:
            return ref.forward(spec, x, w, b)
        return ref.forward(spec, np.broadcast_to(x[:1], x.shape), w, b)


class OperandsFloat16(ZooAdapter):
    """C17 hidden downcast: float32 operands are rounded to float16 before the products.

    The adapter claims float32 operands (the float64-accumulating model of the base);
    a 'fast path' converts x, w and b to half precision first. float64 is right."""

    name = "operands_float16"
    bug_class = "C17"

    def fwd(self, spec, x, w, b):
        if spec.dtype != "float32":
            return ref.forward(spec, x, w, b)
        h = lambda a: None if a is None else a.astype(np.float16).astype(np.float64)   # noqa: E731
        return ref.forward(spec, h(x), h(w), h(b))


class AccumulateFloat16(ZooAdapter):
    """C17 low-precision accumulation: float32 products summed in a float16 accumulator.

    Declares float32 accumulation (``ErrorModel()``, the honest numpy model) but keeps
    every partial sum in half precision, as the bf16/fp16 CPU fast path of
    pytorch#163347 did. float64 is right."""

    name = "accumulate_float16"
    bug_class = "C17"
    claims = {"error_model": ErrorModel(note="claims accumulation in the input dtype")}

    def fwd(self, spec, x, w, b):
        if spec.dtype != "float32":
            return forward_taps(spec, x, w, b)
        return forward_taps(spec, x, w, b, accumulate=np.float16, per_term=True)


class BiasMissingLastChannel(ZooAdapter):
    """C13 tile remainder: the vectorised bias loop stops one channel short.

    The bias of the last output channel is never added (the remainder of the channel
    loop is dropped); every other channel is right."""

    name = "bias_missing_last_channel"
    bug_class = "C13"

    def fwd(self, spec, x, w, b):
        if b is None or b.size == 0:
            return ref.forward(spec, x, w, b)
        b2 = b.copy()
        b2[-1] = 0
        return ref.forward(spec, x, w, b2)


class DilationAxesSwapped(ZooAdapter):
    """C05 per-axis swap: the dilation of axis 0 is used on axis 1 and vice versa.

    The output buffer has the right size; the taps are placed with the other axis'
    dilation. Isotropic dilation, and 1-D, hide it (tinygrad#17805)."""

    name = "dilation_axes_swapped"
    bug_class = "C05"

    def fwd(self, spec, x, w, b):
        swapped = _swap01(spec.dilation)
        if swapped == spec.dilation:
            return ref.forward(spec, x, w, b)
        other = spec.replace(dilation=swapped)     # may raise: the wrong window leaves the input
        return fit(ref.forward(other, x, w, b), spec.y_shape)


class StrideAxesSwapped(ZooAdapter):
    """C05 per-axis swap: the stride of axis 0 is used on axis 1 and vice versa.

    The output buffer is sized with the right strides, the windows are stepped with the
    swapped ones (torch/cunn#470: height and width mixed up). Isotropic strides hide it."""

    name = "stride_axes_swapped"
    bug_class = "C05"

    def fwd(self, spec, x, w, b):
        swapped = _swap01(spec.stride)
        if swapped == spec.stride:
            return ref.forward(spec, x, w, b)
        return fit(ref.forward(spec.replace(stride=swapped), x, w, b), spec.y_shape)


class ChannelThresholdSkip(ZooAdapter):
    """C13 fast-path threshold: with C_in/G >= 8 (one AVX2 vector) the last input channel
    of each group is skipped by the vectorised loop (modular#6248: exact for C_in <= 6,
    wrong for C_in >= 8)."""

    name = "channel_threshold_skip"
    bug_class = "C13"

    def fwd(self, spec, x, w, b):
        cg = spec.in_channels // spec.groups
        if cg < 8:
            return ref.forward(spec, x, w, b)
        x2 = x.copy()
        x2[:, cg - 1::cg] = 0
        return ref.forward(spec, x2, w, b)


def _pad_axis(a: np.ndarray, axis: int, lo: int, hi: int, wrap: bool) -> np.ndarray:
    """Pad/crop one spatial axis; ``wrap``: the trailing pad reads the cropped-away head."""
    L = a.shape[axis]
    kept = np.take(a, range(max(0, -lo), L - max(0, -hi)), axis=axis)
    width = [(0, 0)] * a.ndim
    width[axis] = (max(0, lo), 0 if wrap else max(0, hi))
    out = np.pad(kept, width)
    if wrap:
        out = np.concatenate([out, np.take(a, range(hi), axis=axis)], axis=axis)
    return out


class NegativePaddingWraps(ZooAdapter):
    """C07 negative padding: with ``p_lo < 0 < p_hi <= |p_lo|`` the trailing padded positions
    read the cropped-away head of the row instead of zeros (an out-of-bounds read into
    memory that still holds data, openxla/xla#48713). Other paddings are right."""

    name = "negative_padding_wraps"
    bug_class = "C07"

    def fwd(self, spec, x, w, b):
        if not any(lo < 0 < hi <= -lo for lo, hi in spec.padding):
            return ref.forward(spec, x, w, b)
        xp = x
        for a, (lo, hi) in enumerate(spec.padding):
            xp = _pad_axis(xp, 2 + a, lo, hi, lo < 0 < hi <= -lo)
        flat = spec.replace(input_size=xp.shape[2:], padding=0)
        return ref.forward(flat, xp, w, b)


class DepthwiseDilatedStridedShape(ZooAdapter):
    """C09 wrong output geometry: a depthwise convolution with stride > 1 and dilation > 1
    sizes and computes its output as if undilated (tensorflow#57128: 136x136, k=3, s=2,
    d=3 gave 64x64). Every other geometry is right."""

    name = "depthwise_dilated_strided_shape"
    bug_class = "C09"

    def fwd(self, spec, x, w, b):
        depthwise = spec.groups > 1 and spec.groups == spec.in_channels
        if depthwise and any(s > 1 for s in spec.stride) and any(d > 1 for d in spec.dilation):
            return ref.forward(spec.replace(dilation=1), x, w, b)
        return ref.forward(spec, x, w, b)


class NarrowOutputIndex(ZooAdapter):
    """C15 index overflow, scaled down: the flat output index lives in a counter too narrow
    for the tensor (10 bits here, 32 in the wild), so outputs past 2^10 elements are never
    written and keep the zeros of the fresh buffer (ROCm/rocm-libraries#4611)."""

    name = "narrow_output_index"
    bug_class = "C15"
    LIMIT = 2 ** 10

    def fwd(self, spec, x, w, b):
        y = np.ascontiguousarray(ref.forward(spec, x, w, b))
        y.reshape(-1)[self.LIMIT:] = 0
        return y


class IntermediateOverflow(ZooAdapter):
    """C18 intermediate overflow: a transformed algorithm keeps its partial results scaled
    by 16 in the storage format, so outputs within 1/16 of the top of the range come out
    as ±inf although the exact result is finite (pytorch#84171: NaN/inf on GPU, finite
    ~1e35 on CPU)."""

    name = "intermediate_overflow"
    bug_class = "C18"

    def fwd(self, spec, x, w, b):
        y = ref.forward(spec, x, w, b)
        top = float(np.finfo(spec.dtype).max)
        with np.errstate(invalid="ignore"):
            return np.where(np.abs(y) * 16 > top, np.sign(y) * np.inf, y)
