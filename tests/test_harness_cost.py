"""The cheaper harness keeps what it replaced (issue 11, item 6).

The speed itself is a figure of ``python -m convwitness.bench harness``, never a test
here (no verdict depends on timing). These tests check that the cheaper paths give what
the outside reference gives: hypothesis's own ``st.sampled_from`` for the builder's
choices, hypothesis's pretty printer for how a case is shown, and the elementwise
definition |actual - expected| <= bound, computed apart with numpy, for compare().
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, seed, settings, strategies as st

from convwitness.cases.strategies import _HypothesisPicker, make_case
from convwitness.geometry.spec import ConvSpec
from convwitness.invariants.evidence import compare

SEQS = (("a", "b"), tuple(range(7)), ("plain", "remainder", "pointwise"), (1,), tuple(range(200)))


@st.composite
def _choices(draw, use_picker: bool):
    """The draws as the geometry strategy makes them (inside st.composite, labelled)."""
    pick = _HypothesisPicker(draw)
    if use_picker:
        return [pick.choice(list(seq), f"c{i}") for i, seq in enumerate(SEQS)]
    return [draw(st.sampled_from(seq), label=f"c{i}") for i, seq in enumerate(SEQS)]


def _drawn(use_picker: bool, s: int) -> list:
    out = []

    @seed(s)
    @settings(max_examples=60, database=None, deadline=None, suppress_health_check=list(HealthCheck))
    @given(_choices(use_picker))
    def run(values):
        out.append(values)
    run()
    return out


@pytest.mark.parametrize("s", [0, 1, 2])
def test_builder_choice_draws_what_sampled_from_draws(s):
    # Reference: hypothesis's st.sampled_from, which the picker's choice replaced; under
    # the same hypothesis seed both must give the same values in the same order (so the
    # examples a run draws, and how they shrink, are unchanged).
    assert _drawn(True, s) == _drawn(False, s)


def test_case_is_printed_by_hypothesis_without_its_arrays():
    # Reference: hypothesis's pretty printer (hypothesis.vendor.pretty), which prints
    # every explicit and falsifying example; it honours the _repr_pretty_ protocol.
    from hypothesis.vendor.pretty import pretty
    spec = ConvSpec(batch=2, in_channels=3, out_channels=4, input_size=(6, 5), kernel_size=(3, 3),
                    dtype="float32", bias=True)
    case = make_case(spec, "uniform", 7)
    shown = pretty(case)
    assert shown == repr(case)
    assert "seed=7" in shown and "kind='uniform'" in shown
    assert "array(" not in shown


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.float16])
def test_compare_on_finite_data_follows_the_elementwise_definition(dtype):
    # Reference: the share of the bound |actual - expected| / bound elementwise, passing
    # where it is at most 1, computed here apart with numpy (common practice, no source).
    rng = np.random.default_rng(11)
    for trial in range(300):
        shape = tuple(int(n) for n in rng.integers(1, 5, size=rng.integers(1, 4)))
        expected = rng.standard_normal(shape)
        actual = (expected + rng.standard_normal(shape) * 10.0 ** rng.integers(-9, 0)).astype(dtype)
        bound = np.abs(rng.standard_normal(shape)) * 10.0 ** rng.integers(-6, 0)
        ev = compare(actual, expected, bound, what="y", criterion="c")
        diff = np.abs(actual.astype(np.float64) - expected)
        share = diff / bound
        assert ev.ok == bool((share <= 1.0).all())
        assert ev.share == float(share.max())
        assert ev.where == tuple(int(i) for i in np.unravel_index(int(np.argmax(share)), shape))
        assert ev.error == float(diff.max())


def _geometries(monkeypatch, direct: bool, s: int, n: int = 12) -> list:
    import convwitness.cases.strategies as strategies
    from convwitness.boundary.loading import load_adapter
    monkeypatch.setattr(strategies, "DIRECT", direct)
    caps = load_adapter("reference").capabilities
    out = []

    @seed(s)
    @settings(max_examples=n, database=None, deadline=None, suppress_health_check=list(HealthCheck))
    @given(strategies.specs(caps, "quick"))
    def run(spec):
        out.append(spec)
    run()
    return out


@pytest.mark.parametrize("s", [0, 1, 2])
def test_choice_sequence_picker_draws_what_the_public_draws_draw(monkeypatch, s):
    # Reference: hypothesis's public st.integers / st.booleans drawn inside st.composite
    # (the fallback path, _HypothesisPicker), whose ConjectureData methods _ChoicePicker
    # calls directly. Under one hypothesis seed both paths give the same first geometries;
    # they part later, where hypothesis mutates the labelled spans only the public path has.
    from convwitness.cases import strategies
    assert strategies.DIRECT, "this hypothesis lacks ConjectureData.draw_integer/draw_boolean"
    direct, public = _geometries(monkeypatch, True, s), _geometries(monkeypatch, False, s)
    assert len(direct) == len(public) == 12
    assert direct[:8] == public[:8]
    assert len(set(direct)) > 6          # fresh geometries, not one repeated


class _Recording:
    """The reference adapter, recording every forward call's shapes, keywords and input."""

    def __init__(self):
        from convwitness.adapters.reference import ReferenceAdapter
        self.inner = ReferenceAdapter()
        self.name, self.version = "recording", self.inner.version
        self.capabilities = self.inner.capabilities.replace(passes=frozenset({"forward"}))
        self.calls = []

    def forward(self, x, w, b, **kw):
        self.calls.append((x.shape, w.shape, b is None, tuple(sorted(kw.items())), x.tobytes()))
        return self.inner.forward(x, w, b, **kw)


