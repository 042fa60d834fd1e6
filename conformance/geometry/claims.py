"""Per-pass claims and named constraints: what one flag for every pass cannot say.

Real libraries differ by pass: groups in the forward convolution but not in the
transposed one, zero batch in one pass and not another, fewer dtypes for the
gradients. And some combinations are refused whatever the pass: output padding at or
above the stride, stride together with dilation. :class:`~.capabilities.Capabilities`
says these with two fields, both plain data so that they cross the worker and wire
boundaries:

* ``per_pass``: ``{pass: {field: value}}`` with pass one of ``forward``, ``backward``,
  ``transposed`` and field one of :data:`PER_PASS_FIELDS`. A boolean narrows the flag
  for that pass (``{"transposed": {"groups": False}}``); a collection replaces the set
  (``{"backward": {"dtypes": {"float32"}}}``); ``constraints`` adds named constraints
  for that pass only.
* ``constraints``: names from :data:`CONSTRAINTS`, for every pass.

An invariant is judged on the claims of every pass it calls:
``caps.for_passes(inv.passes)`` is a plain Capabilities that admits a geometry only
where each of those passes claims it, so ``admits()`` stays exact per invariant.
"""
from __future__ import annotations

from typing import Callable

__all__ = ["CONSTRAINTS", "PER_PASS_FIELDS", "constraint_refusal", "check_constraints",
           "check_per_pass", "merge_for_passes"]


def _op_below_stride(s) -> bool:
    return all(op < st for op, st in zip(s.output_padding, s.stride))


def _op_below_stride_or_dilation(s) -> bool:
    return all(op < max(st, d) for op, st, d in zip(s.output_padding, s.stride, s.dilation))


def _not_stride_and_dilation(s) -> bool:
    return not (any(st > 1 for st in s.stride) and any(d > 1 for d in s.dilation))


def _groups_single_or_depthwise(s) -> bool:
    return s.groups in (1, s.in_channels)


def _square_kernel(s) -> bool:
    return len(set(s.kernel_size)) <= 1


#: name -> (what a claim with it says, predicate on a ConvSpec: True where admitted)
CONSTRAINTS: dict[str, tuple[str, Callable]] = {
    "output_padding<stride": (
        "output padding below the stride on every axis", _op_below_stride),
    "output_padding<max(stride,dilation)": (
        "output padding below max(stride, dilation) on every axis", _op_below_stride_or_dilation),
    "no_stride_with_dilation": (
        "stride > 1 and dilation > 1 never in the same call", _not_stride_and_dilation),
    "groups_single_or_depthwise": (
        "groups is 1 or the number of input channels", _groups_single_or_depthwise),
    "square_kernel": ("the same kernel size on every spatial axis", _square_kernel),
}

PER_PASS_FIELDS = ("ndims", "dtypes", "layouts", "padding", "stride", "dilation", "groups",
                   "bias", "zero_batch", "zero_spatial", "output_padding", "constraints")


def check_constraints(names, where: str = "constraints") -> tuple:
    from ..errors import SpecError
    if isinstance(names, str):
        names = (names,)
    names = tuple(names)
    bad = [n for n in names if n not in CONSTRAINTS]
    if bad:
        raise SpecError(f"Capabilities: {where} has unknown constraint(s) {bad}; expected names "
                        f"from {sorted(CONSTRAINTS)}")
    return tuple(sorted(set(names)))


def check_per_pass(per_pass, pass_names) -> tuple:
    """Normalise ``per_pass`` to a sorted tuple of (pass, ((field, value), ...))."""
    from ..errors import SpecError
    items = per_pass.items() if hasattr(per_pass, "items") else per_pass
    out = []
    for entry in items:
        try:
            pass_, claims = entry
        except (TypeError, ValueError):
            raise SpecError(f"Capabilities: per_pass entry {entry!r} must be (pass, {{field: value}})") from None
        if pass_ not in pass_names:
            raise SpecError(f"Capabilities: per_pass key {pass_!r}; expected one of {list(pass_names)}")
        pairs = claims.items() if hasattr(claims, "items") else claims
        norm = []
        for field, value in pairs:
            if field not in PER_PASS_FIELDS:
                raise SpecError(f"Capabilities: per_pass[{pass_!r}] field {field!r}; expected one "
                                f"of {list(PER_PASS_FIELDS)}")
            if field == "constraints":
                value = check_constraints(value, f"per_pass[{pass_!r}].constraints")
            elif isinstance(value, (set, frozenset, list, tuple)):
                value = tuple(sorted(value, key=str))
            elif not isinstance(value, bool):
                raise SpecError(f"Capabilities: per_pass[{pass_!r}].{field}={value!r}; expected "
                                "True/False or a collection")
            norm.append((field, value))
        out.append((pass_, tuple(sorted(norm))))
    return tuple(sorted(out))


def merge_for_passes(caps, passes) -> dict:
    """The field changes that give the claims shared by every pass in ``passes``."""
    changes: dict = {}
    table = dict(caps.per_pass)
    constraints = set(caps.constraints)
    for pass_ in sorted(passes):
        for field, value in table.get(pass_, ()):
            if field == "constraints":
                constraints.update(value)
                continue
            current = changes.get(field, getattr(caps, field))
            if isinstance(current, bool):
                changes[field] = current and bool(value)
            else:
                changes[field] = frozenset(current) & frozenset(value)
    changes["constraints"] = tuple(sorted(constraints))
    changes["per_pass"] = ()
    return changes


def constraint_refusal(names, spec) -> str | None:
    for name in names:
        what, ok = CONSTRAINTS[name]
        if not ok(spec):
            return f"constraint {name} ({what}) excludes {spec.describe()}"
    return None
