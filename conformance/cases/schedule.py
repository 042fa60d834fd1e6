"""The covering schedule: explicit examples that reach every admitted target first.

Hypothesis's free search reaches a feature or coincidence with some probability per
draw; a claimed corner that one invariant in twenty draws (zero batch, say) is missed
on many seeds. So every invariant first runs a short *schedule* of explicit examples,
built deterministically from the capabilities, the invariant's needs, the profile and
the seed, then hypothesis's free search (the runner adds them as ``@example``).

The targets (:func:`targets`) are ``category:name`` tags, as :func:`reach_of` reads
them off a spec: every feature, coincidence, channel structure, dtype, layout, ndim and
claimed corner (negative padding, an axis cropped on one side and padded on the other,
either way round; the largest legal output padding; an output of an eighth of the
profile's element budget or more, ``corner:large_tensor``) the invariant can
draw, C_in on either side of the vector and tile widths (``width:``, with one group),
and every value kind it allows (the dtype's range end is the ``near_max`` kind).
The schedule is greedy: each entry forces one not-yet-reached value of every category
at once (the builder ignores a forced choice it cannot honour), keeps the geometry if
it reaches something new, and falls back to forcing one target alone; a target that
no try reaches stays a hole, which the report names.

Then the feature pairs of :data:`SCHEDULED_PAIRS` (``pair:`` tags, as
:func:`~convwitness.cases.features.pair_tags` reads them): a bug that needs two features
at once (a strided depthwise kernel, a dilated kernel with a stride remainder, an empty
batch in a dtype whose kernel mishandles it) is on
every seed's path only if each admitted combination is scheduled, not left to the free
search's odds. dtype×ndim is reported, not scheduled (it would multiply the geometries).
"""
from __future__ import annotations

import zlib

from ..geometry.capabilities import Capabilities
from ..geometry.spec import ConvSpec
from .draw import (THRESHOLD_COUNTS, Needs, Reject, RngPicker, build_spec, coincidences_for,
                   dtypes_for, features_for, groupings_for, usable, zero_spatial_allowed)
from .features import PAIRS, pair_tags, reach_within
from .profiles import Profile

__all__ = ["targets", "schedule", "value_kinds", "pair_space", "satisfies", "MAX_ENTRIES",
           "SCHEDULED_PAIRS"]

#: explicit geometries per invariant at most (forward.contract takes up to about 24: an
#: empty batch in each dtype is an entry of its own)
MAX_ENTRIES = 28
#: the feature pairs whose admitted combinations the schedule reaches (pair: tags)
SCHEDULED_PAIRS = ("groups×stride", "stride×dilation", "remainder×dilation", "layout×groups",
                   "groups×padding", "batch×dtype")
#: builder choices that give one value of a feature_of key (pair targets)
_VALUE_FORCE = {
    ("stride", "strided"): {"stride": "max", "kernel": "max"},     # a window on every axis
    ("stride", "unit"): {"stride": "min", "feature": "plain"},
    ("dilation", "dilated"): {"dilation": "max"}, ("dilation", "none"): {"dilation": "min"},
    ("groups", "single"): {"grouping": "single"}, ("groups", "grouped"): {"grouping": "grouped"},
    ("groups", "depthwise"): {"grouping": "depthwise"},
    ("padding", "none"): {"asymmetric": False, "pad": 0, "feature": "plain"},
    ("padding", "symmetric"): {"asymmetric": False, "pad": "max", "feature": "plain"},
    ("padding", "asymmetric"): {"asymmetric": True, "pad_lo": "max", "pad_hi": 0, "feature": "plain"},
    ("padding", "negative"): {"asymmetric": True, "pad_lo": "min", "pad": "min", "feature": "plain"},
    ("remainder", "nonzero"): {"feature": "remainder"},
    ("remainder", "zero"): {"feature": "kernel_fills_input"},   # every axis: L + lo + hi == e
    ("batch", "zero"): {"feature": "zero_batch"}, ("batch", "one"): {"batch": 1},
    ("batch", "many"): {"batch": "max"},
}
#: target categories a lean schedule (Needs.lean) leaves to the reference invariants
LEAN_LEAVES = ("dtype", "width")
TRIES = 12              # seeded tries per forced combination

# forced builder choices that produce a tag (tags not listed force their own label)
_CORNER_FORCE = {"negative_padding": {"asymmetric": True, "pad_lo": "min", "pad": "min"},
                 "crop_then_pad": {"asymmetric": True, "pad_lo": "min", "pad_hi": 1, "feature": "plain"},
                 "pad_then_crop": {"asymmetric": True, "pad_lo": 1, "pad_hi": "min", "feature": "plain"},
                 "zero_spatial": {"zero_spatial": "max"},
                 # 3 taps, padding 1: the output as large as the input, of C = 17
                 "large_tensor": {"coincidence": "equal_channels", "grouping": "single",
                                  "channel_counts": "threshold", "channels_in": 17,
                                  "length": "max", "batch": "max", "feature": "everyday",
                                  "pad": "max"},
                 "max_output_padding": {"output_padding": "max", "stride": "max"}}
