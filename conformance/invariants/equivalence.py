"""Forward equivalences: the adapter against itself on rewritten geometries.

Each rewrite computes the same exact values, so the two results may differ by at
most the sum of their derived bounds: groups as per-group convolutions, padding as
explicit zeros, stride as subsampling, dilation as a zero-inserted kernel,
translation by one stride, the other layout, and samples of a batch computed alone.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from .evidence import Evidence, compare, combine
from ..geometry.spec import ConvSpec
from ..cases.strategies import Needs
from ..cases.values import SALTS, aux_rng, fill, geometry_rng
from . import invariant
from ..numerics import reference as ref
from ._common import copies, overflow_possible, run_forward, self_bound


def _fwd(adapter, spec, x, w, b, y_hat=None):
    """(reference, bound valid for the adapter's own map) of one forward computation."""
    y = ref.forward(spec, x, w, b)
    return y, self_bound(adapter, spec, x, w, b, y_hat)


def _part(bound, pick):
    """The bound restricted by ``pick`` (a function of an array), arrays kept aligned."""
    return replace(bound, values=pick(bound.values), magnitude=pick(bound.magnitude),
                   overflow=None if bound.overflow is None else pick(bound.overflow))


def _skip(why: str) -> Evidence:
    return Evidence.skip(why)


def _caxis(spec: ConvSpec) -> int:
    return -1 if spec.layout == "channels_last" else 1


def _spatial(spec: ConvSpec, axis: int) -> int:
    """Array axis of spatial axis ``axis`` for x/y in the spec's layout."""
    return 1 + axis if spec.layout == "channels_last" else 2 + axis


def _same(adapter, spec, y, y_other, bound_a, bound_b, *, criterion, mask=None):
    tol = bound_a.values + bound_b.values
    free = overflow_possible(spec, adapter, bound_a) | overflow_possible(spec, adapter, bound_b)
    if mask is not None:
        free = free | ~mask
    return compare(y_other, y.astype(np.float64), tol, what="y", allow=free,
                   criterion=criterion, explanation=f"sum of both bounds; {bound_a.explain()}")


def _per_group(spec: ConvSpec) -> ConvSpec:
    return spec.replace(groups=1, in_channels=spec.in_channels // spec.groups,
                        out_channels=spec.out_channels // spec.groups)


@invariant("forward.group_split", derives=lambda spec, caps: [("forward", _per_group(spec))],
           passes=("forward",), needs=Needs(grouped=True),
           requires=lambda caps: None if caps.groups else "adapter does not claim groups",
           statement="a grouped convolution equals the per-group convolutions side by side")
def groups(adapter, case, ctx):
    """f_G(x, w)[:, g*Og:(g+1)*Og] = f_1(x[:, g*Cg:(g+1)*Cg], w[g*Og:(g+1)*Og]) for every group g,
    within the sum of both bounds."""
    spec = case.spec
    G, Cg, Og = spec.groups, spec.in_channels // spec.groups, spec.out_channels // spec.groups
    single = _per_group(spec)
    if not adapter.capabilities.admits(single):
        return _skip(f"per-group spec not admitted: {adapter.capabilities.refusal(single)}")
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    ax = _caxis(spec)
    parts = []
    for g in range(G):
        xs = np.take(case.x, range(g * Cg, (g + 1) * Cg), axis=ax)
        ws = case.w[g * Og:(g + 1) * Og]
        bs = None if case.b is None else case.b[g * Og:(g + 1) * Og]
        parts.append(run_forward(adapter, single, np.ascontiguousarray(xs), np.ascontiguousarray(ws), bs))
    joined = np.concatenate(parts, axis=ax)
    return _same(adapter, spec, y, joined, bound, bound,
                 criterion=f"groups: f_G(x) == concat of {G} single-group convolutions")


def _explicit_padding(spec: ConvSpec, x: np.ndarray):
    """x padded with zeros / cropped where negative; and the spec with zero padding."""
    sl, pads = [], []
    for lo, hi in spec.padding:
        sl.append(slice(max(0, -lo), None if hi >= 0 else hi))
        pads.append((max(0, lo), max(0, hi)))
    if spec.layout == "channels_last":
        cut = (slice(None),) + tuple(sl) + (slice(None),)
        width = [(0, 0)] + pads + [(0, 0)]
    else:
        cut = (slice(None), slice(None)) + tuple(sl)
        width = [(0, 0), (0, 0)] + pads
    return np.pad(x[cut], width), _zero_padded(spec)


def _zero_padded(spec: ConvSpec) -> ConvSpec:
    size = tuple(L + lo + hi for L, (lo, hi) in zip(spec.input_size, spec.padding))
    return spec.replace(input_size=size, padding=0)


@invariant("forward.explicit_padding", derives=lambda spec, caps: [("forward", _zero_padded(spec))],
           passes=("forward",), needs=Needs(padding=True),
           statement="padding equals explicit zeros around the input (cropping where negative)")
def padding(adapter, case, ctx):
    """f(x; p_lo, p_hi) = f(pad(x, p_lo, p_hi); 0, 0), negative padding cropping the input,
    within the sum of both bounds."""
    spec = case.spec
    xp, zero = _explicit_padding(spec, case.x)
    if not adapter.capabilities.admits(zero):
        return _skip(f"zero-padding spec not admitted: {adapter.capabilities.refusal(zero)}")
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    y0 = run_forward(adapter, zero, xp, case.w, case.b)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    _, bound0 = _fwd(adapter, zero, xp, case.w, case.b, y0)
    return _same(adapter, spec, y, y0, bound, bound0,
                 criterion=f"padding: f(x; {spec.padding}) == f(explicitly padded x; 0)")


@invariant("forward.stride_subsampling", derives=lambda spec, caps: [("forward", spec.replace(stride=1))],
           passes=("forward",), needs=Needs(stride=True),
           statement="a strided convolution is the stride-1 result subsampled by the stride")
def stride(adapter, case, ctx):
    """f(x; s)[..., h] = f(x; 1)[..., h*s] for h < L_out, within the sum of both bounds."""
    spec = case.spec
    unit = spec.replace(stride=1)
    if not adapter.capabilities.admits(unit):
        return _skip(f"stride-1 spec not admitted: {adapter.capabilities.refusal(unit)}")
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    y1 = run_forward(adapter, unit, case.x, case.w, case.b)
    sl = tuple(slice(0, h * s, s) for h, s in zip(spec.output_size, spec.stride))
    cut = (slice(None),) + sl + (slice(None),) if spec.layout == "channels_last" else (slice(None),) * 2 + sl
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    _, bound1 = _fwd(adapter, unit, case.x, case.w, case.b, y1)
    bound1 = _part(bound1, lambda a: np.ascontiguousarray(a[cut]))
    return _same(adapter, spec, y, np.ascontiguousarray(y1[cut]), bound, bound1,
                 criterion=f"stride: f(x; s={spec.stride}) == f(x; s=1)[::s]")


def _dilate_kernel(spec: ConvSpec, w: np.ndarray) -> np.ndarray:
    K = spec.effective_kernel
    lead = 1 if spec.layout == "channels_last" else 2
    shape = list(w.shape)
    for i, k in enumerate(K):
        shape[lead + i] = k
    out = np.zeros(shape, dtype=w.dtype)
    sl = tuple(slice(0, None, d) for d in spec.dilation)
    cut = (slice(None),) + sl + (slice(None),) if spec.layout == "channels_last" else (slice(None),) * 2 + sl
    out[cut] = w
    return out


def _undilated(spec: ConvSpec) -> ConvSpec:
    return spec.replace(kernel_size=spec.effective_kernel, dilation=1)


@invariant("forward.dilation_expansion", derives=lambda spec, caps: [("forward", _undilated(spec))],
           passes=("forward",), needs=Needs(dilation=True),
           statement="a dilated kernel equals the zero-inserted kernel without dilation")
def dilation(adapter, case, ctx):
    """f(x, w; d) = f(x, w_d; 1) with w_d[t*d] = w[t] and zeros between,
    within the sum of both bounds."""
    spec = case.spec
    wd = _dilate_kernel(spec, case.w)
    plain = _undilated(spec)
    if not adapter.capabilities.admits(plain):
        return _skip(f"undilated spec not admitted: {adapter.capabilities.refusal(plain)}")
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    yd = run_forward(adapter, plain, case.x, wd, case.b)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    _, bound_d = _fwd(adapter, plain, case.x, wd, case.b, yd)
    return _same(adapter, spec, y, yd, bound, bound_d,
                 criterion=f"dilation: f(x, w; d={spec.dilation}) == f(x, zero-inserted w; 1)")


def _shiftable(spec, caps) -> dict:
    """Axis -> shifted spec, for every axis along which a shift by one stride says
    something: two outputs or more, a shifted input still admitted, and a shifted window
    right of the leading padding."""
    out = {}
    for a in range(spec.ndim):
        s = spec.stride[a]
        if spec.output_size[a] < 2:
            continue
        size = list(spec.input_size)
        size[a] -= s
        try:
            shifted = spec.replace(input_size=tuple(size))
        except Exception:       # shorter than the kernel
            continue
        if caps.admits(shifted) and -(-max(spec.padding[a][0], 0) // s) < shifted.output_size[a]:
            out[a] = shifted
    return out


def _shift(spec, caps):
    """(axis, shifted spec) of the shift check on ``spec`` (None: no axis): the axis drawn
    from the geometry alone (cases/values.geometry_rng)."""
    axes = _shiftable(spec, caps)
    if not axes:
        return None
    a = int(geometry_rng(spec, SALTS["shift_axis"]).choice(sorted(axes)))
    return a, axes[a]


@invariant("forward.shift_equivariance",
           derives=lambda spec, caps: [("forward", (_shift(spec, caps) or (0, None))[1])],
           passes=("forward",),
           needs=Needs(applies=lambda spec, caps: bool(_shiftable(spec, caps)),
                       never=("coincidence:output_one",)),
           statement="shifting the input by one stride shifts the output by one position")
def translation(adapter, case, ctx):
    """With x'[..., i] = x[..., i + s] along one axis: f(x')[..., h] = f(x)[..., h + 1] for every
    h whose window lies right of the leading padding (h >= ceil(p_lo/s)), within both bounds."""
    spec = case.spec
    shift = _shift(spec, adapter.capabilities)
    if shift is None:
        return _skip("no axis can be shifted (two outputs, a shifted input admitted, a window "
                     "right of the leading padding)")
    a, shifted = shift
    s = spec.stride[a]
    ax = _spatial(spec, a)
    xs = np.ascontiguousarray(np.take(case.x, range(s, spec.input_size[a]), axis=ax))
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    y2 = run_forward(adapter, shifted, xs, case.w, case.b)
    n2 = shifted.output_size[a]
    start = -(-max(spec.padding[a][0], 0) // s)
    later = np.take(y, range(1, 1 + n2), axis=ax)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    _, bound2 = _fwd(adapter, shifted, xs, case.w, case.b, y2)
    bnd = _part(bound, lambda a: np.take(a, range(1, 1 + n2), axis=ax))
    mask = np.zeros(y2.shape, bool)
    idx = [slice(None)] * y2.ndim
    idx[ax] = slice(start, None)
    mask[tuple(idx)] = True
    return _same(adapter, spec, later, y2, bnd, bound2, mask=mask,
                 criterion=f"translation: f(x shifted by {s} on axis {a}) == f(x) shifted by 1")


def _to_layout(a: np.ndarray, layout: str) -> np.ndarray:
    if layout == "channels_last":
        return np.ascontiguousarray(np.moveaxis(a, 1, -1))
    return np.ascontiguousarray(np.moveaxis(a, -1, 1))


def _other_layout(spec: ConvSpec) -> ConvSpec:
    return spec.replace(layout="channels_first" if spec.layout == "channels_last" else "channels_last")


@invariant("forward.layout_agreement", derives=lambda spec, caps: [("forward", _other_layout(spec))],
           passes=("forward",),
           requires=lambda caps: None if {"channels_first", "channels_last"} <= caps.layouts
           else "adapter claims only one layout",
           statement="channels-last and channels-first give the same result")
def layout(adapter, case, ctx):
    """f_last(x^T, w^T)^T = f_first(x, w) (channels moved to the last axis and back),
    within the sum of both bounds."""
    spec = case.spec
    other = _other_layout(spec)
    other_layout = other.layout
    if not adapter.capabilities.admits(other):
        return _skip(f"{other_layout} not admitted: {adapter.capabilities.refusal(other)}")
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    yo = run_forward(adapter, other, _to_layout(case.x, other_layout),
                     _to_layout(case.w, other_layout), case.b)
    back = _to_layout(yo, spec.layout)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, np.maximum(np.abs(y), np.abs(back)))
    return _same(adapter, spec, y, back, bound, bound,
                 criterion=f"layout: {spec.layout} == {other_layout} (transposed back)")


@invariant("forward.batch_independence", derives=lambda spec, caps: [("forward", spec.replace(batch=1))],
           passes=("forward",), needs=Needs(batch_min=2),
           statement="sample i's output depends only on sample i (other samples changed, or "
                     "computed alone)")
def batch_independence(adapter, case, ctx):
    """For x' equal to x in sample i only: f(x')[i] = f(x)[i]; and f(x[i:i+1])[0] = f(x)[i],
    within the sum of both bounds."""
    spec = case.spec
    N = spec.batch
    rng = aux_rng(case.seed, SALTS["batch_sample"])
    i = int(rng.integers(0, N))
    other = fill(spec, case.kind if case.kind != "one_hot" else "small_int", int(rng.integers(0, 2**31)))["x"]
    x2 = other.copy()
    x2[i] = case.x[i]
    x, w, b, _ = copies(case)
    y = run_forward(adapter, spec, x, w, b)
    y2 = run_forward(adapter, spec, x2, case.w, case.b)
    _, bound = _fwd(adapter, spec, case.x, case.w, case.b, y)
    _, bound2 = _fwd(adapter, spec, x2, case.w, case.b, y2)
    sub2 = _part(bound2, lambda a: a[i:i + 1])
    sub = _part(bound, lambda a: a[i:i + 1])
    changed = _same(adapter, spec, y[i:i + 1], y2[i:i + 1], sub, sub2,
                    criterion=f"batch: sample {i} unchanged when the other {N - 1} samples change")
    one = spec.replace(batch=1)
    if not adapter.capabilities.admits(one):
        return changed
    y1 = run_forward(adapter, one, np.ascontiguousarray(case.x[i:i + 1]), case.w, case.b)
    alone = _same(adapter, spec, y[i:i + 1], y1, sub, sub,
                  criterion=f"batch: sample {i} computed alone equals sample {i} of the batch of {N}")
    return combine(changed, alone)
