"""onnxruntime behind the call signature: one ``Conv`` / ``ConvTranspose`` node.

A model of a single node is built in memory with ``onnx.helper`` (opset 22, IR
version 10) and run on the CPU execution provider:

* attributes ``strides``, ``dilations``, ``group`` and ``pads`` in ONNX order
  ``[x1_begin, x2_begin, ..., x1_end, x2_end]`` (asymmetric padding is native);
  ``ConvTranspose`` also gets ``output_padding``. ``kernel_shape`` is left to be
  inferred from W.
* X, W and B are graph *inputs* with symbolic shapes, so one InferenceSession serves
  every value draw (and every size) of one geometry; sessions are cached per
  (node, dtype, rank, strides, pads, dilations, group, output_padding, bias).
  Because W is not a constant initializer, onnxruntime's NCHWc layout rewrite (which
  needs constant weights) does not apply and its generic Conv kernel (im2col + MLAS
  SGEMM) runs.
* forward and transposed only (onnxruntime's inference sessions have no gradients);
  channels first only (ONNX Conv is defined on NC(D)HW).
* dtypes are read from onnxruntime's CPU kernel registry when the adapter is built.
  The CPU provider registers Conv/ConvTranspose for float only: float64 has no kernel
  and is not claimed; float16 works because onnxruntime wraps the node in Casts to
  float32, so its declared model is "float16 operands, exact products, float32
  accumulation, one rounding to float16". Should a build register a float16 kernel,
  the model declared for float16 becomes accumulation in float16.
* negative padding is not claimed: the ONNX operator spec allows only pads >= 0.
* output_padding is claimed below the stride only (constraint
  ``output_padding<stride``): onnxruntime refuses ``output_padding >= stride``
  ("output_padding may be too large for stride"), which is a valid geometry when
  ``dilation > output_padding`` (finding ``onnxruntime.output_padding_refused``:
  ``python scripts/library_findings.py onnxruntime.output_padding_refused``; seen with
  onnxruntime 1.32.0 CPU on AMD EPYC with AVX-512, Python 3.11; and
  ``python3 -m pytest tests/test_claims.py -k onnxruntime``).
* a zero-length spatial axis (made valid by padding) is refused by onnxruntime's
  Conv ("Invalid input shape").
"""
from __future__ import annotations

from collections import OrderedDict

import numpy as np

from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.errors import AdapterUnavailable

__all__ = ["OnnxRuntimeAdapter"]

OPSET = 22
IR_VERSION = 10


def _cpu_kernel_types(ops=("Conv", "ConvTranspose")) -> set[str] | None:
    """Element types every op in ``ops`` has a CPU kernel for (None if not readable)."""
    try:
        from onnxruntime.capi import _pybind_state
        kernels = _pybind_state.get_all_opkernel_def()
    except Exception:
        return None
    per_op = {op: set() for op in ops}
    for k in kernels:
        if k.op_name in per_op and k.domain == "" and k.provider == "CPUExecutionProvider":
            for t in k.type_constraints.get("T", ()):
                per_op[k.op_name].add(t)
    return set.intersection(*per_op.values())


class OnnxConvCalls:
    """The call signature of the ONNX Conv adapters (onnxruntime, onnx-reference): forward
    and transposed through the class's ``_run``, channels first only."""

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        self._channels_first(layout)
        return self._run("Conv", x, w, b, stride, padding, dilation, groups)

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        self._channels_first(layout)
        return self._run("ConvTranspose", x, w, b, stride, padding, dilation, groups, output_padding)

    def _channels_first(self, layout: str):
        if layout != "channels_first":
            raise ValueError(f"{self.name} adapter: layout={layout!r}, expected 'channels_first' "
                             "(ONNX Conv is defined on NC(D)HW); transpose the arrays first")


def conv_feed(x, w, b) -> dict:
    """The inputs X, W (and B) of a Conv/ConvTranspose model, contiguous."""
    feed = {"X": np.ascontiguousarray(x), "W": np.ascontiguousarray(w)}
    if b is not None:
        feed["B"] = np.ascontiguousarray(b)
    return feed


def cpu_session(ort, model):
    """An onnxruntime CPU session of ``model``, warnings off (log level 3: errors only)."""
    options = ort.SessionOptions()
    options.log_severity_level = 3
    return ort.InferenceSession(model.SerializeToString(), options, providers=["CPUExecutionProvider"])