#: further forced choices, tried in turn where a target's own give it in no try
_ALSO_FORCE = {"corner:large_tensor": ({"coincidence": "equal_channels", "grouping": "single",
                                        "channel_counts": "threshold", "channels_in": 33,
                                        "length": "max", "batch": "max", "feature": "everyday",
                                        "pad": "max", "ndim": 1},)}     # 1-D: wider channels


def _ndims(caps: Capabilities, needs: Needs) -> list[int]:
    return sorted(caps.ndims if needs.ndims is None else set(caps.ndims) & set(needs.ndims))


def _layouts(caps: Capabilities, needs: Needs) -> list[str]:
    return sorted(caps.layouts if needs.layouts is None else set(caps.layouts) & set(needs.layouts))


def targets(caps: Capabilities, needs: Needs, profile: Profile | None = None) -> list[str]:
    """Every tag this invariant may reach (structural tags, then ``kind:`` tags)."""
    out: list[str] = []

    def add(tag):
        if tag not in out:
            out.append(tag)
    ndims = _ndims(caps, needs)
    for n in ndims:
        for f in features_for(caps, needs, n):
            if f != "plain":        # "nothing special": not a target of its own
                add(f"feature:{f}")
    for n in ndims:
        for f in features_for(caps, needs, n):
            for c in coincidences_for(caps, needs, n, f)[1:]:
                add(f"coincidence:{c}")
                if c == "equal_channels" and "grouped" in groupings_for(caps, needs, c):
                    add("coincidence:equal_channels_grouped")
    for g in groupings_for(caps, needs):
        add(f"grouping:{g}")
    for d in dtypes_for(caps, needs):
        add(f"dtype:{d}")
    for lay in _layouts(caps, needs):
        add(f"layout:{lay}")
    for n in ndims:
        add(f"ndim:{n}")
    if "single" in groupings_for(caps, needs):
        for c in THRESHOLD_COUNTS:          # C_in on either side of vector and tile widths
            add(f"width:{c}")
    if "negative" in caps.padding and not needs.transposed and needs.negative_padding is not False \
            and needs.padding is not False:
        add("corner:negative_padding")
        if "asymmetric" in caps.padding and needs.padding is not False:
            add("corner:crop_then_pad")     # p_lo < 0 < p_hi on one axis, and mirrored
            add("corner:pad_then_crop")
    if zero_spatial_allowed(caps, needs):
        add("corner:zero_spatial")
    if needs.transposed and caps.output_padding and (caps.stride or caps.dilation) \
            and needs.stride is not False:
        add("corner:max_output_padding")
    if profile is not None and not needs.zero_batch:
        add("corner:large_tensor")          # an output of an eighth of the element budget
    for k in needs.kinds:
        add(f"kind:{k}")
    return [t for t in out if t not in needs.never
            and not (needs.lean and t.partition(":")[0] in LEAN_LEAVES)]


def _force(tag: str) -> dict:
    cat, _, name = tag.partition(":")
    if cat == "corner":
        return dict(_CORNER_FORCE[name])
    if cat == "coincidence" and name == "equal_channels_grouped":
        return {"coincidence": "equal_channels", "grouping": "grouped"}
    if cat == "ndim":
        return {"ndim": int(name)}
    if cat == "width":
        return {"grouping": "single", "channel_counts": "threshold", "channels_in": int(name)}
    return {cat: name}


def _pair_force(tag: str) -> dict:
    """Builder choices for a ``pair:<name>=<a>×<b>`` target."""
    name, _, values = tag[len("pair:"):].partition("=")
    keys, vals = PAIRS[name], values.split("×")
    forced: dict = {}
    for key, val in zip(keys, vals):
        if key in ("layout", "dtype"):
            forced[key] = val
        elif key == "ndim":
            forced["ndim"] = int(val)
        else:
            forced.update(_VALUE_FORCE.get((key, val), {}))
    return forced


def _reach(spec, profile) -> set:
    return reach_within(spec, profile.max_elements)


def _tags(spec, profile) -> set:
    return _reach(spec, profile) | pair_tags(spec)


def _try(caps, profile, needs, forced: dict, seed: int, wanted: set, tries: int = TRIES):
    """The first seeded geometry under ``forced`` that reaches one of ``wanted``, and what
    it reaches of them (None, empty set when no try does)."""
    for t in range(tries):
        try:
            spec = build_spec(RngPicker(seed * 7919 + t, forced), caps, profile, needs)
        except Reject:
            continue
        new = _tags(spec, profile) & wanted
        if new:
            return spec, new
    return None, set()


