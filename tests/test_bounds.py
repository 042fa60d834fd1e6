"""Derived rounding-error bounds: gamma_n, error models, no false alarms, real detection.

Sources named beside each check:
* Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., SIAM 2002,
  Lemma 3.1 / §3.1 [secondary]: gamma_n = n u / (1 - n u), and an inner product of n
  terms in any order obeys |fl(x^T y) - x^T y| <= gamma_n |x|^T |y|.
* IEEE 754-2019: binary32 has p = 24 (u = 2^-24), binary16 p = 11 (from memory, checked
  against numpy.finfo in test_formats.py).
* SOURCES.md [derived]: gamma_576 in binary32 = 9/262135; products of two binary16 or
  bfloat16 numbers are exact in binary32.
"""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from convwitness import ConvSpec, ErrorModel, FormatError, derive, gamma
from convwitness.numerics import reference as ref

U32, U16, U64 = 2.0 ** -24, 2.0 ** -11, 2.0 ** -53


# -- gamma_n against exact rationals --------------------------------------------------------
def _exact_gamma(n: int, u: float) -> float:
    nu = Fraction(n) * Fraction(u)
    return float(nu / (1 - nu))


@pytest.mark.parametrize("u", [U64, U32, U16, 2.0 ** -8, 2.0 ** -4])
def test_gamma_matches_exact_rationals(u):
    # Higham 2002, Lemma 3.1: gamma_n = n u / (1 - n u); checked in exact arithmetic
    ns = [0, 1, 2, 3, 7, 27, 576, 1000, 4096, 10 ** 6, 2 ** 20 + 1]
    for n in ns:
        if Fraction(n) * Fraction(u) >= 1:
            continue
        exact = _exact_gamma(n, u)
        got = gamma(n, u)
        assert abs(got - exact) <= math.ulp(exact), (n, u, got, exact)


def test_gamma_576_binary32_is_9_over_262135():
    # SOURCES.md [derived]: 576 * 2^-24 / (1 - 576 * 2^-24) = 576 / (2^24 - 576) = 9/262135
    assert Fraction(576, 2 ** 24 - 576) == Fraction(9, 262135)
    exact = float(Fraction(9, 262135))
    assert abs(gamma(576, U32) - exact) <= math.ulp(exact)


def test_gamma_is_inf_when_nu_reaches_one():
    # Higham 2002, Lemma 3.1: gamma_n is defined only for n u < 1
    assert gamma(2 ** 24, U32) == math.inf
    assert gamma(2 ** 24 + 5, U32) == math.inf
    assert gamma(2 ** 11, U16) == math.inf
    assert math.isfinite(gamma(2 ** 24 - 1, U32))
    assert gamma(0, U32) == 0.0
    with pytest.raises(ValueError, match="n=-1"):
        gamma(-1, U32)


def test_gamma_is_at_least_nu_and_increasing():
    # Higham 2002, §3.1: gamma_n >= n u, gamma_m + gamma_n + gamma_m gamma_n <= gamma_{m+n}
    for n in (1, 5, 100, 10 ** 5):
        assert gamma(n, U32) >= n * U32
        assert gamma(n + 1, U32) > gamma(n, U32)
        m = 3 * n
        assert gamma(m, U32) + gamma(n, U32) + gamma(m, U32) * gamma(n, U32) <= \
            gamma(m + n, U32) * (1 + 4 * U64)


# -- derive(): the explanation says which n and u were used --------------------------------
SPEC27 = ConvSpec(batch=2, in_channels=3, out_channels=4, input_size=(6, 6), kernel_size=(3, 3),
                  bias=False)


def _data(spec, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1, 1, spec.x_shape).astype(np.float32)
    w = rng.uniform(-1, 1, spec.w_shape).astype(np.float32)
    g = rng.uniform(-1, 1, spec.y_shape).astype(np.float32)
    b = rng.uniform(-1, 1, spec.out_channels).astype(np.float32)
    return x, w, g, b


