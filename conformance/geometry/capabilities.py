"""Capabilities: the part of the geometry space an adapter claims to get right.

A missing declaration means the whole default space: 1-3 spatial axes, float32 and
float64, channels first, every pass the object implements, symmetric and asymmetric (non-negative) padding, any
stride, dilation and groups, with and without bias, zero-size batches, deterministic,
direct summation in the dtype of the case.
"""
from __future__ import annotations

from dataclasses import dataclass, field, fields, replace
from typing import Mapping

from ..numerics.bounds import ErrorModel
from ..errors import SpecError
from .claims import check_constraints, check_per_pass, constraint_refusal, merge_for_passes
from .formats import STORAGE_FORMATS
from .quant import QuantCapabilities
from .spec import LAYOUTS, ConvSpec

__all__ = ["Capabilities", "PADDING_KINDS", "PASS_NAMES", "GRADIENTS", "MODEL_KEYS", "compiles_per_shape"]

PADDING_KINDS = ("symmetric", "asymmetric", "negative")
PASS_NAMES = ("forward", "backward", "transposed", "quantized")
#: the outputs of the backward pass; an error model keyed "dtype/backward" covers all three
GRADIENTS = ("grad_input", "grad_weight", "grad_bias")
#: what may follow "dtype/" in an error_models key (the quantized pass has its own
#: requantization models: geometry/quant.py)
MODEL_KEYS = ("forward", "backward", "transposed") + GRADIENTS


def _frozen(name, value, allowed=None, kind=str):
    if isinstance(value, (str, int)) and not isinstance(value, bool):
        value = (value,)
    try:
        items = frozenset(value)
    except TypeError:
        raise SpecError(f"Capabilities: {name}={value!r} must be a collection") from None
    if allowed is not None:
        bad = sorted(str(v) for v in items if v not in allowed)
        if bad:
            raise SpecError(f"Capabilities: {name}={sorted(map(str, items))} has unknown "
                            f"entries {bad}; expected a subset of {list(allowed)}")
    return items


