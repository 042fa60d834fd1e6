"""The coverage classifier: which geometry features a drawn spec has.

Kept apart from the strategies so that reading or comparing reports (``diff``) never
imports hypothesis.
"""
from __future__ import annotations

import math
from functools import lru_cache

from ..geometry.spec import ConvSpec

#: channel counts on either side of vector and tile widths (8, 16, 32): class C13
THRESHOLD_COUNTS = (7, 8, 9, 15, 16, 17, 31, 32, 33)

__all__ = ["feature_of", "reach_of", "pair_tags", "geometry_tags", "PAIRS", "empty_shape_tells",
           "reads_input", "large_tensor", "reach_within"]


def feature_of(spec: ConvSpec) -> dict:
    """Coverage features of a spec (for the report)."""
    grouping = "single" if spec.groups == 1 else (
        "depthwise" if spec.in_channels == spec.groups else "grouped")
    pads = set()
    for lo, hi in spec.padding:
        pads.add("negative" if min(lo, hi) < 0 else "asymmetric" if lo != hi else
                 "symmetric" if lo else "none")
    return {
        "ndim": str(spec.ndim),
        "dtype": spec.dtype,
        "layout": spec.layout,
        "stride": "strided" if any(s > 1 for s in spec.stride) else "unit",
        "dilation": "dilated" if any(d > 1 for d in spec.dilation) else "none",
        "groups": grouping,
        "padding": "+".join(sorted(pads)),
        "remainder": "nonzero" if any(spec.remainder) else "zero",
        "batch": "zero" if spec.batch == 0 else "one" if spec.batch == 1 else "many",
        "bias": "bias" if spec.bias else "nobias",
        "transposed": "transposed" if spec.transposed else "conv",
    }


def empty_shape_tells(spec: ConvSpec) -> bool:
    """Whether an empty batch can show a wrong output shape: with N = 0 the output has no
    values, only its shape, so it must differ from the input's shape, padded or not (an
    implementation that returns a tensor shaped like its (padded) input, as tensorflow's
    ``tf.nn.convolution`` did with batch 0, is then caught). True for N > 0."""
    if spec.batch:
        return True
    y = tuple(spec.y_shape[1:])
    padded = [L + lo + hi for L, (lo, hi) in zip(spec.input_size, spec.padding)]
    if spec.layout == "channels_last":
        return y not in (tuple(spec.x_shape[1:]), (*padded, spec.in_channels))
    return y not in (tuple(spec.x_shape[1:]), (spec.in_channels, *padded))


def reads_input(spec: ConvSpec) -> bool:
    """Whether some output of a (non-transposed) convolution reads an input element: on
    every axis some window has a tap inside the input. If not, every output is the bias
    alone (every tap in the padding, or dilated taps stepping over the data) and the
    geometry says nothing about how the data is read, whatever its features (a zero-size
    axis is the corner that means it, and is let through)."""
    return 0 in spec.input_size or all(_taps_reading(spec))


def _taps_reading(spec: ConvSpec) -> list[int]:
    """Per axis, how many kernel taps read an input element in some output (all of them
    for a transposed convolution, which scatters every input through every tap)."""
    if spec.transposed:
        return list(spec.kernel_size)
    return [axis_taps_reading(L, k, s, d, lo, hi) for L, k, s, d, (lo, hi) in
            zip(spec.input_size, spec.kernel_size, spec.stride, spec.dilation, spec.padding)]