def test_derive_forward_explanation_names_n_and_u():
    x, w, _, b = _data(SPEC27)
    bound = derive(SPEC27, ErrorModel(), "forward", ref.forward_magnitude(SPEC27, x, w),
                   ref.forward(SPEC27, x, w))
    # C_in/G * prod(k) = 3 * 9 = 27 products at binary32's u = 2^-24 (Higham 2002, §3.1)
    assert bound.n == 27
    assert bound.explain().startswith("γ_27 at u=2^-24 on |x|⋆|w|, plus output rounding u=2^-24 (float32)")
    assert "float64 reference's γ_27" in bound.explain()
    with_bias = derive(SPEC27, ErrorModel(), "forward", ref.forward_magnitude(SPEC27, x, w, b),
                       ref.forward(SPEC27, x, w, b), with_bias=True)
    assert with_bias.explain().startswith("γ_28 at u=2^-24 on |x|⋆|w|")
    # the bound contains Higham's gamma_n term and the output rounding
    mag, y = ref.forward_magnitude(SPEC27, x, w), ref.forward(SPEC27, x, w)
    assert (bound.values >= gamma(27, U32) * mag + U32 * np.abs(y)).all()
    assert bound.exact_limit == 2.0 ** 24 and not bound.vacuous


def test_derive_gradient_explanations_use_their_own_lengths():
    x, w, g, _ = _data(SPEC27)
    gi = derive(SPEC27, ErrorModel(), "grad_input", ref.grad_input_magnitude(SPEC27, w, g),
                ref.grad_input(SPEC27, w, g))
    assert gi.n == 4 * 9 and gi.explain().startswith("γ_36 at u=2^-24 on |g|⋆ᵀ|w|")
    gw = derive(SPEC27, ErrorModel(), "grad_weight", ref.grad_weight_magnitude(SPEC27, x, g),
                ref.grad_weight(SPEC27, x, g))
    assert gw.n == 2 * 4 * 4 and gw.explain().startswith("γ_32 at u=2^-24 on |x|⋆|g|")
    gb = derive(SPEC27, ErrorModel(), "grad_bias", ref.grad_bias_magnitude(SPEC27, g),
                ref.grad_bias(SPEC27, g))
    # a pure sum of 32 terms has 31 additions and no products (Higham 2002, §4 [memory])
    assert gb.explain().startswith("γ_31 at u=2^-24 (sums only) on Σ|g|")
    s16 = SPEC27.replace(dtype="float16")
    h = derive(s16, ErrorModel(), "forward", ref.forward_magnitude(s16, x, w), ref.forward(s16, x, w))
    assert h.explain().startswith("γ_27 at u=2^-11 on |x|⋆|w|, plus output rounding u=2^-11 (float16)")


def test_mixed_precision_products_are_exact():
    # SOURCES.md [derived]: two bfloat16 (p=8) or binary16 (p=11) operands have a product of
    # at most 16 or 22 significant bits, exact in binary32 (p=24)
    for dtype in ("bfloat16", "float16"):
        r = ErrorModel(accumulate="float32").resolve(dtype)
        assert r.u_p == 0.0 and r.u_acc == U32 and r.product == "float32"
    assert ErrorModel().resolve("float32").u_p == U32            # 48 bits do not fit in 24
    assert ErrorModel(accumulate="float32").resolve("float32").u_p == U32
    tf = ErrorModel(operand="tf32").resolve("float32")           # 2 * 11 <= 24
    assert tf.u_p == 0.0 and tf.u_in == U16
    assert ErrorModel(operand="tf32").resolve("float16").u_in == 0.0   # not narrower than the dtype
    x, w, _, _ = _data(SPEC27)
    sb = SPEC27.replace(dtype="bfloat16")
    bound = derive(sb, ErrorModel(accumulate="float32"), "forward",
                   ref.forward_magnitude(sb, x, w), ref.forward(sb, x, w))
    assert bound.explain().startswith("exact products, γ_26 at u=2^-24 on |x|⋆|w|, plus output "
                                      "rounding u=2^-8 (bfloat16)")


def test_mixed_precision_product_exactness_is_real():
    ml_dtypes = pytest.importorskip("ml_dtypes")
    # the derivation above, checked on data: float32 products of low-precision operands
    # equal their exact (float64) products
    rng = np.random.default_rng(5)
    for dt in (ml_dtypes.bfloat16, np.float16):
        a = (rng.standard_normal(20000) * 2.0 ** rng.integers(-6, 6, 20000)).astype(dt)
        b = (rng.standard_normal(20000) * 2.0 ** rng.integers(-6, 6, 20000)).astype(dt)
        p32 = a.astype(np.float32) * b.astype(np.float32)
        p64 = a.astype(np.float64) * b.astype(np.float64)
        assert (p32.astype(np.float64) == p64).all()
    # while two float32 operands do not multiply exactly in float32
    a, b = rng.standard_normal(2000).astype(np.float32), rng.standard_normal(2000).astype(np.float32)
    assert ((a * b).astype(np.float64) != a.astype(np.float64) * b.astype(np.float64)).any()


