"""Quantized cases: a QuantSpec with concrete integer arrays, their file form, and the
hypothesis strategies that reach where integer convolution code breaks.

Geometries come from the float path's strategies (every feature and coincidence of
``cases/strategies.py``); on top of them this module draws

* zero points: anywhere, at the ends of their range, or far from 0 (so that padding
  filled with a raw 0 instead of the input zero point shows);
* scales: powers of two (then the multiplier is a power of two and ties ``k + 1/2``
  are frequent: the rounding rule shows) or not; multipliers moderate, "half" (M = 2^-j,
  j = 1..3: every other sum is a tie), "near_half" (M = 2^-j (1 + eps) with non-power-of-two
  scales whose float32 product rounds to make M exactly 2^-j: near-ties), tiny (large
  shifts) or large (outputs saturate);
* per-tensor against per-output-channel weight parameters, distinct per channel;
* values: uniform, at the ends of the range, "saturating" (every product at its
  largest magnitude, one sign: the longest sums and the ends of the output range), and
  near the zero point.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from hypothesis import assume, strategies as st

from ..errors import SpecError
from ..geometry.capabilities import Capabilities
from ..geometry.quant import INT_RANGES, QuantSpec, worst_sum
from ..numerics.requant import per_weight
from .case import QCase, load_qcase  # noqa: F401  (public here too)
from .profiles import get_profile
from .strategies import Needs, specs
from .values import SALTS, aux_rng

__all__ = ["QCase", "QNeeds", "quant_examples", "load_qcase", "QUANT_KINDS"]

QUANT_KINDS = ("uniform", "extreme", "saturating", "near_zero_point")
ZERO_POINTS = ("any", "ends", "far")
MULTIPLIERS = ("moderate", "half", "near_half", "tiny", "large")


@dataclass(frozen=True)
class QNeeds:
    """What a quantized invariant requires: the geometry's ``Needs`` and the parameters.

    ``outputs``: output formats allowed (None: any claimed). ``zero_points``: one of
    ZERO_POINTS or None (drawn). ``multipliers``: allowed multiplier kinds.
    ``per_channel``: force (True), forbid (False) or draw (None). ``kinds``: value kinds.
    ``clamp``: None drawn, False never.
    """

    geometry: Needs = Needs()
    outputs: tuple | None = None
    zero_points: tuple = ZERO_POINTS
    multipliers: tuple = MULTIPLIERS
    pow2_share: bool = True
    per_channel: bool | None = None
    kinds: tuple = QUANT_KINDS
    clamp: bool | None = None


def _geometry_caps(caps: Capabilities, direction: str = "forward") -> Capabilities:
    """The plain claims used to draw geometries for the quantized pass (the quantized
    claim's layouts, the direction drawn, an accumulation short enough for the exact
    reference)."""
    return caps.replace(passes=frozenset({direction}), unclaimed_passes=frozenset(),
                        dtypes=frozenset({"float64"}), layouts=caps.quant.layouts,
                        per_pass=(), error_models=())


def _scale(draw, pow2: bool, label: str) -> float:
    k = draw(st.integers(-10, 2), label=f"{label}_exp")
    if pow2:
        return 2.0 ** k
    mant = draw(st.integers(2 ** 22 + 1, 2 ** 24 - 1), label=f"{label}_mant")   # float32 mantissa
    return float(np.float32(mant * 2.0 ** (k - 23)))


def _zero_point(draw, dtype: str, mode: str, label: str) -> int:
    lo, hi = INT_RANGES[dtype]
    if mode == "ends":
        return draw(st.sampled_from((lo, hi)), label=label)
    if mode == "far":
        span = (hi - lo) // 4
        return draw(st.sampled_from((lo + draw(st.integers(0, span), label=label + "_lo"),
                                     hi - draw(st.integers(0, span), label=label + "_hi"))), label=label)
    return draw(st.integers(lo, hi), label=label)


@st.composite
def _qspec(draw, caps: Capabilities, profile, qn: QNeeds):
    qc = caps.quant
    direction = draw(st.sampled_from(sorted(qc.directions)), label="direction")
    needs = replace(qn.geometry, transposed=direction == "transposed")
    conv = draw(specs(_geometry_caps(caps, direction), profile, needs), label="geometry")
    x_dtype = draw(st.sampled_from(sorted(qc.x_dtypes)), label="x_dtype")
    outputs = sorted(qc.outputs if qn.outputs is None else set(qc.outputs) & set(qn.outputs))
    assume(outputs)
    output = draw(st.sampled_from(outputs), label="output")
    zp_mode = draw(st.sampled_from(qn.zero_points), label="zero_points")
    x_zp = _zero_point(draw, x_dtype, zp_mode, "x_zero_point")
    per_channel = qc.per_channel and conv.out_channels > 1 and (
        qn.per_channel if qn.per_channel is not None else draw(st.booleans(), label="per_channel"))
    assume(qn.per_channel is not True or per_channel)
    mult = draw(st.sampled_from(qn.multipliers), label="multiplier") if output != "int32" else "moderate"
    # "half": M = 2^-j with j in 1..3, power-of-two scales: ties k + 1/2 are frequent
    pow2 = mult == "half" or (mult != "near_half" and qn.pow2_share
                              and draw(st.booleans(), label="power_of_two_scales"))
    n_w = conv.out_channels if per_channel else 1
    if qc.weight_zero_points:
        w_zp = tuple(_zero_point(draw, "int8", "any" if zp_mode == "far" else zp_mode, f"w_zero_point{i}")
                     if draw(st.booleans(), label="w_zp_nonzero") else 0 for i in range(n_w))
    else:
        w_zp = (0,) * n_w
    x_scale = _scale(draw, pow2, "x_scale")
    w_scale = tuple(_scale(draw, pow2, f"w_scale{i}") for i in range(n_w))
    if per_channel and n_w > 1 and len(set(w_scale)) == 1:
        w_scale = tuple(s * 2.0 ** (i % 3) for i, s in enumerate(w_scale))   # distinct per channel
    bias = "none"
    if conv.bias:
        kinds = sorted(set(qc.bias) - {"none"})
        if kinds:
            bias = draw(st.sampled_from(kinds), label="bias_kind")
        else:
            conv = conv.replace(bias=False)
    y_scale, y_zp, clamp = None, 0, None
    if output != "int32":
        xlo, xhi = INT_RANGES[x_dtype]
        n = max(1, (conv.in_channels // conv.groups) * math.prod(conv.kernel_size))
        typical = max(1.0, math.sqrt(n) * (xhi - xlo) * 255 / 8)
        if mult in ("half", "near_half"):
            target = 2.0 ** -draw(st.integers(1, 3), label="m_exp")
        else:
            j = {"moderate": draw(st.integers(-2, 3), label="m_exp"),
                 "tiny": -draw(st.integers(8, 20), label="m_exp"),
                 "large": draw(st.integers(4, 10), label="m_exp")}[mult]
            target = 2.0 ** j * 64.0 / typical
        raw = x_scale * w_scale[0] / target
        # near_half: y_scale = fl32(x_scale*w_scale)/target, so the exact multiplier is
        # 2^-j (1 + eps), |eps| <= 2^-24, while one computed in float32 is 2^-j exactly:
        # exact ties of the float32 model are near-ties of the exact one
        y_scale = 2.0 ** round(math.log2(raw)) if pow2 else float(np.float32(raw))
        y_zp = _zero_point(draw, output, zp_mode, "y_zero_point")
        if qc.clamp and qn.clamp is not False and draw(st.booleans(), label="clamp"):
            olo, ohi = INT_RANGES[output]
            lo = draw(st.integers(olo, ohi), label="clamp_lo")
            clamp = (lo, draw(st.integers(lo, ohi), label="clamp_hi"))
    try:
        spec = QuantSpec(conv, x_dtype=x_dtype, x_scale=x_scale, x_zero_point=x_zp, w_scale=w_scale,
                         w_zero_point=w_zp, bias=bias, output=output, y_scale=y_scale,
                         y_zero_point=y_zp, clamp=clamp)
    except SpecError:
        assume(False)
        raise
    assume(qc.admits(spec))
    return spec


def fill(spec: QuantSpec, kind: str, seed: int) -> dict:
    """x, w, b of a value kind, from ``seed`` alone (a witness replays without hypothesis)."""
    rng = aux_rng(seed, SALTS["quant_values"])
    xlo, xhi = INT_RANGES[spec.x_dtype]
    wlo, whi = INT_RANGES[spec.w_dtype]
    xs, ws = spec.x_shape, spec.w_shape
    wzp = per_weight(spec, spec.w_zero_point).astype(np.int64)
    if kind == "extreme":
        x = rng.choice([xlo, xhi], xs)
        w = rng.choice([wlo, whi], ws)
    elif kind == "saturating":
        # every |x - x_zp| and |w - w_zp| at its largest, signs aligned per output channel
        far_x = xhi if xhi - spec.x_zero_point >= spec.x_zero_point - xlo else xlo
        x = np.full(xs, far_x)
        up = (whi - wzp) >= (wzp - wlo)
        w_far = np.where(up, whi, wlo)
        flip = rng.random(wzp.shape) < 0.5     # some output channels negative
        w = np.where(flip, np.where(up, wlo, whi), w_far) * np.ones(ws, dtype=np.int64)
    elif kind == "near_zero_point":
        x = np.clip(spec.x_zero_point + rng.integers(-3, 4, xs), xlo, xhi)
        w = np.clip(wzp + rng.integers(-3, 4, ws), wlo, whi)
    else:
        x = rng.integers(xlo, xhi + 1, xs)
        w = rng.integers(wlo, whi + 1, ws)
    b = None
    if spec.bias != "none":
        # about the size of the sums themselves, so that the bias neither vanishes nor
        # pushes every output to saturation
        n = max(1, (spec.in_channels // spec.groups) * math.prod(spec.kernel_size))
        typical = math.sqrt(n) * (9 if kind == "near_zero_point" else 128 * 64)
        head = int(min(2 ** 31 - 1 - worst_sum(spec), max(8, typical)))
        bq = rng.integers(-head, head + 1, (spec.out_channels,))
        if spec.bias == "int32":
            b = bq.astype(np.int32)
        else:
            real = (bq + rng.random(spec.out_channels) - 0.5) * spec.x_scale * np.asarray(spec.channel(spec.w_scale))
            b = real.astype(np.float32)
    return {"x": np.asarray(x).astype(spec.x_dtype), "w": np.asarray(w).astype(spec.w_dtype), "b": b}


@st.composite
def _qcases(draw, caps, profile, qn: QNeeds):
    spec = draw(_qspec(caps, profile, qn))
    out = []
    for _ in range(profile.values):
        kind = draw(st.sampled_from(qn.kinds), label="kind")
        seed = draw(st.integers(0, 2 ** 32 - 1), label="seed")
        a = fill(spec, kind, seed)
        out.append(QCase(spec, a["x"], a["w"], a["b"], kind, seed=seed))
    return tuple(out)


def quant_examples(caps: Capabilities, profile="quick", qneeds: QNeeds | None = None):
    """A strategy of tuples of ``profile.values`` QCases sharing one quantized spec."""
    if not isinstance(caps, Capabilities) or caps.quant is None:
        raise SpecError(f"quant_examples: capabilities={caps!r} declare no quantized pass "
                        "(Capabilities.quant is None); declare QuantCapabilities(...)")
    return _qcases(caps, get_profile(profile), qneeds or QNeeds())
