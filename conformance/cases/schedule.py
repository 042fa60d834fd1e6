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
With them, the feature pairs of :data:`SCHEDULED_PAIRS` (``pair:`` tags, as
:func:`~convwitness.cases.features.pair_tags` reads them): a bug that needs two features
at once (a strided depthwise kernel, a dilated kernel with a stride remainder, an empty
batch in a dtype whose kernel mishandles it) is on every seed's path only if each
admitted combination is scheduled, not left to the free search's odds. dtype×ndim is
reported, not scheduled (it would multiply the geometries).

The schedule is a greedy set cover: the run's earlier geometries first (a shared pool),
then fresh candidates, built under each unreached target's forced choices and under
merges of several (the builder ignores a forced choice it cannot honour), the one that
reaches the most unreached targets first; a target no candidate reaches gets tries of
its own, and one no try reaches stays a hole, which the report names. For a port that
compiles per shape fresh candidates carry a bias unless forced off (``bias:absent`` is
then a target: the invariants that need a bias reuse them), and a lean schedule
(``Needs.lean``) weighs each candidate by the call signatures it adds.
"""
from __future__ import annotations

import zlib

from ..geometry.capabilities import Capabilities, compiles_per_shape
from ..geometry.spec import ConvSpec
from .draw import (THRESHOLD_COUNTS, Needs, Reject, RngPicker, build_spec, coincidences_for,
                   dtypes_for, features_for, groupings_for, usable, zero_spatial_allowed)
from .cover import cover, prune
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
COMBINATIONS = 400      # merged forced choices among a schedule's fresh candidates
COMBINATIONS_FEW = 1000  # the same for a port that compiles per shape (fewer signatures)

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
    if compiles_per_shape(caps) and caps.bias and needs.bias is None:
        add("bias:absent")          # fresh geometries have a bias (_candidates): one without
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
    if cat == "bias":
        return {"bias": False}
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
    return next(_built(caps, profile, needs, [forced] * tries, seed, wanted), (None, set()))


def _built(caps, profile, needs, forced: list, seed: int, wanted: set):
    """(geometry, what it reaches of ``wanted``) of each admitted build under ``forced[i]``
    (picker seed ``seed * 7919 + i``) that reaches something of it."""
    for i, f in enumerate(forced):
        try:
            spec = build_spec(RngPicker(seed * 7919 + i, f), caps, profile, needs)
        except Reject:
            continue
        got = _tags(spec, profile) & wanted
        if got:
            yield spec, got


def _forces(tag: str) -> tuple:
    """The forced builder choices that give ``tag``, in the order they are tried."""
    if tag.startswith("pair:"):
        return (_pair_force(tag),)
    return (_force(tag),) + _ALSO_FORCE.get(tag, ())


def _candidates(caps, profile, needs, seed: int, remaining: list) -> list:
    """Fresh geometries for the targets still unreached: each target's own forced choices,
    and merges of several targets' choices (one geometry that reaches many), each built
    under a seeded picker; with what each reaches of ``remaining``."""
    import random
    want = set(remaining)
    rng = random.Random(seed)
    forced = [_forces(t)[0] for t in remaining]
    merges = [dict(f) for f in forced for _ in range(2)]
    for _ in range(COMBINATIONS_FEW if compiles_per_shape(caps) else COMBINATIONS):
        merged: dict = {}
        for f in rng.sample(forced, min(len(forced), rng.randint(2, 8))):
            if all(merged.get(k, v) == v for k, v in f.items()):
                merged.update(f)
        merges.append(merged)
    # one unreached value of every category at once, with every pair that agrees
    merged = {}
    for f in forced:
        if all(merged.get(k, v) == v for k, v in f.items()):
            merged.update(f)
    merges += [merged] * 4
    if compiles_per_shape(caps):      # a bias unless forced off: the invariants that need one reuse them
        merges = [{"bias": True, **f} for f in merges]
    return list(_built(caps, profile, needs, merges, seed, want))


def schedule(caps: Capabilities, profile: Profile, needs: Needs, seed: int | None = 0,
             salt: str = "", pool: list | None = None, ledger=None) -> list:
    """The explicit geometries (specs) that reach every structural and pair target, in order.

    With ``pool`` (a list of ``(spec, tags)`` shared by the invariants of a run), the
    geometries of earlier invariants that meet these needs are taken first, greedily by
    how many unreached targets each adds. Then fresh geometries, by a greedy set cover over
    candidates built for the targets left (:func:`_candidates`); a target no candidate
    reaches gets tries of its own (its forced choices, then unforced draws), and one no
    try reaches stays a hole, which the report names. Fresh geometries join the pool."""
    base = zlib.crc32(f"{salt}/{seed or 0}".encode())
    remaining = [t for t in targets(caps, needs, profile) if not t.startswith("kind:")]
    remaining += [t for t in pair_targets(caps, needs) if t not in remaining]
    wanted = set(remaining)
    specs: list = []
    reusable = [(sp, tags) for sp, tags in pool or () if satisfies(sp, caps, profile, needs)]
    if needs.lean and ledger is not None:
        # each entry calls derived geometries as well: one cover over the pool and fresh
        # candidates, by targets reached per call signature added (cases/cover.py ``cost``)
        want = set(remaining)
        sourced = [(sp, _tags(sp, profile) & want) for sp in ledger.sources([g for g, _ in pool or ()])
                   if satisfies(sp, caps, profile, needs)]
        remaining = cover(specs, remaining, reusable + [o for o in sourced if o[1]]
                          + _candidates(caps, profile, needs, base, remaining), ledger, MAX_ENTRIES)
    elif reusable:
        remaining = cover(specs, remaining, reusable, ledger, MAX_ENTRIES)
    if remaining:
        remaining = cover(specs, remaining, _candidates(caps, profile, needs, base, remaining),
                           ledger, MAX_ENTRIES)
    for step, tag in enumerate(list(remaining)):
        if tag not in remaining or len(specs) >= MAX_ENTRIES:
            continue
        spec, new = None, set()
        for i, f in enumerate(_forces(tag)):
            spec, new = _try(caps, profile, needs, f, base + 10007 + 31 * step + i, {tag},
                             tries=4 * TRIES)
            if new:
                break
        if not new:     # a target the forced choice cannot give under these needs (one
            # unit-length axis beside a long one, for a shift): unforced draws may
            spec, new = _try(caps, profile, needs, {}, base + 30011 + step, {tag},
                             tries=8 * TRIES)
        if new:
            specs.append(spec)
            got = _tags(spec, profile)
            remaining = [t for t in remaining if t not in got]
    specs = prune(specs, wanted, lambda sp: _tags(sp, profile), ledger)
    if ledger is not None:
        for sp in specs:
            ledger.add(sp)
    if pool is not None:
        known = {sp for sp, _ in pool}
        pool.extend((sp, frozenset(_tags(sp, profile))) for sp in specs if sp not in known)
    return specs


def pair_targets(caps: Capabilities, needs: Needs) -> list[str]:
    """The ``pair:`` tags of :data:`SCHEDULED_PAIRS` this invariant admits (none for an
    invariant of empty batches: no value of theirs can show a path's arithmetic; none on a
    lean schedule, :class:`~convwitness.cases.draw.Needs`)."""
    if needs.zero_batch or needs.lean:
        return []
    space = pair_space(caps, needs)
    return [f"pair:{name}={combo}" for name in SCHEDULED_PAIRS for combo in space.get(name, [])]


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