def test_vacuous_bound_and_error_model_validation():
    s = ConvSpec(batch=1, in_channels=2048, out_channels=1, input_size=(2,), kernel_size=(1,),
                 dtype="float16", bias=False)
    x, w = np.ones(s.x_shape), np.ones(s.w_shape)
    b = derive(s, ErrorModel(), "forward", ref.forward_magnitude(s, x, w), ref.forward(s, x, w))
    # n u = 2048 * 2^-11 = 1: gamma_n undefined (Higham 2002, Lemma 3.1)
    assert b.vacuous and np.isinf(b.values).all() and "vacuous" in b.explain()
    with pytest.raises(FormatError, match="accumulate='fp24'"):
        ErrorModel(accumulate="fp24")
    with pytest.raises(FormatError, match="algorithm='strassen'"):
        ErrorModel(algorithm="strassen")
    with pytest.raises(FormatError, match="block=0"):
        ErrorModel(block=0)


def test_blocked_accumulation_counts_additions():
    # blocked summation of n terms in blocks of b: (b - 1) + (ceil(n/b) - 1) additions
    # along any term (Blanchard, Higham, Lopez, Mary, Pranesh 2020 [bound form memory])
    x, _, g, _ = _data(SPEC27)
    bound = derive(SPEC27, ErrorModel(block=8), "grad_weight", ref.grad_weight_magnitude(SPEC27, x, g),
                   ref.grad_weight(SPEC27, x, g))
    assert "γ_10 at u=2^-24 (4 block(s) of 8 terms: 10 additions)" in bound.explain()     # 32 terms: 7 + 3


# -- exact_limit: integer data summed exactly ------------------------------------------------
def test_exact_limit_values():
    # integers up to 2^p are exact in a binary format of precision p (IEEE 754-2019, from memory)
    assert ErrorModel().resolve("float32").exact_limit() == 2.0 ** 24
    assert ErrorModel().resolve("float64").exact_limit() == 2.0 ** 53
    assert ErrorModel().resolve("float16").exact_limit() == 2.0 ** 11
    assert ErrorModel(accumulate="float32").resolve("bfloat16").exact_limit() == 2.0 ** 8
    assert ErrorModel(accumulate="float32", output="float32").resolve("float16").exact_limit() == 2.0 ** 11
    assert ErrorModel(operand="tf32").resolve("float32").exact_limit() == 2.0 ** 11
    assert ErrorModel(accumulate="float16").resolve("float32").exact_limit() == 2.0 ** 11
    # fast algorithms (Winograd: fractions in the transforms, Lavin & Gray 2016) are never exact
    assert ErrorModel(algorithm="winograd").resolve("float32").exact_limit() == 0.0


def test_exact_limit_is_exact_and_tight_for_float32():
    # magnitude sums <= 2^24 of integers are exact in binary32; 2^24 + 1 is not representable
    s = ConvSpec(batch=1, in_channels=2, out_channels=1, input_size=(1,), kernel_size=(1,), bias=False)
    limit = ErrorModel().resolve("float32").exact_limit()
    x = np.array([[[2.0 ** 23], [2.0 ** 23]]], dtype=np.float32)
    w = np.ones(s.w_shape, dtype=np.float32)
    assert float(ref.forward_magnitude(s, x, w).max()) == limit
    assert float(conv_float32(s, x, w)[0, 0, 0]) == float(ref.forward(s, x, w)[0, 0, 0]) == limit
    x = np.array([[[2.0 ** 24], [1.0]]], dtype=np.float32)
    assert float(ref.forward_magnitude(s, x, w).max()) == limit + 1
    assert float(conv_float32(s, x, w)[0, 0, 0]) != float(ref.forward(s, x, w)[0, 0, 0])


# -- implementations written here: float32 tap by tap, vectorised over positions -------------
def _padded(spec, x):
    """x (N, C, *S) with (lo, hi) padding applied per axis (zeros; crop where negative)."""
    for axis, (lo, hi) in enumerate(spec.padding, start=2):
        n = x.shape[axis]
        x = np.take(x, range(max(0, -lo), n - max(0, -hi)), axis=axis)
        width = [(0, 0)] * x.ndim
        width[axis] = (max(0, lo), max(0, hi))
        x = np.pad(x, width)
    return x


