"""onnxruntime's quantized convolutions behind the quantized call signature.

One single-node ONNX model (opset 22, IR version 10) per geometry, run by the CPU
execution provider:

* int32 output: ``ConvInteger`` (x, w, x_zero_point, w_zero_point; no bias input, so
  an int32 bias is added to its int32 output in numpy, as a user would);
* int8/uint8 output: ``QLinearConv`` (x, x_scale, x_zero_point, w, w_scale,
  w_zero_point, y_scale, y_zero_point, B int32). The ONNX specification
  (https://onnx.ai/onnx/operators/onnx__QLinearConv) asks for a bias at scale
  x_scale*w_scale with zero point 0, and per-tensor or per-output-channel weight
  parameters; QuantizeLinear's rule (https://onnx.ai/onnx/operators/onnx__QuantizeLinear)
  is round half to even, then saturate.

Claims, as read from onnxruntime's CPU kernel registry (``get_all_opkernel_def``):
QLinearConv exists for uint8 x -> uint8 y and int8 x -> int8 y (``output_like_input``);
ConvInteger for uint8/int8 x and w. No fused clamp (the operator has none) and no float
bias (QLinearConv takes an int32 B). The declared requantization model is ``float32``:
onnxruntime's CPU kernel multiplies the int32 accumulator by a float32 output scale
(x_scale*w_scale/y_scale) -- recalled from memory of its MLAS requantization, and what
the suite measures (``quantized.requantization``); an exact-model claim would be
``onnxruntime-qlinearconv-exact``, which the suite finds NOT CONFORMANT on a near-tie.
``onnxruntime-quant`` (both ops, per-channel claimed for both as ONNX allows) is NOT
CONFORMANT: ConvInteger refuses a per-channel weight zero point; ``onnxruntime-convinteger``
claims per-tensor only. ``python3 scripts/probe_quant.py`` reproduces both findings.

Environment where the figures of docs/quantized.md were seen: onnxruntime 1.32.0,
onnx 1.23.2, numpy 2.4.6, Python 3.11, x86-64 CPU; reproduce with
``convwitness run --adapter onnxruntime-quant --profile quick --report /tmp/ortq``.
"""
from __future__ import annotations

import numpy as np

from convwitness.errors import AdapterUnavailable
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.quant import QuantCapabilities

from .onnxruntime_node import SessionCache, cpu_session  # sessions bounded: each owns a thread pool

__all__ = ["QuantOnnxRuntime"]

OPSET = 22
IR_VERSION = 10


