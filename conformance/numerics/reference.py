"""The float64 reference: forward, input/weight/bias gradients and transposed forward.

Index formulas (channels first, one spatial axis shown; every axis alike). With
``x_p`` the input padded by ``(p_lo, p_hi)`` zeros (cropped where negative),
``Cg = C_in/G``, ``Og = C_out/G`` and ``g(o) = o // Og``:

* forward      ``y[n,o,h]  = b[o] + sum_{c<Cg, t<k} w[o,c,t] * x_p[n, g(o)Cg + c, h*s + t*d]``
* grad_input   ``gx_p[n, gCg + c, j] = sum_{o in group g, t, h : h*s + t*d = j} w[o,c,t] * gy[n,o,h]``
  (then ``gx`` is ``gx_p`` without the padding)
* grad_weight  ``gw[o,c,t] = sum_{n,h} x_p[n, g(o)Cg + c, h*s + t*d] * gy[n,o,h]``
* grad_bias    ``gb[o]     = sum_{n,h} gy[n,o,h]``
* transposed   the input gradient of the matching convolution
  (``ConvSpec.matching_conv``) applied to x, plus the bias: Dumoulin & Visin 2016, §4.

Everything is computed in float64 from the given arrays (any float dtype, converted
exactly). Integer-valued data whose partial sums stay below 2**53 come out exact in
any summation order, so the reference is exact on them. The ``*_magnitude``
functions apply the same operation to absolute values (``|x| * |w|``), the terms the
rounding-error bounds need.
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from . import engine as _engine
from ..errors import SpecError
from ..geometry.spec import ConvSpec

__all__ = [
    "forward", "grad_input", "grad_weight", "grad_bias", "backward", "transposed",
    "forward_magnitude", "grad_input_magnitude", "grad_weight_magnitude", "grad_bias_magnitude",
]


@lru_cache(maxsize=256)
def _plan(spec: ConvSpec) -> _engine.Plan:
    return _engine.Plan(spec)


def _f64(name: str, a, shape) -> np.ndarray:
    arr = np.asarray(a)
    if arr.shape != tuple(shape):
        raise SpecError(f"reference: {name} has shape {arr.shape}, expected {tuple(shape)} for this spec")
    return arr.astype(np.float64, copy=False)


def _conv_spec(spec: ConvSpec) -> ConvSpec:
    return spec.matching_conv() if spec.transposed else spec


def _zero_work(spec: ConvSpec) -> bool:
    plan_spec = _conv_spec(spec)
    return (plan_spec.batch == 0 or plan_spec.in_channels == 0 or plan_spec.out_channels == 0
            or math.prod(plan_spec.output_size) == 0 or math.prod(plan_spec.input_size) == 0)


def _add_bias(spec: ConvSpec, y: np.ndarray, b) -> np.ndarray:
    if b is None:
        return y
    b = _f64("b", b, (spec.out_channels,))
    if spec.layout == "channels_last":
        return y + b
    return y + b.reshape((-1,) + (1,) * spec.ndim)


def forward(spec: ConvSpec, x, w, b=None) -> np.ndarray:
    """y of the spec's forward pass (the transposed forward when spec.transposed)."""
    if spec.transposed:
        return transposed(spec, x, w, b)
    x = _f64("x", x, spec.x_shape)
    w = _f64("w", w, spec.w_shape)
    if _zero_work(spec):
        y = np.zeros(spec.y_shape)
    else:
        y = _engine.forward(_plan(spec), x, w, spec.layout)
    return _add_bias(spec, y, b)


def transposed(spec: ConvSpec, x, w, b=None) -> np.ndarray:
    """Transposed convolution: the input gradient of ``spec.matching_conv()`` applied to x."""
    if not spec.transposed:
        raise SpecError("reference.transposed: spec.transposed is False; use reference.forward")
    x = _f64("x", x, spec.x_shape)
    w = _f64("w", w, spec.w_shape)
    conv = spec.matching_conv()
    if _zero_work(spec):
        y = np.zeros(spec.y_shape)
    else:
        y = _engine.grad_input(_plan(conv), w, x, spec.layout)
    return _add_bias(spec, y, b)