def conv_float32(spec, x, w, b=None, operand=None):
    """An honest direct convolution: every product and addition rounded to float32, the
    accumulator running over (channel, tap); ``operand`` rounds x and w to that dtype first."""
    x32, w32 = np.asarray(x, np.float32), np.asarray(w, np.float32)
    if operand is not None:
        x32, w32 = x32.astype(operand).astype(np.float32), w32.astype(operand).astype(np.float32)
    xp = _padded(spec, x32)
    G = spec.groups
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    acc = np.zeros(spec.y_shape, dtype=np.float32)
    if b is not None:
        acc += np.asarray(b, np.float32).reshape((-1,) + (1,) * spec.ndim)
    for g, c, t in itertools.product(range(G), range(Cg), itertools.product(*map(range, spec.kernel_size))):
        window = xp[(slice(None), g * Cg + c) + tuple(
            slice(ti * d, ti * d + (h - 1) * s + 1, s)
            for ti, d, s, h in zip(t, spec.dilation, spec.stride, spec.output_size))]
        wv = w32[(slice(g * Og, (g + 1) * Og), c) + t].reshape((1, Og) + (1,) * spec.ndim)
        acc[:, g * Og:(g + 1) * Og] += wv * window[:, None]        # float32 product, float32 add
    return acc


@st.composite
def geometries(draw, max_ndim=2):
    nd = draw(st.integers(1, max_ndim))
    G = draw(st.integers(1, 3))
    k = tuple(draw(st.integers(1, 4)) for _ in range(nd))
    s = tuple(draw(st.integers(1, 3)) for _ in range(nd))
    d = tuple(draw(st.integers(1, 2)) for _ in range(nd))
    pad = tuple((draw(st.integers(-1, 2)), draw(st.integers(-1, 2))) for _ in range(nd))
    size = []
    for ki, di, (lo, hi) in zip(k, d, pad):
        e = di * (ki - 1) + 1
        low = max(1, e - lo - hi, -lo, -hi)
        size.append(draw(st.integers(low, low + 7)))
    return ConvSpec(batch=draw(st.integers(1, 2)), in_channels=G * draw(st.integers(1, 4)),
                    out_channels=G * draw(st.integers(1, 3)), input_size=tuple(size), kernel_size=k,
                    stride=s, padding=pad, dilation=d, groups=G, bias=draw(st.booleans()))


def _values(rng, shape, kind):
    if kind == "uniform":
        return rng.uniform(-1, 1, shape).astype(np.float32)
    if kind == "wide":      # wide dynamic range: |v| in [2^-30, 2^30], some exact zeros
        v = rng.choice([-1.0, 1.0], shape) * 2.0 ** rng.uniform(-30, 30, shape)
        v[rng.random(shape) < 0.1] = 0.0
        return v.astype(np.float32)
    # "cancel": +-1 times a common value, so outputs nearly cancel
    return (rng.choice([-1.0, 1.0], shape) * rng.uniform(0.999, 1.001, shape)).astype(np.float32)


def _case(spec, seed, kind):
    rng = np.random.default_rng(seed)
    x = _values(rng, spec.x_shape, kind)
    w = _values(rng, spec.w_shape, kind)
    b = _values(rng, (spec.out_channels,), kind) if spec.bias else None
    return x, w, b


def _bound(spec, x, w, b):
    return derive(spec, ErrorModel(), "forward", ref.forward_magnitude(spec, x, w, b),
                  ref.forward(spec, x, w, b), with_bias=b is not None)


