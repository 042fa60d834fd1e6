"""Hypothesis strategies for geometries and cases (public).

They draw only what the adapter's capabilities admit and the invariant needs, sized
by the profile, and they *reach* the geometries where convolution code breaks: each
draw first picks a feature and then builds the geometry so that the feature holds.

Features (per spatial axis unless said): ``plain``; ``remainder``
((L + p_lo + p_hi - e) mod s != 0); ``stride_over_kernel`` (s > e);
``anisotropic`` (axes differ in k, s, d, p and size); ``pad_before`` / ``pad_after``
(asymmetric padding, each order); ``window_in_padding`` (p_lo >= e: the first window
reads only padding); ``kernel_fills_input`` (L_out = 1); ``unit_length`` (L = 1);
``pointwise`` (1x1 kernels); ``dilated_strided`` (d >= 2 with s >= 2); ``everyday`` (3-tap kernels, stride
1, no dilation, padding 0 or 1: the shape fast paths such as Winograd serve);
``zero_batch`` (N = 0).
Channel structure, drawn independently of the feature: one group, 1 < G < C_in,
depthwise with multiplier 1 and > 1; channel counts small, or (half the draws) on
either side of vector and tile widths: 7/8/9, 15/16/17, 31/32/33 (the spatial size is
then kept small enough for the profile's element budget).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from hypothesis import assume, strategies as st

from ..geometry.capabilities import Capabilities
from .case import Case
from ..errors import SpecError
from ..geometry.formats import STORAGE_FORMATS, available
from .profiles import Profile, get_profile
from ..geometry.spec import ConvSpec
from .values import KINDS, NUMERIC_KINDS, fill

__all__ = ["Needs", "FEATURES", "GROUPINGS", "specs", "cases", "examples"]

FEATURES = ("plain", "remainder", "stride_over_kernel", "anisotropic", "pad_before", "pad_after",
            "window_in_padding", "kernel_fills_input", "unit_length", "pointwise",
            "dilated_strided", "everyday", "zero_batch")
GROUPINGS = ("single", "grouped", "depthwise", "depthwise_multiplier")
THRESHOLD_COUNTS = (7, 8, 9, 15, 16, 17, 31, 32, 33)


@dataclass(frozen=True)
class Needs:
    """What an invariant requires of its cases.

    ``bias``/``stride``/``dilation``/``padding``/``grouped`` force the property
    (True), forbid it (False) or leave it free (None). ``kinds`` are the value kinds
    allowed. ``layouts`` restricts the layout; ``batch_min`` the batch size.
    """

    transposed: bool = False
    kinds: tuple = NUMERIC_KINDS
    bias: bool | None = None
    stride: bool | None = None
    dilation: bool | None = None
    padding: bool | None = None
    grouped: bool | None = None
    negative_padding: bool | None = None
    zero_batch: bool | None = None
    batch_min: int = 1
    layouts: tuple | None = None
    dtypes: tuple | None = None
    ndims: tuple | None = None
    features: tuple | None = None

    def __post_init__(self):
        bad = [k for k in self.kinds if k not in KINDS]
        if bad:
            raise SpecError(f"Needs: kinds={self.kinds!r} has unknown kinds {bad}; expected a "
                            f"subset of {KINDS}")
        if self.features is not None:
            badf = [f for f in self.features if f not in FEATURES]
            if badf:
                raise SpecError(f"Needs: features={self.features!r} has unknown features {badf}; "
                                f"expected a subset of {FEATURES}")


def _check_args(capabilities, profile, needs):
    if not isinstance(capabilities, Capabilities):
        raise SpecError(f"strategies: capabilities={capabilities!r} must be a convwitness.Capabilities")
    profile = get_profile(profile)
    if needs is None:
        needs = Needs()
    if not isinstance(needs, Needs):
        raise SpecError(f"strategies: needs={needs!r} must be a convwitness.cases.strategies.Needs")
    return profile, needs


def _features(caps: Capabilities, needs: Needs, ndim: int) -> list[str]:
    # the everyday 3-tap convolution is listed twice: it is the shape real code (and its
    # fast paths) serves most, so it gets twice the share of draws
    out = list(needs.features or FEATURES + ("everyday",))
    asym = "asymmetric" in caps.padding
    stride_ok = caps.stride and needs.stride is not False
    dil_ok = caps.dilation and needs.dilation is not False
    drop = set()
    if not stride_ok:
        drop |= {"remainder", "stride_over_kernel", "dilated_strided"}
    if not dil_ok:
        drop.add("dilated_strided")
    if not asym or needs.padding is False:
        drop |= {"pad_before", "pad_after", "window_in_padding"}
    if needs.transposed:
        drop |= {"remainder", "kernel_fills_input", "window_in_padding"}
    if ndim == 1:
        drop.add("anisotropic")
    if not (caps.zero_batch and needs.zero_batch is not False and needs.batch_min == 0):
        drop.add("zero_batch")
    if needs.zero_batch:
        return ["zero_batch"]
    kept = [f for f in out if f not in drop]
    return kept or ["plain"]


def _axis(draw, feature: str, caps: Capabilities, profile: Profile, ndim: int, needs: Needs,
          lmax: int):
    """One axis: (L, k, s, d, lo, hi, op)."""
    pmax = profile.max_padding
    kmax = profile.max_kernel
    if feature == "everyday":
        lo = hi = draw(st.integers(0, 1), label="pad") if needs.padding is not False else 0
        if needs.transposed:
            L = draw(st.integers(1, max(1, min(lmax, 8))), label="length")
            return max(L, 2), 3, 1, 1, lo, hi, 0
        L = draw(st.integers(max(1, 3 - 2 * lo), max(3, lmax)), label="length")
        return L, 3, 1, 1, lo, hi, 0
    k = 1 if feature == "pointwise" else draw(st.integers(1, kmax), label="kernel")
    d = 1
    if caps.dilation and needs.dilation is not False and k > 1:
        dmin = 2 if feature == "dilated_strided" else 1
        d = draw(st.integers(dmin, profile.max_dilation), label="dilation")
    e = d * (k - 1) + 1
    s = 1
    if caps.stride and needs.stride is not False:
        if feature == "stride_over_kernel":
            s = draw(st.integers(e + 1, e + 2), label="stride")
        else:
            smin = 2 if feature in ("remainder", "dilated_strided") else 1
            s = draw(st.integers(smin, max(smin, profile.max_stride)), label="stride")
    neg = ("negative" in caps.padding and not needs.transposed and needs.negative_padding is not False)
    pmin = -2 if neg else 0
    lo = hi = 0
    if needs.padding is not False:
        sym_ok = "symmetric" in caps.padding
        asym_ok = "asymmetric" in caps.padding
        if feature == "window_in_padding":
            lo = draw(st.integers(e, e + 1), label="pad_lo")
            hi = draw(st.integers(0, pmax), label="pad_hi")
        elif feature in ("pad_before", "pad_after"):
            a = draw(st.integers(max(pmin, 0), pmax - 1), label="pad_small")
            b = draw(st.integers(a + 1, pmax), label="pad_large")
            lo, hi = (b, a) if feature == "pad_before" else (a, b)
        elif asym_ok and draw(st.booleans(), label="asymmetric"):
            lo = draw(st.integers(pmin, pmax), label="pad_lo")
            hi = draw(st.integers(pmin, pmax), label="pad_hi")
        elif sym_ok or asym_ok:
            lo = hi = draw(st.integers(max(pmin, -1), pmax), label="pad")
    if needs.transposed:
        lo, hi = max(lo, 0), max(hi, 0)
    op = 0
    if needs.transposed:
        if caps.output_padding and max(s, d) > 1:
            op = draw(st.integers(0, max(s, d) - 1), label="output_padding")
        L = draw(st.integers(1, max(1, min(lmax, 8))), label="length")
        # the output must keep at least one element
        need = lo + hi - e - op + 1
        if (L - 1) * s < need:
            L = max(L, -(-need // s) + 1)
        return L, k, s, d, lo, hi, op
    low = max(e - lo - hi, -lo, -hi, -(lo + hi), 0)
    if feature == "unit_length":
        L = 1
        if 1 + lo + hi < e:
            hi = e - 1 - lo
    elif feature == "kernel_fills_input" and low >= 1:
        L = low
    elif feature == "remainder" and s > 1:
        r = draw(st.integers(1, s - 1), label="remainder")
        m = draw(st.integers(0, max(0, (lmax - low) // s)), label="windows")
        L = e - lo - hi + m * s + r
        if L < low:
            L += s * (-(-(low - L) // s))
    else:
        L = draw(st.integers(max(low, 1), max(low, 1, lmax)), label="length")
    return L, k, s, d, lo, hi, op


def _channels(draw, caps: Capabilities, profile: Profile, needs: Needs):
    # one group is the common case: it gets two shares of the draws
    choices = ["single"] + list(GROUPINGS) if caps.groups and needs.grouped is not False else ["single"]
    if needs.grouped:
        choices = [g for g in choices if g != "single"] or ["grouped"]
    kind = draw(st.sampled_from(choices), label="grouping")
    cmax = profile.max_channels
    threshold = kind in ("single", "depthwise", "depthwise_multiplier") and \
        draw(st.sampled_from(("small", "threshold")), label="channel_counts") == "threshold"
    if kind == "single":
        if threshold:
            cin = draw(st.sampled_from(THRESHOLD_COUNTS), label="channels_in")
            outs = (1, 2, 3) if cin > 16 else (1, 2, 3) + THRESHOLD_COUNTS
            return 1, cin, draw(st.sampled_from(outs), label="channels_out"), kind
        return 1, draw(st.integers(1, cmax), label="channels_in"), \
            draw(st.integers(1, cmax), label="channels_out"), kind
    if threshold:
        G = draw(st.sampled_from(THRESHOLD_COUNTS), label="groups")
    else:
        G = draw(st.integers(2, max(2, profile.max_groups)), label="groups")
    if kind == "grouped":
        cg = draw(st.integers(2, max(2, cmax)), label="channels_per_group")
        og = draw(st.integers(1, cmax), label="outputs_per_group")
    elif kind == "depthwise":
        cg, og = 1, 1
    else:
        cg, og = 1, draw(st.integers(2, max(2, cmax)), label="multiplier")
    return G, G * cg, G * og, kind


def _dtypes(caps: Capabilities, needs: Needs) -> list[str]:
    names = [d for d in STORAGE_FORMATS if d in caps.dtypes and available(d)]
    if needs.dtypes is not None:
        names = [d for d in names if d in needs.dtypes]
    return names


@st.composite
def _spec(draw, caps: Capabilities, profile: Profile, needs: Needs):
    ndims = sorted(caps.ndims if needs.ndims is None else set(caps.ndims) & set(needs.ndims))
    dtypes = _dtypes(caps, needs)
    layouts = sorted(caps.layouts if needs.layouts is None else set(caps.layouts) & set(needs.layouts))
    if not ndims or not dtypes or not layouts:
        raise SpecError(f"strategies: nothing to draw: capabilities ({caps.summary()}) and the "
                        f"invariant's needs leave ndims={ndims}, dtypes={dtypes}, layouts={layouts}")
    ndim = draw(st.sampled_from(ndims), label="ndim")
    feature = draw(st.sampled_from(_features(caps, needs, ndim)), label="feature")
    G, cin, cout, _grouping = _channels(draw, caps, profile, needs)
    if feature == "zero_batch" or needs.zero_batch:
        batch = 0
    else:
        batch = draw(st.integers(max(1, needs.batch_min), max(1, needs.batch_min, profile.max_batch)),
                     label="batch")
    # spatial sizes within the element budget for these channel counts
    per_position = max(1, batch) * max(cin, cout, 1)
    lcap = int((profile.max_elements / per_position) ** (1.0 / ndim))
    lmax = max(1, min(profile.max_spatial[ndim - 1], lcap))
    axes = [_axis(draw, feature, caps, profile, ndim, needs, lmax) for _ in range(ndim)]
    if feature == "anisotropic":
        assume(len({a[1:] for a in axes}) > 1 and len({a[0] for a in axes}) > 1)
    if needs.stride:
        assume(any(a[2] > 1 for a in axes))
    if needs.dilation:
        assume(any(a[3] > 1 for a in axes))
    if needs.padding:
        assume(any(a[4] or a[5] for a in axes))
    if needs.negative_padding:
        assume(any(a[4] < 0 or a[5] < 0 for a in axes))
    bias = needs.bias if needs.bias is not None else (caps.bias and draw(st.booleans(), label="bias"))
    if bias and not caps.bias:
        assume(False)
    try:
        spec = ConvSpec(batch=batch, in_channels=cin, out_channels=cout,
                        input_size=tuple(a[0] for a in axes), kernel_size=tuple(a[1] for a in axes),
                        stride=tuple(a[2] for a in axes), dilation=tuple(a[3] for a in axes),
                        padding=tuple((a[4], a[5]) for a in axes), groups=G, bias=bool(bias),
                        dtype=draw(st.sampled_from(dtypes), label="dtype"),
                        layout=draw(st.sampled_from(layouts), label="layout"),
                        transposed=needs.transposed,
                        output_padding=tuple(a[6] for a in axes))
    except SpecError:
        assume(False)
        raise
    assume(caps.admits(spec))
    assume(max(math.prod(spec.x_shape), math.prod(spec.w_shape), math.prod(spec.y_shape))
           <= profile.max_elements)
    return spec


def specs(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of ConvSpecs inside ``capabilities`` that meet ``needs``."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _spec(capabilities, profile, needs)


@st.composite
def _cases(draw, caps, profile, needs, count):
    spec = draw(_spec(caps, profile, needs))
    kinds = list(needs.kinds)
    out = []
    for i in range(count):
        kind = draw(st.sampled_from(kinds), label="kind")
        seed = draw(st.integers(0, 2 ** 32 - 1), label="seed")
        arrays = fill(spec, kind, seed)
        out.append(Case(spec, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], kind,
                        seed=seed))
    return tuple(out)


def examples(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of tuples of ``profile.values`` Cases sharing one geometry."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _cases(capabilities, profile, needs, profile.values)


def cases(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of single Cases."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _cases(capabilities, profile, needs, 1).map(lambda t: t[0])
