"""How one geometry is built from a few choices (no hypothesis import).

The builder asks a *picker* for every choice: ``pick.int(lo, hi, label)``,
``pick.choice(seq, label)``, ``pick.bool(label)`` and ``pick.reject()``. Under
hypothesis the picker wraps ``draw`` (:mod:`.strategies`), so every choice shrinks;
for the covering schedule (:mod:`.schedule`) it is :class:`RngPicker`, which takes
the choices it is told (``forced``, by label) and draws the rest from a seeded
generator. One builder, so a scheduled geometry and a searched one obey the same rules.

A geometry has one **feature** (see :data:`FEATURES`), one **coincidence** (an equality
that real networks run all the time and that independent draws almost never produce,
see :data:`COINCIDENCES`) and one channel structure (:data:`GROUPINGS`), each with its
own share of the draws, combined freely where they are compatible.
"""
from __future__ import annotations

import math
import random
from dataclasses import dataclass, field
from typing import Callable

from ..errors import SpecError
from ..geometry.capabilities import Capabilities
from ..geometry.formats import STORAGE_FORMATS, available
from ..geometry.spec import ConvSpec
from .features import THRESHOLD_COUNTS, axis_taps_reading, empty_shape_tells, reads_input
from .profiles import Profile
from .values import KINDS, NUMERIC_KINDS

__all__ = ["Needs", "FEATURES", "GROUPINGS", "COINCIDENCES", "THRESHOLD_COUNTS", "Reject",
           "RngPicker", "features_for", "coincidences_for", "groupings_for", "dtypes_for",
           "build_spec", "usable"]

FEATURES = ("plain", "remainder", "stride_over_kernel", "anisotropic", "pad_before", "pad_after",
            "window_in_padding", "kernel_fills_input", "unit_length", "pointwise",
            "dilated_strided", "everyday", "zero_batch")
GROUPINGS = ("single", "grouped", "depthwise", "depthwise_multiplier")
#: equalities of real networks (BUG-CLASSES.md §4 item 20, classes C27, C03, C05):
#: ``equal_channels`` C_in/G == C_out/G > 1 (64->64; with groups: channels per group ==
#: outputs per group > 1); ``batch_equals_channels`` N == C_in; ``square_input`` every axis
#: alike (square input, square kernel, same stride, dilation and padding);
#: ``square_kernel`` equal kernel lengths > 1, the rest drawn per axis;
#: ``stride_equals_kernel`` s == k > 1 on every axis of a 2-D/3-D square kernel (patch
#: embeddings); ``output_one`` one output position per axis
COINCIDENCES = ("equal_channels", "batch_equals_channels", "square_input", "square_kernel",
                "stride_equals_kernel", "output_one")