class OnnxRuntimeAdapter(OnnxConvCalls):
    """A single-node ONNX model per geometry, run by onnxruntime's CPU provider."""

    name = "onnxruntime"

    def __init__(self):
        try:
            import onnx
            import onnxruntime
            from onnx import TensorProto, helper
        except ImportError:
            raise AdapterUnavailable(
                "onnx and onnxruntime are not installed; fix: pip install 'convwitness[onnx]'") from None
        self._onnx, self._ort, self._helper = onnx, onnxruntime, helper
        self._elem = {"float32": TensorProto.FLOAT, "float16": TensorProto.FLOAT16,
                      "float64": TensorProto.DOUBLE}
        self.version = onnxruntime.__version__
        self._sessions = SessionCache()
        kernels = _cpu_kernel_types()
        dtypes = {"float32"}
        models = {}
        if kernels is not None and "tensor(double)" in kernels:
            dtypes.add("float64")
        dtypes.add("float16")           # numpy's own float16; a Cast or a kernel runs it
        if kernels is not None and "tensor(float16)" not in kernels:
            models["float16"] = ErrorModel(
                accumulate="float32",
                note="no float16 CPU kernel: onnxruntime casts to float32 around the node")
        else:
            models["float16"] = ErrorModel(note="float16 kernel, accumulation assumed in float16")
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset(dtypes),
            layouts=frozenset({"channels_first"}),
            padding=frozenset({"symmetric", "asymmetric"}),
            passes=frozenset({"forward", "transposed"}),
            # onnxruntime rejects output_padding >= stride, which the geometry space
            # allows when the dilation is larger (max(s, d) rule): claimed below the stride
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=True, constraints=("output_padding<stride",), deterministic=True,
            error_model=ErrorModel(note="MLAS im2col + SGEMM, summed in float32"),
            error_models=tuple(sorted(models.items())),
        )

    # -- sessions ----------------------------------------------------------------------
    def _model(self, op, dtype, ndim, attrs, has_bias):
        return conv_model(self._helper, op, self._elem[dtype], ndim, attrs, has_bias)

    def _session(self, op, dtype, ndim, stride, padding, dilation, groups, has_bias,
                 output_padding=None):
        key = (op, dtype, ndim, stride, padding, dilation, groups, has_bias, output_padding)
        sess = self._sessions.get(key)
        if sess is not None:
            return sess
        attrs = {"strides": list(stride), "dilations": list(dilation), "group": groups,
                 "pads": [lo for lo, _ in padding] + [hi for _, hi in padding]}
        if output_padding is not None:
            attrs["output_padding"] = list(output_padding)
        sess = self._sessions[key] = cpu_session(self._ort, self._model(op, dtype, ndim, attrs, has_bias))
        return sess

    def _run(self, op, x, w, b, stride, padding, dilation, groups, output_padding=None):
        x = np.ascontiguousarray(x)
        sess = self._session(op, x.dtype.name, x.ndim - 2, tuple(int(s) for s in stride),
                             tuple((int(lo), int(hi)) for lo, hi in padding),
                             tuple(int(d) for d in dilation), int(groups), b is not None,
                             None if output_padding is None else tuple(int(o) for o in output_padding))
        return sess.run(None, conv_feed(x, w, b))[0]


#: sessions kept per adapter (the most recently used ones)
MAX_SESSIONS = 48


class SessionCache(OrderedDict):
    """Sessions per geometry, the ``limit`` most recently used kept. Every onnxruntime
    session owns an intra-op thread pool (one thread per core beside the caller's), so an
    unbounded cache ran out of threads in a long run ("pthread_create failed ... Cannot
    allocate memory" once some 500 sessions lived under the worker's memory limit): an
    error of this adapter that the report would have laid on onnxruntime."""

    def __init__(self, limit: int = MAX_SESSIONS):
        super().__init__()
        self.limit = limit

    def get(self, key, default=None):
        if key not in self:
            return default
        self.move_to_end(key)
        return self[key]

    def __setitem__(self, key, value):
        super().__setitem__(key, value)
        self.move_to_end(key)
        while len(self) > self.limit:
            self.popitem(last=False)


def conv_model(helper, op: str, elem, ndim: int, attrs: dict, has_bias: bool):
    """A one-node ONNX model of ``op`` (Conv or ConvTranspose) on inputs X, W (and B) of
    tensor type ``elem`` with symbolic shapes, output Y (shared with onnx-reference)."""
    names = ["X", "W"] + (["B"] if has_bias else [])
    node = helper.make_node(op, names, ["Y"], **attrs)
    inputs = [helper.make_tensor_value_info("X", elem, ["N", "C"] + [f"S{i}" for i in range(ndim)]),
              helper.make_tensor_value_info("W", elem, ["M", "CG"] + [f"K{i}" for i in range(ndim)])]
    if has_bias:
        inputs.append(helper.make_tensor_value_info("B", elem, ["M"]))
    graph = helper.make_graph([node], f"convwitness_{op}", inputs,
                              [helper.make_tensor_value_info("Y", elem, None)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="convwitness")
    model.ir_version = IR_VERSION
    return model
