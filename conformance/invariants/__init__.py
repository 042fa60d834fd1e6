"""The invariant catalogue.

Each invariant is a small registered function ``check(adapter, case) -> Evidence``
with an id such as ``forward.reference``, the adapter passes it needs, the cases it
needs (:class:`~convwitness.cases.strategies.Needs`) and a one-line statement; its
docstring states the property in maths. ``catalogue()`` lists them in a fixed order.
"""
from __future__ import annotations

import dataclasses
import inspect
from dataclasses import dataclass, field
from typing import Callable

from ..geometry.capabilities import Capabilities, compiles_per_shape
from ..errors import ConvWitnessError
from ..cases.profiles import Profile, get_profile
from ..cases.strategies import Needs

__all__ = ["Invariant", "Context", "invariant", "catalogue", "by_surface", "get", "REGISTRY", "SURFACES"]

REGISTRY: dict[str, "Invariant"] = {}

#: The surfaces of ``<surface>.<property>`` ids, in listing order: what is checked.
SURFACES = {
    "forward": "the forward pass",
    "grad_input": "the input gradient of the backward pass",
    "grad_weight": "the weight gradient of the backward pass",
    "grad_bias": "the bias gradient of the backward pass",
    "backward": "the backward pass as a whole (all three gradients)",
    "transposed": "the transposed convolution",
    "call": "the call itself: inputs left untouched, strided views",
    "precision": "the precision the error model declares",
    "long_sum": "long accumulations",
    "quantized": "the quantized integer convolution: accumulation, zero points, requantization",
}


@dataclass
class Context:
    """Per-run information an invariant may use: the profile and state kept across examples."""

    profile: Profile = field(default_factory=lambda: get_profile("quick"))
    state: dict = field(default_factory=dict)


@dataclass(frozen=True)
class Invariant:
    id: str
    statement: str
    passes: frozenset
    needs: Needs
    func: Callable = field(repr=False, compare=False)
    requires: Callable | None = field(default=None, repr=False, compare=False)
    informational_unless: str | None = None
    adjust: Callable | None = field(default=None, repr=False, compare=False)
    cases: Callable | None = field(default=None, repr=False, compare=False)
    #: steer hypothesis toward the largest share of the bound (``hypothesis.target``):
    #: worth its cost where the share grows smoothly toward a failure (agreement with
    #: the reference); a structural property fails at once or not at all
    steer: bool = False
    #: the check calls the port on geometries derived from the case's (a stride of 1,
    #: explicit padding, the other layout, a gradient as a forward call...): each a
    #: call signature of its own, which a port that compiles per shape pays for;
    #: ``derives(spec, caps)`` lists those calls as (method, geometry)
    derives: Callable | None = field(default=None, repr=False, compare=False)
    #: ``sources(spec, caps)``: geometries whose derived calls land on ``spec`` (for a
    #: port that compiles per shape, candidates whose derived calls the run may make anyway)
    sources: Callable | None = field(default=None, repr=False, compare=False)

    @property
    def property(self) -> str:
        """The property in maths (the function's docstring)."""
        return inspect.cleandoc(self.func.__doc__ or self.statement)

    def claims(self, caps: Capabilities) -> Capabilities:
        """The adapter's claims on every pass this invariant calls (per-pass claims
        applied, geometry/claims.py): what its geometries are drawn from and judged on."""
        return caps.for_passes(self.passes | ({"transposed"} if self.needs.transposed else set()))

    def refusal(self, caps: Capabilities) -> str | None:
        """Why this invariant does not apply to an adapter, or None."""
        caps = self.claims(caps)
        claimed = caps.claimed_passes
        missing = sorted(self.passes - claimed)
        if missing:
            unclaimed = sorted(set(missing) & caps.unclaimed_passes)
            if unclaimed:
                return (f"needs pass(es) {missing}: implemented but not claimed by the adapter's "
                        f"capabilities (passes={sorted(claimed)}), so untested")
            return f"needs pass(es) {missing}, which the adapter does not implement"
        if self.needs.transposed and "transposed" not in claimed:
            if "transposed" in caps.unclaimed_passes:
                return ("needs the transposed pass: implemented but not claimed by the adapter's "
                        f"capabilities (passes={sorted(claimed)}), so untested")
            return "needs the transposed pass, which the adapter does not implement"
        if self.requires is not None:
            return self.requires(caps)
        return None

    def needs_for(self, caps: Capabilities) -> Needs:
        """The needs, adjusted to what the adapter can do (e.g. no dilation)."""
        lean = self.derives is not None and compiles_per_shape(caps)
        caps = self.claims(caps)
        needs = self.adjust(caps, self.needs) if self.adjust else self.needs
        return dataclasses.replace(needs, lean=True) if lean else needs

    def strategy(self, caps: Capabilities, profile: Profile):
        """The hypothesis strategy of this invariant's examples (tuples of Cases)."""
        from ..cases.strategies import examples
        caps = self.claims(caps)
        if self.cases is not None:
            return self.cases(caps, get_profile(profile))
        return examples(caps, profile, self.needs_for(caps))

    def informational(self, caps: Capabilities) -> bool:
        """Failures are information only unless the adapter claims the named capability."""
        return bool(self.informational_unless) and not getattr(caps, self.informational_unless)

    def derived_calls(self, spec, caps: Capabilities) -> list:
        """(method, geometry) of each call the check makes on ``spec`` besides the case's
        own geometry, as far as the geometry decides (those ``caps`` admit)."""
        if self.derives is None:
            return []
        from ..errors import SpecError
        try:
            calls = self.derives(spec, caps)
        except SpecError:
            return []
        return [(m, sp) for m, sp in calls if sp is not None and caps.admits(sp)]

    def check(self, adapter, case, context: Context | None = None):
        return self.func(adapter, case, context or Context())