@dataclass(frozen=True)
class Needs:
    """What an invariant requires of its cases.

    ``bias``/``stride``/``dilation``/``padding``/``grouped`` force the property (True), forbid
    it (False) or leave it free (None); ``kinds``, ``layouts``, ``batch_min`` restrict those.
    ``applies(spec, caps)`` is the invariant's own geometry condition (what it would
    otherwise skip): a geometry it refuses is never drawn, scheduled or reused, so no
    scheduled target is reached only by a skipped example. ``never`` lists the targets
    no geometry meeting that condition can have (left out of the schedule's targets and
    the report's holes: e.g. one output position for a shift of the output). ``lean``:
    a lean schedule (``Invariant.needs_for``, cases/schedule.py ``LEAN_LEAVES``).
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
    applies: Callable | None = field(default=None, compare=False)
    never: tuple = ()
    lean: bool = False

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


class Reject(Exception):
    """The choices so far give no admitted geometry (hypothesis: ``assume(False)``)."""


class RngPicker:
    """Choices from ``forced`` (label -> value) where valid, otherwise from a seeded rng.

    A forced int may be ``"max"`` or ``"min"``: the end of whatever range is asked.
    """

    def __init__(self, seed: int, forced: dict | None = None):
        self.rng = random.Random(seed)
        self.forced = dict(forced or {})

    def int(self, lo: int, hi: int, label: str) -> int:
        f = self.forced.get(label)
        if f == "max":
            return hi
        if f == "min":
            return lo
        if isinstance(f, int) and not isinstance(f, bool) and lo <= f <= hi:
            return f
        return self.rng.randint(lo, hi)

    def choice(self, seq, label: str):
        seq = list(seq)
        f = self.forced.get(label)
        if f is not None and f in seq:
            return f
        return seq[self.rng.randrange(len(seq))]

    def bool(self, label: str) -> bool:
        f = self.forced.get(label)
        return f if isinstance(f, bool) else self.rng.random() < 0.5

    def reject(self):
        raise Reject()


def features_for(caps: Capabilities, needs: Needs, ndim: int) -> list[str]:
    """The features this invariant may draw (``everyday`` listed twice: twice the share)."""
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
    if needs.stride or needs.dilation:
        drop.add("everyday")
    if needs.dilation:
        drop.add("pointwise")
    if not (caps.zero_batch and needs.zero_batch is not False and needs.batch_min == 0):
        drop.add("zero_batch")
    if needs.zero_batch:
        return ["zero_batch"]
    kept = [f for f in out if f not in drop]
    return kept or ["plain"]


def groupings_for(caps: Capabilities, needs: Needs, coincidence: str = "none") -> list[str]:
    """Channel structures (``single`` listed twice: one group is the common case)."""
    choices = ["single"] + list(GROUPINGS) if caps.groups and needs.grouped is not False else ["single"]
    if needs.grouped:
        choices = [g for g in choices if g != "single"] or ["grouped"]
    if coincidence == "equal_channels":
        choices = [g for g in choices if g in ("single", "grouped")]
    return choices


def coincidences_for(caps: Capabilities, needs: Needs, ndim: int, feature: str) -> list[str]:
    """The coincidences compatible with this feature ("none" first)."""
    out = []
    if groupings_for(caps, needs, "equal_channels"):
        out.append("equal_channels")
    if feature != "zero_batch" and not needs.zero_batch:
        out.append("batch_equals_channels")
    if ndim >= 2 and feature != "anisotropic":
        out.append("square_input")
    if ndim >= 2 and feature not in ("pointwise", "everyday"):
        out.append("square_kernel")
    if ndim >= 2 and caps.stride and needs.stride is not False and needs.dilation is not True and \
            feature not in ("stride_over_kernel", "everyday", "pointwise", "dilated_strided"):
        out.append("stride_equals_kernel")
    if not needs.transposed and feature not in ("window_in_padding", "unit_length"):
        out.append("output_one")
    return ["none"] + out


def dtypes_for(caps: Capabilities, needs: Needs) -> list[str]:
    names = [d for d in STORAGE_FORMATS if d in caps.dtypes and available(d)]
    if needs.dtypes is not None:
        names = [d for d in names if d in needs.dtypes]
    return names


def _axis(pick, feature, coincidence, caps, profile, needs, lmax, kernel=None):
    """One axis: (L, k, s, d, lo, hi, op); ``kernel`` forces the kernel length."""
    pmax, kmax = profile.max_padding, profile.max_kernel
    if feature == "everyday":
        lo = hi = pick.int(0, 1, "pad") if needs.padding is not False else 0
        if needs.transposed:
            L = pick.int(1, max(1, min(lmax, 8)), "length")
            return max(L, 2), 3, 1, 1, lo, hi, 0
        L = pick.int(max(1, 3 - 2 * lo), max(3, lmax), "length")
        return L, 3, 1, 1, lo, hi, 0
    kmin = 2 if coincidence in ("square_kernel", "stride_equals_kernel") else 1
    if kernel is not None:
        k = kernel
    else:
        k = 1 if feature == "pointwise" else pick.int(min(kmin, kmax), kmax, "kernel")
    same = coincidence == "stride_equals_kernel"
    d = 1
    if caps.dilation and needs.dilation is not False and k > 1 and not same:
        dmin = 2 if feature == "dilated_strided" else 1
        d = pick.int(dmin, profile.max_dilation, "dilation")
    e = d * (k - 1) + 1
    s = 1
    if same:
        s = k
    elif caps.stride and needs.stride is not False:
        if feature == "stride_over_kernel":
            s = pick.int(e + 1, e + 2, "stride")
        else:
            smin = 2 if feature in ("remainder", "dilated_strided") else 1
            s = pick.int(smin, max(smin, profile.max_stride), "stride")
    neg = ("negative" in caps.padding and not needs.transposed and needs.negative_padding is not False)
    pmin = -2 if neg else 0
    lo = hi = 0
    if needs.padding is not False:
        sym_ok = "symmetric" in caps.padding
        asym_ok = "asymmetric" in caps.padding
        if feature == "window_in_padding":
            lo = pick.int(e, e + 1, "pad_lo")
            hi = pick.int(0, pmax, "pad_hi")
        elif feature in ("pad_before", "pad_after"):
            a = pick.int(max(pmin, 0), pmax - 1, "pad_small")
            b = pick.int(a + 1, pmax, "pad_large")
            lo, hi = (b, a) if feature == "pad_before" else (a, b)
        elif asym_ok and pick.bool("asymmetric"):
            lo = pick.int(pmin, pmax, "pad_lo")
            hi = pick.int(pmin, pmax, "pad_hi")
        elif sym_ok or asym_ok:
            lo = hi = pick.int(max(pmin, -1), pmax, "pad")
    if needs.transposed:
        lo, hi = max(lo, 0), max(hi, 0)
    op = 0
    if needs.transposed:
        if caps.output_padding and max(s, d) > 1:
            op = pick.int(0, max(s, d) - 1, "output_padding")
        L = pick.int(1, max(1, min(lmax, 8)), "length")
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
        r = pick.int(1, s - 1, "remainder")
        m = pick.int(0, max(0, (lmax - low) // s), "windows")
        L = e - lo - hi + m * s + r
        if L < low:
            L += s * (-(-(low - L) // s))
    else:
        L = pick.int(max(low, 1), max(low, 1, lmax), "length")
    if coincidence == "output_one":
        # one window: L + lo + hi - e < s; trim the trailing padding if it is too long
        L = max(low, 1)
        over = L + lo + hi - e - (s - 1)
        if over > 0:
            hi -= over
            if hi < pmin or (hi < 0 and lo < 0) or L < max(-lo, -hi, 0):
                pick.reject()
    if not axis_taps_reading(L, k, s, d, lo, hi):
        keep = feature in ("unit_length", "kernel_fills_input") or coincidence == "output_one"
        L, lo, hi = _reading(L, k, s, d, lo, hi, pmin, pmax, keep)
    return L, k, s, d, lo, hi, op


def _reading(L, k, s, d, lo, hi, pmin, pmax, keep):
    """An axis on which no output reads data (every window in the padding or the crop, or
    dilated taps stepping over the data), moved to one that reads: more windows (L grown
    by whole strides), or, where the window count is the point (``keep``), the padding
    moved from one side to the other. Unchanged if neither reads (then rejected): far
    cheaper than drawing again."""
    if not keep:
        for m in (1, 2, 3):
            if axis_taps_reading(L + m * s, k, s, d, lo, hi):
                return L + m * s, lo, hi
    step = -1 if lo > 0 else 1
    for delta in range(1, abs(lo) + abs(hi) + 1):
        a, b = lo + step * delta, hi - step * delta
        if pmin <= a <= pmax and pmin <= b <= pmax and axis_taps_reading(L, k, s, d, a, b):
            return L, a, b
    return L, lo, hi


def _channels(pick, caps: Capabilities, profile: Profile, needs: Needs, coincidence: str):
    kind = pick.choice(groupings_for(caps, needs, coincidence), "grouping")
    cmax = profile.max_channels
    equal = coincidence == "equal_channels"
    small = coincidence == "batch_equals_channels"
    threshold = kind in ("single", "depthwise", "depthwise_multiplier") and not small and \
        pick.choice(("small", "threshold"), "channel_counts") == "threshold"
    if kind == "single":
        if threshold:
            cin = pick.choice(THRESHOLD_COUNTS, "channels_in")
            if equal:
                return 1, cin, cin, kind
            outs = (1, 2, 3) if cin > 16 else (1, 2, 3) + THRESHOLD_COUNTS
            return 1, cin, pick.choice(outs, "channels_out"), kind
        cin = pick.int(2 if equal else 1, max(2, cmax), "channels_in")
        return 1, cin, cin if equal else pick.int(1, cmax, "channels_out"), kind
    if threshold:
        G = pick.choice(THRESHOLD_COUNTS, "groups")
    else:
        G = pick.int(2, max(2, profile.max_groups), "groups")
    if kind == "grouped":
        cg = pick.int(2, max(2, cmax), "channels_per_group")
        og = cg if equal else pick.int(1, cmax, "outputs_per_group")
    elif kind == "depthwise":
        cg, og = 1, 1
    else:
        cg, og = 1, pick.int(2, max(2, cmax), "multiplier")
    return G, G * cg, G * og, kind


def zero_spatial_allowed(caps: Capabilities, needs: Needs) -> bool:
    """Whether this invariant may draw a zero-size spatial axis (claimed, padding allowed,
    not transposed, not an empty batch already)."""
    return bool(caps.zero_spatial and not needs.transposed and needs.padding is not False
                and not needs.zero_batch and {"symmetric", "asymmetric"} & set(caps.padding))


def _empty_axis(axis, caps: Capabilities):
    """The axis with length 0 and padding enough for the windows (all of them in it)."""
    _, k, s, d, lo, hi, op = axis
    e, asym = d * (k - 1) + 1, "asymmetric" in caps.padding
    lo, hi = max(lo, 0), max(hi, 0, e - max(lo, 0) if asym else 0)
    if not asym:
        lo = hi = max(lo, hi, -(-e // 2))
    return 0, k, s, d, lo, hi, op


def build_spec(pick, caps: Capabilities, profile: Profile, needs: Needs) -> ConvSpec:
    """One admitted geometry from the picker's choices (``pick.reject()`` when none)."""
    ndims = sorted(caps.ndims if needs.ndims is None else set(caps.ndims) & set(needs.ndims))
    dtypes = dtypes_for(caps, needs)
    layouts = sorted(caps.layouts if needs.layouts is None else set(caps.layouts) & set(needs.layouts))
    if not ndims or not dtypes or not layouts:
        raise SpecError(f"strategies: nothing to draw: capabilities ({caps.summary()}) and the "
                        f"invariant's needs leave ndims={ndims}, dtypes={dtypes}, layouts={layouts}")
    ndim = pick.choice(ndims, "ndim")
    feature = pick.choice(features_for(caps, needs, ndim), "feature")
    # "none" gets two shares: most draws stay independent
    co = coincidences_for(caps, needs, ndim, feature)
    coincidence = pick.choice(["none"] + co, "coincidence")
    G, cin, cout, _grouping = _channels(pick, caps, profile, needs, coincidence)
    if feature == "zero_batch" or needs.zero_batch:
        batch = 0
    elif coincidence == "batch_equals_channels":
        batch = cin
        if batch < needs.batch_min:
            pick.reject()
    else:
        batch = pick.int(max(1, needs.batch_min), max(1, needs.batch_min, profile.max_batch), "batch")
    # spatial sizes within the element budget for these channel counts
    per_position = max(1, batch) * max(cin, cout, 1)
    lcap = int((profile.max_elements / per_position) ** (1.0 / ndim))
    lmax = max(1, min(profile.max_spatial[ndim - 1], lcap))
    first = _axis(pick, feature, coincidence, caps, profile, needs, lmax)
    if coincidence == "square_input":
        axes = [first] * ndim
    else:
        kernel = first[1] if coincidence in ("square_kernel", "stride_equals_kernel") else None
        # one unit-length axis beside drawn ones (a shift or a read along another axis)
        rest = "plain" if feature == "unit_length" else feature
        axes = [first] + [_axis(pick, rest, coincidence, caps, profile, needs, lmax, kernel)
                          for _ in range(ndim - 1)]
    # one draw in eight; 7, not 0, so that shrinking (toward 0) leaves the axis non-empty
    if zero_spatial_allowed(caps, needs) and pick.int(0, 7, "zero_spatial") == 7:
        axes[0] = _empty_axis(axes[0], caps)
    if feature == "anisotropic" and not (len({a[1:] for a in axes}) > 1 and len({a[0] for a in axes}) > 1):
        pick.reject()
    checks = ((needs.stride, lambda a: a[2] > 1), (needs.dilation, lambda a: a[3] > 1),
              (needs.padding, lambda a: a[4] or a[5]),
              (needs.negative_padding, lambda a: a[4] < 0 or a[5] < 0))
    for wanted, test in checks:
        if wanted and not any(test(a) for a in axes):
            pick.reject()
    bias = needs.bias if needs.bias is not None else (caps.bias and pick.bool("bias"))
    if bias and not caps.bias:
        pick.reject()
    try:
        spec = ConvSpec(batch=batch, in_channels=cin, out_channels=cout,
                        input_size=tuple(a[0] for a in axes), kernel_size=tuple(a[1] for a in axes),
                        stride=tuple(a[2] for a in axes), dilation=tuple(a[3] for a in axes),
                        padding=tuple((a[4], a[5]) for a in axes), groups=G, bias=bool(bias),
                        dtype=pick.choice(dtypes, "dtype"), layout=pick.choice(layouts, "layout"),
                        transposed=needs.transposed,
                        output_padding=tuple(a[6] for a in axes))
    except SpecError:
        pick.reject()
        raise
    if not usable(spec, caps, profile, needs):
        pick.reject()
    return spec


def usable(spec: ConvSpec, caps: Capabilities, profile: Profile, needs: Needs) -> bool:
    """Claimed, within the element budget, able to show a bug (features.py), and applies."""
    return caps.admits(spec) and empty_shape_tells(spec) and reads_input(spec) and max(
        math.prod(spec.x_shape), math.prod(spec.w_shape), math.prod(spec.y_shape)) <= profile.max_elements \
        and (needs.applies is None or needs.applies(spec, caps))
