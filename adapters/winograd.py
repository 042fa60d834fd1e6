"""Winograd F(2,3) and F(4,3) convolution in numpy (a fast-algorithm control).

Stride 1, dilation 1 and 3-tap kernels on every axis go through the Winograd tiles
of Lavin & Gray 2016 (arXiv:1509.09308), computed in the dtype of the inputs with the
transform matrices rounded to it; every other geometry is computed directly, as real
libraries fall back. Declared with ``ErrorModel(algorithm="winograd", tile=m)`` it is
conformant; declared ``direct`` (``declare="direct"``) its larger errors are flagged
where they exceed the componentwise bound of direct summation.
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref
from convwitness.adapters.reference import _spec
from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.numerics.winograd import winograd_conv, winograd_eligible

__all__ = ["WinogradAdapter", "WinogradF2", "WinogradF4"]


class WinogradAdapter:
    def __init__(self, tile: int = 2, declare: str = "winograd"):
        self.tile = tile
        self.name = f"winograd-f{tile}" + ("" if declare == "winograd" else "-declared-direct")
        self.version = "1.0"
        model = (ErrorModel(algorithm="winograd", tile=tile, note="Winograd tiles where eligible")
                 if declare == "winograd" else ErrorModel(note="claims direct summation"))
        self.capabilities = Capabilities(
            dtypes=frozenset({"float32", "float64"}),
            layouts=frozenset({"channels_first", "channels_last"}),
            padding=frozenset({"symmetric", "asymmetric", "negative"}),
            passes=frozenset({"forward"}), error_model=model)

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout)
        if not winograd_eligible(spec) or spec.batch == 0 or spec.out_channels == 0:
            return ref.forward(spec, x, w, b).astype(x.dtype)
        y = winograd_conv(spec, x, w, self.tile, dtype=x.dtype)
        if b is not None:
            y = y + b.reshape((1, -1) + (1,) * spec.ndim).astype(x.dtype)
        if layout == "channels_last":
            y = np.moveaxis(y, 1, -1)
        return np.ascontiguousarray(y, dtype=x.dtype)


def WinogradF2():
    return WinogradAdapter(2)


def WinogradF4():
    return WinogradAdapter(4)


def WinogradF4DeclaredDirect():
    return WinogradAdapter(4, declare="direct")


def WinogradF2DeclaredDirect():
    return WinogradAdapter(2, declare="direct")