def schedule(caps: Capabilities, profile: Profile, needs: Needs, seed: int | None = 0,
             salt: str = "", pool: list | None = None) -> list:
    """The explicit geometries (specs) that reach every structural target, in order.

    With ``pool`` (a list of ``(spec, tags)`` shared by the invariants of a run), the
    geometries of earlier invariants that meet these needs are taken first, greedily by
    how many unreached targets each adds; fresh geometries are added to the pool."""
    base = zlib.crc32(f"{salt}/{seed or 0}".encode())
    remaining = [t for t in targets(caps, needs, profile) if not t.startswith("kind:")]
    specs = []
    if pool:
        reusable = [(sp, tags) for sp, tags in pool if satisfies(sp, caps, profile, needs)]
        while remaining and len(specs) < MAX_ENTRIES and reusable:
            want = set(remaining)
            gain, best = max(((len(tags & want), -i) for i, (_, tags) in enumerate(reusable)),
                             default=(0, 0))
            if gain == 0:
                break
            sp, tags = reusable.pop(-best)
            specs.append(sp)
            remaining = [t for t in remaining if t not in tags]
    step = 0
    # pair combinations the entries may reach on the way (not an empty batch: its entries
    # would reach their structural targets with no values to show them)
    pairs = [t for t in pair_targets(caps, needs) if "=zero×" not in t]
    while remaining and len(specs) < MAX_ENTRIES:
        step += 1
        # one unreached value of every category at once, then the first target alone
        forced: dict = {}
        seen_cats = set()
        for t in remaining:
            cat = t.partition(":")[0]
            if cat not in seen_cats:
                seen_cats.add(cat)
                for k, v in _force(t).items():
                    forced.setdefault(k, v)
        reached = set().union(*(_tags(sp, profile) for sp in specs)) if specs else set()
        for tag in pairs:       # and every unreached pair combination that agrees
            f = _pair_force(tag)
            if tag not in reached and all(forced.get(k, v) == v for k, v in f.items()):
                forced.update(f)
        spec, new = _try(caps, profile, needs, forced, base + step, set(remaining))
        if not new:
            for i, f in enumerate((_force(remaining[0]),) + _ALSO_FORCE.get(remaining[0], ())):
                spec, new = _try(caps, profile, needs, f, base + step + 10007 + i, {remaining[0]},
                                 tries=4 * TRIES)
                if new:
                    break
            if not new:     # a target the forced choice cannot give under these needs (one
                # unit-length axis beside a long one, for a shift): unforced draws may
                spec, new = _try(caps, profile, needs, {}, base + step + 30011, {remaining[0]},
                                 tries=8 * TRIES)
            if new:
                new = _reach(spec, profile) & set(remaining)
            else:
                remaining.pop(0)        # unreachable here: the report names the hole
                continue
        specs.append(spec)
        if pool is not None:
            pool.append((spec, frozenset(_reach(spec, profile))))
        remaining = [t for t in remaining if t not in new]
    return _pairs(caps, profile, needs, base, specs, pool)


def pair_targets(caps: Capabilities, needs: Needs) -> list[str]:
    """The ``pair:`` tags of :data:`SCHEDULED_PAIRS` this invariant admits (none for an
    invariant of empty batches: no value of theirs can show a path's arithmetic; none on a
    lean schedule, :class:`~convwitness.cases.draw.Needs`)."""
    if needs.zero_batch or needs.lean:
        return []
    space = pair_space(caps, needs)
    return [f"pair:{name}={combo}" for name in SCHEDULED_PAIRS for combo in space.get(name, [])]


def _pairs(caps, profile, needs, base: int, specs: list, pool) -> list:
    """``specs`` extended by geometries that reach the admitted pair combinations the
    schedule has not reached yet: from the pool first, then fresh (one forced pair each)."""
    reached = set().union(*(_tags(sp, profile) for sp in specs)) if specs else set()
    remaining = [t for t in pair_targets(caps, needs) if t not in reached]
    if pool and remaining:
        reusable = [sp for sp, _ in pool if sp not in specs and satisfies(sp, caps, profile, needs)]
        for sp in reusable:
            if len(specs) >= MAX_ENTRIES or not remaining:
                break
            got = _tags(sp, profile) & set(remaining)
            if got:
                specs.append(sp)
                remaining = [t for t in remaining if t not in got]
    step = 0
    while remaining and len(specs) < MAX_ENTRIES:
        step += 1
        # as many unreached combinations at once as their forced choices agree, then the
        # first one alone
        forced: dict = {}
        for tag in remaining:
            f = _pair_force(tag)
            if all(forced.get(k, v) == v for k, v in f.items()):
                forced.update(f)
        spec, new = _try(caps, profile, needs, forced, base + 20011 + step, set(remaining))
        if not new:
            tag = remaining.pop(0)
            spec, new = _try(caps, profile, needs, _pair_force(tag), base + 40013 + step, {tag},
                             tries=4 * TRIES)
            if not new:
                continue                # not reachable under these needs: a hole in the pair %
        specs.append(spec)
        if pool is not None:
            pool.append((spec, frozenset(_reach(spec, profile))))
        got = _tags(spec, profile)
        remaining = [t for t in remaining if t not in got]
    return specs