def _calls_of_a_run() -> list:
    from convwitness.boundary.contract import wrap
    from convwitness.cases.profiles import get_profile
    from convwitness.invariants import get
    from convwitness.run.runner import run_invariant
    import dataclasses
    port = _Recording()
    profile = dataclasses.replace(get_profile("quick"), examples=300, values=1)
    res = run_invariant(wrap(port, source="recording"), get("forward.reference"), profile,
                        seed=0, shrink=False)
    assert res.verdict == "pass" and res.examples == 300
    return port.calls


@pytest.fixture
def import_constants(tmp_path, monkeypatch):
    """Imports a local module whose source holds integer constants in the range of a
    value set's filling seed (hypothesis skips |v| < 100, which it weights anyway); kept in
    sys.modules until the test ends (hypothesis notices new modules by the length of
    sys.modules)."""
    import importlib
    import sys
    names = []

    def load(name: str):
        (tmp_path / f"{name}.py").write_text(
            "TABLE = [" + ", ".join(str(1000 + 7 * i) for i in range(64)) + "]\n", encoding="utf-8")
        monkeypatch.syspath_prepend(str(tmp_path))
        importlib.import_module(name)
        names.append(name)
    yield load
    for name in names:
        sys.modules.pop(name, None)


def test_a_run_draws_the_same_whatever_else_the_process_imported(import_constants):
    # Reference: hypothesis's own source (hypothesis.internal.conjecture.providers, 6.155):
    # about one integer draw in twenty is a constant from the source of the loaded local
    # modules. A run of one seed must not depend on them (a cluster worker and a CLI process
    # import different modules): the same calls, inputs included, before and after
    # importing a module of integer constants.
    before = _calls_of_a_run()
    import_constants("cw_constants_a")
    assert _calls_of_a_run() == before


def test_without_the_guard_hypothesis_draws_the_constants_of_loaded_modules(import_constants, monkeypatch):
    # The hazard the guard removes, shown on this hypothesis: the same seed's draws change
    # once a local module of constants is imported (where hypothesis has no such pool, as
    # in 6.100, the guard does nothing and the draws do not change).
    import contextlib
    import convwitness.run.runner as runner
    try:
        from hypothesis.internal.conjecture import providers
        has_pool = hasattr(providers, "_get_local_constants")
    except ImportError:
        has_pool = False
    monkeypatch.setattr(runner, "independent_of_loaded_modules", contextlib.nullcontext)
    before = _calls_of_a_run()
    import_constants("cw_constants_b")
    after = _calls_of_a_run()
    assert (after != before) == has_pool
