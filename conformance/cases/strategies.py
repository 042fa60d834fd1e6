"""Hypothesis strategies for geometries and cases (public).

They draw only what the adapter's capabilities admit and the invariant needs, sized
by the profile, and they *reach* the geometries where convolution code breaks: each
draw first picks a feature and then builds the geometry so that the feature holds.

Features (per spatial axis unless said): ``plain``; ``remainder``
((L + p_lo + p_hi - e) mod s != 0); ``stride_over_kernel`` (s > e);
``anisotropic`` (axes differ in k, s, d, p and size); ``pad_before`` / ``pad_after``
(asymmetric padding, each order); ``window_in_padding`` (p_lo >= e: the first window
reads only padding); ``kernel_fills_input`` (L_out = 1); ``unit_length`` (L = 1 on the first axis);
``pointwise`` (1x1 kernels); ``dilated_strided`` (d >= 2 with s >= 2); ``everyday`` (3-tap kernels, stride
1, no dilation, padding 0 or 1: the shape fast paths such as Winograd serve);
``zero_batch`` (N = 0).
Coincidences, with their own share of the draws and combined with the feature where
compatible (:data:`~convwitness.cases.draw.COINCIDENCES`): C_in/G == C_out/G > 1, N == C_in,
every axis alike, square kernels > 1, stride == a square kernel (2-D/3-D), one output position.
The geometry itself is built by :func:`convwitness.cases.draw.build_spec`, which the
covering schedule (:mod:`convwitness.cases.schedule`) shares.
Channel structure, drawn independently of the feature: one group, 1 < G < C_in,
depthwise with multiplier 1 and > 1; channel counts small, or (half the draws) on
either side of vector and tile widths: 7/8/9, 15/16/17, 31/32/33 (the spatial size is
then kept small enough for the profile's element budget).
"""
from __future__ import annotations

from contextlib import contextmanager

from hypothesis import assume, strategies as st

from ..geometry.capabilities import Capabilities
from .case import Case
from ..errors import SpecError
from .draw import (COINCIDENCES, FEATURES, GROUPINGS, THRESHOLD_COUNTS, Needs,  # noqa: F401
                   build_spec)
from .profiles import get_profile
from .values import fill

__all__ = ["Needs", "FEATURES", "GROUPINGS", "COINCIDENCES", "specs", "cases", "examples",
           "examples_on", "make_case", "independent_of_loaded_modules"]


def _check_args(capabilities, profile, needs):
    if not isinstance(capabilities, Capabilities):
        raise SpecError(f"strategies: capabilities={capabilities!r} must be a convwitness.Capabilities")
    profile = get_profile(profile)
    if needs is None:
        needs = Needs()
    if not isinstance(needs, Needs):
        raise SpecError(f"strategies: needs={needs!r} must be a convwitness.cases.strategies.Needs")
    return profile, needs


_INTEGERS: dict = {}
_BOOLEANS = st.booleans()


def _integers(lo, hi):
    """``st.integers(lo, hi)``, built once per range: a strategy built afresh on every draw
    is validated afresh too, which cost about half of each example's drawing. Kept
    unwrapped where hypothesis wraps it lazily (``wrapped_strategy``, validated first):
    the same draws, without the unwrapping on each one."""
    s = _INTEGERS.get((lo, hi))
    if s is None:
        s = st.integers(lo, hi)
        s.validate()
        s = _INTEGERS[(lo, hi)] = getattr(s, "wrapped_strategy", s)
    return s


class _HypothesisPicker:
    """The builder's choices as hypothesis draws (each one shrinks; labels name them).

    A choice from a sequence is its index drawn as an integer: the same one choice in
    ``[0, len - 1]`` that ``st.sampled_from`` draws, shrinking the same way (toward the
    first element), for sequences up to 128 long (longer ones use ``sampled_from``); a
    one-element sequence draws nothing, as ``sampled_from`` (``just``)."""

    def __init__(self, draw):
        self.draw = draw

    def int(self, lo, hi, label):
        return self.draw(_integers(lo, hi), label=label)

    def choice(self, seq, label):
        seq = seq if isinstance(seq, (list, tuple)) else list(seq)
        if len(seq) == 1:
            return seq[0]
        if len(seq) > 128:              # st.integers weights the ends of ranges this long
            return self.draw(st.sampled_from(seq), label=label)
        return seq[self.draw(_integers(0, len(seq) - 1), label=label)]

    def bool(self, label):
        return self.draw(_BOOLEANS, label=label)

    def reject(self):
        assume(False)