def axis_taps_reading(L: int, k: int, s: int, d: int, lo: int, hi: int) -> int:
    """How many of one axis's k taps read an input element in some output (convolution,
    not transposed)."""
    n = (L + lo + hi - d * (k - 1) - 1) // s + 1      # output positions (none if < 1)
    count = 0
    for t in range(k):
        # tap t reads position o*s + c, c = t*d - lo: the first output at or past the
        # input's start is o = max(0, ceil(-c / s)); it reads data if it exists and is < L
        c = t * d - lo
        o = max(0, -(c // s))
        count += o < n and o * s + c < L
    return count


def _positions_read(spec: ConvSpec) -> int:
    """How many positions of the first spatial axis some output reads (its length for a
    transposed convolution)."""
    L, k, s, d, (lo, _), n = (spec.input_size[0], spec.kernel_size[0], spec.stride[0],
                              spec.dilation[0], spec.padding[0], spec.output_size[0])
    if spec.transposed:
        return L
    return len({o * s - lo + t * d for o in range(n) for t in range(k)} & set(range(L)))


def _axes(spec: ConvSpec):
    return list(zip(spec.input_size, spec.kernel_size, spec.stride, spec.dilation,
                    spec.effective_kernel, spec.padding, spec.output_padding))


def reach_of(spec: ConvSpec) -> set:
    """What a drawn spec reaches, as ``category:name`` tags: the features, coincidences,
    channel structure, dtype, layout, ndim and claimed corners that hold for it.

    Read off the spec alone (not from how it was drawn), so a tag is never claimed for a
    geometry that does not have it. The names are those of
    :mod:`convwitness.cases.draw` (FEATURES, COINCIDENCES, GROUPINGS).
    """
    ax = _axes(spec)
    conv = not spec.transposed
    f = set()
    if spec.batch == 0:
        f.add("zero_batch")
    if conv and any(s > 1 and r for (_, _, s, *_), r in zip(ax, spec.remainder)):
        f.add("remainder")
    if any(s > e for _, _, s, _, e, _, _ in ax):
        f.add("stride_over_kernel")
    if spec.ndim > 1 and len({a[:4] + (a[5],) for a in ax}) > 1 and len({a[0] for a in ax}) > 1:
        f.add("anisotropic")
    if any(lo > hi >= 0 for *_, (lo, hi), _ in ax):
        f.add("pad_before")
    if any(hi > lo >= 0 for *_, (lo, hi), _ in ax):
        f.add("pad_after")
    if conv and any(lo >= e for _, _, _, _, e, (lo, _), _ in ax):
        f.add("window_in_padding")
    if conv and any(L + lo + hi == e and k > 1 for L, k, _, _, e, (lo, hi), _ in ax):
        f.add("kernel_fills_input")
    if any(L == 1 for L, *_ in ax):
        f.add("unit_length")
    if all(k == 1 for _, k, *_ in ax):
        f.add("pointwise")
    if any(d >= 2 and s >= 2 for _, _, s, d, *_ in ax):
        f.add("dilated_strided")
    if all(k == 3 and s == 1 and d == 1 and lo == hi and lo in (0, 1)
           for _, k, s, d, _, (lo, hi), _ in ax):
        f.add("everyday")
    if not f:
        f.add("plain")
    c = set()
    G = spec.groups
    cg, og = spec.in_channels // G, spec.out_channels // G
    if cg == og > 1:
        c.add("equal_channels_grouped" if G > 1 else "equal_channels")
        c.add("equal_channels")
    if spec.batch and spec.batch == spec.in_channels:
        c.add("batch_equals_channels")
    # the axis and kernel equalities count only where they can show an exchange: more
    # than one input position, and every kernel tap reading data somewhere
    if spec.ndim > 1 and len({a[:4] + a[5:] for a in ax}) == 1 and _positions_read(spec) > 1:
        c.add("square_input")
    full = _taps_reading(spec) == list(spec.kernel_size)
    if spec.ndim > 1 and len({k for _, k, *_ in ax}) == 1 and ax[0][1] > 1 and full:
        c.add("square_kernel")
    if spec.ndim > 1 and all(s == k == ax[0][1] > 1 for _, k, s, *_ in ax) and full:
        c.add("stride_equals_kernel")
    if conv and all(n == 1 for n in spec.output_size):
        c.add("output_one")
    g = {"single"} if G == 1 else {"depthwise" if cg == 1 and og == 1 else
                                   "depthwise_multiplier" if cg == 1 else "grouped"}
    corners = set()
    if any(min(lo, hi) < 0 for *_, (lo, hi), _ in ax):
        corners.add("negative_padding")
    # one side cropped, the other padded by no more than the crop: a read past the end
    # (or before the start) then lands on cropped-away data, not on zeros (C07); counted
    # only where a window reads that padding: the last one's last tap, at L + hi - 1 - r
    # (r the stride remainder), reaches past the end; the first window's first tap, at
    # -p_lo, always reads the leading padding
    if conv and any(lo < 0 < hi <= -lo and r < hi for (*_, (lo, hi), _), r in zip(ax, spec.remainder)):
        corners.add("crop_then_pad")
    if any(hi < 0 < lo <= -hi for *_, (lo, hi), _ in ax):
        corners.add("pad_then_crop")
    if any(L == 0 for L, *_ in ax):
        corners.add("zero_spatial")
    if spec.transposed and any(op > 0 and op == max(s, d) - 1 for _, _, s, d, _, _, op in ax):
        corners.add("max_output_padding")
    tags = {f"feature:{x}" for x in f} | {f"coincidence:{x}" for x in c}
    tags |= {f"grouping:{x}" for x in g} | {f"corner:{x}" for x in corners}
    tags |= {f"dtype:{spec.dtype}", f"layout:{spec.layout}", f"ndim:{spec.ndim}"}
    if G == 1 and spec.in_channels in THRESHOLD_COUNTS:
        tags.add(f"width:{spec.in_channels}")
    if not spec.bias:
        tags.add("bias:absent")
    return tags


#: feature pairs whose joint coverage the report gives per invariant, as a percentage of
#: the value combinations the invariant admits (name -> the two feature_of keys)
PAIRS = {"stride×dilation": ("stride", "dilation"), "groups×padding": ("groups", "padding"),
         "remainder×dilation": ("remainder", "dilation"), "layout×groups": ("layout", "groups"),
         "groups×stride": ("groups", "stride"), "batch×dtype": ("batch", "dtype"),
         "dtype×ndim": ("dtype", "ndim")}


#: the pairs an empty input (N = 0 or a zero-size axis) reaches: it has no values, only
#: its shape and dtype
EMPTY_PAIRS = ("batch×dtype", "dtype×ndim")


def pair_tags(spec: ConvSpec) -> set:
    """``pair:<name>=<a>×<b>`` tags of :data:`PAIRS` for a spec (one per padding kind
    when the axes pad differently), counted only where the geometry can show the pair.
    An empty input reaches only :data:`EMPTY_PAIRS`. A stride joins a pair only where
    every kernel axis is longer than 1 and every tap reads data somewhere: on a one-tap
    axis each input is read once whatever the stride, and a tap that reads only padding
    computes nothing a stride could misplace, so the strided window paths of a
    depthwise, grouped or dilated kernel do not show there (common practice, no source)."""
    fo = {k: v.split("+") for k, v in feature_of(spec).items()}
    if fo["stride"] == ["strided"] and (min(spec.kernel_size, default=1) < 2 or
                                        _taps_reading(spec) != list(spec.kernel_size)):
        fo["stride"] = []
    if spec.batch == 0 or 0 in spec.input_size:
        return {f"pair:{name}={x}×{y}" for name in EMPTY_PAIRS for x in fo[PAIRS[name][0]]
                for y in fo[PAIRS[name][1]]}
    return {f"pair:{name}={x}×{y}" for name, (a, b) in PAIRS.items() for x in fo[a] for y in fo[b]}


def large_tensor(spec: ConvSpec, budget: int | None) -> bool:
    """Whether the output holds at least an eighth of the profile's element budget
    (``budget``, Profile.max_elements; an eighth, so that a 1-D geometry reaches it under
    every profile's caps: quick's 3 x 33 channels x 17 positions is 1683 of 8192): the size
    end of what a profile draws, where the flat index of the result written, and the tile
    and block counts, are largest (an index kept in too narrow a counter, BUG-CLASSES C15,
    shows only there)."""
    return bool(budget) and 8 * math.prod(spec.y_shape) >= budget


def reach_within(spec: ConvSpec, budget: int | None) -> set:
    """:func:`reach_of`, and ``corner:large_tensor`` against the element ``budget``."""
    return reach_of(spec) | ({"corner:large_tensor"} if large_tensor(spec, budget) else set())


@lru_cache(maxsize=4096)
def geometry_tags(spec: ConvSpec, budget: int | None = None) -> tuple[tuple, frozenset]:
    """(``"key=value"`` of :func:`feature_of`, :func:`reach_within` | :func:`pair_tags`)
    of a spec: what the runner tallies for each checked geometry, a function of the
    geometry and the profile's element budget alone, so computed once per geometry (the
    schedules of a run share geometries)."""
    return (tuple(f"{k}={v}" for k, v in feature_of(spec).items()),
            frozenset(reach_within(spec, budget) | pair_tags(spec)))
