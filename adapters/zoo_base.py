"""Shared machinery of the planted-bug zoo (see :mod:`convwitness.adapters.zoo`).

A zoo adapter is an object-form adapter whose passes call the float64 reference
(:mod:`convwitness.numerics.reference`) with one realistic defect. :class:`ZooAdapter` does the
plumbing: it builds the :class:`~convwitness.ConvSpec` from the call's arrays and
keywords, moves channels-last arrays to channels first and back, and rounds results
once to the input dtype. A bug overrides one hook (``fwd``, ``bwd``, ``tr``) that sees
channels-first arrays and a channels-first spec, or a public method when the defect
lives in the plumbing itself (layouts, buffers, inputs).
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.formats import dtype_name
from convwitness.geometry.spec import ConvSpec

__all__ = ["ZooAdapter", "make_spec", "to_cf", "from_cf", "fit", "explicit_pad", "ZOO_VERSION"]

ZOO_VERSION = "zoo-1"
ALL_PADDING = frozenset({"symmetric", "asymmetric", "negative"})
BOTH_LAYOUTS = frozenset({"channels_first", "channels_last"})


def make_spec(x, w, b, stride, padding, dilation, groups, layout="channels_first",
              transposed=False, output_padding=0) -> ConvSpec:
    """The ConvSpec of one call, read off the arrays' shapes and the keywords."""
    cl = layout == "channels_last"
    size = x.shape[1:-1] if cl else x.shape[2:]
    kernel = w.shape[1:-1] if cl else w.shape[2:]
    cin = x.shape[-1] if cl else x.shape[1]
    per_group = w.shape[-1] if cl else w.shape[1]
    cout = per_group * groups if transposed else w.shape[0]
    return ConvSpec(batch=x.shape[0], in_channels=cin, out_channels=cout, input_size=size,
                    kernel_size=kernel, stride=stride, padding=padding, dilation=dilation,
                    groups=groups, bias=b is not None, dtype=dtype_name(x.dtype), layout=layout,
                    transposed=transposed, output_padding=output_padding)


def to_cf(a, layout: str):
    """x, y, g or w of ``layout`` as a channels-first array."""
    if a is None or layout != "channels_last":
        return a
    return np.ascontiguousarray(np.moveaxis(a, -1, 1))


def from_cf(a, layout: str):
    if a is None or layout != "channels_last":
        return a
    return np.ascontiguousarray(np.moveaxis(a, 1, -1))


def fit(a: np.ndarray, shape) -> np.ndarray:
    """``a`` cropped or zero-extended at the end of every axis to ``shape`` (what a kernel
    that computes with the wrong geometry leaves in a correctly sized output buffer)."""
    out = np.zeros(tuple(shape), dtype=a.dtype)
    common = tuple(slice(0, min(m, n)) for m, n in zip(a.shape, shape))
    out[common] = a[common]
    return out


def explicit_pad(x: np.ndarray, padding) -> np.ndarray:
    """Channels-first x with zeros added where padding is positive, cropped where negative."""
    cut = [slice(None), slice(None)]
    width = [(0, 0), (0, 0)]
    for L, (lo, hi) in zip(x.shape[2:], padding):
        cut.append(slice(max(0, -lo), L - max(0, -hi)))
        width.append((max(0, lo), max(0, hi)))
    return np.pad(x[tuple(cut)], width)


class ZooAdapter:
    """Base of the zoo: every pass is the float64 reference rounded once to the dtype.

    Class attributes of a bug: ``name``, ``bug_class`` (C01..C26 of BUG-CLASSES.md),
    ``passes`` (what it implements), ``claims`` (extra Capabilities fields).
    """

    name = "zoo"
    bug_class = ""
    passes: tuple = ("forward",)
    claims: dict = {}
    version = ZOO_VERSION

    def __init__(self):
        fields = dict(
            dtypes=frozenset({"float32", "float64"}), layouts=BOTH_LAYOUTS, padding=ALL_PADDING,
            passes=frozenset(self.passes), ieee_special=True,
            error_model=ErrorModel(accumulate="float64", product="float64",
                                   note="float64 reference, one rounding"))
        fields.update(self.claims)
        self.capabilities = Capabilities(**fields)

    # -- hooks (channels-first spec and arrays; results may be float64) ------------
    def fwd(self, spec: ConvSpec, x, w, b):
        return ref.forward(spec, x, w, b)

    def bwd(self, spec: ConvSpec, x, w, b, g):
        return ref.backward(spec, x, w, g, bias=b is not None)

    def tr(self, spec: ConvSpec, x, w, b):
        return ref.transposed(spec, x, w, b)

    # -- the call signature -------------------------------------------------------
    @staticmethod
    def _cf_spec(spec: ConvSpec) -> ConvSpec:
        return spec.replace(layout="channels_first") if spec.layout != "channels_first" else spec

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = make_spec(x, w, b, stride, padding, dilation, groups, layout)
        y = self.fwd(self._cf_spec(spec), to_cf(x, layout), to_cf(w, layout), b)
        return self.finish(from_cf(np.asarray(y), layout), x.dtype)

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups,
                 layout="channels_first"):
        spec = make_spec(x, w, b, stride, padding, dilation, groups, layout)
        gx, gw, gb = self.bwd(self._cf_spec(spec), to_cf(x, layout), to_cf(w, layout), b,
                              to_cf(grad_y, layout))
        return (self.finish(from_cf(gx, layout), x.dtype), self.finish(from_cf(gw, layout), x.dtype),
                None if gb is None else self.finish(gb, x.dtype))

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        spec = make_spec(x, w, b, stride, padding, dilation, groups, layout, True, output_padding)
        y = self.tr(self._cf_spec(spec), to_cf(x, layout), to_cf(w, layout), b)
        return self.finish(from_cf(np.asarray(y), layout), x.dtype)

    def finish(self, a, dtype):
        """Round a result once to the output dtype (a bug may do otherwise)."""
        return np.asarray(a).astype(dtype)
