"""Ports that compile per shape: the free search adds no call signature (issue 11).

Sources beside each check:
- what a compiling port pays for: jax's documentation of ``jax.jit`` says a jitted
  function is traced and compiled again for each new combination of argument shapes and
  dtypes (recalled from memory); the signature here is (method, array shapes and dtypes,
  keywords), as ``Adapter.signatures`` records it;
- that the free search must not say more than was tested (distinct geometries counted
  once) is this project's rule (DESIGN.md, "a certificate never says more than was
  tested"): common practice, no source;
- the repeatability and shift checks rest on the same relationships as their invariants
  (run-to-run identity; translation equivariance of a convolution, Goodfellow, Bengio &
  Courville 2016, section 9.2, recalled from memory).
"""
from __future__ import annotations

import json
import os

import pytest

from convwitness.adapters.reference import ReferenceAdapter
from convwitness.boundary.contract import wrap
from convwitness.cases.profiles import get_profile
from convwitness.cases.strategies import examples_on, make_case
from convwitness.errors import SpecError
from convwitness.invariants import Context, get
from convwitness.run.covering import covering_examples
from convwitness.run.runner import run_invariant

QUICK = get_profile("quick")


def _reference(declared: bool):
    inner = ReferenceAdapter()
    inner.capabilities = inner.capabilities.replace(compiles_per_shape=declared)
    return wrap(inner, source="reference")


def _schedule_signatures(inv_id: str) -> set:
    """The signatures of the covering schedule of ``inv_id`` alone (each explicit example
    checked once, on a fresh adapter), and how many explicit examples it has."""
    adapter = _reference(True)
    inv = get(inv_id)
    explicit = covering_examples(inv.claims(adapter.capabilities), inv, QUICK, 0)
    ctx = Context(profile=QUICK)
    for cases in explicit:
        for case in cases:
            inv.check(adapter, case, ctx)
    return adapter.signatures, sum(len(c) for c in explicit), len({c[0].spec for c in explicit})


@pytest.mark.parametrize("inv_id", ["forward.reference", "forward.stride_subsampling",
                                    "backward.repeatability"])
def test_free_search_stays_on_the_schedules_signatures(inv_id):
    scheduled, explicit_examples, explicit_geometries = _schedule_signatures(inv_id)
    few = _reference(True)
    res = run_invariant(few, get(inv_id), QUICK, seed=0, shrink=False)
    assert res.verdict == "pass", res.message
    # the free search ran (more examples than the schedule's) and made no new signature
    assert res.examples > explicit_examples
    assert few.signatures == scheduled
    # each geometry counted once: the report does not count a geometry per draw
    assert res.geometries == explicit_geometries
    # control: a port that does not declare it gets fresh geometries, new signatures
    fresh = _reference(False)
    res = run_invariant(fresh, get(inv_id), QUICK, seed=0, shrink=False)
    assert res.verdict == "pass", res.message
    assert len(fresh.signatures - scheduled) > 0
    assert res.geometries > explicit_geometries


@pytest.mark.parametrize("inv_id", ["forward.repeatability", "backward.repeatability",
                                    "forward.shift_equivariance"])
def test_geometry_choices_follow_the_geometry_not_the_values(inv_id):
    """The second geometry of A, B, A and the shifted axis depend on the geometry alone:
    two value sets of one geometry make the same calls."""
    inv = get(inv_id)
    adapter = _reference(False)
    explicit = covering_examples(inv.claims(adapter.capabilities), inv, QUICK, 0)
    spec = next(c[0].spec for c in explicit if c[0].spec.batch > 0)
    seen = []
    for seed in (1, 2, 3):
        a = _reference(False)
        ev = inv.check(a, make_case(spec, "uniform", seed), Context(profile=QUICK))
        assert ev.ok or ev.skipped
        seen.append(a.signatures)
    assert seen[0] == seen[1] == seen[2]
    assert len(seen[0]) >= 2          # the geometry and its derived call (B, or the shift)


def test_examples_on_draws_only_the_given_geometries():
    from hypothesis import given, settings
    inv = get("forward.reference")
    caps = ReferenceAdapter().capabilities
    specs = [c[0].spec for c in covering_examples(caps, inv, QUICK, 0)][:3]
    drawn = set()

    @settings(max_examples=30, database=None, deadline=None)
    @given(examples_on(specs, QUICK, inv.needs_for(caps)))
    def collect(cases):
        assert len(cases) == QUICK.values
        drawn.add(cases[0].spec)
    collect()
    assert drawn <= set(specs) and drawn
    with pytest.raises(SpecError, match="no geometries"):
        examples_on([], QUICK)


def test_cli_flag_is_recorded_and_said(tmp_path):
    from convwitness.cli.main import main
    out = tmp_path / "r"
    with pytest.raises(SystemExit) as exc:
        main(["run", "--adapter", "reference", "--only", "forward.reference", "--isolation", "none",
              "--compiles-per-shape", "--report", str(out), "--quiet"])
    assert exc.value.code == 0
    doc = json.loads((out / "report.json").read_text())
    assert doc["adapter"]["capabilities"]["compiles_per_shape"] is True
    assert doc["signatures"] > 0
    # summary.md and report.html say the same sentence (report/reach.py shapes_text)
    for view in ("summary.md", "report.html"):
        text = (out / view).read_text()
        assert f"{doc['signatures']} distinct call signatures" in text, view
        assert "compiles per shape" in text, view


