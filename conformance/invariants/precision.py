"""The precision probe: infer the operand and accumulation precision actually used.

Crafted 1x1 convolutions whose exact results are known:

* operands: ``x = 1 + 2^-k`` in the first channel, zeros in the others, against unit
  weights (and the other way round) gives ``1 + 2^-k`` exactly when operands are read
  with more than k fraction bits;
* accumulation: the channels hold ``2^e``, ``1`` and ``-2^e`` (zeros between, the 1
  in the first or a later block of channels). Every partial sum of any summation order
  is then one of ``±2^e``, ``2^e + 1``, ``1 - 2^e``, ``1``, ``0``: all exact with ``e + 1``
  significant bits. A result other than 1 therefore proves that some partial sum was
  kept in fewer than ``e + 1`` bits, whatever the order. (A lucky order, pairing
  ``2^e`` with ``-2^e`` first, can hide a narrow accumulator, never invent one.)

What was found is reported next to what the adapter declared; operands or partial sums
narrower than declared fail. (ml_dtypes' README shows the effect probed here: ten
thousand uniforms summed in bfloat16 stall at 256.)
"""
from __future__ import annotations

import numpy as np

from .evidence import Evidence
from ..geometry.formats import get_format, numpy_dtype
from ..geometry.capabilities import compiles_per_shape
from ..geometry.spec import ConvSpec
from ..cases.strategies import Needs
from . import invariant
from ._common import model_of

REDUCTION = 64          # channels of the accumulation probe


def _probe_spec(case_spec, channels: int, ndim: int | None = None, layout: str | None = None) -> ConvSpec:
    nd = ndim or case_spec.ndim
    return ConvSpec(batch=1, in_channels=channels, out_channels=1, input_size=(1,) * nd,
                    kernel_size=(1,) * nd, dtype=case_spec.dtype, layout=layout or case_spec.layout,
                    bias=False)


def _geometry(adapter, case_spec, profile) -> ConvSpec:
    """The probe's geometry: REDUCTION channels into one, 1x1, in the case's ndim and layout.
    For a port that compiles per shape, the geometry long_sum.forward calls in this dtype
    (1x1, ``few_channels``, the lowest ndim, the first layout): the probe then adds no call
    signature of its own."""
    caps = adapter.capabilities
    if not compiles_per_shape(caps):
        return _probe_spec(case_spec, REDUCTION)
    from .stress import few_channels
    caps = caps.for_passes({"forward"})
    return _probe_spec(case_spec, few_channels(profile), min(caps.ndims), sorted(caps.layouts)[0])


def _arrays(spec, xvals, wvals):
    dt = numpy_dtype(spec.dtype)
    x = np.asarray(xvals, dtype=np.float64).reshape(spec.x_shape if spec.layout == "channels_first"
                                                    else spec.x_shape)
    w = np.asarray(wvals, dtype=np.float64).reshape(spec.w_shape)
    return x.astype(dt), w.astype(dt)


def _run(adapter, spec, xvals, wvals) -> float:
    x, w = _arrays(spec, xvals, wvals)
    return float(adapter.forward(spec, x, w, None).astype(np.float64).reshape(-1)[0])


def _operand_bits(adapter, spec, which: str, limit: int) -> int:
    """Largest k <= limit such that every 1 + 2^-j (j <= k) is read exactly (in the first
    channel of the accumulation probe's geometry, zeros in the others: one geometry, one
    call signature, for both probes)."""
    found, n = 0, spec.in_channels
    one, zero = [1.0] * n, [0.0] * (n - 1)
    for k in range(1, limit + 1):
        v = 1.0 + 2.0 ** -k
        got = _run(adapter, spec, [v] + zero, one) if which == "x" else \
            _run(adapter, spec, one, [v] + zero)
        if got != v:
            break
        found = k
    return found


def _accumulation_bits(adapter, spec, limit: int, fmt_max: float) -> tuple[int, int | None]:
    """(bits kept by partial sums as far as probed, the first e that lost the 1 or None)."""
    n = spec.in_channels
    for e in range(1, limit + 1):
        if 2.0 ** e >= fmt_max:
            return e, None
        for one_at in (1, n // 2 + 1):
            x = np.zeros(n)
            x[0], x[one_at], x[-1] = 2.0 ** e, 1.0, -(2.0 ** e)
            if _run(adapter, spec, x, np.ones(n)) != 1.0:
                return e, e
    return limit + 1, None



@invariant("precision.probe", passes=("forward",),
           needs=Needs(kinds=("ones",), bias=False, batch_min=1),
           statement="operands and partial sums keep at least the precision the error model declares")
def precision_probe(adapter, case, ctx):
    """Operands: y(1 + 2^-k, 1) = 1 + 2^-k for k < p_operand.
    Accumulation: y(2^e, 1, -2^e) = 1 for e < p_acc, in any summation order."""
    spec = case.spec
    # once per dtype, layout and ndim (each may have a kernel of its own); once per dtype
    # for a port that compiles per shape (on a geometry the run calls anyway, _geometry)
    key = ((spec.dtype,) if compiles_per_shape(adapter.capabilities)
           else (spec.dtype, spec.layout, spec.ndim))
    done = ctx.state.setdefault("probed", {})
    if key in done:
        return done[key]
    probe = _geometry(adapter, spec, ctx.profile)
    if not adapter.capabilities.admits(probe):
        ev = Evidence.skip(f"precision probe: the probe geometry is not admitted for {key}")
        done[key] = ev
        return ev
    m = model_of(adapter, probe).resolve(spec.dtype)
    dtype = get_format(spec.dtype)
    p_op = min(get_format(m.operand).precision, dtype.precision)
    p_acc = get_format(m.accumulate).precision
    limit_op = dtype.precision - 1                  # 1 + 2^-k must be storable in the dtype
    found_x = _operand_bits(adapter, probe, "x", limit_op)
    found_w = _operand_bits(adapter, probe, "w", limit_op)
    acc_max = get_format(m.accumulate).max
    bits, lost = _accumulation_bits(adapter, probe, min(p_acc + 8, 62), min(acc_max, dtype.max))
    problems = []
    if min(found_x, found_w) < min(p_op - 1, limit_op):
        problems.append(f"operands keep only {min(found_x, found_w) + 1} significant bits "
                        f"(x: {found_x + 1}, w: {found_w + 1}), declared {m.operand} ({p_op})")
    if lost is not None and lost + 1 <= p_acc:
        problems.append(f"partial sums keep at most {lost} significant bits (2^{lost} + 1 was "
                        f"rounded), declared accumulation in {m.accumulate} ({p_acc} bits)")
    found = (f"{spec.dtype}/{probe.layout}: operands keep ≥ {min(found_x, found_w) + 1} bits "
             f"(declared {p_op}); partial sums keep "
             + (f"{lost} bits" if lost is not None else f"≥ {bits} bits")
             + f" (declared {m.accumulate}, {p_acc})")
    ev = Evidence(not problems, share=0.0 if not problems else np.inf,
                  message=("precision probe: " + found) if not problems else
                  ("precision probe: " + "; ".join(problems) + f" [{found}]"))
    done[key] = ev
    return ev
