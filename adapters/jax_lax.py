"""jax behind the call signature: ``jax.lax.conv_general_dilated``.

* **forward** -- ``conv_general_dilated`` with ``window_strides=stride``, explicit
  ``(lo, hi)`` padding pairs (XLA pads natively, asymmetric and negative alike),
  ``rhs_dilation=dilation``, ``feature_group_count=groups`` and
  ``dimension_numbers`` ``NC(D)HW/OI(D)HW`` or, for ``layout="channels_last"``,
  ``N(D)HWC/O(D)HWI`` -- the arrays go to XLA in the layout they come in.
* **backward** -- ``jax.vjp`` of that forward function (see below: not claimed).
* **transposed** -- the construction ``lax.conv_transpose(..., transpose_kernel=True)``
  stands for, with groups (``lax.conv_transpose`` has no ``feature_group_count``):
  the input is dilated by ``stride`` and padded by ``(e-1-p_lo, e-1-p_hi+output_padding)``
  per axis (``e = d(k-1)+1``; negative amounts crop) in one ``lax.pad`` with interior
  padding ``stride-1``, then convolved (stride 1, no padding, ``rhs_dilation=dilation``)
  with the kernel flipped in space and its in/out channels swapped inside each group
  (Dumoulin & Visin 2016, arXiv:1603.07285, §4). The zeros are inserted with
  ``lax.pad`` rather than ``lhs_dilation=stride`` because XLA's CPU compiler aborts the
  process ("Window dimensions do not match RHS shape", algebraic_simplifier.cc) on
  some lhs-dilated convolutions whose input is smaller than the kernel on an axis.
* **backward** is offered but NOT claimed: the input gradient that ``jax.vjp`` builds
  for a strided convolution is such an lhs-dilated convolution, and XLA aborts the
  process compiling it for some small geometries (e.g. x ``(1, 1, 2, 4)``, w
  ``(1, 1, 3, 2)``, stride ``(1, 2)``, padding ``((1, 1), (1, 1))``, float32 and float64;
  finding ``jax.vjp_strided_abort``: ``python scripts/library_findings.py
  jax.vjp_strided_abort``, seen with jax/jaxlib 0.10.2 on AMD EPYC, 1 and 2 threads).
* **precision** -- ``precision=lax.Precision.HIGHEST`` is passed, so float32 is
  computed in float32 on every platform (on CPU it is also the default).
* **float64** -- the constructor turns on ``jax_enable_x64`` (a process-wide jax
  setting that stays on; without it jax silently computes float64 input in float32).
* **negative padding is not claimed**: jax takes it natively, but on CPU (jax 0.10.2)
  a float32 2-D convolution with one axis padded ``(-p, +p)``, ``p > 0``, returns
  garbage (values read from outside the input: huge numbers, inf, NaN) whenever the
  kernel is wider than 1 on some axis; float64 is right. Crop the input instead.
  (Finding ``jax.negative_padding_float32``: ``python scripts/library_findings.py
  jax.negative_padding_float32``; seen on AMD EPYC with AVX-512, for some value draws.)
* **not covered by the declared model** (found by convwitness, jax 0.10.2 CPU): XLA
  flushes subnormal inputs and results to zero (float32 and float64), so the
  gradual-underflow terms of the bound do not hold for subnormal data (finding
  ``jax.subnormal_flush``, ``python scripts/library_findings.py jax.subnormal_flush``,
  AMD EPYC with AVX-512); and a float64
  grouped convolution lets a NaN/inf of one group reach the outputs of the others
  (``ieee_special`` is not claimed; seen with jax 0.10.2 CPU, machine and geometry not
  recorded; ``python scripts/library_findings.py jax.nan_crosses_groups`` tries a simple
  case, which does not show it on AMD EPYC with AVX-512: unconfirmed).
* **compilation** -- each geometry (strides, padding, dilation, groups, layout, bias)
  gets one ``jax.jit``-ed function, cached in the adapter; jit caches one compiled
  executable per array shape and dtype, so repeated value draws of one geometry
  never trace or compile again. ``trace_count`` counts traces.
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.errors import AdapterUnavailable

__all__ = ["JaxAdapter"]

_SPATIAL = {1: "H", 2: "HW", 3: "DHW"}


def _dimension_numbers(ndim: int, layout: str):
    sp = _SPATIAL[ndim]
    if layout == "channels_last":
        return ("N" + sp + "C", "O" + sp + "I", "N" + sp + "C")
    return ("NC" + sp, "OI" + sp, "NC" + sp)


class JaxAdapter:
    """jax.lax.conv_general_dilated, gradients by jax.vjp, jitted per geometry."""

    name = "jax"

    def __init__(self, dtypes=("float32", "float64"), name: str | None = None, error_models=()):
        try:
            import jax
            import jax.numpy as jnp
            from jax import lax
        except ImportError:
            raise AdapterUnavailable(
                "jax is not installed; fix: pip install 'convwitness[jax]'") from None
        jax.config.update("jax_enable_x64", True)
        self._jax, self._jnp, self._lax = jax, jnp, lax
        self.version = jax.__version__
        self.trace_count = 0
        self._cache: dict = {}
        if name:
            self.name = name
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset(dtypes),
            error_models=tuple(error_models),
            layouts=frozenset({"channels_first", "channels_last"}),
            # not "negative": XLA's CPU float32 2-D convolution reads memory outside the
            # input when one axis is padded (-p, +p) (garbage, NaN, inf; float64 is right)
            padding=frozenset({"symmetric", "asymmetric"}),
            # backward is offered, not claimed: XLA aborts on some strided input gradients
            passes=frozenset({"forward", "transposed"}),
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=True, deterministic=True,
            # every geometry is traced and compiled once (jax.jit): the free search then
            # stays on the covering schedule's geometries
            compiles_per_shape=True,
            error_model=ErrorModel(note="XLA convolution at Precision.HIGHEST, summed in the case "
                                        "dtype; XLA on CPU flushes subnormals to zero"),
        )

    # -- traced bodies ----------------------------------------------------------------
    def _conv(self, x, w, b, geo):
        """The forward convolution (traced inside jit)."""
        ndim, layout, stride, padding, dilation, groups = geo
        self.trace_count += 1
        y = self._lax.conv_general_dilated(
            x, w, window_strides=stride, padding=padding, rhs_dilation=dilation,
            dimension_numbers=_dimension_numbers(ndim, layout), feature_group_count=groups,
            precision=self._lax.Precision.HIGHEST)
        return y if b is None else y + self._bias_shape(b, ndim, layout)

    def _bias_shape(self, b, ndim, layout):
        if layout == "channels_last":
            return b
        return b.reshape((1, -1) + (1,) * ndim)

    def _flip_kernel(self, w, ndim, layout, groups):
        """(C_in, C_out/G, *K) -> forward kernel (C_out, C_in/G, *K), flipped in space."""
        jnp = self._jnp
        if layout == "channels_last":        # (C_in, *K, C_out/G)
            c_in, og, ks = w.shape[0], w.shape[-1], w.shape[1:-1]
            cg = c_in // groups
            w = w.reshape((groups, cg) + ks + (og,))
            w = jnp.moveaxis(w, -1, 1)          # (G, og, cg, *K)
            w = jnp.moveaxis(w, 2, -1)          # (G, og, *K, cg)
            w = w.reshape((groups * og,) + ks + (cg,))
            return jnp.flip(w, axis=tuple(range(1, 1 + ndim)))
        c_in, og, ks = w.shape[0], w.shape[1], w.shape[2:]
        cg = c_in // groups
        w = w.reshape((groups, cg, og) + ks)
        w = jnp.swapaxes(w, 1, 2).reshape((groups * og, cg) + ks)
        return jnp.flip(w, axis=tuple(range(2, 2 + ndim)))

    def _conv_t(self, x, w, b, geo, output_padding):
        ndim, layout, stride, padding, dilation, groups = geo
        self.trace_count += 1
        lax = self._lax
        ks = w.shape[1:-1] if layout == "channels_last" else w.shape[2:]
        spatial = []
        for k, d, s, (lo, hi), op in zip(ks, dilation, stride, padding, output_padding):
            e = d * (k - 1) + 1
            spatial.append((e - 1 - lo, e - 1 - hi + op, s - 1))
        # zeros between the inputs (interior padding) and the edges in one lax.pad
        # (negative edges crop); then a stride-1, padding-0 convolution
        none = [(0, 0, 0)]
        config = none + spatial + none if layout == "channels_last" else none * 2 + spatial
        xd = lax.pad(x, self._jnp.zeros((), x.dtype), config)
        y = lax.conv_general_dilated(
            xd, self._flip_kernel(w, ndim, layout, groups), window_strides=(1,) * ndim,
            padding=[(0, 0)] * ndim, rhs_dilation=dilation,
            dimension_numbers=_dimension_numbers(ndim, layout), feature_group_count=groups,
            precision=lax.Precision.HIGHEST)
        return y if b is None else y + self._bias_shape(b, ndim, layout)

    # -- the jitted functions, one per geometry -------------------------------------------
    def _function(self, kind, x, stride, padding, dilation, groups, layout, has_bias,
                  output_padding=None):
        geo = (x.ndim - 2, layout, tuple(int(s) for s in stride),
               tuple((int(lo), int(hi)) for lo, hi in padding),
               tuple(int(d) for d in dilation), int(groups))
        op = None if output_padding is None else tuple(int(o) for o in output_padding)
        key = (kind, geo, has_bias, op)
        fn = self._cache.get(key)
        if fn is not None:
            return fn
        jax = self._jax
        if kind == "forward":
            if has_bias:
                body = lambda x, w, b: self._conv(x, w, b, geo)          # noqa: E731
            else:
                body = lambda x, w: self._conv(x, w, None, geo)          # noqa: E731
        elif kind == "backward":
            if has_bias:
                def body(x, w, b, gy):
                    _, vjp = jax.vjp(lambda x, w, b: self._conv(x, w, b, geo), x, w, b)
                    return vjp(gy)
            else:
                def body(x, w, gy):
                    _, vjp = jax.vjp(lambda x, w: self._conv(x, w, None, geo), x, w)
                    return vjp(gy)
        else:
            if has_bias:
                body = lambda x, w, b: self._conv_t(x, w, b, geo, op)    # noqa: E731
            else:
                body = lambda x, w: self._conv_t(x, w, None, geo, op)    # noqa: E731
        fn = self._cache[key] = jax.jit(body)
        return fn

    # -- the call signature ----------------------------------------------------------
    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        fn = self._function("forward", x, stride, padding, dilation, groups, layout, b is not None)
        y = fn(x, w) if b is None else fn(x, w, b)
        return np.array(y)

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups,
                 layout="channels_first"):
        fn = self._function("backward", x, stride, padding, dilation, groups, layout, b is not None)
        if b is None:
            gx, gw = fn(x, w, grad_y)
            return np.array(gx), np.array(gw), None
        gx, gw, gb = fn(x, w, b, grad_y)
        return (np.array(gx), np.array(gw),
                np.array(gb))

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        fn = self._function("transposed", x, stride, padding, dilation, groups, layout,
                            b is not None, output_padding)
        y = fn(x, w) if b is None else fn(x, w, b)
        return np.array(y)


def jax_bf16():
    """``jax-bf16``: XLA's CPU convolution in bfloat16, under the model it follows.

    XLA computes bfloat16 convolutions in float32 (products exact, float32 sums) and
    rounds the convolution to bfloat16; the bias is then added in bfloat16, a second
    rounding (``ErrorModel.bias_add``)."""
    from convwitness.geometry.formats import numpy_dtype
    numpy_dtype("bfloat16")                       # needs ml_dtypes
    model = ErrorModel(product="float32", accumulate="float32", bias_add="bfloat16",
                       note="XLA CPU: float32 compute, rounded to bfloat16, then + bias in bfloat16")
    return JaxAdapter(dtypes=("bfloat16",), name="jax-bf16", error_models=(("bfloat16", model),))
