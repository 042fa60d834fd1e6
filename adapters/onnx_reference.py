"""The reference evaluator shipped with the ``onnx`` package behind the call signature.

``onnx.reference.ReferenceEvaluator`` runs a model in pure numpy. Each geometry gets a
model of one ``Conv`` or ``ConvTranspose`` node built with ``onnx.helper`` (opset 22,
IR version 10), with X, W and B as graph inputs:

* attributes ``strides``, ``dilations``, ``group``, ``pads`` in ONNX order
  ``[x1_begin, x2_begin, ..., x1_end, x2_end]`` and, for ``ConvTranspose``,
  ``output_padding``; ``kernel_shape`` is inferred from W.
* forward and transposed only (the evaluator has no gradients); channels first only
  (ONNX Conv is defined on NC(D)HW); negative padding is not claimed (the operator spec
  allows only pads >= 0).
* dtypes: those the operator schema (``onnx.defs.get_schema``) allows for both ops at
  opset 22 and numpy can hold (bfloat16 through ml_dtypes, which onnx depends on).

How it computes (onnx/reference/ops/op_conv.py and op_conv_transpose.py, read in
onnx 1.23.2, and measured with ``convwitness run --adapter onnx-reference --only
precision.probe``, see scripts/probe_onnx_reference.py):

* ``Conv``: im2col, then one numpy matmul per group (``w @ cols``), cast to the dtype,
  then ``+= B`` in the dtype. numpy's matmul of float32/float64 is BLAS; of float16 and
  of ml_dtypes' bfloat16 it sums in float32 and rounds once (the probe keeps partial
  sums of 2^15 + 1 in float16 and 2^23 + 1 in bfloat16). Declared: float16 and
  bfloat16 summed in float32, rounded to the dtype, then the bias added in the dtype
  (``bias_add``); float32/float64 direct summation in the dtype (the bias added last in
  the same format is one more term of the same sum).
* ``ConvTranspose``: a matmul over the input channels per image, then ``col2im``
  scatter-adds the taps one by one into an array of the dtype, then ``+= B[c]``.
  Declared for float16/bfloat16: products and sums in the dtype (a bound that covers the
  float32 channel sums rounded to the dtype, then taps summed in the dtype).

Claims are those of the ONNX operator spec (groups, output padding and zero batch in
both ops), so what the evaluator gets wrong shows in the report. What the suite found
in onnx 1.23.2 (``convwitness run --adapter onnx-reference --profile quick``; every
item reproduced without convwitness by ``python scripts/probe_onnx_reference.py``):

* ``ConvTranspose`` raises ValueError for ``output_padding >= stride`` where the
  dilation is larger (a valid geometry: output_padding < max(stride, dilation)):
  ``col2im`` recomputes the input length from the output size and gets one more column.
  The quick profile's witness: convT1d C=1->1 S=1 k=2 s=1 d=2 op=1 (transposed.contract
  and transposed.reference error).
* ``ConvTranspose`` with groups raises ValueError when C_in != C_out (it slices W by
  output channels) and, for depthwise ones, silently adds the first group's bias
  entries to every group (found by reading op_conv_transpose.py and confirmed by the
  script; the suite stops at the raising case first).
* ``ConvTranspose`` with batch 0 raises TypeError (``Conv`` returns the empty result).
* ``Conv`` with dilation materialises the dilated kernel with zeros, so a NaN or an
  infinity on an input position no tap reads still reaches the output (0 * NaN):
  forward.special_values, information only (IEEE propagation is not claimed).

The forward pass is conformant in every claimed dtype (quick and standard profiles).
"""
from __future__ import annotations

import numpy as np

from convwitness.errors import AdapterUnavailable
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.formats import available
from convwitness.numerics.bounds import ErrorModel

from .onnxruntime_node import (OPSET, OnnxConvCalls, SessionCache,  # one ONNX model for both
                               conv_feed, conv_model)

__all__ = ["OnnxReferenceAdapter", "claimed_dtypes"]


#: ONNX type strings -> convwitness dtype names
_ONNX_TYPES = {"tensor(double)": "float64", "tensor(float)": "float32",
               "tensor(float16)": "float16", "tensor(bfloat16)": "bfloat16"}


def claimed_dtypes(defs, opset: int = OPSET) -> set[str]:
    """dtypes both Conv and ConvTranspose accept at ``opset`` per the operator schema."""
    per_op = []
    for op in ("Conv", "ConvTranspose"):
        schema = defs.get_schema(op, opset)
        allowed = set()
        for t in schema.type_constraints:
            if t.type_param_str == "T":
                allowed |= {_ONNX_TYPES[s] for s in t.allowed_type_strs if s in _ONNX_TYPES}
        per_op.append(allowed)
    return set.intersection(*per_op)


class OnnxReferenceAdapter(OnnxConvCalls):
    """One-node ONNX models run by ``onnx.reference.ReferenceEvaluator`` (pure numpy)."""

    name = "onnx-reference"

    def __init__(self):
        try:
            import onnx
            from onnx import TensorProto, defs, helper
            from onnx.reference import ReferenceEvaluator
        except ImportError:
            raise AdapterUnavailable("onnx is not installed; fix: pip install "
                                     "'convwitness[onnx-reference]'") from None
        self._helper, self._evaluator = helper, ReferenceEvaluator
        self._elem = {"float64": TensorProto.DOUBLE, "float32": TensorProto.FLOAT,
                      "float16": TensorProto.FLOAT16, "bfloat16": TensorProto.BFLOAT16}
        self.version = onnx.__version__
        self._cache = SessionCache()
        dtypes = {d for d in claimed_dtypes(defs) if available(d)}
        models = {}
        for dt in ("float16", "bfloat16"):
            if dt in dtypes:
                models[dt] = ErrorModel(
                    product="float32", accumulate="float32", bias_add=dt,
                    note="numpy matmul sums in float32, rounds once; then += B in the dtype")
                models[f"{dt}/transposed"] = ErrorModel(
                    product=dt, accumulate=dt,
                    note="channel sums rounded to the dtype, taps scatter-added in the dtype")
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset(dtypes),
            layouts=frozenset({"channels_first"}),
            padding=frozenset({"symmetric", "asymmetric"}),
            passes=frozenset({"forward", "transposed"}),
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=True, deterministic=True,
            error_model=ErrorModel(note="im2col + numpy matmul (BLAS) in the dtype, then + B"),
            error_models=tuple(sorted(models.items())),
        )

    def _session(self, op, dtype, ndim, attrs_key, has_bias):
        key = (op, dtype, ndim, attrs_key, has_bias)
        sess = self._cache.get(key)
        if sess is not None:
            return sess
        attrs = {k: list(v) if isinstance(v, tuple) else v for k, v in attrs_key}
        model = conv_model(self._helper, op, self._elem[dtype], ndim, attrs, has_bias)
        sess = self._cache[key] = self._evaluator(model)
        return sess

    def _run(self, op, x, w, b, stride, padding, dilation, groups, output_padding=None):
        attrs = [("strides", tuple(int(s) for s in stride)),
                 ("dilations", tuple(int(d) for d in dilation)),
                 ("group", int(groups)),
                 ("pads", tuple(int(lo) for lo, _ in padding) + tuple(int(hi) for _, hi in padding))]
        if output_padding is not None:
            attrs.append(("output_padding", tuple(int(o) for o in output_padding)))
        sess = self._session(op, x.dtype.name, x.ndim - 2, tuple(attrs), b is not None)
        return sess.run(None, conv_feed(x, w, b))[0]