class _ChoicePicker(_HypothesisPicker):
    """The same choices made on hypothesis's choice sequence itself
    (``ConjectureData.draw_integer`` / ``draw_boolean``, which ``st.integers`` and
    ``st.booleans`` call): the same values, drawn and shrunk the same way, without a
    strategy and a span around each of a geometry's 25 or so choices, which cost about
    half of each example's drawing (``python -m convwitness.bench harness``). Those are
    hypothesis internals, so :func:`_direct` checks for them first, and the strategies
    fall back to :class:`_HypothesisPicker` (public ``draw``) where they are missing."""

    def __init__(self, data):
        self.data = data

    def int(self, lo, hi, label):
        # (st.integers weights the ends of ranges over 127 long; the one such range here
        # is a value set's filling seed, whose ends mean nothing, and the ``weights``
        # argument changed form across hypothesis versions: not passed)
        return self.data.draw_integer(lo, hi)

    def choice(self, seq, label):
        seq = seq if isinstance(seq, (list, tuple)) else list(seq)
        if len(seq) == 1:
            return seq[0]
        return seq[self.data.draw_integer(0, len(seq) - 1)]    # as st.sampled_from

    def bool(self, label):
        return self.data.draw_boolean()


def _direct() -> bool:
    """Whether this hypothesis offers the choice methods :class:`_ChoicePicker` uses."""
    try:
        from hypothesis.internal.conjecture.data import ConjectureData
    except ImportError:                 # pragma: no cover - a hypothesis without them
        return False
    return all(callable(getattr(ConjectureData, m, None)) for m in ("draw_integer", "draw_boolean"))


DIRECT = _direct()


class _NoConstants:
    """An empty pool of source-code constants (``set_for_type`` is all hypothesis asks)."""

    def set_for_type(self, choice_type):
        return ()


@contextmanager
def independent_of_loaded_modules():
    """Hypothesis's draws made independent of which modules this process has imported.

    Recent hypothesis versions draw, in about one integer in twenty, a constant taken from
    the source of every *local* module loaded (outside site-packages and the standard
    library: the adapter's own file, convwitness when installed editable, anything else
    imported). One seed's free search then depends on what else the process imported: a
    run on a cluster worker and the same run in a CLI or pytest process draw different
    geometries. Inside this context that local pool is empty (hypothesis's own global
    constants stay). Internals again: where they are missing (older hypothesis, which has
    no such pool) this does nothing."""
    try:
        from hypothesis.internal.conjecture import providers
        saved, cache = providers._get_local_constants, providers.CONSTANTS_CACHE
    except (ImportError, AttributeError):
        yield
        return
    providers._get_local_constants = _NoConstants
    cache.cache.clear()
    try:
        yield
    finally:
        providers._get_local_constants = saved
        cache.cache.clear()


class _Built(st.SearchStrategy):
    """A strategy that runs ``build(pick, *args)`` with a :class:`_ChoicePicker`."""

    def __init__(self, build, *args):
        super().__init__()
        self.build, self.args = build, args

    def do_draw(self, data):
        return self.build(_ChoicePicker(data), *self.args)

    def __repr__(self):
        return f"convwitness.{self.build.__name__.strip('_')}(...)"


def _strategy(build, *args):
    """``build(pick, *args)`` as a strategy: on the choice sequence where this hypothesis
    allows it, else through ``st.composite``'s public ``draw``."""
    if DIRECT:
        return _Built(build, *args)
    return st.composite(lambda draw: build(_HypothesisPicker(draw), *args))()


def specs(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of ConvSpecs inside ``capabilities`` that meet ``needs``."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _strategy(build_spec, capabilities, profile, needs)


def _cases(pick, caps, profile, needs, count):
    return _valued(pick, build_spec(pick, caps, profile, needs), needs, count)


def _cases_on(pick, specs, needs, count):
    return _valued(pick, pick.choice(specs, "geometry"), needs, count)


def _valued(pick, spec, needs, count) -> tuple:
    """``count`` cases of ``spec``, each of a drawn value kind and filling seed."""
    kinds = list(needs.kinds)
    out = []
    for i in range(count):
        kind = pick.choice(kinds, "kind")
        seed = pick.int(0, 2 ** 32 - 1, "seed")
        out.append(make_case(spec, kind, seed))
    return tuple(out)


def make_case(spec, kind: str, seed: int) -> Case:
    """The case of ``spec`` with values of ``kind`` filled from ``seed``."""
    arrays = fill(spec, kind, seed)
    return Case(spec, arrays["x"], arrays["w"], arrays["b"], arrays["grad_y"], kind, seed=seed)


def examples(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of tuples of ``profile.values`` Cases sharing one geometry."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _strategy(_cases, capabilities, profile, needs, profile.values)


def examples_on(geometries, profile="quick", needs: Needs | None = None):
    """A strategy of tuples of ``profile.values`` Cases on one of ``geometries`` (a
    non-empty sequence of ConvSpecs, shrinking toward the first), with fresh values: the
    free search of a port that compiles per shape, which adds no call signature."""
    profile = get_profile(profile)
    needs = needs if needs is not None else Needs()
    geometries = tuple(geometries)
    if not geometries:
        raise SpecError("examples_on: no geometries to draw from; give at least one ConvSpec")
    return _strategy(_cases_on, geometries, needs, profile.values)


def cases(capabilities: Capabilities, profile="quick", needs: Needs | None = None):
    """A strategy of single Cases."""
    profile, needs = _check_args(capabilities, profile, needs)
    return _strategy(_cases, capabilities, profile, needs, 1).map(lambda t: t[0])