@dataclass(frozen=True)
class Capabilities:
    """What an adapter claims. ``admits(spec)`` says whether a geometry is claimed.

    ``error_models`` maps a dtype, or ``"dtype/pass"`` (a pass: forward, backward,
    transposed; or one output of the backward pass: grad_input, grad_weight, grad_bias),
    optionally followed by ``/1d``, ``/2d`` or ``/3d``, to its :class:`ErrorModel`; the most
    specific entry wins (``dtype/grad_input/Nd``, ``dtype/grad_input``, ``dtype/backward``,
    ``dtype/Nd``, then ``dtype``), and ``error_model`` covers the rest. ``passes=None`` (the
    default) means every pass the object implements (its ``forward``, ``backward`` and
    ``transposed`` methods); a set excludes the implemented passes it leaves out, and the
    loader records those in ``unclaimed_passes`` (implemented, not claimed: untested).
    ``per_pass`` and ``constraints`` narrow the claims by pass and by named constraint
    (geometry/claims.py). ``max_elements`` caps the number of elements of any one array
    (x, w, y). ``ieee_special`` claims IEEE-754 propagation of NaN and infinities.
    ``zero_spatial`` claims inputs with a zero-size spatial axis (every window then lies in
    the padding); off by default, so that no certificate covers them untested.
    ``compiles_per_shape`` is not a claim but a cost: the port pays for each new call
    signature (a JIT library, an accelerator compiler or emulator). Hypothesis's free
    search then draws fresh values on the covering schedule's geometries instead of fresh
    geometries (run/covering.py); the report says so.
    """

    ndims: frozenset = frozenset({1, 2, 3})
    dtypes: frozenset = frozenset({"float32", "float64"})
    layouts: frozenset = frozenset({"channels_first"})
    padding: frozenset = frozenset({"symmetric", "asymmetric"})
    passes: frozenset | None = None
    stride: bool = True
    dilation: bool = True
    groups: bool = True
    bias: bool = True
    zero_batch: bool = True
    zero_spatial: bool = False
    output_padding: bool = True
    deterministic: bool = True
    ieee_special: bool = False
    compiles_per_shape: bool = False
    max_elements: int | None = None
    error_model: ErrorModel = field(default_factory=ErrorModel)
    error_models: tuple = ()
    #: claims that differ by pass and named constraints (geometry/claims.py)
    per_pass: tuple = ()
    constraints: tuple = ()
    unclaimed_passes: frozenset = frozenset()
    #: the claims of the quantized pass (geometry/quant.py), None without one
    quant: QuantCapabilities | None = None

    def __post_init__(self):
        set_ = object.__setattr__
        set_(self, "ndims", _frozen("ndims", self.ndims, (1, 2, 3)))
        set_(self, "dtypes", _frozen("dtypes", self.dtypes, STORAGE_FORMATS))
        set_(self, "layouts", _frozen("layouts", self.layouts, LAYOUTS))
        set_(self, "padding", _frozen("padding", self.padding, PADDING_KINDS))
        if self.passes is not None:
            set_(self, "passes", _frozen("passes", self.passes, PASS_NAMES))
        set_(self, "unclaimed_passes", _frozen("unclaimed_passes", self.unclaimed_passes, PASS_NAMES))
        em = self.error_models
        if isinstance(em, Mapping):
            em = tuple(sorted(em.items()))
        for item in em:
            if not (isinstance(item, tuple) and len(item) == 2 and isinstance(item[1], ErrorModel)):
                raise SpecError(f"Capabilities: error_models entry {item!r} must be "
                                "(dtype or 'dtype/pass', ErrorModel)")
            _model_key(item[0])
        set_(self, "error_models", tuple(em))
        set_(self, "constraints", check_constraints(self.constraints))
        set_(self, "per_pass", check_per_pass(self.per_pass, PASS_NAMES))
        if isinstance(self.quant, Mapping):
            set_(self, "quant", QuantCapabilities.from_dict(dict(self.quant)))
        if self.quant is not None and not isinstance(self.quant, QuantCapabilities):
            raise SpecError(f"Capabilities: quant={self.quant!r} must be a QuantCapabilities or None")
        if not isinstance(self.error_model, ErrorModel):
            raise SpecError(f"Capabilities: error_model={self.error_model!r} must be an ErrorModel")
        if self.max_elements is not None and (not isinstance(self.max_elements, int) or self.max_elements < 1):
            raise SpecError(f"Capabilities: max_elements={self.max_elements!r} must be a positive int or None")

    def error_model_for(self, dtype: str, pass_: str | None = None,
                        ndim: int | None = None) -> ErrorModel:
        """The most specific entry: dtype/pass/Nd, dtype/pass, for a gradient
        dtype/backward/Nd and dtype/backward, then dtype/Nd, dtype, the default."""
        table = dict(self.error_models)
        nd = f"{ndim}d" if ndim else None
        grad = pass_ in GRADIENTS
        for key in (pass_ and nd and f"{dtype}/{pass_}/{nd}", pass_ and f"{dtype}/{pass_}",
                    grad and nd and f"{dtype}/backward/{nd}", grad and f"{dtype}/backward",
                    nd and f"{dtype}/{nd}", dtype):
            if key and key in table:
                return table[key]
        return self.error_model

    def for_passes(self, passes) -> "Capabilities":
        """The claims shared by every pass in ``passes`` (per_pass applied, constraints
        kept): what an invariant that calls those passes may be judged on."""
        if not self.per_pass:
            return self
        return replace(self, **merge_for_passes(self, passes))

    @property
    def claimed_passes(self) -> frozenset:
        """The passes claimed (``passes=None``, not yet resolved by a loader: all of them)."""
        return frozenset(PASS_NAMES) if self.passes is None else self.passes

    def for_methods(self, implemented) -> "Capabilities":
        """These capabilities for an object implementing the passes ``implemented``:
        ``passes=None`` becomes exactly those; implemented passes the claim leaves out
        are recorded in ``unclaimed_passes``."""
        implemented = frozenset(implemented)
        claimed = implemented if self.passes is None else self.passes
        unclaimed = self.unclaimed_passes | (implemented - claimed)
        return replace(self, passes=claimed, unclaimed_passes=unclaimed)

    def refusal(self, spec: ConvSpec) -> str | None:
        """Why the spec is outside the claimed space, or None when it is admitted."""
        if spec.ndim not in self.ndims:
            return f"ndim={spec.ndim} not in ndims={sorted(self.ndims)}"
        if spec.dtype not in self.dtypes:
            return f"dtype={spec.dtype} not in dtypes={sorted(self.dtypes)}"
        if spec.layout not in self.layouts:
            return f"layout={spec.layout} not in layouts={sorted(self.layouts)}"
        need = "transposed" if spec.transposed else "forward"
        if need not in self.claimed_passes:
            return f"pass {need} not in passes={sorted(self.claimed_passes)}"
        if not self.stride and any(s != 1 for s in spec.stride):
            return f"stride={spec.stride} but stride=False"
        if not self.dilation and any(d != 1 for d in spec.dilation):
            return f"dilation={spec.dilation} but dilation=False"
        if not self.groups and spec.groups != 1:
            return f"groups={spec.groups} but groups=False"
        if not self.bias and spec.bias:
            return "bias=True but bias=False"
        if not self.zero_batch and spec.batch == 0:
            return "batch=0 but zero_batch=False"
        if not self.zero_spatial and 0 in spec.input_size:
            return f"input_size={spec.input_size} has a zero-size axis but zero_spatial=False"
        if not self.output_padding and any(spec.output_padding):
            return f"output_padding={spec.output_padding} but output_padding=False"
        for kind in padding_kinds(spec):
            if kind not in self.padding:
                return f"{kind} padding {spec.padding} not in padding={sorted(self.padding)}"
        if self.constraints:
            why = constraint_refusal(self.constraints, spec)
            if why:
                return why
        if self.per_pass:
            pass_ = "transposed" if spec.transposed else "forward"
            why = self.for_passes({pass_}).refusal(spec)
            if why:
                return f"{pass_} pass: {why}"
        if self.max_elements is not None:
            import math
            biggest = max(math.prod(spec.x_shape), math.prod(spec.w_shape), math.prod(spec.y_shape))
            if biggest > self.max_elements:
                return f"an array of {biggest} elements exceeds max_elements={self.max_elements}"
        return None

    def admits(self, spec: ConvSpec) -> bool:
        """Whether the adapter claims to compute ``spec`` correctly."""
        return self.refusal(spec) is None

    def replace(self, **changes) -> "Capabilities":
        return replace(self, **changes)

    def to_dict(self) -> dict:
        d = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, frozenset):
                v = sorted(v)
            elif isinstance(v, ErrorModel):
                v = v.to_dict()
            elif f.name == "error_models":
                v = {k: m.to_dict() for k, m in v}
            elif f.name == "per_pass":
                v = {p: {k: (sorted(x, key=str) if isinstance(x, tuple) else x) for k, x in claims}
                     for p, claims in v}
            elif f.name == "constraints":
                v = list(v)
            elif f.name == "quant":
                v = None if v is None else v.to_dict()
            d[f.name] = v
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "Capabilities":
        known = {f.name for f in fields(cls)}
        extra = sorted(set(d) - known)
        if extra:
            raise SpecError(f"Capabilities: unknown field(s) {extra}; known fields are {sorted(known)}")
        kw = dict(d)
        if isinstance(kw.get("error_model"), dict):
            kw["error_model"] = ErrorModel.from_dict(kw["error_model"])
        if isinstance(kw.get("error_models"), dict):
            kw["error_models"] = tuple(sorted((k, ErrorModel.from_dict(v))
                                              for k, v in kw["error_models"].items()))
        return cls(**kw)

    def summary(self) -> str:
        """One line for ``convwitness adapters``."""
        flags = [n for n in ("stride", "dilation", "groups", "bias") if getattr(self, n)]
        return (f"{''.join(str(n) for n in sorted(self.ndims))}-D "
                f"{','.join(sorted(self.dtypes, key=STORAGE_FORMATS.index))} "
                f"{'/'.join(sorted(self.layouts))} pad={'+'.join(k for k in PADDING_KINDS if k in self.padding)} "
                f"{'+'.join(flags)} passes={','.join(p for p in PASS_NAMES if p in self.claimed_passes)}"
                + (" (inferred)" if self.passes is None else "")
                + (f"; {self.quant.summary()}" if self.quant is not None else ""))


