"""Demo scenario: a CPU emulation of the Oxtervane Devices OXT-16 NPU convolution kernel.

Oxtervane Devices is an invented accelerator vendor (our demo scenario, no real
product). Its OXT-16 convolution engine, as emulated here, works like this:

* operands are bfloat16 (the adapter claims dtype ``bfloat16`` only);
* input channels are processed in tiles of 16; within a tile the products (exact in
  float32: two 8-bit significands) are accumulated in float32 over the tile's channels
  and every kernel tap;
* the tile partial sums are added in float32, then the bias;
* the result is rounded once to bfloat16.

Its declared error model is exactly that: ``ErrorModel(product="float32",
accumulate="float32", block=16)`` (blocks of 16 channels), with bfloat16 operands and
output. ``OxtervaneNPUTailBug`` is a sibling port with a planted tile-remainder bug: when
a group has more than 16 input channels and their count is not a multiple of 16, the
channels of the last, partial tile are skipped (a loop bound written as
``C // 16`` tiles).
"""
from __future__ import annotations

import numpy as np

from convwitness.adapters.reference import _spec
from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.formats import numpy_dtype

__all__ = ["OxtervaneNPU", "OxtervaneNPUTailBug", "OxtervaneNPUNarrowAccumulator", "TILE"]

TILE = 16


def _conv_f32(spec, x, w):
    """Plain float32 convolution of channels-first x (N, C, *S) and w (O, C, *K), one group."""
    nd = spec.ndim
    pads = [(0, 0), (0, 0)] + [(lo, hi) for lo, hi in spec.padding]
    xp = np.pad(x, pads)
    view = xp
    for i, (e, d, s) in enumerate(zip(spec.effective_kernel, spec.dilation, spec.stride)):
        view = np.lib.stride_tricks.sliding_window_view(view, e, axis=2 + i)
        sl = [slice(None)] * view.ndim
        sl[2 + i] = slice(0, None, s)
        sl[-1] = slice(0, None, d)
        view = view[tuple(sl)]
    # view: (N, C, *Ho, *K); contract C and K with w (O, C, *K) in float32
    letters = "abc"[:nd]
    outs = "xyz"[:nd]
    expr = f"nc{outs}{letters},oc{letters}->no{outs}"
    return np.einsum(expr, view, w, optimize=True).astype(np.float32, copy=False)


class OxtervaneNPU:
    """OXT-16 forward kernel: bf16 operands, fp32 accumulation per 16-channel tile."""

    name = "oxtervane-npu"
    version = "OXT-16 emulator 2.3"
    tile_remainder_bug = False

    def __init__(self):
        self._bf16 = numpy_dtype("bfloat16")        # needs ml_dtypes (the lowp extra)
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2}), dtypes=frozenset({"bfloat16"}),
            layouts=frozenset({"channels_first", "channels_last"}),
            padding=frozenset({"symmetric", "asymmetric"}), passes=frozenset({"forward"}),
            error_model=ErrorModel(product="float32", accumulate="float32", block=TILE,
                                   note="16-channel tiles accumulated in float32"),
        )

    def _tiles(self, cg: int):
        full = cg // TILE
        if self.tile_remainder_bug and full >= 1:
            return [(t * TILE, (t + 1) * TILE) for t in range(full)]     # remainder lost
        return [(t, min(t + TILE, cg)) for t in range(0, cg, TILE)]

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout)
        xf = x.astype(np.float32)
        wf = w.astype(np.float32)
        if layout == "channels_last":
            xf, wf = np.moveaxis(xf, -1, 1), np.moveaxis(wf, -1, 1)
        G = spec.groups
        cg, og = spec.in_channels // G, spec.out_channels // G
        one = spec.replace(layout="channels_first", groups=1, bias=False,
                           in_channels=max(cg, 1), out_channels=max(og, 1))
        y = np.zeros((spec.batch, spec.out_channels) + spec.output_size, dtype=np.float32)
        if spec.batch and spec.out_channels:
            for g in range(G):
                acc = np.zeros((spec.batch, og) + spec.output_size, dtype=np.float32)
                for lo, hi in self._tiles(cg):
                    acc = self._add_tile(acc, one, xf[:, g * cg + lo:g * cg + hi],
                                         wf[g * og:(g + 1) * og, lo:hi])
                y[:, g * og:(g + 1) * og] = acc
        if b is not None:
            y = y + b.astype(np.float32).reshape((1, -1) + (1,) * spec.ndim)
        if layout == "channels_last":
            y = np.moveaxis(y, 1, -1)
        return np.ascontiguousarray(y).astype(self._bf16)


    def _add_tile(self, acc, one, xt, wt):
        """acc + this tile's partial sum, in float32."""
        return acc + _conv_f32(one.replace(in_channels=xt.shape[1]), xt, wt)


class OxtervaneNPUTailBug(OxtervaneNPU):
    """The same kernel with a planted tile-remainder bug (channels beyond C//16 tiles lost)."""

    name = "oxtervane-npu-tailbug"
    tile_remainder_bug = True


class OxtervaneNPUNarrowAccumulator(OxtervaneNPU):
    """A port that keeps its partial sums in bfloat16 while declaring float32.

    Each channel's contribution is added to the running sum, which is rounded back to
    bfloat16 every time: long sums stall (the effect ml_dtypes' README shows).
    """

    name = "oxtervane-npu-narrow-accumulator"

    def _add_tile(self, acc, one, xt, wt):
        for c in range(xt.shape[1]):
            part = _conv_f32(one.replace(in_channels=1), xt[:, c:c + 1], wt[:, c:c + 1])
            acc = (acc + part).astype(self._bf16).astype(np.float32)
        return acc
