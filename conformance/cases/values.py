"""Value kinds: how the numbers of a case are filled.

Hypothesis draws the kind and a seed (both shrink: kinds toward ``ones``, seeds
toward 0); the bulk values are then filled cheaply by numpy from the seed, because
shrinking individual floats of a large array buys nothing. Every value is drawn in
float64 and rounded with the format's own conversion, so the case holds numbers
representable in its dtype and the reference computes from exactly those.

Numeric kinds, simplest first:

* ``ones``      every entry 1 (integer, exact in every format);
* ``one_hot``   x and the upstream gradient zero but for one entry, small-integer w;
* ``small_int`` integers in [-3, 3]: every correct summation order is exact;
* ``pow2``      signed powers of two in [2^-4, 2^4];
* ``uniform``   uniform in [-1, 1];
* ``wide``      signed log-uniform magnitudes over a wide dynamic range;
* ``near_max``  uniform data scaled by a power of two so the largest output sum lies
  near the top of the format's range (but cannot overflow).

Special kinds (for the special-value invariants only): ``nan``, ``inf``,
``subnormal``.
"""
from __future__ import annotations

import math
import zlib

import numpy as np

from ..geometry.formats import get_format, numpy_dtype, to_format

__all__ = ["NUMERIC_KINDS", "EXACT_KINDS", "SPECIAL_KINDS", "KINDS", "fill", "aux_rng", "geometry_rng"]

NUMERIC_KINDS = ("ones", "one_hot", "small_int", "pow2", "uniform", "wide", "near_max")
EXACT_KINDS = ("ones", "one_hot", "small_int")
SPECIAL_KINDS = ("nan", "inf", "subnormal")
KINDS = NUMERIC_KINDS + SPECIAL_KINDS


#: The salts of auxiliary random data, one per purpose, in one table: an invariant draws
#: ``aux_rng(case.seed, SALTS[purpose])`` so that its extra data are replayable from the
#: case alone and no two purposes share a stream. Never renumber (witnesses replay them).
SALTS = {
    "input_second": 11,        # forward.input_linearity: the second input x2
    "input_scale": 12,         # forward.input_linearity: the power of two 2^k
    "weight_second": 21,       # forward.weight_linearity: the second weight w2
    "weight_scale": 22,        # forward.weight_linearity: the power of two 2^k
    "shift_axis": 31,          # forward.shift_equivariance: axis and fill of the shift
    "batch_sample": 41,        # forward.batch_independence: sample kept, others redrawn
    "state_forward": 51,       # forward.repeatability: the other geometry B of A, B, A
    "state_backward": 52,      # backward.repeatability: the other geometry B of A, B, A
    "zero_batch_warmup": 61,   # backward.zero_batch: the N = 1 call before N = 0
    "upstream_second": 71,     # backward.upstream_linearity: the second upstream gradient
    "upstream_scale": 72,      # backward.upstream_linearity: the power of two 2^k
    "fd_input": 81,            # backward.finite_differences: direction in x
    "fd_weight": 82,           # backward.finite_differences: direction in w
    "quant_values": 91,        # cases/quant.py: the integer x, w, b of a quantized case
}


def aux_rng(seed: int, salt: int = 0) -> np.random.Generator:
    """The generator an invariant uses for auxiliary data (replayable from the case)."""
    return np.random.default_rng([int(seed) & 0xFFFFFFFF, salt])


def geometry_rng(spec, salt: int = 0) -> np.random.Generator:
    """The generator of a choice that belongs to the geometry, not to its values (which axis
    to shift, which second geometry to call in between): a function of the geometry alone,
    so every value set of a geometry makes the same calls (no call signature more for a port
    that compiles per shape) and a witness replays it from its geometry."""
    return np.random.default_rng([zlib.crc32(repr(spec).encode()), salt])


