"""Quantized convolution: the spec of one integer convolution and the claims about it.

A quantized convolution is a float convolution's geometry (a :class:`ConvSpec`, whose
``dtype`` is ignored: the geometry only) plus the integer formats and the affine
quantization parameters of each tensor, real = scale * (q - zero_point):

* activations ``x``: ``int8`` or ``uint8``, one scale and one zero point; channels first
  ``(N, C_in, *S)`` or, with the geometry's ``layout="channels_last"``, ``(N, *S, C_in)``
  (w then ``(C_out, *K, C_in/G)`` and y ``(N, *S_out, C_out)``, as on the float path);
* weights ``w``: ``int8``, one scale and zero point per tensor, or one per OUTPUT
  channel (``len(w_scale) == C_out``; with groups, output channel ``o`` belongs to
  group ``o // (C_out/G)``);
* bias: none, ``int32`` at scale ``x_scale * w_scale[o]`` with zero point 0, or
  ``float`` (real values, quantized by the model to that same scale);
* output: ``int32`` (the bare accumulator: sum of (x - x_zp)(w - w_zp) plus the int32
  bias, no requantization), or ``int8``/``uint8`` after requantization with
  ``y_scale``, ``y_zero_point`` and an optional clamp range (a fused activation) inside
  the output range.

:class:`QuantCapabilities` is what an adapter claims about its quantized pass; it is
carried by ``Capabilities.quant`` (None for a float-only adapter).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace

from ..errors import SpecError
from .spec import LAYOUTS, ConvSpec

__all__ = ["QuantSpec", "QuantCapabilities", "INT_RANGES", "REQUANT_MODELS", "BIAS_KINDS",
           "OUTPUT_DTYPES", "DIRECTIONS", "worst_sum"]

#: the integer formats and their ranges (two's complement / unsigned, common practice)
INT_RANGES = {"int8": (-128, 127), "uint8": (0, 255), "int16": (-32768, 32767),
              "int32": (-2 ** 31, 2 ** 31 - 1)}
X_DTYPES = ("int8", "uint8")
W_DTYPES = ("int8",)
OUTPUT_DTYPES = ("int32", "int8", "uint8")
BIAS_KINDS = ("none", "int32", "float")
#: the directions of a quantized convolution: forward, and transposed (the geometry's
#: ``transposed=True``: w ``(C_in, C_out/G, *K)``, output channel ``o`` of group ``g`` is
#: ``w[:, o - g*C_out/G]`` of that group's input channels)
DIRECTIONS = ("forward", "transposed")
#: the requantization models (numerics/requant.py derives each one's allowed deviation)
REQUANT_MODELS = ("exact", "fixed_point", "float32")


def _fail(msg: str):
    raise SpecError(f"QuantSpec: {msg}")


def _scale(name, v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        _fail(f"{name}={v!r} must be a positive finite float")
    if not (math.isfinite(f) and f > 0):
        _fail(f"{name}={v!r} must be a positive finite float")
    return f


@dataclass(frozen=True)
class QuantSpec:
    """One quantized convolution (geometry from ``conv``; its dtype is not used)."""

    conv: ConvSpec
    x_dtype: str = "uint8"
    w_dtype: str = "int8"
    x_scale: float = 1.0
    x_zero_point: int = 0
    w_scale: tuple = (1.0,)
    w_zero_point: tuple = (0,)
    bias: str = "none"
    output: str = "int32"
    y_scale: float | None = None
    y_zero_point: int = 0
    clamp: tuple | None = None

    def __post_init__(self):
        s = object.__setattr__
        c = self.conv
        if not isinstance(c, ConvSpec):
            _fail(f"conv={c!r} must be a ConvSpec (the geometry)")
        if self.x_dtype not in X_DTYPES:
            _fail(f"x_dtype={self.x_dtype!r}; expected one of {X_DTYPES}")
        if self.w_dtype not in W_DTYPES:
            _fail(f"w_dtype={self.w_dtype!r}; expected one of {W_DTYPES}")
        if self.output not in OUTPUT_DTYPES:
            _fail(f"output={self.output!r}; expected one of {OUTPUT_DTYPES}")
        if self.bias not in BIAS_KINDS:
            _fail(f"bias={self.bias!r}; expected one of {BIAS_KINDS}")
        if (self.bias != "none") != c.bias:
            _fail(f"bias={self.bias!r} but conv.bias={c.bias}; use bias='none' exactly when "
                  "the geometry has no bias")
        s(self, "x_scale", _scale("x_scale", self.x_scale))
        lo, hi = INT_RANGES[self.x_dtype]
        if not (isinstance(self.x_zero_point, int) and lo <= self.x_zero_point <= hi):
            _fail(f"x_zero_point={self.x_zero_point!r} must be an int in [{lo}, {hi}] ({self.x_dtype})")
        ws = tuple(_scale("w_scale", v) for v in (self.w_scale if isinstance(self.w_scale, (tuple, list))
                                                  else (self.w_scale,)))
        wz = tuple(int(v) for v in (self.w_zero_point if isinstance(self.w_zero_point, (tuple, list))
                                    else (self.w_zero_point,)))
        for name, vals in (("w_scale", ws), ("w_zero_point", wz)):
            if len(vals) not in (1, c.out_channels):
                _fail(f"{name} has {len(vals)} entries; expected 1 (per tensor) or "
                      f"C_out={c.out_channels} (per output channel)")
        wlo, whi = INT_RANGES[self.w_dtype]
        if any(not wlo <= z <= whi for z in wz):
            _fail(f"w_zero_point={wz} must lie in [{wlo}, {whi}] ({self.w_dtype})")
        s(self, "w_scale", ws)
        s(self, "w_zero_point", wz)
        if self.output == "int32":
            if self.y_scale is not None or self.clamp is not None:
                _fail("output='int32' is the bare accumulator: y_scale and clamp must be None")
        else:
            s(self, "y_scale", _scale("y_scale", self.y_scale))
            olo, ohi = INT_RANGES[self.output]
            if not (isinstance(self.y_zero_point, int) and olo <= self.y_zero_point <= ohi):
                _fail(f"y_zero_point={self.y_zero_point!r} must be an int in [{olo}, {ohi}] ({self.output})")
            if self.clamp is not None:
                cl = tuple(int(v) for v in self.clamp)
                if len(cl) != 2 or not olo <= cl[0] <= cl[1] <= ohi:
                    _fail(f"clamp={self.clamp!r} must be (lo, hi) with {olo} <= lo <= hi <= {ohi}")
                s(self, "clamp", cl)

    # -- derived ---------------------------------------------------------------------
    def __getattr__(self, name):
        # the geometry's attributes (ndim, groups, padding, y_shape, ...) read through, so
        # coverage, causes and witnesses treat a quantized spec like a ConvSpec
        if name.startswith("__") or name == "conv":
            raise AttributeError(name)
        return getattr(self.conv, name)

    @property
    def dtype(self) -> str:
        """The formats in one word, e.g. ``uint8*int8->int8`` (for coverage and scope)."""
        return f"{self.x_dtype}*{self.w_dtype}->{self.output}"

    @property
    def per_channel(self) -> bool:
        return len(self.w_scale) > 1 or len(self.w_zero_point) > 1

    @property
    def requantized(self) -> bool:
        return self.output != "int32"

    @property
    def channel_axis(self) -> int:
        """The output channel axis of x and y: 1 (channels first) or -1 (channels last)."""
        return -1 if self.conv.layout == "channels_last" else 1

    def channel_shape(self) -> tuple:
        """The shape that broadcasts one value per output channel over y."""
        nd = self.conv.ndim
        return (1,) * (nd + 1) + (-1,) if self.channel_axis == -1 else (1, -1) + (1,) * nd

    def channel(self, values: tuple) -> list:
        """A per-tensor or per-output-channel tuple as one value per output channel."""
        return list(values) * self.conv.out_channels if len(values) == 1 else list(values)

    def out_range(self) -> tuple[int, int]:
        """The range the output may take: the clamp, else the output format's range."""
        return self.clamp if self.clamp is not None else INT_RANGES[self.output]

    def describe(self) -> str:
        q = (f"x {self.x_dtype} s={self.x_scale:.9g} zp={self.x_zero_point}, w {self.w_dtype} "
             f"{'per-channel' if self.per_channel else 'per-tensor'}, bias {self.bias}, out {self.output}")
        if self.requantized:
            q += f" s={self.y_scale:.9g} zp={self.y_zero_point}"
            if self.clamp is not None:
                q += f" clamp={list(self.clamp)}"
        geometry = self.conv.describe()
        if geometry.endswith(f" {self.conv.dtype}"):       # the geometry's dtype is not used
            geometry = geometry[: -len(self.conv.dtype) - 1]
        return f"{geometry}; {q}"

    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["conv"] = self.conv.to_dict()
        for k in ("w_scale", "w_zero_point", "clamp"):
            if d[k] is not None:
                d[k] = list(d[k])
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "QuantSpec":
        known = {f.name for f in fields(cls)}
        extra = sorted(set(d) - known)
        if extra:
            _fail(f"unknown field(s) {extra}; known fields are {sorted(known)}")
        kw = dict(d)
        kw["conv"] = ConvSpec.from_dict(kw["conv"])
        for k in ("w_scale", "w_zero_point", "clamp"):
            if kw.get(k) is not None:
                kw[k] = tuple(kw[k])
        return cls(**kw)

    def replace(self, **changes) -> "QuantSpec":
        return replace(self, **changes)