def grad_input(spec: ConvSpec, w, grad_y) -> np.ndarray:
    """dL/dx given dL/dy (for a transposed spec: the matching convolution's forward)."""
    w = _f64("w", w, spec.w_shape)
    gy = _f64("grad_y", grad_y, spec.y_shape)
    if _zero_work(spec):
        return np.zeros(spec.x_shape)
    if spec.transposed:
        conv = spec.matching_conv()
        y = _engine.forward(_plan(conv), gy, w, spec.layout)
        return _crop_to(spec, y, spec.input_size)
    return _engine.grad_input(_plan(spec), w, gy, spec.layout)


def grad_weight(spec: ConvSpec, x, grad_y) -> np.ndarray:
    """dL/dw given dL/dy, in the spec's weight layout."""
    x = _f64("x", x, spec.x_shape)
    gy = _f64("grad_y", grad_y, spec.y_shape)
    if _zero_work(spec):
        return np.zeros(spec.w_shape)
    if spec.transposed:
        conv = spec.matching_conv()
        return _engine.grad_weight(_plan(conv), gy, x, spec.layout)
    return _engine.grad_weight(_plan(spec), x, gy, spec.layout)


def grad_bias(spec: ConvSpec, grad_y) -> np.ndarray:
    """dL/db = the sum of dL/dy over the batch and every spatial position."""
    gy = _f64("grad_y", grad_y, spec.y_shape)
    if spec.layout == "channels_last":
        return gy.reshape(-1, spec.out_channels).sum(axis=0) if gy.size else np.zeros(spec.out_channels)
    axes = (0,) + tuple(range(2, 2 + spec.ndim))
    return gy.sum(axis=axes)


def backward(spec: ConvSpec, x, w, grad_y, bias: bool | None = None):
    """(grad_x, grad_w, grad_b); grad_b is None when the spec (or ``bias``) has no bias."""
    has_bias = spec.bias if bias is None else bias
    return (grad_input(spec, w, grad_y), grad_weight(spec, x, grad_y),
            grad_bias(spec, grad_y) if has_bias else None)


def _crop_to(spec: ConvSpec, y: np.ndarray, size) -> np.ndarray:
    sl = tuple(slice(0, n) for n in size)
    if spec.layout == "channels_last":
        return np.ascontiguousarray(y[(slice(None),) + sl + (slice(None),)])
    return np.ascontiguousarray(y[(slice(None), slice(None)) + sl])


# -- magnitudes: the same operations on absolute values ---------------------------------
def forward_magnitude(spec: ConvSpec, x, w, b=None) -> np.ndarray:
    """``|x| * |w| (+ |b|)``: the sum of the absolute values of the terms of each output."""
    return forward(spec, np.abs(_f64("x", x, spec.x_shape)), np.abs(_f64("w", w, spec.w_shape)),
                   None if b is None else np.abs(_f64("b", b, (spec.out_channels,))))


def grad_input_magnitude(spec: ConvSpec, w, grad_y) -> np.ndarray:
    return grad_input(spec, np.abs(_f64("w", w, spec.w_shape)),
                      np.abs(_f64("grad_y", grad_y, spec.y_shape)))


def grad_weight_magnitude(spec: ConvSpec, x, grad_y) -> np.ndarray:
    return grad_weight(spec, np.abs(_f64("x", x, spec.x_shape)),
                       np.abs(_f64("grad_y", grad_y, spec.y_shape)))


def grad_bias_magnitude(spec: ConvSpec, grad_y) -> np.ndarray:
    return grad_bias(spec, np.abs(_f64("grad_y", grad_y, spec.y_shape)))
