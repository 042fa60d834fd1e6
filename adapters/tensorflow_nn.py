"""TensorFlow (CPU) behind the call signature: ``tf.nn.convolution``, ``tf.nn.conv_transpose``
and gradients from ``tf.GradientTape``.

TensorFlow computes channels last (``NWC``/``NHWC``/``NDHWC``; its CPU kernels do not
take channels first), with filters ``(*K, C_in/G, C_out)`` for the convolution and
``(*K, C_out, C_in)`` for the transposed one. The adapter moves axes (exact) for both
layouts of the call signature and works around what ``tf.nn`` refuses, as a user would:

* padding: ``tf.pad`` with zeros, then ``padding="VALID"`` (asymmetric padding is then
  native to the computation; negative padding is not claimed);
* stride with dilation: ``tf.nn.convolution`` raises "`strides > 1` not supported in
  conjunction with `dilation_rate > 1`", so the convolution runs at stride 1 and is
  subsampled (exact: the same sums, fewer of them kept). The transposed convolution
  gets zeros inserted between the inputs instead (stride 1 on the upsampled input);
* groups: native in the 1-D and 2-D forward pass; the 3-D kernel raises ("input and
  filter must have the same depth") and the float64 gradients raise ("Gradients for
  grouped convolutions are not supported on CPU"), so 3-D groups, the backward pass and
  every grouped transposed convolution run group by group and are concatenated;
* dilation of the transposed convolution: the float64 CPU kernel raises ("Current CPU
  implementations do not yet support dilation rates larger than 1"), so the kernel is
  dilated with zeros first;
* 3-D gradients run in a ``tf.function``: eager ``GradientTape`` on a 3-D convolution
  raises AttributeError inside TensorFlow's ``_Conv3DGrad`` (a TensorFlow bug).
* output padding: the transposed convolution is computed at its full size and zeros are
  appended (positions no input reaches), then the padding is cropped;
* the bias is ``tf.nn.bias_add`` after the convolution (rounded to the dtype first).

All of these are exact rearrangements of finite values, so the error model is that of
the kernels. The gradients are ``GradientTape.gradient`` of that same computation with
``output_gradients = grad_y``.

Error models, measured on this machine (x86-64 without AVX-512, where TensorFlow runs
float16 on Eigen instead of oneDNN; elsewhere run the probe again) with
``scripts/probe_tensorflow.py`` and the reference invariants: float32/float64 summed in
the dtype; bfloat16 forward summed in float32, rounded, then ``bias_add`` in bfloat16;
float16 forward summed in float32 in 1-D and 2-D but in float16 in 3-D, so float16 is
declared summed in float16 (one model per dtype and pass: an error model per ndim
cannot be declared yet); float16 transposed convolution, input and weight gradients
summed in float16 (11-bit partial sums); the bfloat16 bias gradient summed in bfloat16 (8-bit partial
sums: 4096 ones sum to 256).

What the suite found in tensorflow-cpu 2.21.0 (``convwitness run --adapter tensorflow
--profile quick``; reproduced with tf alone by ``python scripts/probe_tensorflow.py``):

* ``tf.nn.convolution`` with batch 0 returns a tensor of the input's shape, not the
  output's (forward.contract fails: conv1d N=0 C=1->2 gives shape (0, 1, 1)); the
  backward pass then fails in ``bias_add`` (backward.zero_batch error).
* eager gradients of 3-D convolutions raise AttributeError (worked around above).
* float64 subnormal inputs are flushed to zero (forward.subnormals, information only).
* bfloat16: a NaN reaches an output whose taps read only padding (forward.special_values,
  information only; IEEE propagation is not claimed).
* the bfloat16 bias gradient sums in bfloat16 and the float16 weight gradient in float16
  (declared as measured, so their long sums get vacuous bounds, which the report states;
  the script sums 4096 ones to 256).

Everything else in the quick profile passes (31 of 35 invariants).
"""
from __future__ import annotations

import os

import numpy as np

from convwitness.errors import AdapterUnavailable
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.formats import available
from convwitness.numerics.bounds import ErrorModel

__all__ = ["TensorflowAdapter"]


