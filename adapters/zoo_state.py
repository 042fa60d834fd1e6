"""Planted bugs of the zoo in the plumbing: buffers, state, layouts, dtypes, special
values, memory views, and the transposed pass.

Each class wraps the float64 reference with one defect, described in its docstring
with the bug class of shared/BUG-CLASSES.md it stands for.
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref
from convwitness.errors import SpecError

from .zoo_base import ZooAdapter, fit, from_cf, make_spec, to_cf

__all__ = [
    "InputMutated", "PlanCacheByShape", "ChannelsLastWeightMisread", "ReusedOutputBuffer",
    "OutputFloat64", "NanReadAsZero", "ViewReadAsPacked", "TransposedIgnoresDilation",
    "OutputPaddingAsInputPadding",
]


class InputMutated(ZooAdapter):
    """C25 in-place buffer forwarding: a fused conv+add writes its result into the input
    buffer it believes dead (tensorflow#43577): x is overwritten with the leading values
    of y. The returned y is right."""

    name = "input_mutated"
    bug_class = "C25"

    def forward(self, x, w, b, **kw):
        y = super().forward(x, w, b, **kw)
        if x.flags.writeable and x.flags.c_contiguous and x.size:
            m = min(x.size, y.size)
            x.reshape(-1)[:m] = y.reshape(-1)[:m]
        return y


class PlanCacheByShape(ZooAdapter):
    """C23 state across calls: execution plans are cached by the array shapes only, so a
    call with the same shapes but another stride, dilation or padding reuses the first
    call's geometry (pytorch/xla#1017: A with d=1, then B with d=2). Every first call of
    a shape is right."""

    name = "plan_cache_by_shape"
    bug_class = "C23"
    passes = ("forward", "backward")

    def __init__(self):
        super().__init__()
        self._plans: dict = {}

    def _plan(self, kind, x, w, kw):
        key = (kind, x.shape, w.shape, x.dtype.str, kw.get("layout", "channels_first"))
        return dict(kw, **self._plans.setdefault(key, {k: kw[k] for k in
                                                       ("stride", "padding", "dilation", "groups")}))

    def forward(self, x, w, b, **kw):
        return super().forward(x, w, b, **self._plan("forward", x, w, kw))

    def backward(self, x, w, b, grad_y, **kw):
        return super().backward(x, w, b, grad_y, **self._plan("backward", x, w, kw))


class ChannelsLastWeightMisread(ZooAdapter):
    """C12 layout dispatch: with layout="channels_last" the weight, stored (C_out, *K, C_in/G),
    is read with the channels-first index formula as if it were (C_out, C_in/G, *K)
    (pytorch#82060). The input is read right; channels first is right; C_in/G = 1 or a
    1x1 kernel hide it."""

    name = "channels_last_weight_misread"
    bug_class = "C12"

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        if layout != "channels_last":
            return super().forward(x, w, b, stride=stride, padding=padding, dilation=dilation,
                                   groups=groups)
        spec = make_spec(x, w, b, stride, padding, dilation, groups, layout).replace(
            layout="channels_first")
        w_as_cf = np.ascontiguousarray(w).reshape(spec.w_shape)     # raw memory, wrong formula
        return self.finish(from_cf(ref.forward(spec, to_cf(x, layout), w_as_cf, b), layout), x.dtype)


class ReusedOutputBuffer(ZooAdapter):
    """C20 reused output buffer: forward returns the same array object for every call of a
    shape (an arena the caller is not told about), so an earlier result changes when
    the next call runs. Every value is right when it is returned."""

    name = "reused_output_buffer"
    bug_class = "C20"

    def __init__(self):
        super().__init__()
        self._buffers: dict = {}

    def forward(self, x, w, b, **kw):
        y = super().forward(x, w, b, **kw)
        buf = self._buffers.setdefault((y.shape, y.dtype.str), np.empty_like(y))
        buf[...] = y
        return buf


class OutputFloat64(ZooAdapter):
    """C26 dtype contract: the output comes back in float64 for float32 inputs (the
    internal accumulator type leaks out, tensorflow#56680's dtype mismatch). The values
    are right."""

    name = "output_float64"
    bug_class = "C26"

    def finish(self, a, dtype):
        return np.asarray(a, dtype=np.float64)


class NanReadAsZero(ZooAdapter):
    """C19 NaN propagation: NaN inputs are silently replaced by 0 (a 'sanitising' load),
    while the adapter claims IEEE 754 special values (ieee_special=True). NaN weights
    and infinities propagate correctly."""

    name = "nan_read_as_zero"
    bug_class = "C19"

    def fwd(self, spec, x, w, b):
        return ref.forward(spec, np.where(np.isnan(x), 0.0, x), w, b)


def _as_packed(a: np.ndarray) -> np.ndarray:
    """A strided view read as if it were packed from its first element (the C11 defect)."""
    if a is None or a.flags.c_contiguous or a.size == 0:
        return a
    item = a.itemsize
    if any(s <= 0 or s % item for s in a.strides):
        return a                       # broadcast or negative strides: this path is not taken
    packed = tuple(int(np.prod(a.shape[i + 1:])) * item for i in range(a.ndim))
    return np.lib.stride_tricks.as_strided(a, shape=a.shape, strides=packed, writeable=False)


class ViewReadAsPacked(ZooAdapter):
    """C11 non-contiguous views: a strided view of x or w (step slice, channel slice,
    permuted axes) is read as if its elements were packed from the first one
    (pytorch#1246: wrong output for a non-contiguous weight). Contiguous arrays are right."""

    name = "view_read_as_packed"
    bug_class = "C11"

    def forward(self, x, w, b, **kw):
        return super().forward(_as_packed(x), _as_packed(w), b, **kw)


class _Transposed(ZooAdapter):
    passes = ("forward", "backward", "transposed")


class TransposedIgnoresDilation(_Transposed):
    """C04 dilation in the transposed convolution: taps are scattered with dilation 1
    into a correctly sized output (apache/mxnet#13876). Forward and backward are right."""

    name = "transposed_ignores_dilation"
    bug_class = "C04"

    def tr(self, spec, x, w, b):
        if all(d == 1 for d in spec.dilation):
            return ref.transposed(spec, x, w, b)
        op = tuple(min(a, s - 1) for a, s in zip(spec.output_padding, spec.stride))
        try:
            plain = spec.replace(dilation=1, output_padding=op)
        except SpecError:                     # nothing left after the crop: all zeros
            return np.zeros(spec.y_shape)
        return fit(ref.transposed(plain, x, w, b), spec.y_shape)


class OutputPaddingAsInputPadding(_Transposed):
    """C08 output_padding lowered as input padding: x is zero-extended by op at the end of
    each axis instead of the output being extended, so the output is op(s-1) too long
    (apple/coreai-torch#57). Right when op = 0 (or s = 1)."""

    name = "output_padding_as_input_padding"
    bug_class = "C08"

    def tr(self, spec, x, w, b):
        if not any(spec.output_padding):
            return ref.transposed(spec, x, w, b)
        xp = np.pad(x, [(0, 0), (0, 0)] + [(0, op) for op in spec.output_padding])
        longer = spec.replace(input_size=xp.shape[2:], output_padding=0)
        return ref.transposed(longer, xp, w, b)
