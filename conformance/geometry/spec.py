"""ConvSpec: the frozen, validated geometry of one convolution.

Per spatial axis with input length ``L``, kernel ``k``, stride ``s``, dilation ``d``
and padding ``(p_lo, p_hi)``, the effective kernel is ``e = d(k-1) + 1`` and

* convolution:  ``L_out = floor((L + p_lo + p_hi - e) / s) + 1``
  (Dumoulin & Visin 2016, arXiv:1603.07285, Relationship 15 with ``2p`` split into
  ``p_lo + p_hi``);
* transposed:   ``L_out = s(L - 1) + e + a - (p_lo + p_hi)`` with ``a`` the output
  padding (their Relationship 14, ``k`` replaced by ``e``).

Accumulation lengths (terms of the inner product behind one output element) are
``C_in/G * prod(k)`` for the forward pass, ``C_out/G * prod(k)`` for the input
gradient and ``N * prod(L_out)`` for the weight and bias gradients.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, fields, replace
from typing import Any

from ..errors import SpecError
from .formats import STORAGE_FORMATS

__all__ = ["ConvSpec", "LAYOUTS", "PASSES"]

LAYOUTS = ("channels_first", "channels_last")
PASSES = ("forward", "grad_input", "grad_weight", "grad_bias")


def _fail(msg: str):
    raise SpecError(f"ConvSpec: {msg}")


def _int(name: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        try:
            import numpy as np
            if isinstance(value, np.integer):
                value = int(value)
            else:
                raise TypeError
        except TypeError:
            _fail(f"{name}={value!r} must be an int >= {low}")
    if value < low:
        _fail(f"{name}={value!r} must be >= {low}")
    return int(value)


def _axes(name: str, value: Any, ndim: int, low: int) -> tuple[int, ...]:
    if isinstance(value, int) and not isinstance(value, bool):
        value = (value,) * ndim
    try:
        items = tuple(value)
    except TypeError:
        _fail(f"{name}={value!r} must be an int or a tuple of {ndim} ints")
    if len(items) != ndim:
        _fail(f"{name}={value!r} has {len(items)} entries but input_size has {ndim} axes; "
              f"give one per spatial axis")
    return tuple(_int(f"{name}[{i}]", v, low) for i, v in enumerate(items))


def _padding(value: Any, ndim: int) -> tuple[tuple[int, int], ...]:
    """int -> same on every side; ndim ints -> symmetric per axis; ndim pairs."""
    if isinstance(value, int) and not isinstance(value, bool):
        return ((int(value), int(value)),) * ndim
    try:
        items = tuple(value)
    except TypeError:
        _fail(f"padding={value!r} must be an int, {ndim} ints or {ndim} (before, after) pairs")
    if len(items) != ndim:
        _fail(f"padding={value!r} has {len(items)} entries but input_size has {ndim} axes; "
              "give one int or one (before, after) pair per spatial axis")
    out = []
    for i, item in enumerate(items):
        if isinstance(item, int) and not isinstance(item, bool):
            out.append((int(item), int(item)))
            continue
        try:
            lo, hi = item
        except (TypeError, ValueError):
            _fail(f"padding[{i}]={item!r} must be an int or a (before, after) pair")
        out.append((_int(f"padding[{i}][0]", lo, -(1 << 62)), _int(f"padding[{i}][1]", hi, -(1 << 62))))
    return tuple(out)


@dataclass(frozen=True)
class ConvSpec:
    """Geometry of one convolution (or transposed convolution).

    Arrays that go with it, channels first (``layout="channels_first"``):
    x ``(batch, in_channels, *input_size)``, w ``(out_channels, in_channels/groups,
    *kernel_size)``, b ``(out_channels,)``, y and the upstream gradient
    ``(batch, out_channels, *output_size)``. With ``layout="channels_last"`` the
    channel axis moves to the end: x ``(N, *S, C_in)``, w ``(C_out, *K, C_in/G)``.
    For ``transposed=True``, w is ``(in_channels, out_channels/groups, *K)``.

    ``stride``, ``dilation`` and ``output_padding`` accept an int (every axis) or one
    int per axis; ``padding`` an int, one int per axis (both sides) or one
    ``(before, after)`` pair per axis. Negative padding crops the input.
    """

    batch: int
    in_channels: int
    out_channels: int
    input_size: tuple[int, ...]
    kernel_size: tuple[int, ...]
    stride: tuple[int, ...] = 1
    padding: tuple[tuple[int, int], ...] = 0
    dilation: tuple[int, ...] = 1
    groups: int = 1
    bias: bool = True
    dtype: str = "float32"
    layout: str = "channels_first"
    transposed: bool = False
    output_padding: tuple[int, ...] = 0

    # -- validation ------------------------------------------------------------
    def __post_init__(self):
        set_ = object.__setattr__
        try:
            size = tuple(self.input_size)
        except TypeError:
            size = None
        if size is None or not 1 <= len(size) <= 3:
            _fail(f"input_size={self.input_size!r} must be a tuple of 1 to 3 spatial sizes")
        ndim = len(size)
        set_(self, "input_size", _axes("input_size", size, ndim, 0))
        set_(self, "kernel_size", _axes("kernel_size", self.kernel_size, ndim, 1))
        set_(self, "stride", _axes("stride", self.stride, ndim, 1))
        set_(self, "dilation", _axes("dilation", self.dilation, ndim, 1))
        set_(self, "output_padding", _axes("output_padding", self.output_padding, ndim, 0))
        set_(self, "padding", _padding(self.padding, ndim))
        for name in ("batch", "in_channels", "out_channels"):
            set_(self, name, _int(name, getattr(self, name), 0))
        set_(self, "groups", _int("groups", self.groups, 1))
        for name in ("bias", "transposed"):
            if not isinstance(getattr(self, name), bool):
                _fail(f"{name}={getattr(self, name)!r} must be True or False")
        if self.dtype not in STORAGE_FORMATS:
            _fail(f"dtype={self.dtype!r} is not a storage format; expected one of "
                  f"{', '.join(STORAGE_FORMATS)}")
        if self.layout not in LAYOUTS:
            _fail(f"layout={self.layout!r}; expected one of {', '.join(LAYOUTS)}")
        g = self.groups
        for name in ("in_channels", "out_channels"):
            c = getattr(self, name)
            if c % g:
                divisors = [i for i in range(1, max(self.in_channels, self.out_channels, 1) + 1)
                            if self.in_channels % i == 0 and self.out_channels % i == 0]
                _fail(f"groups={g} does not divide {name}={c}; choose groups among the common "
                      f"divisors of in_channels and out_channels {divisors}")
        if self.transposed:
            self._check_transposed()
        else:
            self._check_forward()

    def _check_forward(self):
        if any(self.output_padding):
            _fail(f"output_padding={self.output_padding} is only meaningful with transposed=True; "
                  "set it to 0")
        for i, (L, k, d, (lo, hi)) in enumerate(zip(self.input_size, self.kernel_size,
                                                    self.dilation, self.padding)):
            if lo < -L or hi < -L or lo + hi < -L:
                _fail(f"padding[{i}]=({lo}, {hi}) crops more than input_size[{i}]={L}; "
                      "negative padding may remove at most the whole axis")
            e = d * (k - 1) + 1
            if L + lo + hi < e:
                _fail(f"kernel wider than the padded input on axis {i}: effective kernel "
                      f"dilation*(kernel_size-1)+1={e} > input_size+padding={L}+{lo}+{hi}={L + lo + hi}; "
                      "enlarge input_size or padding, or shrink kernel_size or dilation")

    def _check_transposed(self):
        for i, (L, s, d, op, (lo, hi)) in enumerate(zip(self.input_size, self.stride, self.dilation,
                                                       self.output_padding, self.padding)):
            if lo < 0 or hi < 0:
                _fail(f"padding[{i}]=({lo}, {hi}) is negative; a transposed convolution takes "
                      "padding >= 0 (it crops the output)")
            if L < 1:
                _fail(f"input_size[{i}]={L}: a transposed convolution needs input_size >= 1")
            if op >= max(s, d):
                _fail(f"output_padding[{i}]={op} must be smaller than max(stride, dilation)="
                      f"{max(s, d)} on that axis; lower output_padding or raise the stride")
        for i, o in enumerate(self.output_size):
            if o < 1:
                _fail(f"transposed output size {o} < 1 on axis {i}: padding "
                      f"{self.padding[i]} crops away the whole output; lower the padding")

    # -- derived geometry --------------------------------------------------------
    @property
    def ndim(self) -> int:
        """Number of spatial axes (1 to 3)."""
        return len(self.input_size)

    @property
    def effective_kernel(self) -> tuple[int, ...]:
        """``d(k-1)+1`` per axis."""
        return tuple(d * (k - 1) + 1 for k, d in zip(self.kernel_size, self.dilation))

    @property
    def output_size(self) -> tuple[int, ...]:
        """Spatial size of y (Relationship 15 / 14 of Dumoulin & Visin 2016)."""
        out = []
        for L, e, s, (lo, hi), op in zip(self.input_size, self.effective_kernel, self.stride,
                                          self.padding, self.output_padding):
            if self.transposed:
                out.append(s * (L - 1) + e + op - lo - hi)
            else:
                out.append((L + lo + hi - e) // s + 1)
        return tuple(out)

    @property
    def remainder(self) -> tuple[int, ...]:
        """``(L + p_lo + p_hi - e) mod s`` per axis: trailing inputs no window covers."""
        if self.transposed:
            return tuple(0 for _ in self.input_size)
        return tuple((L + lo + hi - e) % s for L, e, s, (lo, hi)
                     in zip(self.input_size, self.effective_kernel, self.stride, self.padding))

    @property
    def taps(self) -> int:
        return math.prod(self.kernel_size)

    def _shape(self, channels: int, size: tuple[int, ...]) -> tuple[int, ...]:
        if self.layout == "channels_last":
            return (self.batch, *size, channels)
        return (self.batch, channels, *size)

    @property
    def x_shape(self) -> tuple[int, ...]:
        return self._shape(self.in_channels, self.input_size)

    @property
    def y_shape(self) -> tuple[int, ...]:
        return self._shape(self.out_channels, self.output_size)

    @property
    def w_shape(self) -> tuple[int, ...]:
        if self.transposed:
            lead, per_group = self.in_channels, self.out_channels // self.groups
        else:
            lead, per_group = self.out_channels, self.in_channels // self.groups
        if self.layout == "channels_last":
            return (lead, *self.kernel_size, per_group)
        return (lead, per_group, *self.kernel_size)

    @property
    def b_shape(self) -> tuple[int, ...] | None:
        return (self.out_channels,) if self.bias else None

    def accumulation_length(self, pass_: str = "forward") -> int:
        """Products summed into one element of the named pass (bias not counted).

        forward (and the transposed forward): C_in/G * prod(k); grad_input:
        C_out/G * prod(k); grad_weight and grad_bias: N * prod(output_size).
        """
        if pass_ == "forward":
            return self.in_channels // self.groups * self.taps
        if pass_ == "grad_input":
            return self.out_channels // self.groups * self.taps
        if pass_ in ("grad_weight", "grad_bias"):
            return self.batch * math.prod(self.output_size)
        raise SpecError(f"accumulation_length: pass_={pass_!r}; expected one of {', '.join(PASSES)}")

    def matching_conv(self) -> "ConvSpec":
        """For a transposed spec: the convolution whose input gradient it computes.

        Its input size is this spec's output size and its in/out channels are swapped.
        """
        if not self.transposed:
            raise SpecError("matching_conv: spec is not transposed; set transposed=True")
        return replace(self, in_channels=self.out_channels, out_channels=self.in_channels,
                       input_size=self.output_size, transposed=False,
                       output_padding=(0,) * self.ndim)

    def flops(self, pass_: str = "forward") -> int:
        """Multiply-adds times two for one pass (for benchmarks)."""
        per_out = 2 * self.accumulation_length("forward")
        if self.transposed:
            return 2 * self.batch * self.in_channels * math.prod(self.input_size) * \
                (self.out_channels // self.groups) * self.taps
        return per_out * self.batch * self.out_channels * math.prod(self.output_size)

    # -- serialisation -----------------------------------------------------------
    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["padding"] = [list(p) for p in self.padding]
        for k in ("input_size", "kernel_size", "stride", "dilation", "output_padding"):
            d[k] = list(d[k])
        return d

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data: dict) -> "ConvSpec":
        if not isinstance(data, dict):
            raise SpecError(f"ConvSpec.from_dict: expected a JSON object, got {type(data).__name__}")
        known = {f.name for f in fields(cls)}
        extra = sorted(set(data) - known)
        if extra:
            raise SpecError(f"ConvSpec.from_dict: unknown field(s) {extra}; known fields are "
                            f"{sorted(known)}")
        required = ("batch", "in_channels", "out_channels", "input_size", "kernel_size")
        missing = [n for n in required if n not in data]
        if missing:
            raise SpecError(f"ConvSpec.from_dict: missing field(s) {missing}")
        kwargs = dict(data)
        if "padding" in kwargs and isinstance(kwargs["padding"], list):
            kwargs["padding"] = tuple(tuple(p) if isinstance(p, list) else p for p in kwargs["padding"])
        return cls(**kwargs)

    @classmethod
    def from_json(cls, text: str) -> "ConvSpec":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise SpecError(f"ConvSpec.from_json: not JSON ({exc})") from None
        return cls.from_dict(data)

    def replace(self, **changes) -> "ConvSpec":
        """A copy with some fields changed (validated again)."""
        return replace(self, **changes)

    def __repr__(self) -> str:
        parts = []
        for f in fields(self):
            v = getattr(self, f.name)
            parts.append(f"{f.name}={v!r}")
        return f"ConvSpec({', '.join(parts)})"

    def describe(self) -> str:
        """A compact one-line description for people."""
        t = "convT" if self.transposed else "conv"
        pads = ",".join(f"{lo}/{hi}" for lo, hi in self.padding)
        s = (f"{t}{self.ndim}d N={self.batch} C={self.in_channels}->{self.out_channels} "
             f"S={'x'.join(map(str, self.input_size))} k={'x'.join(map(str, self.kernel_size))} "
             f"s={'x'.join(map(str, self.stride))} p={pads} d={'x'.join(map(str, self.dilation))} "
             f"g={self.groups}")
        if self.transposed:
            s += f" op={'x'.join(map(str, self.output_padding))}"
        s += f" {'bias' if self.bias else 'nobias'} {self.dtype}"
        if self.layout != "channels_first":
            s += f" {self.layout}"
        return s
