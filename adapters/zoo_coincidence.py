"""Planted bugs hidden behind a shape coincidence (class C27 of shared/BUG-CLASSES.md).

Libraries choose fast kernels by dispatching on equalities of the geometry: equal
channel counts, square inputs and kernels, stride equal to the kernel, depthwise
groups, batch equal to channels (common practice, no source). Each class here is
correct everywhere except on the path such an equality selects, where it reads two
equal-length axes in exchanged order or takes a wrong channel offset. Shape checks
cannot see these bugs: the shapes coincide by construction. Only geometries that have
the coincidence show them, so they prove that the strategies draw coincidences on
purpose. Hooks see channels-first arrays and a channels-first spec (see :mod:`.zoo_base`).
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref

from .zoo_base import ZooAdapter

__all__ = ["WeightGradChannelsSwapped", "SquareInputAxesSwapped", "DepthwiseMultiplierOrder",
           "BatchChannelsSwapped", "PatchKernelTransposed"]


def _isotropic01(spec) -> bool:
    """Axes 0 and 1 alike in every parameter (the 'square' fast path's test)."""
    if spec.ndim < 2:
        return False
    a = [(L, k, s, d, p) for L, k, s, d, p in zip(spec.input_size, spec.kernel_size, spec.stride,
                                                   spec.dilation, spec.padding)]
    return a[0] == a[1]


class WeightGradChannelsSwapped(ZooAdapter):
    """C27: when C_in/G == C_out/G the weight gradient takes a transposed-weight shortcut
    and returns each group's (C_out/G, C_in/G) block with its two channel axes exchanged.
    The shape is right (the two counts are equal); forward and input gradient are right.
    With one channel per group (depthwise) the block is 1x1 and nothing changes."""

    name = "weight_grad_channels_swapped"
    bug_class = "C27"
    passes = ("forward", "backward")

    def bwd(self, spec, x, w, b, g):
        gx, gw, gb = ref.backward(spec, x, w, g, bias=b is not None)
        G = spec.groups
        cg, og = spec.in_channels // G, spec.out_channels // G
        if cg == og > 1:
            blocks = gw.reshape((G, og, cg) + gw.shape[2:])
            gw = np.swapaxes(blocks, 1, 2).reshape(gw.shape)
        return gx, gw, gb


class SquareInputAxesSwapped(ZooAdapter):
    """C27/C05: a 'square' forward path, taken when the first two spatial axes are alike
    in size, kernel, stride, dilation and padding, reads the input with those two axes
    exchanged (H for W). Every shape matches; the backward is right."""

    name = "square_input_axes_swapped"
    bug_class = "C27"
    passes = ("forward", "backward")

    def fwd(self, spec, x, w, b):
        if _isotropic01(spec):
            x = np.ascontiguousarray(np.swapaxes(x, 2, 3))
        return ref.forward(spec, x, w, b)


class DepthwiseMultiplierOrder(ZooAdapter):
    """C27/C03: the depthwise path is chosen whenever groups == C_in, also with a channel
    multiplier m = C_out/C_in > 1, and it maps output channel o to input channel o mod C_in
    (the order of multiplier 1 repeated) instead of o div m. Right for m = 1 and for
    C_in = 1; the shapes are right."""

    name = "depthwise_multiplier_order"
    bug_class = "C27"
    passes = ("forward", "backward")

    def fwd(self, spec, x, w, b):
        G, cin, cout = spec.groups, spec.in_channels, spec.out_channels
        m = cout // G
        if G == 1 or G != cin or m == 1:
            return ref.forward(spec, x, w, b)
        # y_bug[o] = x[o mod G] * w[o]; the correct map reads x[o' div m] for w[o']
        perm = np.array([(o % G) * m + o // G for o in range(cout)])
        w2 = np.empty_like(w)
        w2[perm] = w
        b2 = None
        if b is not None:
            b2 = np.empty_like(b)
            b2[perm] = b
        return ref.forward(spec, x, w2, b2)[:, perm]


class BatchChannelsSwapped(ZooAdapter):
    """C27/C14: with N == C_in a layout shortcut (CNHW taken for NCHW: the two leading axes
    have the same length) reads the input with batch and channel axes exchanged. Every
    shape matches; right whenever N != C_in; the backward is right."""

    name = "batch_channels_swapped"
    bug_class = "C27"
    passes = ("forward", "backward")

    def fwd(self, spec, x, w, b):
        if spec.batch == spec.in_channels > 1:
            x = np.ascontiguousarray(np.swapaxes(x, 0, 1))
        return ref.forward(spec, x, w, b)


class PatchKernelTransposed(ZooAdapter):
    """C27: the non-overlapping 'patch' path, taken when stride == kernel > 1 on every axis
    of a 2-D or 3-D convolution with a square kernel, flattens each patch in (kw, kh) order
    against a weight flattened in (kh, kw) order: the kernel's first two spatial axes are
    exchanged. Every shape matches; overlapping windows are right; the backward is right."""

    name = "patch_kernel_transposed"
    bug_class = "C27"
    passes = ("forward", "backward")

    def fwd(self, spec, x, w, b):
        k = spec.kernel_size
        if spec.ndim >= 2 and all(s == kk > 1 for s, kk in zip(spec.stride, k)) and k[0] == k[1]:
            w = np.ascontiguousarray(np.swapaxes(w, 2, 3))
        return ref.forward(spec, x, w, b)
