"""The float64 reference against outside implementations, on generated geometries.

Outside sources: torch.nn.functional (conv1d/2d/3d, conv_transpose1d/2d/3d,
autograd), jax.lax.conv_general_dilated (with jax.vjp) and scipy.signal.correlate.
These tests call the libraries directly -- not through convwitness's adapters -- so
they check the reference alone.

Tolerance: both sides compute in float64, so each element may differ by the float64
bound of convwitness.numerics.bounds.derive with ErrorModel(accumulate="float64"): gamma_n at
u = 2^-53 on the magnitude |x|*|w| for the library, the reference's own gamma_n,
and u|y| for the final rounding (Higham 2002, §3.1, gamma_n). No looser factor.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, example, given, settings
from hypothesis import strategies as st

from convwitness import ConvSpec, SpecError
from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import ErrorModel, derive

F64 = ErrorModel(accumulate="float64")
SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])


# -- geometries -------------------------------------------------------------------------
@st.composite
def conv_specs(draw, transposed=False, layouts=("channels_first", "channels_last"),
               negative=True):
    """A valid float64 ConvSpec: 1-3 D, groups (depthwise included), dilation, stride,
    asymmetric (and, for convolutions, negative) padding, zero-size batches."""
    nd = draw(st.integers(1, 3))
    groups = draw(st.integers(1, 3))
    depthwise = draw(st.booleans())
    cg = 1 if depthwise else draw(st.integers(1, 3))
    og = draw(st.integers(1, 3))
    kmax, lmax = (3, 5) if nd < 3 else (2, 3)
    ks, ds, ss, pads, sizes, ops = [], [], [], [], [], []
    for _ in range(nd):
        k, d, s = draw(st.integers(1, kmax)), draw(st.integers(1, 3)), draw(st.integers(1, 3))
        e = d * (k - 1) + 1
        if transposed:
            lo, hi = draw(st.integers(0, 3)), draw(st.integers(0, 3))
            size = draw(st.integers(1, lmax))
            ops.append(draw(st.integers(0, max(s, d) - 1)))
        else:
            low = -2 if negative else 0
            lo, hi = draw(st.integers(low, 3)), draw(st.integers(low, 3))
            size = max(1, e - lo - hi) + draw(st.integers(0, lmax))
            ops.append(0)
        ks.append(k), ds.append(d), ss.append(s), pads.append((lo, hi)), sizes.append(size)
    try:
        spec = ConvSpec(batch=draw(st.sampled_from((1, 2, 0))), in_channels=groups * cg,
                        out_channels=groups * og, input_size=tuple(sizes), kernel_size=tuple(ks),
                        stride=tuple(ss), padding=tuple(pads), dilation=tuple(ds), groups=groups,
                        bias=draw(st.booleans()), dtype="float64",
                        layout=draw(st.sampled_from(layouts)), transposed=transposed,
                        output_padding=tuple(ops))
    except SpecError:
        assume(False)
    return spec


def draw_arrays(spec: ConvSpec, seed: int):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(spec.x_shape)
    w = rng.standard_normal(spec.w_shape)
    b = rng.standard_normal(spec.out_channels) if spec.bias else None
    gy = rng.standard_normal(spec.y_shape)
    return x, w, b, gy


def assert_within(spec, pass_, got, expected, magnitude, with_bias=False, source=""):
    got = np.asarray(got, dtype=np.float64)
    assert got.shape == expected.shape, f"{source} {pass_}: shape {got.shape} != {expected.shape} for {spec!r}"
    bound = derive(spec, F64, pass_, magnitude, expected, with_bias=with_bias).values
    err = np.abs(got - expected)
    bad = err > bound
    if bad.any():
        i = np.unravel_index(np.argmax(err - bound), err.shape)
        pytest.fail(f"{source} {pass_}: {int(bad.sum())}/{err.size} elements beyond the float64 bound; "
                    f"worst at {i}: reference={expected[i]!r} library={got[i]!r} err={err[i]:.3g} "
                    f"bound={bound[i]:.3g}; spec={spec!r}")


def to_channels_first(spec, a):
    """numpy channels-last (N, *S, C) / (O, *K, I) -> channels-first, for libraries
    that take NC(D)HW only."""
    if spec.layout == "channels_last":
        return np.ascontiguousarray(np.moveaxis(a, -1, 1))
    return a


def to_spec_layout(spec, a):
    if spec.layout == "channels_last":
        return np.ascontiguousarray(np.moveaxis(a, 1, -1))
    return a


# -- torch ----------------------------------------------------------------------------
EXAMPLES_CONV = [
    # stride remainder: (7 + 1 + 0 - 3) mod 2 = 1 (common practice, no source: a trailing
    # input no window covers)
    ConvSpec(2, 2, 4, (7,), (3,), stride=2, padding=((1, 0),), dtype="float64"),
    # depthwise 2-D, channels last, asymmetric padding, dilation
    ConvSpec(1, 3, 6, (6, 5), (2, 3), stride=(1, 2), padding=((2, 0), (0, 1)), dilation=(2, 1),
             groups=3, dtype="float64", layout="channels_last"),
    # zero-size batch, 3-D
    ConvSpec(0, 2, 2, (3, 4, 3), (2, 2, 2), padding=1, groups=2, dtype="float64"),
    # negative padding crops the input
    ConvSpec(1, 2, 3, (6, 7), (2, 2), stride=(2, 3), padding=((-1, 1), (0, -2)), dtype="float64"),
]
EXAMPLES_T = [
    ConvSpec(2, 4, 2, (3, 2), (3, 2), stride=(2, 3), padding=((1, 0), (0, 2)), groups=2,
             output_padding=(1, 2), transposed=True, dtype="float64", layout="channels_last"),
    # output_padding >= stride is allowed when the dilation is larger (max(s, d) rule)
    ConvSpec(1, 2, 3, (4,), (2,), dilation=2, output_padding=1, transposed=True, dtype="float64"),
]


def _with_examples(examples):
    def deco(f):
        for spec in examples:
            f = example(spec=spec, seed=0)(f)
        return f
    return deco


class TestTorch:
    """Source: torch.nn.functional conv{1,2,3}d / conv_transpose{1,2,3}d, torch.autograd."""

    @SETTINGS
    @_with_examples(EXAMPLES_CONV)
    @given(spec=conv_specs(), seed=st.integers(0, 2**32 - 1))
    def test_forward_and_gradients(self, spec, seed):
        torch = pytest.importorskip("torch")
        F = torch.nn.functional
        x, w, b, gy = draw_arrays(spec, seed)
        xt = torch.from_numpy(to_channels_first(spec, x)).requires_grad_(True)
        wt = torch.from_numpy(to_channels_first(spec, w)).requires_grad_(True)
        bt = None if b is None else torch.from_numpy(b).requires_grad_(True)
        pad = [v for lo_hi in reversed(spec.padding) for v in lo_hi]     # F.pad: last axis first
        conv = {1: F.conv1d, 2: F.conv2d, 3: F.conv3d}[spec.ndim]
        y = conv(F.pad(xt, pad), wt, bt, stride=spec.stride, dilation=spec.dilation,
                 groups=spec.groups)
        inputs = [xt, wt] + ([bt] if bt is not None else [])
        grads = torch.autograd.grad(y, inputs, torch.from_numpy(to_channels_first(spec, gy)),
                                    allow_unused=True)
        grads = [torch.zeros_like(t) if g is None else g for g, t in zip(grads, inputs)]
        src = "torch"
        assert_within(spec, "forward", to_spec_layout(spec, y.detach().numpy()),
                      ref.forward(spec, x, w, b), ref.forward_magnitude(spec, x, w, b),
                      with_bias=spec.bias, source=src)
        assert_within(spec, "grad_input", to_spec_layout(spec, grads[0].numpy()),
                      ref.grad_input(spec, w, gy), ref.grad_input_magnitude(spec, w, gy), source=src)
        assert_within(spec, "grad_weight", to_spec_layout(spec, grads[1].numpy()),
                      ref.grad_weight(spec, x, gy), ref.grad_weight_magnitude(spec, x, gy), source=src)
        if spec.bias:
            assert_within(spec, "grad_bias", grads[2].numpy(), ref.grad_bias(spec, gy),
                          ref.grad_bias_magnitude(spec, gy), source=src)

    @SETTINGS
    @_with_examples(EXAMPLES_T)
    @given(spec=conv_specs(transposed=True), seed=st.integers(0, 2**32 - 1))
    def test_transposed(self, spec, seed):
        torch = pytest.importorskip("torch")
        F = torch.nn.functional
        x, w, b, _ = draw_arrays(spec, seed)
        conv_t = {1: F.conv_transpose1d, 2: F.conv_transpose2d, 3: F.conv_transpose3d}[spec.ndim]
        y = conv_t(torch.from_numpy(to_channels_first(spec, x)),
                   torch.from_numpy(to_channels_first(spec, w)),
                   None if b is None else torch.from_numpy(b), stride=spec.stride, padding=0,
                   output_padding=spec.output_padding, groups=spec.groups,
                   dilation=spec.dilation).numpy()
        # torch pads symmetrically only; (before, after) padding crops the padding-0 output
        y = y[(slice(None), slice(None)) + tuple(slice(lo, n - hi) for (lo, hi), n
                                                 in zip(spec.padding, y.shape[2:]))]
        assert_within(spec, "transposed", to_spec_layout(spec, y), ref.transposed(spec, x, w, b),
                      ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias, source="torch")


# -- jax ------------------------------------------------------------------------------
def _jax():
    jax = pytest.importorskip("jax")
    jax.config.update("jax_enable_x64", True)       # float64 needs it (jax docs, "Double precision")
    return jax


def _dims(spec):
    sp = {1: "H", 2: "HW", 3: "DHW"}[spec.ndim]
    if spec.layout == "channels_last":
        return ("N" + sp + "C", "O" + sp + "I", "N" + sp + "C")
    return ("NC" + sp, "OI" + sp, "NC" + sp)


def _jax_conv(jax, spec, x, w, *, slice_stride=False):
    """conv_general_dilated; with ``slice_stride`` a stride-1 convolution sliced [::s].

    The sliced form is for differentiating: jax.vjp of a natively strided convolution
    builds an lhs-dilated convolution that XLA's CPU compiler (jax 0.10.2) aborts the
    process on for some small geometries (Check failed in algebraic_simplifier.cc,
    "Window dimensions do not match RHS shape"); the gradient of a strided slice is
    an interior pad instead, which compiles."""
    y = jax.lax.conv_general_dilated(
        x, w, window_strides=(1,) * spec.ndim if slice_stride else spec.stride,
        padding=spec.padding, rhs_dilation=spec.dilation, dimension_numbers=_dims(spec),
        feature_group_count=spec.groups, precision=jax.lax.Precision.HIGHEST)
    if slice_stride:
        step = tuple(slice(None, None, s) for s in spec.stride)
        y = y[(slice(None),) + step + (slice(None),)] if spec.layout == "channels_last" \
            else y[(slice(None), slice(None)) + step]
    return y


def _jax_bias(spec, b):
    return b if spec.layout == "channels_last" else b.reshape((-1,) + (1,) * spec.ndim)


class TestJax:
    """Source: jax.lax.conv_general_dilated (native (lo, hi) padding, both layouts), jax.vjp
    (of the stride-1 convolution sliced [::s], see _jax_conv)."""

    @SETTINGS
    @_with_examples(EXAMPLES_CONV)
    @given(spec=conv_specs(), seed=st.integers(0, 2**32 - 1))
    def test_forward_and_gradients(self, spec, seed):
        jax = _jax()
        x, w, b, gy = draw_arrays(spec, seed)

        def f(x, w, b):
            y = _jax_conv(jax, spec, x, w, slice_stride=True)
            return y if b is None else y + _jax_bias(spec, b)

        y = _jax_conv(jax, spec, x, w)                     # the natively strided forward
        if b is not None:
            y = y + _jax_bias(spec, b)
        _, vjp = jax.vjp(f, x, w, b)
        gx, gw, gb = vjp(gy)
        src = "jax"
        assert_within(spec, "forward", y, ref.forward(spec, x, w, b),
                      ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias, source=src)
        assert_within(spec, "grad_input", gx, ref.grad_input(spec, w, gy),
                      ref.grad_input_magnitude(spec, w, gy), source=src)
        assert_within(spec, "grad_weight", gw, ref.grad_weight(spec, x, gy),
                      ref.grad_weight_magnitude(spec, x, gy), source=src)
        if spec.bias:
            assert_within(spec, "grad_bias", gb, ref.grad_bias(spec, gy),
                          ref.grad_bias_magnitude(spec, gy), source=src)

    @SETTINGS
    @_with_examples(EXAMPLES_T)
    @given(spec=conv_specs(transposed=True), seed=st.integers(0, 2**32 - 1))
    def test_transposed(self, spec, seed):
        """The transposed convolution is the input gradient (vjp) of the convolution it
        inverts the shape of (Dumoulin & Visin 2016, arXiv:1603.07285, §4)."""
        jax = _jax()
        x, w, b, _ = draw_arrays(spec, seed)
        conv = spec.matching_conv()            # input size = the transposed output size
        primal = np.zeros(conv.x_shape)
        y_conv, vjp = jax.vjp(lambda z: _jax_conv(jax, conv, z, w, slice_stride=True), primal)
        # with output_padding >= stride the convolution has more outputs than x has
        # inputs; those carry no cotangent (zeros appended at the end of each axis)
        sp = slice(1, -1) if spec.layout == "channels_last" else slice(2, None)
        extra = [(0, 0)] * x.ndim
        for i, (m, n) in enumerate(zip(y_conv.shape[sp], x.shape[sp])):
            extra[sp.start + i] = (0, m - n)
        (y,) = vjp(np.pad(x, extra))
        if b is not None:
            y = y + _jax_bias(spec, b)
        assert_within(spec, "transposed", y, ref.transposed(spec, x, w, b),
                      ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias, source="jax")


# -- scipy ----------------------------------------------------------------------------
class TestScipy:
    """Source: scipy.signal.correlate (direct, mode='valid'), forward only."""

    @SETTINGS
    @_with_examples(EXAMPLES_CONV)
    @given(spec=conv_specs(), seed=st.integers(0, 2**32 - 1))
    def test_forward(self, spec, seed):
        signal = pytest.importorskip("scipy.signal")
        x, w, b, _ = draw_arrays(spec, seed)
        X, W = to_channels_first(spec, x), to_channels_first(spec, w)
        # explicit padding, negative amounts crop
        X = np.pad(X, [(0, 0), (0, 0)] + [(max(lo, 0), max(hi, 0)) for lo, hi in spec.padding])
        X = X[(slice(None), slice(None)) + tuple(slice(max(-lo, 0), n - max(-hi, 0)) for (lo, hi), n
                                                 in zip(spec.padding, X.shape[2:]))]
        # dilation as a zero-inserted kernel, stride as slicing the stride-1 result
        Wd = np.zeros(W.shape[:2] + spec.effective_kernel)
        Wd[(slice(None), slice(None)) + tuple(slice(None, None, d) for d in spec.dilation)] = W
        cg, og = spec.in_channels // spec.groups, spec.out_channels // spec.groups
        y = np.zeros((spec.batch, spec.out_channels) + spec.output_size)
        step = tuple(slice(None, None, s) for s in spec.stride)
        for n in range(spec.batch):
            for o in range(spec.out_channels):
                g = o // og
                # one (C_in/G, *S) x (C_in/G, *K) correlation: 'valid' leaves one channel row
                r = signal.correlate(X[n, g * cg:(g + 1) * cg], Wd[o], mode="valid", method="direct")
                y[n, o] = r[0][step]
        if b is not None:
            y += b.reshape((-1,) + (1,) * spec.ndim)
        assert_within(spec, "forward", to_spec_layout(spec, y), ref.forward(spec, x, w, b),
                      ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias, source="scipy")
