"""The backward, own-identity and transposed invariants: they pass on correct
implementations and catch planted bugs.

(a) Every invariant passes, profile "quick", on convwitness's float64 reference and on
    torch (torch.nn.functional + autograd, the outside implementation; skipped when it
    is not installed).
(b) Every invariant fails on at least one planted-bug adapter written below. Each bug
    wraps the float64 reference, changes one thing the way the bug classes of
    shared/BUG-CLASSES.md describe, and declares the reference adapter's capabilities.

The properties checked come from outside the project: the dot-product test of
Claerbout (backward.adjoint_identity); the weight gradient as a correlation of input and
upstream gradient and the input gradient as a transposed convolution (Goodfellow,
Bengio & Courville, Deep Learning, §9.5); Relationship 14 of Dumoulin & Visin 2016,
arXiv:1603.07285 (transposed output size) and their §4 (a transposed convolution is the
input gradient of the matching convolution); rounding-error bounds of Higham 2002 §3.1.
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest

import convwitness
from convwitness.numerics import reference as ref
from convwitness.adapters.reference import ReferenceAdapter, _spec
from convwitness.errors import SpecError
from convwitness.invariants import get
from convwitness.run.runner import run_invariant

IDS = [
    "grad_input.reference", "grad_weight.reference", "grad_bias.reference", "backward.zero_batch",
    "backward.upstream_linearity", "backward.bias_independence", "backward.adjoint_identity",
    "grad_weight.forward_correlation", "grad_input.forward_flipped_kernel", "backward.finite_differences",
    "transposed.contract", "transposed.reference", "transposed.grad_input_identity",
]


def _cf(a, layout):
    return np.moveaxis(a, -1, 1) if layout == "channels_last" else a


def _back(a, layout):
    return np.ascontiguousarray(np.moveaxis(a, 1, -1) if layout == "channels_last" else a)


def _padded(spec, xcf):
    """x (channels first, float64) with zeros around it, cropped where the padding is negative."""
    cut, width = [slice(None)] * 2, [(0, 0)] * 2
    for lo, hi in spec.padding:
        cut.append(slice(max(0, -lo), None if hi >= 0 else hi))
        width.append((max(0, lo), max(0, hi)))
    return np.pad(xcf[tuple(cut)], width)


def grad_weight_direct(spec, x, g, stride, dilation):
    """gw[o,c,t] = sum_{n,h} x_p[n, c, h*stride + t*dilation] g[n, o, h], per group, as a plain
    loop over taps (common practice, no source); a planted bug passes the wrong stride or dilation."""
    xp = _padded(spec, _cf(x, spec.layout).astype(np.float64))
    gcf = _cf(g, spec.layout).astype(np.float64)
    G = spec.groups
    Cg, Og = spec.in_channels // G, spec.out_channels // G
    N, out = spec.batch, spec.output_size
    positions = int(np.prod(out))
    gw = np.zeros((spec.out_channels, Cg) + spec.kernel_size)
    for t in itertools.product(*(range(k) for k in spec.kernel_size)):
        idx = (slice(None), slice(None)) + tuple(slice(ti * di, ti * di + si * (o - 1) + 1, si)
                                                 for ti, di, si, o in zip(t, dilation, stride, out))
        win = xp[idx]
        for gi in range(G):
            a = win[:, gi * Cg:(gi + 1) * Cg].reshape(N, Cg, positions)
            b = gcf[:, gi * Og:(gi + 1) * Og].reshape(N, Og, positions)
            gw[(slice(gi * Og, (gi + 1) * Og), slice(None)) + t] = np.einsum("ncp,nop->oc", a, b)
    return _back(gw, spec.layout)


def test_grad_weight_direct_is_right():
    """The loop the weight-gradient bugs distort is right with the true stride and dilation:
    against torch autograd (outside source; symmetric padding, which torch takes natively)
    and against the float64 reference (asymmetric and negative padding)."""
    rng = np.random.default_rng(5)
    spec = convwitness.ConvSpec(2, 4, 6, (9, 8), (3, 2), stride=(2, 3), padding=((1, 2), (-1, 0)),
                                dilation=(2, 1), groups=2, dtype="float64")
    x, g = rng.standard_normal(spec.x_shape), rng.standard_normal(spec.y_shape)
    ours = grad_weight_direct(spec, x, g, spec.stride, spec.dilation)
    np.testing.assert_allclose(ours, ref.grad_weight(spec, x, g), rtol=1e-12, atol=1e-12)
    torch = pytest.importorskip("torch")
    sym = spec.replace(padding=((2, 2), (1, 1)))
    x, g = rng.standard_normal(sym.x_shape), rng.standard_normal(sym.y_shape)
    xt = torch.from_numpy(x)
    wt = torch.zeros(sym.w_shape, dtype=torch.float64, requires_grad=True)
    y = torch.nn.functional.conv2d(xt, wt, None, sym.stride, (2, 1), sym.dilation, sym.groups)
    (gw,) = torch.autograd.grad(y, wt, torch.from_numpy(g))
    np.testing.assert_allclose(grad_weight_direct(sym, x, g, sym.stride, sym.dilation), gw.numpy(),
                               rtol=1e-12, atol=1e-12)


# -- planted bugs ---------------------------------------------------------------------------
class _Planted(ReferenceAdapter):
    """The float64 reference with one planted bug; capabilities as the reference declares."""

    def _grads(self, x, w, b, grad_y, kw):
        spec = _spec(x, w, b, kw["stride"], kw["padding"], kw["dilation"], kw["groups"],
                     kw.get("layout", "channels_first"))
        return spec, list(super().backward(x, w, b, grad_y, **kw))


class StrideTailGradInput(_Planted):
    """C01: where the windows do not tile the padded input (r != 0), the input gradient of the
    last s + r input positions is never written."""
    name = "planted-stride-tail-gi"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        gx = _cf(out[0], spec.layout).copy()
        for a, (L, s, r) in enumerate(zip(spec.input_size, spec.stride, spec.remainder)):
            if r and s > 1:
                idx = [slice(None)] * gx.ndim
                idx[2 + a] = slice(max(0, L - s - r), None)
                gx[tuple(idx)] = 0
        out[0] = _back(gx, spec.layout)
        return tuple(out)


class GradWeightNoDilation(_Planted):
    """C04/C22: the weight gradient steps through the input with dilation 1."""
    name = "planted-gw-no-dilation"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        out[1] = grad_weight_direct(spec, x, grad_y, spec.stride, (1,) * spec.ndim).astype(x.dtype)
        return tuple(out)


class GradWeightNoStride(_Planted):
    """C02: the weight gradient reads consecutive input positions instead of every s-th."""
    name = "planted-gw-no-stride"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        out[1] = grad_weight_direct(spec, x, grad_y, (1,) * spec.ndim, spec.dilation).astype(x.dtype)
        return tuple(out)


class GradBiasFirstSample(_Planted):
    """C14/C21: the bias gradient sums the upstream gradient of sample 0 only."""
    name = "planted-gb-sample0"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        if out[2] is not None:
            out[2] = ref.grad_bias(spec.replace(batch=min(spec.batch, 1)), grad_y[:1]).astype(x.dtype)
        return tuple(out)


class GradBiasMean(_Planted):
    """The bias gradient is the mean of the upstream gradient instead of its sum."""
    name = "planted-gb-mean"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        if out[2] is not None:
            count = max(1, grad_y.size // spec.out_channels)
            out[2] = (ref.grad_bias(spec, grad_y) / count).astype(x.dtype)
        return tuple(out)


class ZeroBatchNaNWeight(_Planted):
    """C10: with N = 0 the weight-gradient buffer is returned unwritten (NaN here)."""
    name = "planted-zero-batch-nan-gw"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        if spec.batch == 0:
            out[1] = np.full(spec.w_shape, np.nan, dtype=x.dtype)
        return tuple(out)


class ClippedUpstream(_Planted):
    """C22: the backward clips the upstream gradient to [-1, 1] (breaks homogeneity)."""
    name = "planted-clip-g"

    def backward(self, x, w, b, grad_y, **kw):
        g = np.clip(grad_y.astype(np.float64), -1, 1).astype(grad_y.dtype)
        return super().backward(x, w, b, g, **kw)


class NoBiasSkipsLastChannel(_Planted):
    """C21: without a bias the per-channel loop skips the last output channel of grad_w."""
    name = "planted-nobias-gw"

    def backward(self, x, w, b, grad_y, **kw):
        spec, out = self._grads(x, w, b, grad_y, kw)
        if b is None:
            out[1] = out[1].copy()
            out[1][-1] = 0
        return tuple(out)


def _fit(y, shape, layout):
    """y placed in a zero array of ``shape`` (cropped where longer), channels first inside."""
    ycf, out = _cf(y, layout), np.zeros(_cf(np.empty(shape), layout).shape, dtype=y.dtype)
    sl = tuple(slice(0, min(a, b)) for a, b in zip(ycf.shape, out.shape))
    out[sl] = ycf[sl]
    return _back(out, layout)


class TransposedNoDilation(_Planted):
    """C04: the transposed convolution places its taps as if the dilation were 1."""
    name = "planted-transposed-no-dilation"

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout, True, output_padding)
        op = tuple(min(a, s - 1) for a, s in zip(spec.output_padding, spec.stride))
        try:
            wrong = spec.replace(dilation=1, output_padding=op)
        except SpecError:
            return np.zeros(spec.y_shape, dtype=x.dtype)
        return _fit(ref.transposed(wrong, x, w, b), spec.y_shape, layout).astype(x.dtype)


class OutputPaddingAsInputPadding(_Planted):
    """C08: output_padding is implemented by padding the input with zeros at the end, so the
    output is op*(s-1) too long."""
    name = "planted-op-as-input-padding"

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        spec = _spec(x, w, b, stride, padding, dilation, groups, layout, True, output_padding)
        lead = 1 if layout == "channels_last" else 2
        width = [(0, 0)] * x.ndim
        for a, op in enumerate(spec.output_padding):
            width[lead + a] = (0, op)
        xp = np.pad(x, width)
        size = tuple(i + op for i, op in zip(spec.input_size, spec.output_padding))
        wrong = spec.replace(input_size=size, output_padding=0)
        return ref.transposed(wrong, xp, w, b).astype(x.dtype)


# (invariant, planted bug it must catch). Which bug each invariant catches, from BUG-CLASSES.md §3.
CATCHES = [
    ("grad_input.reference", StrideTailGradInput),
    ("grad_input.reference", ClippedUpstream),
    ("grad_weight.reference", GradWeightNoDilation),
    ("grad_weight.reference", GradWeightNoStride),
    ("grad_bias.reference", GradBiasFirstSample),
    ("grad_bias.reference", GradBiasMean),
    ("backward.zero_batch", ZeroBatchNaNWeight),
    ("backward.upstream_linearity", ClippedUpstream),
    ("backward.bias_independence", NoBiasSkipsLastChannel),
    ("backward.adjoint_identity", StrideTailGradInput),
    ("backward.adjoint_identity", GradWeightNoDilation),
    ("backward.adjoint_identity", GradWeightNoStride),
    ("grad_weight.forward_correlation", GradWeightNoStride),
    ("grad_weight.forward_correlation", GradWeightNoDilation),
    ("grad_input.forward_flipped_kernel", StrideTailGradInput),
    ("backward.finite_differences", StrideTailGradInput),
    ("backward.finite_differences", GradWeightNoDilation),
    ("transposed.contract", OutputPaddingAsInputPadding),
    ("transposed.reference", TransposedNoDilation),
    ("transposed.reference", OutputPaddingAsInputPadding),
    ("transposed.grad_input_identity", TransposedNoDilation),
]


def _run(adapter, inv_id, shrink=False):
    return run_invariant(adapter, get(inv_id), "quick", seed=0, shrink=shrink)


@pytest.fixture(scope="module")
def reference_adapter():
    return convwitness.load_adapter("reference")


@pytest.fixture(scope="module")
def torch_adapter():
    pytest.importorskip("torch")
    return convwitness.load_adapter("torch")


@pytest.mark.parametrize("inv_id", IDS)
def test_passes_on_reference(reference_adapter, inv_id):
    r = _run(reference_adapter, inv_id)
    assert r.verdict == "pass", r.message
    assert r.examples > 0 and r.worst_share <= 1.0


@pytest.mark.parametrize("inv_id", IDS)
def test_passes_on_torch(torch_adapter, inv_id):
    # torch.nn.functional conv*d / conv_transpose*d with autograd: the outside implementation.
    r = _run(torch_adapter, inv_id)
    assert r.verdict == "pass", r.message
    assert r.examples > 0 and r.worst_share <= 1.0


@pytest.mark.parametrize("inv_id,bug", CATCHES, ids=[f"{i}-{b.name}" for i, b in CATCHES])
def test_catches_planted_bug(inv_id, bug):
    r = _run(convwitness.load_adapter(bug()), inv_id)
    assert r.verdict == "fail", f"{bug.name} not caught by {inv_id}: {r.verdict} {r.message}"
    assert r.witness is not None


# Where the reason matters, the failure must name it (not just any mismatch).
REASONS = {
    ("backward.upstream_linearity", ClippedUpstream): "homogeneity in g",
    ("backward.zero_batch", ZeroBatchNaNWeight): "exactly +0",
    ("backward.bias_independence", NoBiasSkipsLastChannel): "grad_w with b == grad_w with b=None",
    ("transposed.contract", OutputPaddingAsInputPadding): "shape",
}


@pytest.mark.parametrize("key", list(REASONS), ids=[f"{i}-{b.name}" for i, b in REASONS])
def test_failure_names_the_broken_property(key):
    inv_id, bug = key
    r = _run(convwitness.load_adapter(bug()), inv_id)
    assert r.verdict == "fail" and REASONS[key] in r.message, r.message


def test_every_invariant_catches_a_planted_bug():
    assert {i for i, _ in CATCHES} == set(IDS)


def test_planted_bugs_pass_where_they_do_not_apply(reference_adapter):
    """A planted bug must not be reported by an unrelated reference check: the transposed
    bugs leave the backward alone and the backward bugs leave the transposed pass alone."""
    assert _run(convwitness.load_adapter(TransposedNoDilation()), "grad_input.reference").verdict == "pass"
    assert _run(convwitness.load_adapter(GradBiasMean()), "transposed.reference").verdict == "pass"


def test_shrunk_witness_replays(tmp_path):
    """With shrinking on, the saved witness is a minimal case that still fails when replayed
    through the invariant alone (no hypothesis)."""
    from convwitness.cases.case import load_case
    adapter = convwitness.load_adapter(StrideTailGradInput())
    r = run_invariant(adapter, get("grad_input.forward_flipped_kernel"), "quick", seed=0,
                      report_dir=str(tmp_path))
    assert r.verdict == "fail"
    spec = convwitness.ConvSpec.from_dict(r.witness["spec"])
    assert any(s > 1 and rem for s, rem in zip(spec.stride, spec.remainder))
    case, _ = load_case(str(tmp_path / r.witness["path"]))
    assert not get("grad_input.forward_flipped_kernel").check(adapter, case).ok
