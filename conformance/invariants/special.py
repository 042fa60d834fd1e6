"""Special values: NaN and infinities propagate as IEEE 754 says; gradual underflow.

The expected class of every output (NaN, +inf, -inf, finite) follows from its terms
alone, in any summation order: NaN if any term is NaN (NaN operand, inf * 0) or if
both +inf and -inf terms occur; +inf (-inf) if some term is +inf (-inf) and none of
the other kinds; finite otherwise. The terms are counted exactly with the reference
on 0/1 indicator arrays. Taps that meet padding multiply a padded zero: a backend
either skips them or forms ``0 * w`` (NaN for a NaN or infinite weight); either is
accepted, but the convention must not change between shapes (it is recorded on the
first example that tells them apart). These invariants are information only unless
the adapter claims ``ieee_special``.
"""
from __future__ import annotations

import math

import numpy as np

from ..numerics import reference as ref
from .evidence import Evidence, compare
from ..cases.strategies import Needs
from . import invariant
from ._common import copies, judge, pass_bound, run_forward

_CLASS = {0: "finite", 1: "NaN", 2: "+inf", 3: "-inf"}


def _count(spec, a_mask, b_mask):
    """Number of (input position, tap) pairs with a_mask(x) and b_mask(w) in each window."""
    return ref.forward(spec.replace(bias=False), a_mask.astype(np.float64), b_mask.astype(np.float64))


def _expected_classes(spec, x, w, b):
    """(class without padded taps, class with padded taps as 0*w) per output element."""
    x = x.astype(np.float64)
    w = w.astype(np.float64)
    xf = np.isfinite(x)
    nan_t = (_count(spec, np.isnan(x), np.ones_like(w)) + _count(spec, ~np.isnan(x), np.isnan(w))
             + _count(spec, np.isinf(x), w == 0) + _count(spec, x == 0, np.isinf(w)))
    pos_t = (_count(spec, x == np.inf, (w > 0)) + _count(spec, x == -np.inf, (w < 0))
             + _count(spec, xf & (x > 0), w == np.inf) + _count(spec, xf & (x < 0), w == -np.inf))
    neg_t = (_count(spec, x == -np.inf, (w > 0)) + _count(spec, x == np.inf, (w < 0))
             + _count(spec, xf & (x > 0), w == -np.inf) + _count(spec, xf & (x < 0), w == np.inf))
    # Taps on padded zeros: all taps with a special weight minus those on real positions.
    special_w = ~np.isfinite(w)
    axes_w = tuple(range(1, w.ndim))
    total = special_w.sum(axis=axes_w).astype(np.float64)          # per output channel
    if spec.layout == "channels_last":
        total_b = total
    else:
        total_b = total.reshape((-1,) + (1,) * spec.ndim)
    padded = total_b - _count(spec, np.ones_like(x, bool), special_w)
    if b is not None:
        bb = b.astype(np.float64)
        shape = (-1,) if spec.layout == "channels_last" else (-1,) + (1,) * spec.ndim
        nan_t = nan_t + np.isnan(bb).reshape(shape)
        pos_t = pos_t + (bb == np.inf).reshape(shape)
        neg_t = neg_t + (bb == -np.inf).reshape(shape)

    def classify(nan_terms):
        c = np.zeros(nan_terms.shape, np.int8)
        c[(pos_t > 0)] = 2
        c[(neg_t > 0)] = 3
        c[(nan_terms > 0) | ((pos_t > 0) & (neg_t > 0))] = 1
        return c
    return classify(nan_t), classify(nan_t + padded), padded > 0


def _classes(y):
    y = y.astype(np.float64)
    c = np.zeros(y.shape, np.int8)
    c[y == np.inf] = 2
    c[y == -np.inf] = 3
    c[np.isnan(y)] = 1
    return c


@invariant("forward.special_values", passes=("forward",), needs=Needs(kinds=("nan", "inf")),
           informational_unless="ieee_special",
           statement="NaN and ±inf reach exactly the outputs IEEE 754 arithmetic says, with one "
                     "padded-tap convention across shapes")
def special_values(adapter, case, ctx):
    """class(y[o, h]) = NaN if some term is NaN (NaN operand, ±inf·0) or +inf and -inf terms
    meet; ±inf if a ±inf term and no other kind; finite (within the bound) otherwise."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    skip, mult, touched = _expected_classes(spec, case.x, case.w, case.b)
    got = _classes(y)
    ok_skip, ok_mult = np.array_equal(got, skip), np.array_equal(got, mult)
    differs = not np.array_equal(skip, mult)
    if not (ok_skip or ok_mult):
        expected = skip if np.sum(got != skip) <= np.sum(got != mult) else mult
        bad = got != expected
        first = [int(i) for i in np.argwhere(bad)[0]]
        return Evidence(False, share=np.inf, where=tuple(first), message=(
            f"special values: {int(bad.sum())} of {bad.size} outputs have the wrong class; first at "
            f"{first}: got {_CLASS[int(got[tuple(first)])]}, IEEE 754 gives "
            f"{_CLASS[int(expected[tuple(first)])]} (terms counted on the reference; padded taps "
            "either skipped or 0*w)"))
    # with no input element (a zero-size spatial axis or no input channel) every tap is
    # padding and implementations commonly skip the work altogether: such a case is judged
    # on its own (either convention is fine) and neither sets nor breaks the convention
    # of the shapes that do read input (common practice, no source)
    empty_input = spec.in_channels == 0 or math.prod(spec.input_size) == 0
    if differs and not empty_input:
        seen = "skip" if ok_skip else "multiply"
        before, where = ctx.state.setdefault("padded_tap", (seen, f"{spec.describe()} ({case.kind}, "
                                                                 f"seed {case.seed})"))
        if before != seen:
            return Evidence(False, share=np.inf, message=(
                f"special values: the padded-tap convention changed between shapes: the example "
                f"{where} set it to {before} padded taps; this one ({spec.describe()}) does {seen}"))
    finite = got == 0
    if finite.any():
        xs = np.where(np.isfinite(case.x.astype(np.float64)), case.x.astype(np.float64), 0.0)
        ws = np.where(np.isfinite(case.w.astype(np.float64)), case.w.astype(np.float64), 0.0)
        bs = None if case.b is None else np.where(np.isfinite(case.b.astype(np.float64)),
                                                   case.b.astype(np.float64), 0.0)
        expected, bound = pass_bound(adapter, spec, "forward", {"x": xs, "w": ws, "b": bs})
        yf = np.where(finite, y.astype(np.float64), expected)
        ev = compare(yf, expected, bound.values, what="y",
                     criterion="special values: finite outputs within the bound",
                     explanation=bound.explain())
        if not ev.ok:
            return ev
    return Evidence(True, message=(f"special values: {int((got != 0).sum())} non-finite outputs where "
                                   "IEEE 754 puts them"), checked=got.size)


@invariant("forward.subnormals", passes=("forward",), needs=Needs(kinds=("subnormal",)),
           informational_unless="ieee_special",
           statement="inputs in the subnormal range give results within the bound (gradual underflow)")
def subnormal(adapter, case, ctx):
    """x subnormal, w moderate: |y - y_ref| <= bound, the bound including half the smallest
    subnormal per rounded product (no flush to zero)."""
    spec = case.spec
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    expected, bound = pass_bound(adapter, spec, "forward", {"x": case.x, "w": case.w, "b": case.b})
    return judge(adapter, spec, y, expected, bound, what="y",
                 criterion="subnormal inputs: |y - y_ref| <= bound (gradual underflow)")
