"""Convolution arithmetic against published relationships, figures and identities.

Sources, named beside each check:
* Dumoulin & Visin 2016, "A guide to convolution arithmetic for deep learning",
  arXiv:1603.07285 (v2, 2018): Relationships 1-15 and the Figure 1.1/1.2 examples;
  §4: a transposed convolution is the gradient of a convolution w.r.t. its input.
* Claerbout, *Basic Earth Imaging*, "Dot product test": <y, F x> = <F^T y, x>.
* Higham 2002, §3.1 (gamma_n): the tolerance of the dot-product test in float64.
* Facts of the trade marked "common practice, no source".
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

import convwitness
from convwitness import ConvSpec, gamma
from convwitness.numerics import reference as ref

U64 = 2.0 ** -53


def conv2d(i, k, s=1, p=0, d=1, **kw):
    return ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(i, i), kernel_size=(k, k),
                    stride=s, padding=p, dilation=d, bias=False, dtype="float64", **kw)


# -- Dumoulin & Visin 2016: Relationships on their example sizes ------------------------------
@pytest.mark.parametrize("rel, i, k, s, p, d, expected", [
    ("R1", 4, 3, 1, 0, 1, 2),        # no padding, unit strides
    ("R2", 5, 4, 1, 2, 1, 6),        # arbitrary padding
    ("R3", 5, 3, 1, 1, 1, 5),        # half (same) padding
    ("R4", 5, 3, 1, 2, 1, 7),        # full padding
    ("R5", 5, 3, 2, 0, 1, 2),        # no padding, non-unit strides
    ("R6", 5, 3, 2, 1, 1, 3),        # padding and strides
    ("R6", 6, 3, 2, 1, 1, 3),        # ... the odd case, i = 6
    ("R15", 7, 3, 1, 0, 2, 3),       # dilated
])
def test_published_conv_output_sizes(rel, i, k, s, p, d, expected):
    # Dumoulin & Visin 2016, arXiv:1603.07285, Relationship `rel` and its example
    assert conv2d(i, k, s, p, d).output_size == (expected, expected)


@pytest.mark.parametrize("rel, i_t, k, s, p, a, expected", [
    ("R12", 2, 3, 2, 0, 0, 5),       # transposed of R5 (no padding, strides)
    ("R13", 3, 3, 2, 1, 0, 5),       # transposed of R6, i = 5
    ("R14", 3, 3, 2, 1, 1, 6),       # transposed of R6, i = 6: a = (6 + 2 - 3) mod 2 = 1
])
def test_published_transposed_output_sizes(rel, i_t, k, s, p, a, expected):
    # Dumoulin & Visin 2016, arXiv:1603.07285, Relationship `rel` and its example
    spec = conv2d(i_t, k, s, p, transposed=True, output_padding=a)
    assert spec.output_size == (expected, expected)


def test_relationship_15_against_counting_windows_and_14_round_trip():
    # Rel. 15 counted by brute force: the number of window starts h*s whose dilated
    # window fits in the padded input (common practice, no source); Rel. 14 with
    # a = (i + 2p - k') mod s maps the output size back to i (Dumoulin & Visin 2016).
    for i, k, s, p, d in itertools.product(range(1, 10), range(1, 4), range(1, 4), range(3), range(1, 3)):
        e = d * (k - 1) + 1
        if i + 2 * p < e:
            continue
        spec = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(i,), kernel_size=(k,),
                        stride=s, padding=p, dilation=d)
        count = sum(1 for h in range(i + 2 * p) if h * s + e <= i + 2 * p)
        assert spec.output_size == (count,), (i, k, s, p, d)
        a = (i + 2 * p - e) % s
        back = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=spec.output_size,
                        kernel_size=(k,), stride=s, padding=p, dilation=d, transposed=True,
                        output_padding=a)
        assert back.output_size == (i,), (i, k, s, p, d)


# -- Dumoulin & Visin 2016, Figures 1.1 and 1.2: integer worked examples ----------------------
FIG_X = [[3, 3, 2, 1, 0], [0, 0, 1, 3, 1], [3, 1, 2, 2, 3], [2, 0, 0, 2, 2], [2, 0, 0, 0, 1]]
FIG_W = [[0, 1, 2], [2, 2, 0], [0, 1, 2]]
FIG_1_1 = [[12, 12, 17], [10, 17, 19], [9, 6, 14]]          # no padding, unit strides
FIG_1_2 = [[6, 17, 3], [8, 17, 13], [6, 4, 4]]              # padding 1, stride 2

FIGURES = [("figure-1.1", dict(), FIG_1_1), ("figure-1.2", dict(p=1, s=2), FIG_1_2)]


@pytest.mark.parametrize("name, geometry, expected", FIGURES, ids=[f[0] for f in FIGURES])
def test_figures_through_the_reference(name, geometry, expected):
    # Dumoulin & Visin 2016, arXiv:1603.07285, Figures 1.1 and 1.2 (cross-correlation)
    spec = conv2d(5, 3, **geometry)
    x = np.array(FIG_X, dtype=np.float64)[None, None]
    w = np.array(FIG_W, dtype=np.float64)[None, None]
    y = ref.forward(spec, x, w)
    assert y.shape == (1, 1, 3, 3)
    assert (y[0, 0] == np.array(expected)).all(), y[0, 0]


@pytest.mark.parametrize("dtype", ["float64", "float32", "float16"])
@pytest.mark.parametrize("name, geometry, expected", FIGURES, ids=[f[0] for f in FIGURES])
def test_figures_through_the_reference_adapter(name, geometry, expected, dtype):
    # Dumoulin & Visin 2016, Figures 1.1/1.2. Integers <= 2^11 with sums <= 19 are exact
    # in binary16 and wider (IEEE 754-2019, p = 11), so equality is demanded.
    adapter = convwitness.load_adapter("reference")
    spec = conv2d(5, 3, **geometry).replace(dtype=dtype)
    x = np.array(FIG_X, dtype=dtype)[None, None]
    w = np.array(FIG_W, dtype=dtype)[None, None]
    y = adapter.forward(spec, x, w, None)
    assert y.dtype == np.dtype(dtype)
    assert (y[0, 0] == np.array(expected, dtype=dtype)).all(), y[0, 0]


# -- the 5x5 / 3x3 / stride 2 example: gradients by hand (common practice, no source) -----------
def _stride2_case():
    rng = np.random.default_rng(20240611)
    spec = conv2d(5, 3, s=2)
    x = rng.integers(-4, 5, size=(1, 1, 5, 5)).astype(np.float64)
    w = rng.integers(-3, 4, size=(1, 1, 3, 3)).astype(np.float64)
    return spec, x, w


def test_stride2_output_is_2x2_and_weight_gradient_by_hand():
    # Common practice, no source: a 3x3 kernel with stride 2 over a 5x5 input gives a
    # 2x2 output, and dL/dw[a][b] = sum over the 4 output positions (i, j) of the input
    # value under that weight, x[2i+a][2j+b], times the upstream gradient g[i][j].
    # (Also Goodfellow, Bengio & Courville 2016, §9.5 eq. 9.11 [secondary].)
    spec, x, _ = _stride2_case()
    assert spec.output_size == (2, 2)
    g = np.array([[[[2.0, -1.0], [3.0, 5.0]]]])
    xl = x[0, 0].tolist()
    gl = g[0, 0].tolist()
    by_hand = [[0.0] * 3 for _ in range(3)]
    for a in range(3):
        for b in range(3):
            total = 0
            for i in range(2):
                for j in range(2):
                    total += xl[2 * i + a][2 * j + b] * gl[i][j]
            by_hand[a][b] = total
    got = ref.grad_weight(spec, x, g)
    assert got.shape == (1, 1, 3, 3)
    assert got[0, 0].tolist() == by_hand              # integers: exact in float64
    # the forward pass by hand as well: y[i][j] = sum_ab x[2i+a][2j+b] w[a][b]
    _, _, w = _stride2_case()
    wl = w[0, 0].tolist()
    y_hand = [[sum(xl[2 * i + a][2 * j + b] * wl[a][b] for a in range(3) for b in range(3))
               for j in range(2)] for i in range(2)]
    assert ref.forward(spec, x, w)[0, 0].tolist() == y_hand


def test_gradient_descent_step_lowers_a_squared_loss():
    # Common practice, no source: for L(w) = 0.5 ||conv(x, w) - target||^2 the step
    # w - alpha dL/dw lowers L for small alpha; since L is quadratic in w, exactly
    # L(w - alpha G) = L(w) - alpha ||G||^2 + 0.5 alpha^2 ||conv(x, G)||^2.
    spec, x, w = _stride2_case()
    target = np.array([[[[1.0, -2.0], [0.5, 4.0]]]])

    def loss(weights):
        r = ref.forward(spec, x, weights) - target
        return 0.5 * float(np.sum(r * r))

    g_y = ref.forward(spec, x, w) - target             # dL/dy
    G = ref.grad_weight(spec, x, g_y)                  # dL/dw
    assert np.sum(G * G) > 0
    for alpha in (1e-2, 1e-3, 1e-4):
        new = loss(w - alpha * G)
        assert new < loss(w), alpha
        predicted = loss(w) - alpha * np.sum(G * G) + 0.5 * alpha ** 2 * np.sum(ref.forward(spec, x, G) ** 2)
        assert new == pytest.approx(predicted, rel=1e-12, abs=1e-12)


# -- Dumoulin & Visin §4: transposed convolution = input gradient of the matching convolution ---
def _transposed_by_scatter(spec: ConvSpec, x, w):
    """Transposed convolution by its scatter definition, plain loops, 1-D channels first:
    y[n, g*Og + o, i*s + t*d - p_lo] += x[n, g*Cg + c, i] * w[g*Cg + c, o, t]."""
    (s,), (d,), ((lo, _hi),) = spec.stride, spec.dilation, spec.padding
    G, Cg, Og = spec.groups, spec.in_channels // spec.groups, spec.out_channels // spec.groups
    (L_out,) = spec.output_size
    y = [[[0.0] * L_out for _ in range(spec.out_channels)] for _ in range(spec.batch)]
    for n, g, c, o, i, t in itertools.product(range(spec.batch), range(G), range(Cg), range(Og),
                                              range(spec.input_size[0]), range(spec.kernel_size[0])):
        j = i * s + t * d - lo
        if 0 <= j < L_out:
            y[n][g * Og + o][j] += float(x[n, g * Cg + c, i]) * float(w[g * Cg + c, o, t])
    return np.array(y)


TRANSPOSED = [
    dict(input_size=(4,), kernel_size=(3,), stride=2),
    dict(input_size=(3,), kernel_size=(3,), stride=2, padding=1, output_padding=1),
    dict(input_size=(5,), kernel_size=(2,), stride=3, padding=((2, 0),), output_padding=2),
    dict(input_size=(4,), kernel_size=(3,), stride=1, dilation=3, output_padding=2),  # a >= s
    dict(input_size=(3,), kernel_size=(4,), stride=2, dilation=2, padding=((0, 3),), groups=2),
]


@pytest.mark.parametrize("geometry", TRANSPOSED, ids=str)
def test_transposed_is_input_gradient_of_matching_conv(geometry):
    # Dumoulin & Visin 2016, §4: the transposed convolution is the gradient of the
    # matching convolution w.r.t. its input; both are checked against the scatter
    # definition computed with plain loops (common practice, no source).
    rng = np.random.default_rng(7)
    spec = ConvSpec(batch=2, in_channels=4, out_channels=2, transposed=True, bias=False,
                    dtype="float64", **geometry)
    x = rng.integers(-5, 6, size=spec.x_shape).astype(np.float64)
    w = rng.integers(-5, 6, size=spec.w_shape).astype(np.float64)
    by_scatter = _transposed_by_scatter(spec, x, w)
    conv = spec.matching_conv()
    assert conv.output_size[0] >= spec.input_size[0]
    g = np.zeros(conv.y_shape)                     # x as the upstream gradient of conv,
    g[..., :spec.input_size[0]] = x                # zero where conv has extra outputs
    as_gradient = ref.grad_input(conv, w, g)
    assert (ref.transposed(spec, x, w) == by_scatter).all()      # integers: exact
    assert (as_gradient == by_scatter).all()


# -- Claerbout's dot-product test on random float64 data --------------------------------------
ADJOINT = [
    dict(input_size=(7,), kernel_size=(3,), stride=2),                          # remainder 0
    dict(input_size=(8,), kernel_size=(3,), stride=3, padding=((2, 0),)),       # remainder 1, asym
    dict(input_size=(9, 6), kernel_size=(2, 3), stride=(4, 1), dilation=(2, 1),
         padding=((-1, 2), (1, 0))),                                            # negative + asym
    dict(input_size=(6, 7), kernel_size=(3, 3), stride=2, padding=((-2, -1), (0, 3)),
         groups=2, layout="channels_last"),
    dict(input_size=(5, 4, 6), kernel_size=(2, 1, 3), stride=(2, 3, 2), padding=((1, 0), (0, 0), (0, 2)),
         dilation=(1, 1, 2), groups=2),
    dict(input_size=(4,), kernel_size=(3,), stride=2, padding=1, output_padding=1, transposed=True,
         groups=2),
]


def _spec(geometry, **kw):
    return ConvSpec(**{"batch": 2, "in_channels": 4, "out_channels": 6, "dtype": "float64",
                       "bias": False, **geometry, **kw})


def _tolerance(spec, x, w, g, n_y_side, n_x_side):
    """|<Fx,g> - <x,F^T g>| <= (gamma_a + gamma_b) <|x|*|w|, |g|> (Higham 2002, §3.1):
    each side is the same set of products x*w*g summed in float64 with at most a or b
    rounded additions/multiplications along any one term."""
    s = float(np.sum(ref.forward_magnitude(spec, x, w) * np.abs(g)))
    return (gamma(n_y_side, U64) + gamma(n_x_side, U64)) * s


@pytest.mark.parametrize("geometry", ADJOINT, ids=str)
def test_dot_product_test_input_and_weight(geometry):
    # Claerbout, "Dot product test": <F x, g> = <x, F^T g> for F = conv(., w), and
    # for F = conv(x, .) with F^T = grad_weight.
    rng = np.random.default_rng(1603)
    spec = _spec(geometry)
    for _ in range(3):
        x = rng.standard_normal(spec.x_shape)
        w = rng.standard_normal(spec.w_shape)
        g = rng.standard_normal(spec.y_shape)
        y = ref.forward(spec, x, w)
        lhs = float(np.sum(y * g))
        n_f = spec.accumulation_length("forward") + 2 + y.size
        rhs_x = float(np.sum(x * ref.grad_input(spec, w, g)))
        tol = _tolerance(spec, x, w, g, n_f, spec.accumulation_length("grad_input") + 2 + x.size)
        assert abs(lhs - rhs_x) <= tol, (lhs, rhs_x, tol)
        rhs_w = float(np.sum(w * ref.grad_weight(spec, x, g)))
        tol = _tolerance(spec, x, w, g, n_f, spec.accumulation_length("grad_weight") + 2 + w.size)
        assert abs(lhs - rhs_w) <= tol, (lhs, rhs_w, tol)
        assert tol < 1e-10 * max(1.0, abs(lhs))        # the test is sharp, not vacuous


@pytest.mark.parametrize("geometry", ADJOINT[:4], ids=str)
def test_bias_gradient_is_the_sum_of_g(geometry):
    # common practice, no source: dL/db[o] = sum over batch and space of g[n, o, ...];
    # also the dot-product test for the bias map b -> y (Claerbout).
    rng = np.random.default_rng(99)
    spec = _spec(geometry, bias=True)
    g = rng.standard_normal(spec.y_shape)
    got = ref.grad_bias(spec, g)
    channel_axis = g.ndim - 1 if spec.layout == "channels_last" else 1
    gl = np.moveaxis(g, channel_axis, 0)
    for o in range(spec.out_channels):
        total = math.fsum(float(v) for v in gl[o].ravel())        # exact sum, rounded once
        assert abs(got[o] - total) <= gamma(gl[o].size, U64) * float(np.sum(np.abs(gl[o])))
    x = rng.standard_normal(spec.x_shape)
    w = rng.standard_normal(spec.w_shape)
    b = rng.standard_normal(spec.out_channels)
    by = ref.forward(spec, x, w, b) - ref.forward(spec, x, w)     # the bias term alone
    lhs, rhs = float(np.sum(by * g)), float(b @ got)
    scale = float(np.sum(np.abs(by) * np.abs(g))) + float(np.sum(ref.forward_magnitude(spec, x, w) * np.abs(g)))
    assert abs(lhs - rhs) <= gamma(2 * g.size + spec.accumulation_length() + 4, U64) * 2 * scale