_MODEL_PASSES = MODEL_KEYS


def _model_key(key: str) -> None:
    """Check an error_models key: dtype, then optionally a pass and/or an ndim (1d-3d)."""
    parts = key.split("/") if isinstance(key, str) else [None]
    dt, rest = parts[0], parts[1:]
    ok = dt in STORAGE_FORMATS and len(rest) <= 2
    if ok and rest:
        nd_ok = rest[-1] in ("1d", "2d", "3d")
        pass_part = rest[:-1] if nd_ok else rest
        ok = len(pass_part) <= 1 and all(p in _MODEL_PASSES for p in pass_part) and \
            (nd_ok or len(rest) == 1)
    if not ok:
        raise SpecError(f"Capabilities: error_models key {key!r}; expected a dtype "
                        f"({', '.join(STORAGE_FORMATS)}), optionally followed by /PASS (one of "
                        f"{', '.join(_MODEL_PASSES)}) and/or /1d, /2d or /3d, e.g. "
                        "'float16/grad_input' or 'float32/forward/3d'")


def padding_kinds(spec: ConvSpec) -> set[str]:
    """The padding kinds a spec uses: symmetric, asymmetric, negative."""
    kinds = set()
    for lo, hi in spec.padding:
        if lo < 0 or hi < 0:
            kinds.add("negative")
        if lo != hi:
            kinds.add("asymmetric")
        elif lo > 0:
            kinds.add("symmetric")
    return kinds


def compiles_per_shape(caps) -> bool:
    """Whether the port pays for each new call signature (``Capabilities.compiles_per_shape``,
    False for capabilities that do not say): its runs keep to the schedules' geometries and
    count signatures (run/covering.py)."""
    return bool(getattr(caps, "compiles_per_shape", False))
