"""Demo port with one planted bug, for the sample reports (invented scenario).

"Brindlemoss BRM-9" is an invented accelerator; this file stands for its convolution
kernel running in CPU emulation. The products and sums are right (they come from
convwitness's float64 reference, rounded once). Release 0.3.0 (``BrindlemossPort030``)
is correct; release 0.3.1 (``BrindlemossPort``) brought a grouped-kernel bug in the bias
stage: with ``groups > 1`` it adds the bias to the output channels of the first
group only. ``convwitness run --adapter reports/_demo/brindlemoss_port.py:BrindlemossPort``
catches it and shrinks it to a small grouped geometry with bias; ``convwitness diff``
of the two releases' reports names the invariants 0.3.1 broke.
"""
from __future__ import annotations

import numpy as np

from convwitness.adapters.reference import ReferenceAdapter
from convwitness import Capabilities


class BrindlemossPort:
    name = "brindlemoss-bm9-emu"
    version = "0.3.1-demo"
    bias_bug = True

    def __init__(self):
        self._ref = ReferenceAdapter()
        self.capabilities = Capabilities(ndims=frozenset({1, 2}),
                                         dtypes=frozenset({"float32", "float64"}))

    def forward(self, x, w, b, *, stride, padding, dilation, groups):
        y = self._ref.forward(x, w, None, stride=stride, padding=padding, dilation=dilation,
                              groups=groups)
        if b is not None and not self.bias_bug:
            y = y + np.asarray(b, dtype=y.dtype).reshape((1, -1) + (1,) * (y.ndim - 2))
        elif b is not None:
            per_group = w.shape[0] // groups
            shape = (1, -1) + (1,) * (y.ndim - 2)
            bias = np.array(b, dtype=y.dtype)
            bias[per_group:] = 0          # the planted bug: only group 0 gets its bias
            y = y + bias.reshape(shape)
        return y


class BrindlemossPort030(BrindlemossPort):
    """The release before the bug."""

    version = "0.3.0-demo"
    bias_bug = False


__all__ = ["BrindlemossPort", "BrindlemossPort030"]