#: kinds of random values, which show a permuted channel, tap or sample ("ones" does not)
GENERIC_KINDS = ("uniform", "small_int", "wide", "pow2")


def value_kinds(needs: Needs, entries: int, per_entry: int) -> list[list[str]]:
    """The value kinds of each entry's cases. With two or more value sets per geometry,
    the first is random values of a generic kind (so that every scheduled geometry is
    seen with values that show an exchanged channel or tap), the others every allowed
    kind in turn; with one, every allowed kind in turn."""
    kinds = list(needs.kinds)
    generic = next((k for k in GENERIC_KINDS if k in kinds), None)
    if per_entry < 2 or generic is None:
        return [[kinds[(i * per_entry + j) % len(kinds)] for j in range(per_entry)]
                for i in range(entries)]
    rest = [k for k in kinds if k != generic] or kinds
    n = per_entry - 1
    return [[generic] + [rest[(i * n + j) % len(rest)] for j in range(n)] for i in range(entries)]


def _values(caps: Capabilities, needs: Needs) -> dict:
    """The values each :func:`feature_of` key may take for this invariant."""
    stride = caps.stride and needs.stride is not False
    dil = caps.dilation and needs.dilation is not False
    grouping = {"single": "single", "grouped": "grouped", "depthwise": "depthwise",
                "depthwise_multiplier": "depthwise"}
    pads = ["none"] if not needs.padding else []
    if needs.padding is not False:
        pads += [k for k in ("symmetric", "asymmetric") if k in caps.padding]
        if "negative" in caps.padding and not needs.transposed and needs.negative_padding is not False:
            pads.append("negative")
    zero = caps.zero_batch and needs.zero_batch is not False and needs.batch_min == 0
    return {
        "batch": (["zero"] if zero else []) + ([] if needs.zero_batch else
                                               ["one"] * (needs.batch_min <= 1) + ["many"]),
        "stride": (["unit"] if not needs.stride else []) + (["strided"] if stride else []),
        "dilation": (["none"] if not needs.dilation else []) + (["dilated"] if dil else []),
        "groups": sorted({grouping[g] for g in groupings_for(caps, needs)}),
        "padding": pads,
        "remainder": ["zero"] + (["nonzero"] if stride and not needs.transposed else []),
        "layout": _layouts(caps, needs),
        "dtype": dtypes_for(caps, needs),
        "ndim": [str(n) for n in _ndims(caps, needs)],
    }


def pair_space(caps: Capabilities, needs: Needs) -> dict:
    """Per pair of :data:`~convwitness.cases.features.PAIRS`, the combinations
    (``a×b``) this invariant admits: the denominator of its pair coverage."""
    from .features import PAIRS
    vals = _values(caps, needs)
    return {name: [f"{x}×{y}" for x in vals[a] for y in vals[b]] for name, (a, b) in PAIRS.items()}


def satisfies(spec: ConvSpec, caps: Capabilities, profile: Profile, needs: Needs) -> bool:
    """Whether ``spec`` (drawn for another invariant) meets these needs and claims: the
    test that lets invariants share geometries (fewer distinct call signatures)."""
    if needs.features is not None or spec.transposed != needs.transposed:
        return False
    if needs.bias is not None and spec.bias != needs.bias:
        return False
    props = ((needs.stride, any(s > 1 for s in spec.stride)),
             (needs.dilation, any(d > 1 for d in spec.dilation)),
             (needs.padding, any(lo or hi for lo, hi in spec.padding)),
             (needs.grouped, spec.groups > 1),
             (needs.negative_padding, any(min(p) < 0 for p in spec.padding)),
             (needs.zero_batch, spec.batch == 0))
    if any(want is not None and want != has for want, has in props):
        return False
    if spec.batch < needs.batch_min or (spec.batch == 0 and not caps.zero_batch):
        return False
    for allowed, value in ((needs.layouts, spec.layout), (needs.dtypes, spec.dtype),
                           (needs.ndims, spec.ndim)):
        if allowed is not None and value not in allowed:
            return False
    return spec.dtype in dtypes_for(caps, needs) and usable(spec, caps, profile, needs)