class TensorflowAdapter:
    """tf.nn convolutions on the CPU, channels last inside, gradients by GradientTape."""

    name = "tensorflow"

    def __init__(self):
        os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")       # no banner on every load
        try:
            import tensorflow as tf
        except ImportError:
            raise AdapterUnavailable("tensorflow is not installed; fix: pip install "
                                     "'convwitness[tensorflow]' (tensorflow-cpu)") from None
        self._tf = tf
        self._graph_grads: dict = {}
        self.version = tf.__version__
        dtypes = {"float64", "float32", "float16"} | ({"bfloat16"} if available("bfloat16") else set())
        models = {}
        models["bfloat16"] = ErrorModel(product="float32", accumulate="float32", bias_add="bfloat16",
                                        note="CPU kernels sum in float32, round to bfloat16, then "
                                             "bias_add in bfloat16")
        # float16: 1-D and 2-D forward sums are float32, 3-D ones float16 (Eigen's Conv3D);
        # Capabilities has one model per dtype and pass, so the float16 one is declared
        models["float16"] = ErrorModel(product="float16", accumulate="float16",
                                       note="3-D Conv3D sums in float16 (1-D/2-D in float32)")
        # measured (scripts/probe_tensorflow.py and the reference invariants): the float16
        # weight gradient and transposed convolution keep 11-bit partial sums, the bfloat16
        # bias gradient 8-bit ones (4096 ones sum to 256)
        models["float16/grad_weight"] = ErrorModel(product="float16", accumulate="float16",
                                                   note="Conv2DBackpropFilter sums in float16")
        for pass_ in ("transposed", "grad_input"):     # both are Conv*DBackpropInput
            models[f"float16/{pass_}"] = ErrorModel(product="float16", accumulate="float16",
                                                    note="Conv*DBackpropInput sums in float16")
        models["bfloat16/grad_bias"] = ErrorModel(accumulate="bfloat16",
                                                  note="BiasAddGrad sums in bfloat16")
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset(dtypes),
            layouts=frozenset({"channels_first", "channels_last"}),
            padding=frozenset({"symmetric", "asymmetric"}),
            passes=frozenset({"forward", "backward", "transposed"}),
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=True, deterministic=True,
            error_model=ErrorModel(note="tf.nn.convolution on the CPU (oneDNN / Eigen), summed "
                                        "in the dtype"),
            error_models=tuple(sorted(models.items())),
        )

    # -- layouts ----------------------------------------------------------------------
    @staticmethod
    def _x_in(a, layout):
        return a if layout == "channels_last" else np.moveaxis(a, 1, -1)

    @staticmethod
    def _x_out(a, layout):
        return a if layout == "channels_last" else np.moveaxis(a, -1, 1)

    @staticmethod
    def _w_in(w, layout):
        """(lead, per_group, *K) or (lead, *K, per_group) -> TF (*K, per_group, lead)."""
        nd = w.ndim - 2
        if layout == "channels_last":
            return np.transpose(w, (*range(1, nd + 1), nd + 1, 0))
        return np.transpose(w, (*range(2, nd + 2), 1, 0))

    @staticmethod
    def _w_out(w, layout):
        nd = w.ndim - 2
        if layout == "channels_last":
            return np.transpose(w, (nd + 1, *range(nd), nd))
        return np.transpose(w, (nd + 1, nd, *range(nd)))

    # -- the computations (tensors in, tensors out; channels last) ---------------------
    def _conv(self, x, w, b, stride, padding, dilation, groups, split_groups=False):
        tf = self._tf
        nd = len(stride)
        x = tf.pad(x, [[0, 0], *[[lo, hi] for lo, hi in padding], [0, 0]])
        both = any(s > 1 for s in stride) and any(d > 1 for d in dilation)
        run_stride = [1] * nd if both else list(stride)
        if groups > 1 and (nd == 3 or split_groups):
            xs = tf.split(x, groups, axis=-1)
            ws = tf.split(w, groups, axis=-1)
            y = tf.concat([tf.nn.convolution(xg, wg, strides=run_stride, padding="VALID",
                                             dilations=list(dilation))
                           for xg, wg in zip(xs, ws)], axis=-1)
        else:
            y = tf.nn.convolution(x, w, strides=run_stride, padding="VALID", dilations=list(dilation))
        if both:
            y = y[(slice(None), *[slice(None, None, s) for s in stride], slice(None))]
        if b is not None:
            y = tf.nn.bias_add(y, b)
        return y

    def _conv_t(self, x, w, b, stride, padding, dilation, groups, output_padding):
        tf = self._tf
        nd = len(stride)
        n = tf.shape(x)[0]
        length = x.shape[1:-1]
        kernel = w.shape[:nd]
        both = any(s > 1 for s in stride) and any(d > 1 for d in dilation)
        if both:                    # zeros between the inputs, then stride 1
            for axis, s in enumerate(stride):
                if s > 1:
                    x = _upsample(tf, x, axis + 1, s)
            run_stride = [1] * nd
        else:
            run_stride = list(stride)
        full = [s * (L - 1) + d * (k - 1) + 1
                for s, L, d, k in zip(stride, length, dilation, kernel)]
        if any(d > 1 for d in dilation):   # the CPU kernel refuses dilation: zeros in the kernel
            for axis, d in enumerate(dilation):
                if d > 1:
                    w = _upsample(tf, w, axis, d)
        per_group = w.shape[nd]
        xs = tf.split(x, groups, axis=-1) if groups > 1 else [x]
        ws = tf.split(w, groups, axis=-1) if groups > 1 else [w]
        parts = [tf.nn.conv_transpose(xg, wg, output_shape=tf.stack([n, *full, per_group]),
                                      strides=run_stride, padding="VALID")
                 for xg, wg in zip(xs, ws)]
        y = parts[0] if len(parts) == 1 else tf.concat(parts, axis=-1)
        y = tf.pad(y, [[0, 0], *[[0, op] for op in output_padding], [0, 0]])
        y = y[(slice(None), *[slice(lo, y.shape[i + 1] - hi) for i, (lo, hi) in enumerate(padding)],
               slice(None))]
        if b is not None:
            y = tf.nn.bias_add(y, b)
        return y

    # -- the call signature ----------------------------------------------------------
    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        tf = self._tf
        y = self._conv(tf.constant(self._x_in(x, layout)), tf.constant(self._w_in(w, layout)),
                       None if b is None else tf.constant(b), stride, padding, dilation, groups)
        return np.ascontiguousarray(self._x_out(y.numpy(), layout))

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups, layout="channels_first"):
        tf = self._tf
        xt = tf.constant(self._x_in(x, layout))
        wt = tf.constant(self._w_in(w, layout))
        bt = None if b is None else tf.constant(b)
        sources = [xt, wt] + ([bt] if bt is not None else [])
        gy = tf.constant(self._x_in(grad_y, layout))
        geometry = (stride, padding, dilation, groups)
        if len(stride) == 3:
            # eager GradientTape on a 3-D convolution raises in TensorFlow's own gradient
            # function (_Conv3DGrad: "'NoneType' object has no attribute 'decode'"); the
            # same gradient in a tf.function (graph mode) works
            key = (geometry, bt is not None, x.dtype.name)
            fn = self._graph_grads.get(key)
            if fn is None:
                fn = self._graph_grads[key] = tf.function(
                    lambda srcs, g: self._grads(srcs, g, *geometry), autograph=False)
            grads = fn(sources, gy)
        else:
            grads = self._grads(sources, gy, *geometry)
        gx = np.ascontiguousarray(self._x_out(grads[0].numpy(), layout))
        gw = np.ascontiguousarray(self._w_out(grads[1].numpy(), layout))
        gb = grads[2].numpy() if bt is not None else None
        return gx, gw, gb

    def _grads(self, sources, gy, stride, padding, dilation, groups):
        tf = self._tf
        with tf.GradientTape() as tape:
            for src in sources:
                tape.watch(src)
            y = self._conv(sources[0], sources[1], sources[2] if len(sources) > 2 else None,
                           stride, padding, dilation, groups, split_groups=True)
        grads = tape.gradient(y, sources, output_gradients=gy)
        return [tf.zeros_like(s) if g is None else g for g, s in zip(grads, sources)]

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        tf = self._tf
        y = self._conv_t(tf.constant(self._x_in(x, layout)), tf.constant(self._w_in(w, layout)),
                         None if b is None else tf.constant(b), stride, padding, dilation, groups,
                         output_padding)
        return np.ascontiguousarray(self._x_out(y.numpy(), layout))


def _upsample(tf, x, axis: int, s: int):
    """Insert s - 1 zeros between the entries of ``x`` along ``axis``."""
    length = x.shape[axis]
    if length == 0:
        return x
    x = tf.expand_dims(x, axis + 1)
    pad = [[0, 0]] * len(x.shape)
    pad[axis + 1] = [0, s - 1]
    x = tf.pad(x, pad)
    shape = tf.concat([tf.shape(x)[:axis], [length * s], tf.shape(x)[axis + 2:]], axis=0)
    x = tf.reshape(x, shape)
    index = [slice(None)] * len(x.shape)
    index[axis] = slice(0, s * (length - 1) + 1)
    return x[tuple(index)]
