"""Derived rounding-error bounds.

A correct implementation that sums ``n`` products in any order, rounding each
operation to nearest with unit roundoff ``u``, obeys componentwise

    |y_hat - y| <= gamma_n * (|x| * |w|),      gamma_n = n u / (1 - n u)

(Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., SIAM 2002,
Lemma 3.1 and §3.1, eq. 3.4/3.5), where ``|x| * |w|`` is the same convolution
applied to absolute values. convwitness composes this from the adapter's declared
:class:`ErrorModel`:

* operands read in a narrower format (a tf32-like mode) contribute ``(1 + u_in)^2``
  per product;
* products formed in format P contribute ``(1 + u_p)``, and none when the product
  of two operands is exact in P (``2 p_operand <= p_P``: bfloat16 x bfloat16 in
  float32, for example);
* ``n - 1`` additions (``n`` with a bias) in the accumulation format contribute
  ``(1 + gamma_{n-1}(u_acc))``; with one precision throughout this is ``gamma_n``;
* the final rounding to the output format adds ``u_out |y|`` and scales the rest by
  ``(1 + u_out)``;
* the float64 reference is itself rounded: ``gamma_n(2**-53)`` of the magnitude is
  added so that float64 implementations are judged fairly;
* gradual underflow: each rounded product may lose half the smallest subnormal of
  its format, and so may the final rounding.

Bias gradients are pure sums (no products): ``gamma_{n-1}(u_acc) * sum |g|``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from ..errors import FormatError
from ..geometry.formats import FORMATS, get_format
from . import fastbounds
from .gamma import U64, gamma

__all__ = ["ErrorModel", "Bound", "derive", "ALGORITHMS"]

ALGORITHMS = ("direct", "winograd", "fft")


def _fmt_u(u: float) -> str:
    if u == 0:
        return "0"
    e = math.log2(u)
    return f"2^{int(e)}" if e == int(e) else f"{u:.3g}"


@dataclass(frozen=True)
class ErrorModel:
    """How an implementation rounds, as its adapter declares it.

    Formats are names from :mod:`convwitness.geometry.formats`; ``None`` means "the dtype of
    the case". ``algorithm`` names the summation family: ``direct`` covers direct
    loops, im2col/GEMM and any summation order; ``winograd`` and ``fft`` are fast
    algorithms whose errors the componentwise bound does not cover.
    """

    accumulate: str | None = None
    product: str | None = None
    operand: str | None = None
    output: str | None = None
    algorithm: str = "direct"
    block: int | None = None
    tile: int | None = None
    bias_add: str | None = None
    note: str = ""

    def __post_init__(self):
        for name in ("accumulate", "product", "operand", "output", "bias_add"):
            v = getattr(self, name)
            if v is not None and v not in FORMATS:
                raise FormatError(f"ErrorModel: {name}={v!r} is not a known format; expected one "
                                  f"of {', '.join(FORMATS)} or None (the case's dtype)")
        if self.algorithm not in ALGORITHMS:
            raise FormatError(f"ErrorModel: algorithm={self.algorithm!r}; expected one of "
                              f"{', '.join(ALGORITHMS)}")
        if self.block is not None and (not isinstance(self.block, int) or self.block < 1):
            raise FormatError(f"ErrorModel: block={self.block!r} must be a positive int or None")
        if self.tile is not None and self.tile not in (2, 4):
            raise FormatError(f"ErrorModel: tile={self.tile!r}; Winograd F(m,3) is modelled for m = 2 or 4")

    def resolve(self, dtype: str) -> "ResolvedModel":
        acc = self.accumulate or dtype
        return ResolvedModel(
            dtype=dtype,
            operand=self.operand or dtype,
            product=self.product or acc,
            accumulate=acc,
            output=self.output or dtype,
            algorithm=self.algorithm,
            block=self.block,
        )

    def to_dict(self) -> dict:
        return {"accumulate": self.accumulate, "product": self.product, "operand": self.operand,
                "output": self.output, "algorithm": self.algorithm, "block": self.block,
                "tile": self.tile, "bias_add": self.bias_add, "note": self.note}

    @classmethod
    def from_dict(cls, d: dict) -> "ErrorModel":
        return cls(**{k: d.get(k) for k in ("accumulate", "product", "operand", "output", "block",
                                             "tile", "bias_add")},
                   algorithm=d.get("algorithm", "direct"), note=d.get("note", "") or "")

    def describe(self, dtype: str | None = None) -> str:
        if dtype is not None:
            r = self.resolve(dtype)
            s = (f"{r.algorithm}: operands {r.operand}, products {r.product}, "
                 f"accumulate {r.accumulate}, output {r.output}")
        else:
            s = (f"{self.algorithm}: operands {self.operand or 'dtype'}, products "
                 f"{self.product or self.accumulate or 'dtype'}, accumulate "
                 f"{self.accumulate or 'dtype'}, output {self.output or 'dtype'}")
        if self.block:
            s += f", blocks of {self.block}"
        if self.tile:
            s += f", F({self.tile},3)"
        if self.bias_add:
            s += f", bias added after rounding, in {self.bias_add}"
        return s


@dataclass(frozen=True)
class ResolvedModel:
    dtype: str
    operand: str
    product: str
    accumulate: str
    output: str
    algorithm: str
    block: int | None

    @property
    def operand_precision(self) -> int:
        return min(get_format(self.operand).precision, get_format(self.dtype).precision)

    @property
    def u_in(self) -> float:
        """Rounding of operands read in a narrower format than they are stored in."""
        op, dt = get_format(self.operand), get_format(self.dtype)
        return op.u if op.precision < dt.precision else 0.0

    @property
    def u_p(self) -> float:
        """Rounding of one product; 0 when two operands multiply exactly."""
        p = get_format(self.product)
        return 0.0 if 2 * self.operand_precision <= p.precision else p.u

    @property
    def u_acc(self) -> float:
        return get_format(self.accumulate).u

    @property
    def u_out(self) -> float:
        return get_format(self.output).u

    def exact_limit(self) -> float:
        """Integer data whose magnitude sums stay at or below this are summed exactly."""
        if self.algorithm != "direct":
            return 0.0
        p = min(get_format(self.product).precision if self.u_p else 10 ** 6,
                get_format(self.accumulate).precision, get_format(self.output).precision,
                self.operand_precision)
        return float(2 ** p)


@dataclass(frozen=True)
class Bound:
    """A per-element bound on ``|actual - reference|`` and how it was built."""

    pass_: str
    n: int
    coefficient: float          # c in  c*|mag| + u_out*|y| + absolute
    u_out: float
    absolute: float
    values: np.ndarray = field(repr=False, compare=False)
    magnitude: np.ndarray | None = field(default=None, repr=False, compare=False)
    explanation: str = ""
    exact_limit: float = 0.0
    vacuous: bool = False
    overflow: np.ndarray | None = field(default=None, repr=False, compare=False)

    def explain(self) -> str:
        """One line: how the bound was built."""
        return self.explanation


def _inner_coefficient(m: ResolvedModel, n_add: int, products: bool,
                       block_terms: int | None = None) -> tuple[float, str]:
    """Relative error coefficient e of one accumulated element, and its description."""
    u_acc = m.u_acc
    if block_terms:
        # Blocked accumulation: each block of `block_terms` terms summed (block_terms-1
        # additions), then the partial sums of the n_blocks blocks summed (n_blocks-1).
        nb = -(-(n_add + 1) // block_terms)
        adds = (min(block_terms, n_add + 1) - 1) + (nb - 1)
        acc_desc = f"{nb} block(s) of {block_terms} terms: {adds} additions"
    else:
        adds = n_add
        acc_desc = None
    u_in2 = (1 + m.u_in) ** 2 - 1 if products else m.u_in
    u_p = m.u_p if products else 0.0
    if products and u_in2 == 0 and u_p == u_acc and not block_terms:
        n = adds + 1
        return gamma(n, u_acc), f"γ_{n} at u={_fmt_u(u_acc)}"
    if not products and m.u_in == 0 and not block_terms:
        return gamma(adds, u_acc), f"γ_{adds} at u={_fmt_u(u_acc)} (sums only)"
    e = (1 + u_in2) * (1 + u_p) * (1 + gamma(adds, u_acc)) - 1
    parts = []
    if u_in2:
        parts.append(f"operands read as {m.operand} (u={_fmt_u(m.u_in)})")
    if products:
        parts.append("exact products" if u_p == 0 else f"products rounded at u={_fmt_u(u_p)}")
    parts.append(f"γ_{adds} at u={_fmt_u(u_acc)}" + (f" ({acc_desc})" if acc_desc else ""))
    return e, ", ".join(parts)


def derive(spec, model: ErrorModel, pass_: str, magnitude, reference, *,
           with_bias: bool = False, arrays: dict | None = None) -> Bound:
    """Bound on ``|actual - reference|`` for every element of one pass.

    ``magnitude`` is the pass applied to absolute values (``reference.*_magnitude``),
    ``reference`` the float64 result, ``with_bias`` whether a bias joins the sum
    (forward pass only). Fast-algorithm models (winograd, fft) need the operands in
    ``arrays`` (x, w, b).
    """
    m = model.resolve(spec.dtype)
    if model.bias_add and with_bias and arrays is not None and arrays.get("b") is not None:
        return _bias_after(spec, model, pass_, magnitude, reference, arrays)
    if m.algorithm != "direct":
        fast = _fast(spec, model, m, pass_, magnitude, reference, arrays)
        if fast is not None:
            return fast
        m = ErrorModel(accumulate=model.accumulate, product=model.product, operand=model.operand,
                       output=model.output).resolve(spec.dtype)
    n, coeff, u_out, absolute, vacuous, explanation, exact_limit = _setup(spec, m, pass_, with_bias)
    mag = np.asarray(magnitude, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        values = coeff * mag + u_out * np.abs(ref) + absolute
        if vacuous:
            values = np.where(mag == 0, u_out * np.abs(ref) + absolute, np.inf)
    return Bound(pass_=pass_, n=n, coefficient=coeff, u_out=u_out, absolute=absolute,
                 values=values, magnitude=mag, explanation=explanation, exact_limit=exact_limit,
                 vacuous=vacuous)


@lru_cache(maxsize=1024)
def _setup(spec, m: ResolvedModel, pass_: str, with_bias: bool) -> tuple:
    """The scalars of a direct-summation bound: (n, coefficient, u_out, absolute, vacuous,
    explanation, exact_limit). A function of the geometry, the resolved model and the pass
    alone, so computed once per geometry (an invariant derives several bounds per example)."""
    n = spec.accumulation_length("forward" if pass_ == "transposed" else pass_)
    products = pass_ != "grad_bias"
    terms = n + (1 if with_bias else 0)
    n_add = max(terms - 1, 0)
    block_terms = None
    if m.block:
        # channels per partial sum (times the taps) for forward and input gradient;
        # output positions per partial sum for the weight and bias gradients
        block_terms = m.block * (spec.taps if pass_ in ("forward", "transposed", "grad_input") else 1)
    e, desc = _inner_coefficient(m, n_add, products, block_terms)
    ref_e = gamma(terms, U64)
    u_out = m.u_out
    coeff = (1 + u_out) * (e + 2 * ref_e) * (1 + ref_e)
    out_fmt = get_format(m.output)
    # Gradual underflow: a rounding below the normal range errs by at most half the
    # smallest subnormal (rounded up to a whole one, so float64's does not vanish).
    absolute = out_fmt.smallest_subnormal
    if products and m.u_p:
        absolute += max(n / 2, 1) * get_format(m.product).smallest_subnormal * (1 + u_out)
    vacuous = not math.isfinite(e)
    explanation = (f"{desc} on {_mag_name(pass_)}, plus output rounding u={_fmt_u(u_out)} "
                   f"({m.output}) and the float64 reference's γ_{terms}")
    if vacuous:
        explanation = (f"vacuous: {desc} has n·u >= 1, so the worst-case bound says nothing; "
                       "declare a blocked-accumulation model (ErrorModel.block) to get a usable one")
    return n, coeff, u_out, absolute, vacuous, explanation, m.exact_limit()


def _bias_after(spec, model, pass_, magnitude, reference, arrays) -> Bound:
    """The convolution rounded to the output first, then the bias added in ``bias_add``:
    |y_hat - y| <= (1 + u_b) B_conv + u_b |y|."""
    from dataclasses import replace as _replace
    b = np.abs(np.asarray(arrays["b"], dtype=np.float64))
    shape = (-1,) if spec.layout == "channels_last" else (-1,) + (1,) * spec.ndim
    braw = np.asarray(arrays["b"], dtype=np.float64).reshape(shape)
    ref = np.asarray(reference, dtype=np.float64)
    conv = derive(spec, _replace(model, bias_add=None), pass_,
                  np.asarray(magnitude, dtype=np.float64) - b.reshape(shape), ref - braw,
                  with_bias=False, arrays={**arrays, "b": None})
    fb = get_format(model.bias_add)
    values = (1 + fb.u) * conv.values + fb.u * np.abs(ref) + fb.smallest_subnormal
    return _replace(conv, values=values, magnitude=np.asarray(magnitude, dtype=np.float64),
                    coefficient=conv.coefficient * (1 + fb.u),
                    explanation=conv.explanation + f"; then the bias added in {model.bias_add} "
                                                   f"(u={_fmt_u(fb.u)})")


def _fast(spec, model, m, pass_, magnitude, reference, arrays):
    if arrays is None:
        raise FormatError(f"derive: the {m.algorithm} model needs the operands; pass arrays={{x, w, b}}")
    if pass_ == "transposed" or spec.transposed:
        return None                          # fast paths cover the convolution itself
    got = fastbounds.fast_bound(spec, model, pass_, arrays["x"], arrays["w"], arrays.get("b"), reference)
    if got is None:
        return None
    values, coeff, mag, overflow, under, desc = got
    n = spec.accumulation_length("forward")
    terms = n + (1 if arrays.get("b") is not None else 0)
    ref_e = gamma(terms, U64)
    u_out = m.u_out
    ref = np.abs(np.asarray(reference, dtype=np.float64))
    out_fmt = get_format(m.output)
    mag_ref = np.asarray(magnitude, dtype=np.float64)
    absolute = out_fmt.smallest_subnormal + under
    total = (1 + u_out) * values + u_out * ref + 2 * ref_e * mag_ref + absolute
    return Bound(pass_=pass_, n=n, coefficient=coeff * (1 + u_out), u_out=u_out,
                 absolute=absolute, values=total, magnitude=mag,
                 explanation=f"{desc}, plus output rounding u={_fmt_u(u_out)} ({m.output}) and the "
                             f"float64 reference's γ_{terms}", exact_limit=0.0, overflow=overflow)


def _mag_name(pass_: str) -> str:
    return {"forward": "|x|⋆|w|", "transposed": "|x|⋆ᵀ|w|", "grad_input": "|g|⋆ᵀ|w|",
            "grad_weight": "|x|⋆|g|", "grad_bias": "Σ|g|"}.get(pass_, "the magnitudes")
