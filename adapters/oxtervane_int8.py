"""Demo scenario: the int8 port of the Oxtervane Devices OXT-16 NPU convolution kernel.

Oxtervane Devices is an invented accelerator vendor (our demo scenario, no real
product). Its OXT-16 integer engine, as emulated here on the CPU:

* activations uint8 or int8 with a zero point, weights int8 symmetric (zero point 0),
  per tensor or per output channel;
* an int32 accumulator (exact within max_sum = 2^31 - 1), an int32 bias;
* requantization by the integer-only fixed-point multiplier of Jacob et al. 2018 (CVPR):
  a Q31 multiplier and a rounding right shift (model ``fixed_point``), then the output
  zero point and a fused clamp (e.g. ReLU6 in the quantized domain);
* outputs int8/uint8 after requantization, or the int32 accumulator itself.

``OxtervaneInt8PadBug`` is a sibling port with a planted bug: the input is padded with
a raw 0 instead of the input zero point (a DMA fill value left at its default).
"""
from __future__ import annotations

from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.quant import QuantCapabilities

from .quant_numpy import QuantNumpy, accumulate
from .zoo_quant import _with_bias

__all__ = ["OxtervaneInt8", "OxtervaneInt8PadBug"]


class OxtervaneInt8(QuantNumpy):
    """CPU emulation of the OXT-16 int8 convolution (invented vendor, demo only)."""

    name = "oxtervane-int8"

    def __init__(self):
        super().__init__("fixed_point")
        self.name = type(self).name
        self.version = "oxt16-int8-1.0 (demo)"
        self.capabilities = Capabilities(
            passes=frozenset({"quantized"}),
            quant=QuantCapabilities(bias=frozenset({"none", "int32"}), weight_zero_points=False,
                                    model="fixed_point"))


class OxtervaneInt8PadBug(OxtervaneInt8):
    """The OXT-16 int8 port with padding filled with a raw 0 (planted bug, demo only)."""

    name = "oxtervane-int8-padbug"

    def accumulate(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                   w_scale, w_zero_point):
        acc = accumulate(x, w, stride=stride, padding=padding, dilation=dilation, groups=groups,
                         x_zero_point=x_zero_point, w_zero_point=w_zero_point, pad_value=0)
        return _with_bias(self, acc, b, x_scale, w_scale, w.shape[0])