def worst_sum(spec: QuantSpec) -> int:
    """The largest |accumulator| any values of this spec can produce: the accumulation
    length times the largest |x - x_zp| times the largest |w - w_zp|, plus the largest
    int32 bias (the bias is not counted: it is drawn within the headroom left)."""
    xlo, xhi = INT_RANGES[spec.x_dtype]
    wlo, whi = INT_RANGES[spec.w_dtype]
    dx = max(xhi - spec.x_zero_point, spec.x_zero_point - xlo)
    dw = max(max(whi - z, z - wlo) for z in spec.w_zero_point)
    n = (spec.conv.in_channels // spec.conv.groups) * math.prod(spec.conv.kernel_size)
    return n * dx * dw


@dataclass(frozen=True)
class QuantCapabilities:
    """What an adapter claims about its quantized pass (``Capabilities.quant``).

    ``model`` is the requantization model it follows (``exact``: real multiplier,
    round half to even; ``fixed_point``: a Q31 multiplier and a rounding right shift;
    ``float32``: the multiplier and product in float32). ``max_sum`` is the largest
    |accumulator| it holds exactly (2^31 - 1 for an int32 accumulator): geometries whose
    worst sum exceeds it are refused. ``weight_zero_points`` False claims only
    symmetric weights (every w_zero_point 0). ``output_like_input`` claims requantized
    outputs only in the activations' own format.
    """

    x_dtypes: frozenset = frozenset(X_DTYPES)
    outputs: frozenset = frozenset(OUTPUT_DTYPES)
    bias: frozenset = frozenset(BIAS_KINDS)
    per_channel: bool = True
    weight_zero_points: bool = True
    clamp: bool = True
    model: str = "exact"
    max_sum: int = 2 ** 31 - 1
    #: the layouts of x, w and y handled (geometry/spec.py LAYOUTS; channels first alone
    #: unless the kernel takes channels-last arrays)
    layouts: frozenset = frozenset({"channels_first"})
    #: forward and/or transposed quantized convolution (DIRECTIONS)
    directions: frozenset = frozenset({"forward"})
    #: a requantized output has the activations' format (uint8 -> uint8, int8 -> int8)
    output_like_input: bool = False

    def __post_init__(self):
        s = object.__setattr__
        for name, allowed in (("x_dtypes", X_DTYPES), ("outputs", OUTPUT_DTYPES), ("bias", BIAS_KINDS),
                              ("layouts", LAYOUTS), ("directions", DIRECTIONS)):
            v = getattr(self, name)
            items = frozenset((v,) if isinstance(v, str) else v)
            bad = sorted(items - set(allowed))
            if bad:
                raise SpecError(f"QuantCapabilities: {name}={sorted(items)} has unknown entries {bad}; "
                                f"expected a subset of {list(allowed)}")
            s(self, name, items)
        if self.model not in REQUANT_MODELS:
            raise SpecError(f"QuantCapabilities: model={self.model!r}; expected one of {REQUANT_MODELS}")
        if not isinstance(self.max_sum, int) or self.max_sum < 1:
            raise SpecError(f"QuantCapabilities: max_sum={self.max_sum!r} must be a positive int")

    def refusal(self, spec: QuantSpec) -> str | None:
        """Why ``spec`` is outside the quantized claim, or None."""
        if spec.x_dtype not in self.x_dtypes:
            return f"x_dtype={spec.x_dtype} not in x_dtypes={sorted(self.x_dtypes)}"
        direction = "transposed" if spec.conv.transposed else "forward"
        if direction not in self.directions:
            return f"a {direction} convolution but directions={sorted(self.directions)}"
        if spec.conv.layout not in self.layouts:
            return f"layout={spec.conv.layout} not in layouts={sorted(self.layouts)}"
        if spec.output not in self.outputs:
            return f"output={spec.output} not in outputs={sorted(self.outputs)}"
        if self.output_like_input and spec.requantized and spec.output != spec.x_dtype:
            return f"output={spec.output} differs from x_dtype={spec.x_dtype} but output_like_input=True"
        if spec.bias not in self.bias:
            return f"bias={spec.bias} not in bias={sorted(self.bias)}"
        if spec.per_channel and not self.per_channel:
            return "per-channel weight parameters but per_channel=False"
        if any(spec.w_zero_point) and not self.weight_zero_points:
            return f"w_zero_point={list(spec.w_zero_point)} but weight_zero_points=False (symmetric only)"
        if spec.clamp is not None and not self.clamp:
            return "a clamp range but clamp=False"
        if worst_sum(spec) > self.max_sum:
            return f"worst accumulator sum {worst_sum(spec)} exceeds max_sum={self.max_sum}"
        return None

    def admits(self, spec: QuantSpec) -> bool:
        return self.refusal(spec) is None

    def to_dict(self) -> dict:
        return {f.name: (sorted(getattr(self, f.name)) if isinstance(getattr(self, f.name), frozenset)
                         else getattr(self, f.name)) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: dict) -> "QuantCapabilities":
        known = {f.name for f in fields(cls)}
        extra = sorted(set(d) - known)
        if extra:
            raise SpecError(f"QuantCapabilities: unknown field(s) {extra}; known fields are {sorted(known)}")
        return cls(**d)

    def summary(self) -> str:
        return (f"quantized x={','.join(sorted(self.x_dtypes))} w=int8 out={','.join(sorted(self.outputs))} "
                f"model={self.model}{' per-channel' if self.per_channel else ''}"
                + ("" if self.layouts == {"channels_first"} else f" layouts={','.join(sorted(self.layouts))}")
                + ("" if self.directions == {"forward"} else f" directions={','.join(sorted(self.directions))}"))
