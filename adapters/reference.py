"""The float64 reference behind the call signature: a known-good control.

It computes every pass in float64 with :mod:`convwitness.numerics.reference` and rounds the
result once to the dtype of the inputs, so its error model is "accumulate in
float64, round once to the output format".
"""
from __future__ import annotations

from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.formats import STORAGE_FORMATS, available, dtype_name
from convwitness.geometry.spec import ConvSpec


def _spec(x, w, b, stride, padding, dilation, groups, layout, transposed=False, output_padding=0):
    cl = layout == "channels_last"
    nd = x.ndim - 2
    size = x.shape[1:-1] if cl else x.shape[2:]
    kernel = w.shape[1:-1] if cl else w.shape[2:]
    cin = x.shape[-1] if cl else x.shape[1]
    per_group = w.shape[-1] if cl else w.shape[1]
    cout = per_group * groups if transposed else w.shape[0]
    del nd
    return ConvSpec(batch=x.shape[0], in_channels=cin, out_channels=cout, input_size=size,
                    kernel_size=kernel, stride=stride, padding=padding, dilation=dilation,
                    groups=groups, bias=b is not None, dtype=dtype_name(x.dtype), layout=layout,
                    transposed=transposed, output_padding=output_padding)


class ReferenceAdapter:
    """convwitness's own float64 reference, rounded once to the input dtype."""

    name = "reference"

    def __init__(self):
        import convwitness
        self.version = convwitness.__version__
        dtypes = frozenset(d for d in STORAGE_FORMATS if available(d))
        self.capabilities = Capabilities(
            dtypes=dtypes, layouts=frozenset({"channels_first", "channels_last"}),
            padding=frozenset({"symmetric", "asymmetric", "negative"}),
            passes=frozenset({"forward", "backward", "transposed"}),
            ieee_special=True, zero_spatial=True,
            error_model=ErrorModel(accumulate="float64", product="float64", note="float64, one rounding"),
        )

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout)
        return ref.forward(spec, x, w, b).astype(x.dtype)

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups, layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout)
        gx, gw, gb = ref.backward(spec, x, w, grad_y)
        return gx.astype(x.dtype), gw.astype(x.dtype), None if gb is None else gb.astype(x.dtype)

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout, True, output_padding)
        return ref.transposed(spec, x, w, b).astype(x.dtype)


__all__ = ["ReferenceAdapter"]
