"""A plain numpy convolution that works in the dtype of its inputs, tap by tap.

The correct control of the zoo that is *not* the float64 reference: every pass
accumulates in the input dtype (float32 sums for float32 data), so it exercises the
derived bounds with real rounding error. Per kernel tap the products of one tap are
summed over the channels of a group (``einsum``) and added into the output, so each
output element is a sum of ``C_in/G * prod(k)`` products rounded in the dtype, in some
order: the direct-summation model ``ErrorModel()`` (Higham 2002, §3.1) covers it.

``accumulate`` selects the accumulator format of :func:`forward_taps`; the zoo's
low-precision accumulation bug passes ``float16`` (and per-term accumulation) to it.
"""
from __future__ import annotations

import itertools

import numpy as np

from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.spec import ConvSpec

from .zoo_base import BOTH_LAYOUTS, ALL_PADDING, ZOO_VERSION, explicit_pad, from_cf, make_spec, to_cf

__all__ = ["NumpyTapAdapter", "forward_taps", "grad_input_taps", "grad_weight_taps"]


def _tap_slices(taps, dilation, stride, out):
    """Per spatial axis: the input positions h*s + t*d, h < L_out, of tap t."""
    return tuple(slice(t * d, t * d + (o - 1) * s + 1, s) for t, d, s, o in zip(taps, dilation, stride, out))


def forward_taps(spec: ConvSpec, x, w, b, *, accumulate=None, per_term=False):
    """Channels-first forward in the accumulator dtype (default: the input dtype).

    ``per_term``: add every single product into the accumulator (no channel sums first).
    """
    acc = np.dtype(accumulate or x.dtype)
    G = spec.groups
    N, Cg, Og = spec.batch, spec.in_channels // G, spec.out_channels // G
    out = spec.output_size
    xp = explicit_pad(x, spec.padding)
    xg = xp.reshape((N, G, Cg) + xp.shape[2:])
    wg = w.reshape((G, Og, Cg) + spec.kernel_size)
    y = np.zeros((N, G, Og) + out, dtype=acc)
    for taps in itertools.product(*(range(k) for k in spec.kernel_size)):
        xs = xg[(slice(None),) * 3 + _tap_slices(taps, spec.dilation, spec.stride, out)]
        wt = wg[(slice(None),) * 3 + taps]
        if per_term:
            for c in range(Cg):
                prod = xs[:, :, None, c] * wt[None, :, :, c].reshape((1, G, Og) + (1,) * len(out))
                y += prod.astype(acc)
        else:
            y += np.einsum("ngc...,goc->ngo...", xs, wt).astype(acc)
    y = y.reshape((N, spec.out_channels) + out)
    if b is not None:
        y = y + b.astype(acc).reshape((-1,) + (1,) * len(out))
    return y


def grad_input_taps(spec: ConvSpec, w, g, padded_size=None):
    """Channels-first input gradient: the products of every tap scattered into the padded
    input (size ``padded_size``, default L + p_lo + p_hi), then the padding taken off."""
    G = spec.groups
    N, Cg, Og = spec.batch, spec.in_channels // G, spec.out_channels // G
    out = tuple(g.shape[2:])
    size = padded_size or tuple(L + lo + hi for L, (lo, hi) in zip(spec.input_size, spec.padding))
    gxp = np.zeros((N, G, Cg) + tuple(size), dtype=g.dtype)
    gg = g.reshape((N, G, Og) + out)
    wg = w.reshape((G, Og, Cg) + spec.kernel_size)
    for taps in itertools.product(*(range(k) for k in spec.kernel_size)):
        sl = (slice(None),) * 3 + _tap_slices(taps, spec.dilation, spec.stride, out)
        gxp[sl] += np.einsum("ngo...,goc->ngc...", gg, wg[(slice(None),) * 3 + taps])
    gxp = gxp.reshape((N, spec.in_channels) + tuple(size))
    return gxp