@settings(max_examples=300, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(spec=geometries(), seed=st.integers(0, 2 ** 32 - 1),
       kind=st.sampled_from(["uniform", "wide", "cancel"]))
def test_no_false_alarms_for_an_honest_float32_implementation(spec, seed, kind):
    # Higham 2002, §3.1: any order of float32 products and sums stays within gamma_n(2^-24)
    # times |x|*|w| (plus the output rounding); derive() must never flag it.
    x, w, b = _case(spec, seed, kind)
    y = conv_float32(spec, x, w, b)
    assert y.dtype == np.float32 and y.shape == spec.y_shape
    bound = _bound(spec, x, w, b)
    err = np.abs(y.astype(np.float64) - ref.forward(spec, x, w, b))
    assert (err <= bound.values).all(), (spec, float((err / bound.values).max()))


def test_real_detection_of_float16_operands():
    # Rounding x and w to binary16 (u = 2^-11) before multiplying perturbs each product by
    # a relative ~2^-11, 2^13 times binary32's u. The derived bound allows about
    # gamma_n(2^-24) |x|*|w| ~ n 2^-24 |x|*|w|, while the error of the float16-operand
    # product sum grows like sqrt(n) 2^-11 |x||w| (random signs). With n <= 48 here it
    # is hundreds of times over the bound on typical outputs, so nearly every case is
    # caught; a case escapes only if every output happens to be small. Geometries whose
    # every window lies in the padding (outputs are 0 or the bias, exact either way)
    # cannot show the fault and are drawn again.
    rng = np.random.default_rng(2016)
    detected, worst = 0, []
    for i in range(50):
        while True:
            spec = _numpy_geometry(rng)
            x, w, b = _case(spec, 1000 + i, "uniform")
            if ref.forward_magnitude(spec, x, w).max() > 0:
                break
        bound = _bound(spec, x, w, b)
        honest = conv_float32(spec, x, w, b)
        lossy = conv_float32(spec, x, w, b, operand=np.float16)
        refy = ref.forward(spec, x, w, b)
        assert (np.abs(honest - refy) <= bound.values).all()       # control: no false alarm
        ratio = float((np.abs(lossy - refy) / bound.values).max())
        worst.append(ratio)
        detected += ratio > 1
    assert detected >= 45, (detected, sorted(worst)[:10])


def _numpy_geometry(rng) -> ConvSpec:
    """A random geometry like geometries(), drawn from a seeded numpy generator."""
    nd = int(rng.integers(1, 3))
    G = int(rng.integers(1, 4))
    k = tuple(int(v) for v in rng.integers(1, 5, nd))
    s = tuple(int(v) for v in rng.integers(1, 4, nd))
    d = tuple(int(v) for v in rng.integers(1, 3, nd))
    pad = tuple((int(rng.integers(-1, 3)), int(rng.integers(-1, 3))) for _ in range(nd))
    size = []
    for ki, di, (lo, hi) in zip(k, d, pad):
        low = max(1, di * (ki - 1) + 1 - lo - hi, -lo, -hi)
        size.append(int(rng.integers(low, low + 8)))
    return ConvSpec(batch=int(rng.integers(1, 3)), in_channels=G * int(rng.integers(1, 5)),
                    out_channels=G * int(rng.integers(1, 4)), input_size=tuple(size), kernel_size=k,
                    stride=s, padding=pad, dilation=d, groups=G, bias=bool(rng.integers(0, 2)))


# -- integer data: the float64 reference is exact ----------------------------------------------
def _exact_int_conv(spec, x, w, b):
    """Forward pass in Python ints with plain loops (channels first, 1-D or 2-D)."""
    xs, ws = x.astype(object), w.astype(object)
    G = spec.groups
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    out = np.zeros(spec.y_shape, dtype=object)
    size = spec.input_size
    for n, o in itertools.product(range(spec.batch), range(spec.out_channels)):
        g = o // Og
        for h in itertools.product(*map(range, spec.output_size)):
            total = int(b[o]) if b is not None else 0
            for c in range(Cg):
                for t in itertools.product(*map(range, spec.kernel_size)):
                    pos = [hi * s + ti * d - lo for hi, ti, s, d, (lo, _)
                           in zip(h, t, spec.stride, spec.dilation, spec.padding)]
                    if all(0 <= p < L for p, L in zip(pos, size)):
                        total += int(xs[(n, g * Cg + c) + tuple(pos)]) * int(ws[(o, c) + t])
            out[(n, o) + h] = total
    return out


@settings(max_examples=40, deadline=None, database=None)
@given(spec=geometries(), seed=st.integers(0, 2 ** 32 - 1))
def test_integer_data_gives_exact_float64_reference(spec, seed):
    # integers below 2^53 are exact in binary64 (IEEE 754-2019, from memory): with
    # |x|, |w|, |b| < 2^20 and n <= 48 every partial sum is < 2^46, so any order is exact
    rng = np.random.default_rng(seed)
    x = rng.integers(-2 ** 20, 2 ** 20, spec.x_shape)
    w = rng.integers(-2 ** 20, 2 ** 20, spec.w_shape)
    b = rng.integers(-2 ** 20, 2 ** 20, spec.out_channels) if spec.bias else None
    exact = _exact_int_conv(spec, x, w, b)
    got = ref.forward(spec.replace(dtype="float64"), x.astype(np.float64), w.astype(np.float64),
                      None if b is None else b.astype(np.float64))
    assert [int(v) for v in got.ravel()] == [int(v) for v in exact.ravel()]
    # and the magnitudes, which decide whether equality may be demanded
    mag = ref.forward_magnitude(spec, x, w, b)
    assert (mag < ErrorModel().resolve("float64").exact_limit()).all()