def invariant(id: str, *, statement: str, passes=("forward",), needs: Needs | None = None,
              requires=None, informational_unless: str | None = None, adjust=None, cases=None,
              steer: bool = False, derives: Callable | None = None,
              sources: Callable | None = None):
    """Register ``func(adapter, case, context) -> Evidence`` as an invariant."""
    surface, dot, prop = id.partition(".")
    if surface not in SURFACES or not dot or not prop or "." in prop:
        raise ConvWitnessError(f"invariant id {id!r}: expected <surface>.<property> with a surface "
                               f"of {list(SURFACES)} and a one-level property")

    def deco(func):
        if id in REGISTRY:
            raise ConvWitnessError(f"invariant id {id!r} registered twice")
        _MODULE_OF[id] = getattr(func, "__module__", "") or ""
        REGISTRY[id] = Invariant(id=id, statement=statement, passes=frozenset(passes),
                                 needs=needs or Needs(), func=func, requires=requires,
                                 informational_unless=informational_unless, adjust=adjust,
                                 cases=cases, steer=steer, derives=derives,
                                 sources=sources)
        return func
    return deco


# Catalogue order: these modules first, then any other module of this package.
_ORDER = ("forward", "equivalence", "state", "special", "backward", "own", "transposed", "precision", "stress")


# Modules of this package that hold helpers, not invariants.
_HELPERS = ("evidence",)


def _load():
    import importlib
    import pkgutil
    found = [m.name for m in pkgutil.iter_modules(__path__)
             if not m.name.startswith("_") and m.name not in _HELPERS]
    for name in [n for n in _ORDER if n in found] + sorted(set(found) - set(_ORDER)):
        importlib.import_module(f"{__name__}.{name}")


#: invariant id -> the module that registered it (kept when a test replaces the function)
_MODULE_OF: dict = {}


def _module_rank(inv: Invariant) -> tuple:
    module = _MODULE_OF.get(inv.id, "").rpartition(".")[2]
    return (_ORDER.index(module), "") if module in _ORDER else (len(_ORDER), module)


def catalogue() -> list[Invariant]:
    """Every registered invariant in one canonical order, whatever imported what first:
    the modules in ``_ORDER`` then the others by name, and within a module the order of
    definition. Runs, shards, cluster workers and generated suites depend on it (the
    run-wide geometry pool is built in this order)."""
    _load()
    order = {inv_id: i for i, inv_id in enumerate(REGISTRY)}   # definition order in a module
    return sorted(REGISTRY.values(), key=lambda inv: (_module_rank(inv), order[inv.id]))


def by_surface() -> dict[str, list[Invariant]]:
    """The catalogue grouped by surface, surfaces in the order of :data:`SURFACES`."""
    groups: dict[str, list[Invariant]] = {s: [] for s in SURFACES}
    for inv in catalogue():
        groups[inv.id.partition(".")[0]].append(inv)
    return {s: invs for s, invs in groups.items() if invs}


def get(id: str) -> Invariant:
    _load()
    try:
        return REGISTRY[id]
    except KeyError:
        import difflib
        close = difflib.get_close_matches(id, list(REGISTRY), n=3)
        hint = f" (did you mean {', '.join(close)}?)" if close else ""
        raise ConvWitnessError(f"unknown invariant {id!r}{hint}; `convwitness invariants` lists them") from None