def _unpad(spec: ConvSpec, gxp):
    """gx[..., i] = gxp[..., i + p_lo] where that position exists, else 0 (cropped input)."""
    gx = np.zeros((spec.batch, spec.in_channels) + spec.input_size, dtype=gxp.dtype)
    dst, src = [slice(None)] * 2, [slice(None)] * 2
    for L, (lo, hi) in zip(spec.input_size, spec.padding):
        i0, i1 = max(0, -lo), L - max(0, -hi)
        dst.append(slice(i0, max(i0, i1)))
        src.append(slice(i0 + lo, max(i0, i1) + lo))
    gx[tuple(dst)] = gxp[tuple(src)]
    return gx


def grad_weight_taps(spec: ConvSpec, x, g):
    """Channels-first weight gradient: per tap one sum over batch and output positions."""
    G = spec.groups
    N, Cg, Og = spec.batch, spec.in_channels // G, spec.out_channels // G
    out = tuple(g.shape[2:])
    xp = explicit_pad(x, spec.padding)
    xg = xp.reshape((N, G, Cg) + xp.shape[2:])
    gg = g.reshape((N, G, Og) + out)
    gw = np.zeros((G, Og, Cg) + spec.kernel_size, dtype=x.dtype)
    for taps in itertools.product(*(range(k) for k in spec.kernel_size)):
        xs = xg[(slice(None),) * 3 + _tap_slices(taps, spec.dilation, spec.stride, out)]
        m = int(np.prod(out, dtype=np.int64))
        gw[(slice(None),) * 3 + taps] = np.einsum("ngcp,ngop->goc", xs.reshape(N, G, Cg, m),
                                                  gg.reshape(N, G, Og, m))
    return gw.reshape((spec.out_channels, Cg) + spec.kernel_size)


class NumpyTapAdapter:
    """Correct control: numpy, accumulating in the input dtype tap by tap (ErrorModel())."""

    name = "numpy_taps"
    version = ZOO_VERSION

    def __init__(self):
        self.capabilities = Capabilities(
            dtypes=frozenset({"float32", "float64"}), layouts=BOTH_LAYOUTS, padding=ALL_PADDING,
            passes=frozenset({"forward", "backward", "transposed"}), ieee_special=True,
            error_model=ErrorModel(note="numpy in the input dtype, summed tap by tap"))

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _cf_spec(x, w, b, stride, padding, dilation, groups, layout)
        y = forward_taps(spec, to_cf(x, layout), to_cf(w, layout), b)
        return from_cf(y.astype(x.dtype, copy=False), layout)

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _cf_spec(x, w, b, stride, padding, dilation, groups, layout)
        xc, wc, gc = to_cf(x, layout), to_cf(w, layout), to_cf(grad_y, layout)
        gx = _unpad(spec, grad_input_taps(spec, wc, gc))
        gw = grad_weight_taps(spec, xc, gc)
        gb = None
        if b is not None:
            gb = gc.sum(axis=(0,) + tuple(range(2, gc.ndim)), dtype=x.dtype) if gc.size \
                else np.zeros(spec.out_channels, dtype=x.dtype)
        return from_cf(gx, layout), from_cf(gw, layout), gb

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        tspec = make_spec(x, w, b, stride, padding, dilation, groups, layout, True, output_padding)
        conv = tspec.matching_conv().replace(layout="channels_first", bias=False)
        # The transposed input plays the upstream gradient of the matching convolution; its
        # padded output spans (L-1)s + d(k-1) + 1 + op positions before p_lo, p_hi are cut.
        size = tuple(s * (L - 1) + d * (k - 1) + 1 + op for L, s, d, k, op in zip(
            tspec.input_size, tspec.stride, tspec.dilation, tspec.kernel_size, tspec.output_padding))
        gxp = grad_input_taps(conv, to_cf(w, layout), to_cf(x, layout), padded_size=size)
        y = gxp[(slice(None),) * 2 + tuple(slice(lo, lo + n) for (lo, _), n
                                           in zip(tspec.padding, tspec.output_size))]
        if b is not None:
            y = y + b.reshape((-1,) + (1,) * tspec.ndim)
        return from_cf(np.ascontiguousarray(y.astype(x.dtype, copy=False)), layout)


def _cf_spec(x, w, b, stride, padding, dilation, groups, layout):
    return make_spec(x, w, b, stride, padding, dilation, groups, layout).replace(layout="channels_first")