class QuantOnnxRuntime:
    """ConvInteger (int32 output) and QLinearConv (8-bit output) on onnxruntime's CPU provider."""

    name = "onnxruntime-quant"

    def __init__(self, model: str = "float32", weight_zero_points: bool = True,
                 outputs=("int32", "int8", "uint8"), per_channel: bool = True, name: str | None = None):
        try:
            import onnx
            import onnxruntime
            from onnx import TensorProto, helper
        except ImportError:
            raise AdapterUnavailable(
                "onnx and onnxruntime are not installed; fix: pip install 'convwitness[onnx]'") from None
        self._onnx, self._ort, self._helper, self._tp = onnx, onnxruntime, helper, TensorProto
        self.version = onnxruntime.__version__
        self._sessions = SessionCache()
        self.capabilities = Capabilities(
            passes=frozenset({"quantized"}),
            quant=QuantCapabilities(bias=frozenset({"none", "int32"}), clamp=False, model=model,
                                    output_like_input=True, weight_zero_points=weight_zero_points,
                                    outputs=frozenset(outputs), per_channel=per_channel))
        if name:
            self.name = name

    def _session(self, op, x, w, ndim, stride, padding, dilation, groups, bias, output, per_channel):
        key = (op, x.dtype.str, w.dtype.str, ndim, stride, padding, dilation, groups, bias, output,
               per_channel)
        sess = self._sessions.get(key)
        if sess is not None:
            return sess
        h, tp = self._helper, self._tp
        el = {"uint8": tp.UINT8, "int8": tp.INT8, "int32": tp.INT32}
        xs = ["N", "C"] + [f"S{i}" for i in range(ndim)]
        ws = ["M", "Cg"] + [f"K{i}" for i in range(ndim)]
        nz = ["Mz"] if per_channel else []
        attrs = dict(strides=list(stride), dilations=list(dilation), group=groups,
                     pads=[p[0] for p in padding] + [p[1] for p in padding])
        inputs = [h.make_tensor_value_info("x", el[x.dtype.name], xs)]
        if op == "ConvInteger":
            names = ["x", "w", "x_zp", "w_zp"]
            inputs += [h.make_tensor_value_info("w", el[w.dtype.name], ws),
                       h.make_tensor_value_info("x_zp", el[x.dtype.name], []),
                       h.make_tensor_value_info("w_zp", el[w.dtype.name], nz)]
            out = h.make_tensor_value_info("y", tp.INT32, None)
        else:
            names = ["x", "x_s", "x_zp", "w", "w_s", "w_zp", "y_s", "y_zp"] + (["b"] if bias else [])
            inputs += [h.make_tensor_value_info("x_s", tp.FLOAT, []),
                       h.make_tensor_value_info("x_zp", el[x.dtype.name], []),
                       h.make_tensor_value_info("w", el[w.dtype.name], ws),
                       h.make_tensor_value_info("w_s", tp.FLOAT, nz),
                       h.make_tensor_value_info("w_zp", el[w.dtype.name], nz),
                       h.make_tensor_value_info("y_s", tp.FLOAT, []),
                       h.make_tensor_value_info("y_zp", el[output], [])]
            if bias:
                inputs.append(h.make_tensor_value_info("b", tp.INT32, ["M"]))
            out = h.make_tensor_value_info("y", el[output], None)
        node = h.make_node(op, names, ["y"], **attrs)
        graph = h.make_graph([node], "q", inputs, [out])
        model = h.make_model(graph, opset_imports=[h.make_opsetid("", OPSET)])
        model.ir_version = IR_VERSION
        sess = self._sessions[key] = cpu_session(self._ort, model)
        return sess

    def quantized(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                  w_scale, w_zero_point, y_scale, y_zero_point, output, clamp):
        if clamp is not None:
            raise ValueError("clamp: QLinearConv has no fused activation; clamp is not claimed")
        if b is not None and b.dtype != np.int32:
            raise ValueError(f"bias dtype {b.dtype}: QLinearConv takes an int32 bias only")
        ndim = x.ndim - 2
        per_channel = len(w_scale) > 1 or len(w_zero_point) > 1
        cout = w.shape[0]
        wz = np.asarray(w_zero_point if not per_channel else
                        np.broadcast_to(np.asarray(w_zero_point), (cout,)), dtype=w.dtype)
        wz = wz.reshape((cout,) if per_channel else ())
        args = dict(stride=tuple(stride), padding=tuple(map(tuple, padding)), dilation=tuple(dilation),
                    groups=groups, output=output, per_channel=per_channel)
        if output == "int32":
            sess = self._session("ConvInteger", x, w, ndim, bias=False, **args)
            y = sess.run(None, {"x": x, "w": w, "x_zp": np.asarray(x_zero_point, dtype=x.dtype),
                                "w_zp": wz})[0]
            if b is not None:
                y = (y.astype(np.int64) + b.reshape((-1,) + (1,) * ndim)).astype(np.int32)
            return y
        ws = np.asarray(np.broadcast_to(np.asarray(w_scale, dtype=np.float32), (cout,))
                        if per_channel else np.float32(w_scale[0]), dtype=np.float32)
        feeds = {"x": x, "x_s": np.asarray(x_scale, dtype=np.float32),
                 "x_zp": np.asarray(x_zero_point, dtype=x.dtype), "w": w, "w_s": ws, "w_zp": wz,
                 "y_s": np.asarray(y_scale, dtype=np.float32),
                 "y_zp": np.asarray(y_zero_point, dtype=output)}
        if b is not None:
            feeds["b"] = b
        sess = self._session("QLinearConv", x, w, ndim, bias=b is not None, **args)
        return sess.run(None, feeds)[0]


def conv_integer():
    """ConvInteger alone (int32 output). Per-tensor weight zero point only: onnxruntime
    1.32.0 refuses a per-channel one ("IsScalarOr1ElementVector(W_Zero_Point) was false.
    Non per-tensor quantization is not supported now", conv_integer.cc:52), found by
    ``convwitness run --adapter onnxruntime-quant`` (which claims it) and declared here."""
    return QuantOnnxRuntime(outputs=("int32",), per_channel=False, name="onnxruntime-convinteger")


def qlinear_conv():
    """QLinearConv alone (uint8 -> uint8, int8 -> int8), float32 requantization model."""
    return QuantOnnxRuntime(outputs=("int8", "uint8"), name="onnxruntime-qlinearconv")


def qlinear_conv_exact():
    """QLinearConv claimed under the exact model (to measure what that claim costs)."""
    return QuantOnnxRuntime(model="exact", outputs=("int8", "uint8"), name="onnxruntime-qlinearconv-exact")