def _draw(rng, kind: str, shape, fmt_name: str) -> np.ndarray:
    fmt = get_format(fmt_name)
    if kind == "ones":
        return np.ones(shape)
    if kind == "small_int" or kind == "one_hot":
        return rng.integers(-3, 4, size=shape).astype(np.float64)
    if kind == "pow2":
        return rng.choice([-1.0, 1.0], size=shape) * np.exp2(rng.integers(-4, 5, size=shape))
    if kind == "wide":
        span = min(20, int(math.log2(fmt.max)) // 4)
        return rng.choice([-1.0, 1.0], size=shape) * np.exp2(rng.uniform(-span, span, size=shape))
    return rng.uniform(-1.0, 1.0, size=shape)


def _one_hot(rng, shape) -> np.ndarray:
    a = np.zeros(shape)
    if a.size:
        a.flat[int(rng.integers(0, a.size))] = 1.0
    return a


def fill(spec, kind: str, seed: int) -> dict:
    """Arrays x, w, b (or None), grad_y for ``spec``, in its dtype, of value ``kind``."""
    rng = np.random.default_rng(int(seed) & 0xFFFFFFFFFFFF)
    base = "uniform" if kind in SPECIAL_KINDS or kind == "near_max" else kind
    arrays = {
        "x": _draw(rng, base, spec.x_shape, spec.dtype),
        "w": _draw(rng, "small_int" if kind == "one_hot" else base, spec.w_shape, spec.dtype),
        "b": _draw(rng, base, spec.b_shape, spec.dtype) if spec.bias else None,
        "grad_y": _draw(rng, base, spec.y_shape, spec.dtype),
    }
    if kind == "one_hot":
        arrays["x"] = _one_hot(rng, spec.x_shape)
        arrays["grad_y"] = _one_hot(rng, spec.y_shape)
        if arrays["b"] is not None:
            arrays["b"] = np.zeros(spec.b_shape)
    elif kind == "near_max":
        _scale_near_max(spec, arrays)
    elif kind in SPECIAL_KINDS:
        _plant_special(rng, spec, kind, arrays)
    dt = numpy_dtype(spec.dtype)
    return {k: (None if v is None else to_format(v, spec.dtype).astype(dt, copy=False))
            for k, v in arrays.items()}


def _scale_near_max(spec, arrays):
    """Scale x (and b) by a power of two so max |x|*|w| (+|b|) sits in [max/8, max/4]."""
    from ..numerics import reference
    fmt = get_format(spec.dtype)
    x, w, b = arrays["x"], arrays["w"], arrays["b"]
    # Round first so the scale is judged on the stored values.
    x, w = to_format(x, spec.dtype).astype(np.float64), to_format(w, spec.dtype).astype(np.float64)
    mag = reference.forward_magnitude(spec, x, w, None if b is None else to_format(b, spec.dtype))
    top = float(mag.max()) if mag.size else 0.0
    if top <= 0 or not np.isfinite(top):
        return
    k = math.floor(math.log2(fmt.max) - 2 - math.log2(top))
    before = dict(arrays)
    with np.errstate(over="ignore", invalid="ignore"):
        arrays["x"] = np.ldexp(x, k)
        if b is not None:
            arrays["b"] = np.ldexp(to_format(b, spec.dtype).astype(np.float64), k)
        arrays["w"] = w
        xmax = float(np.abs(arrays["x"]).max()) if arrays["x"].size else 0.0
        if xmax > fmt.max and np.isfinite(xmax):
            # move part of the scale into w
            shift = math.ceil(math.log2(xmax / fmt.max)) + 1
            arrays["x"] = np.ldexp(arrays["x"], -shift)
            arrays["w"] = np.ldexp(w, shift)
    if not all(v is None or np.isfinite(v).all() for v in arrays.values()):
        # the largest result is tiny beside an element no window reads (or a zero weight
        # hides it): no power of two puts it near the top of the range with every stored
        # value finite, so the values stay as drawn
        arrays.update(before)


def _plant_special(rng, spec, kind, arrays):
    """Place one special value in x (at a corner or the last element), or in w or b."""
    fmt = get_format(spec.dtype)
    if kind == "subnormal":
        scale = fmt.tiny * 2.0 ** -int(rng.integers(1, max(2, fmt.nmant)))
        for name in ("x", "b"):
            if arrays[name] is not None:
                arrays[name] = arrays[name] * scale
        return
    value = np.nan if kind == "nan" else (np.inf if rng.integers(0, 2) else -np.inf)
    if kind == "inf" and not fmt.has_inf:
        value = np.nan
    target = ["x", "x", "w", "b"][int(rng.integers(0, 4))]
    if target == "b" and arrays["b"] is None:
        target = "x"
    a = arrays[target]
    if a.size == 0:
        return
    where = int(rng.integers(0, 3))
    idx = 0 if where == 0 else a.size - 1 if where == 1 else int(rng.integers(0, a.size))
    a.flat[idx] = value