def test_cli_flag_refused_with_a_cluster(tmp_path, capsys):
    from convwitness.cli.main import main
    with pytest.raises(SystemExit) as exc:
        main(["run", "--adapter", "reference", "--only", "forward.reference", "--cluster", "local:1",
              "--compiles-per-shape", "--report", str(tmp_path / "r"), "--quiet"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "compiles_per_shape=True" in err and "--cluster" in err
    assert not os.path.exists(tmp_path / "r" / "report.json")


def _geometry_of_call(sig) -> tuple:
    """(x, w and bias shapes and dtypes, keywords) of a recorded signature: the geometry it
    was called on, a bias or none included (the method and upstream gradient left out)."""
    _method, arrays, kwargs = sig
    return arrays[:3], kwargs


def test_invariants_not_marked_derives_call_only_their_cases_geometry():
    """For a port that compiles per shape, an invariant that is not marked ``derives``
    (forward.bias_shift, the linearity and adjoint checks included: a zero bias in place
    of none) calls the port only on its case's geometry, so it costs no signature beyond
    the schedule's; the ones marked ``derives`` do call others (why their schedules are
    lean)."""
    from convwitness.invariants import catalogue
    caps = _reference(True).capabilities
    own_probe = {"precision.probe"}       # crafted geometries of its own, once per dtype
    extra = {}
    for inv in catalogue():
        if inv.cases is not None or inv.refusal(caps) or inv.id in own_probe:
            continue
        explicit = covering_examples(inv.claims(caps), inv, QUICK, 0)[:4]
        more = 0
        for cases in explicit:
            adapter = _reference(True)
            inv.check(adapter, cases[0], Context(profile=QUICK))
            more += len({_geometry_of_call(s) for s in adapter.signatures}) > 1
        extra[inv.id] = more
    plain = {i: n for i, n in extra.items() if not get(i).derives}
    assert plain and all(n == 0 for n in plain.values()), {i: n for i, n in plain.items() if n}
    marked = {i: n for i, n in extra.items() if get(i).derives}
    assert marked and all(n > 0 for n in marked.values()), {i: n for i, n in marked.items() if not n}


def test_lean_schedules_leave_dtypes_widths_and_pairs_to_the_reference_checks():
    """Only for a port that compiles per shape, and only for invariants marked ``derives``."""
    from convwitness.cases.schedule import pair_targets, targets
    inv = get("forward.layout_agreement")
    for declared in (False, True):
        caps = _reference(declared).capabilities
        needs = inv.needs_for(caps)
        cats = {t.partition(":")[0] for t in targets(caps, needs, QUICK)}
        assert needs.lean is declared
        assert ({"dtype", "width"} <= cats) is not declared
        assert {"feature", "coincidence", "grouping", "layout", "ndim", "corner"} <= cats
        assert bool(pair_targets(caps, needs)) is not declared
    ref = get("forward.reference")
    caps = _reference(True).capabilities
    assert not ref.needs_for(caps).lean
    assert {"dtype", "width"} <= {t.partition(":")[0] for t in targets(caps, ref.needs_for(caps), QUICK)}


def _call_geometry(method, spec) -> tuple:
    """(method, x and w shapes, a bias or none, keywords) of a call on ``spec``, as a
    recorded signature gives them."""
    from convwitness.boundary.contract import call_kwargs
    return (method, spec.x_shape, spec.w_shape, bool(spec.bias),
            tuple(sorted(call_kwargs(spec, transposed=spec.transposed).items())))


def test_derived_calls_are_the_calls_the_checks_make():
    """``Invariant.derived_calls`` (what the lean schedules count) against the calls each
    check actually makes, recorded by the contract wrapper, on scheduled geometries."""
    from convwitness.invariants import catalogue
    caps = _reference(True).capabilities
    geometry = _call_geometry
    checked = 0
    for inv in catalogue():
        if inv.derives is None or inv.refusal(caps):
            continue
        for cases in covering_examples(inv.claims(caps), inv, QUICK, 0)[:5]:
            case = cases[0]
            adapter = _reference(True)
            inv.check(adapter, case, Context(profile=QUICK))
            made = {(m, a[0][0], a[1][0], a[2] is not None, kw) for m, a, kw in adapter.signatures}
            own = {geometry(m, case.spec) for m in ("forward", "backward", "transposed")}
            declared = {geometry(m, sp) for m, sp in inv.derived_calls(case.spec, inv.claims(caps))}
            assert made - own == declared - own, (inv.id, case.spec.describe())
            checked += 1
    assert checked >= 40


def test_schedule_ledger_counts_the_calls_each_check_makes():
    """What the schedules of a port that compiles per shape are chosen by (run/covering.py
    ``_Ledger.calls_of``: own and derived calls) against the calls each check makes."""
    from convwitness.invariants import catalogue
    from convwitness.run.covering import _Ledger
    caps = _reference(True).capabilities
    geometry = _call_geometry
    checked = 0
    for inv in catalogue():
        if inv.cases is not None or inv.refusal(caps) or inv.id == "precision.probe":
            continue
        ledger = _Ledger(inv, caps, set())
        for cases in covering_examples(inv.claims(caps), inv, QUICK, 0)[:3]:
            adapter = _reference(True)
            inv.check(adapter, cases[0], Context(profile=QUICK))
            made = {(m, a[0][0], a[1][0], a[2] is not None, kw) for m, a, kw in adapter.signatures}
            counted = {geometry(m, sp) for m, sp in ledger.calls_of(cases[0].spec)}
            assert made <= counted, (inv.id, cases[0].spec.describe(), made - counted)
            checked += 1
    assert checked >= 60
