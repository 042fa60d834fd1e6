"""Generated pytest suites: ``convwitness generate`` and the :class:`Suite` they import.

``convwitness generate --adapter SPEC -o tests/test_conv_conformance.py`` writes a
readable module with one test per applicable invariant::

    suite = Suite("torch", profile="quick", seed=0)

    @suite.settings
    @given(suite.examples("forward.reference"))
    def test_forward_reference(cases):
        suite.check("forward.reference", cases)

Each test is what ``convwitness run`` executes for that invariant
(:func:`convwitness.run.runner.hypothesis_test`): the same public strategy
(:func:`convwitness.cases.strategies.examples` with the invariant's needs for the
adapter's capabilities), the profile's hypothesis settings and seed, and the same
:meth:`Invariant.check` with the same per-invariant context; the share of the bound
steers hypothesis's targeting as in the runner. The examples come from the
invariant's own strategy (:meth:`Invariant.strategy`, so the long accumulations draw
their long channel counts here too). So for one seed the generated suite and ``run``
draw the same examples, reach the same verdicts and fail with the same anatomy message.

A failing test then does what ``run`` does with a failure: the local pass of
:mod:`convwitness.run.minimize`, the witness written (``convwitness-witnesses/`` beside
the test module, or ``$CONVWITNESS_WITNESS_DIR``), and one message with the whole
geometry, the anatomy and the replay command, without a traceback through convwitness.
It runs under plain ``pytest`` with convwitness and the library under test;
``pytest -n auto`` needs pytest-xdist as well (each test is self-contained).
"""
from __future__ import annotations

import functools
import os
import textwrap

__all__ = ["Suite", "generate", "write_suite"]


class Suite:
    """The adapter, profile and seed of a generated module, and its test helpers."""

    def __init__(self, adapter: str, *, profile: str = "quick", seed: int | None = 0,
                 here: str | None = None, isolation: str = "none"):
        from ..errors import AdapterUnavailable
        from ..boundary.isolation.client import load_isolated
        from ..cases.profiles import get_profile
        self.profile = get_profile(profile)
        self.seed = seed
        self.spec = _resolve_path(adapter, here)
        try:
            self.adapter = load_isolated(self.spec, isolation=isolation,
                                         call_timeout=self.profile.call_timeout)
        except AdapterUnavailable as exc:
            import pytest
            pytest.skip(f"verdict unavailable: {exc}", allow_module_level=True)
        self._contexts: dict = {}
        self._checked: dict = {}        # invariant id -> geometries checked in this test
        self._targets: dict = {}        # invariant id -> geometries to check (schedule + free)
        self.here = here
        self._failure = None            # (invariant id, case, Evidence or adapter fault)

    def invariant(self, inv_id: str):
        from ..invariants import get
        return get(inv_id)

    def examples(self, inv_id: str):
        """The strategy ``run`` draws from for this invariant (tuples of Cases, one geometry):
        ``Invariant.strategy``, as the runner calls it (an invariant with its own ``cases``,
        such as long_sum.* and quantized.*, draws from those). For a port that compiles
        per shape, fresh values on the invariant's covering schedule, as in ``run``."""
        from .covering import covering_examples, few_shapes, free_strategy
        inv, caps = self.invariant(inv_id), self.adapter.capabilities
        explicit = (covering_examples(inv.claims(caps), inv, self.profile, self.seed)
                    if few_shapes(caps) else [])
        return free_strategy(caps, inv, self.profile, explicit)

    def settings(self, test):
        """Apply the profile's hypothesis settings and the seed, as ``run`` does.

        ``@suite.settings("forward.reference")`` also runs that invariant's covering
        schedule first, as ``run`` does (suites generated before the schedule existed use
        the bare ``@suite.settings`` and draw freely only)."""
        if isinstance(test, str):
            return functools.partial(self._settings, inv_id=test)
        return self._settings(test)

    def _settings(self, test, inv_id: str | None = None):
        import hypothesis
        from hypothesis.errors import Unsatisfiable
        from .covering import covering_examples, free_examples, with_examples
        from .runner import hypothesis_settings
        explicit = []
        if inv_id is not None:
            inv = self.invariant(inv_id)
            explicit = covering_examples(inv.claims(self.adapter.capabilities), inv,
                                         self.profile, self.seed)
            test = with_examples(test, explicit)
        free = free_examples(self.profile, explicit)
        if inv_id is not None:          # as in `run`: the schedule, then the free search
            self._targets[inv_id] = len(explicit) + free
        test = hypothesis_settings(self.profile, None, max_examples=free)(test)
        if self.seed is not None:
            test = hypothesis.seed(self.seed)(test)

        @functools.wraps(test)
        def run_test(*args, **kwargs):
            import pytest
            from ..cases.strategies import independent_of_loaded_modules
            from .runner import Enough
            self._failure = None
            self._checked = {}
            try:
                with independent_of_loaded_modules():   # as `run` draws
                    test(*args, **kwargs)
            except Enough:
                return None
            except Unsatisfiable as exc:      # `run` reports this as not-applicable
                pytest.skip(f"not-applicable: no admitted geometry could be drawn: {exc}")
            except AssertionError:
                if self._failure is None:
                    raise
                pytest.fail(self._explain_failure(), pytrace=False)
            except _adapter_faults():
                if self._failure is None:
                    raise
                pytest.fail(self._explain_failure(), pytrace=False)
            if not self._checked:           # `run` calls this not-applicable, not a pass
                pytest.skip("not-applicable: every example was skipped, nothing was checked")
            return None
        return run_test

    def _explain_failure(self) -> str:
        """Minimize the last failing case as ``run`` does, write its witness, and say it
        all in one message: verdict, whole geometry, anatomy, witness, replay command."""
        from .minimize import minimize, outcome_verdict
        from .witness import write_witness
        from ..invariants.evidence import Evidence
        inv_id, case, what = self._failure
        m = minimize(self.adapter, self.invariant(inv_id), case, what, self.profile)
        case, what = m.case, m.what
        verdict = outcome_verdict(what)
        message = what.message if isinstance(what, Evidence) else str(what)
        folder = os.environ.get("CONVWITNESS_WITNESS_DIR") or os.path.join(
            os.path.dirname(os.path.abspath(self.here)) if self.here else os.getcwd(),
            "convwitness-witnesses")
        w = write_witness(case, invariant=inv_id, verdict=verdict, message=message,
                          report_dir=folder, seed=self.seed, adapter_source=self.spec)
        return "\n".join([
            f"{inv_id}: {verdict} on {case.spec.describe()}",
            f"geometry: {case.spec!r}",
            f"values: kind={case.kind} seed={case.seed}",
            message.rstrip(),
            f"witness: {os.path.join(folder, w['path'])} ({m.note})",
            f"replay: {w['replay']}"])

    def context(self, inv_id: str):
        """One context per invariant, kept across its examples (as in ``run``)."""
        from ..invariants import Context
        if inv_id not in self._contexts:
            self._contexts[inv_id] = Context(profile=self.profile)
        return self._contexts[inv_id]

    def check(self, inv_id: str, cases) -> float:
        """Check every case of one geometry; raise InvariantFailure with the anatomy on failure.

        Returns the worst share of the bound, which also steers hypothesis (``target``)."""
        import hypothesis
        from ..invariants.evidence import InvariantFailure
        from .runner import Enough
        inv, ctx = self.invariant(inv_id), self.context(inv_id)
        checked = self._checked.get(inv_id, 0)
        if self._failure is None and checked >= self._targets.get(inv_id, self.profile.examples):
            raise Enough()              # as in `run`: the profile's count of checked geometries
        worst = 0.0
        counted = False
        for case in cases:
            try:
                ev = inv.check(self.adapter, case, ctx)
            except _adapter_faults() as exc:
                self._failure = (inv_id, case, exc)
                raise
            if ev.skipped:              # skipped examples are not checked ones (as in `run`)
                continue
            if not counted:
                counted = True
                self._checked[inv_id] = checked + 1
            worst = max(worst, min(float(ev.share), 1e12))
            if not ev.ok:
                self._failure = (inv_id, case, ev)
                raise InvariantFailure(ev)
        if inv.steer:
            hypothesis.target(worst, label="share of bound")
        return worst

    def informational(self, inv_id: str) -> bool:
        return self.invariant(inv_id).informational(self.adapter.capabilities)


def _adapter_faults() -> tuple:
    from ..errors import AdapterCrashed, AdapterOutputError, AdapterRaised, AdapterTimeout
    return (AdapterRaised, AdapterOutputError, AdapterCrashed, AdapterTimeout)


def _resolve_path(spec: str, here: str | None) -> str:
    """A relative ``file.py:attr`` spec is taken relative to the generated module."""
    where, sep, attr = spec.rpartition(":")
    if not sep or not where.endswith(".py") or os.path.isabs(where) or here is None:
        return spec
    if os.path.isfile(where):
        return spec
    return os.path.join(os.path.dirname(os.path.abspath(here)), where) + ":" + attr


def _spec_for_file(spec: str, out_path: str) -> str:
    where, sep, attr = spec.rpartition(":")
    if not sep or not where.endswith(".py"):
        return spec
    rel = os.path.relpath(os.path.abspath(where), os.path.dirname(os.path.abspath(out_path)))
    return rel.replace(os.sep, "/") + ":" + attr


def _about(prof, seed) -> str:
    return textwrap.fill(
        "Each test is a hypothesis @given over convwitness's public strategies with the settings "
        f"of profile {prof.name!r} ({prof.examples} geometries x {prof.values} value sets per "
        f"invariant) and seed {seed}, calling the same invariant check as `convwitness run`: for "
        "this seed both draw the same examples and reach the same verdicts, and a failure shows "
        "the same anatomy message as the report. Run with `pytest` (or `pytest -n auto` with "
        "pytest-xdist installed).", 88)


def _doc(text: str) -> str:
    return text.replace("\\", "\\\\").replace('"""', '\\"\\"\\"')


def _name(inv_id: str) -> str:
    return "test_" + "".join(c if c.isalnum() else "_" for c in inv_id)


def generate(adapter_spec: str, out_path: str, *, profile: str = "quick", seed: int | None = 0,
             only: str | None = None, isolation: str = "none") -> str:
    """The text of a pytest module for ``adapter_spec``, to be written at ``out_path``."""
    from .. import __version__
    from ..boundary.isolation.client import load_isolated
    from ..cases.profiles import get_profile
    from .runner import select
    prof = get_profile(profile)
    adapter = load_isolated(adapter_spec, isolation="none")
    chosen = select(adapter.capabilities, only)
    if not chosen:
        from ..errors import ConvWitnessError
        raise ConvWitnessError(f"generate: --only {only!r} matches no invariant; "
                               "`convwitness invariants` lists them")
    spec = _spec_for_file(adapter_spec, out_path)
    command = f"convwitness generate --adapter {adapter_spec} -o {out_path} --profile {prof.name} --seed {seed}"
    if only:
        command += f" --only '{only}'"
    skipped = [(inv, why) for inv, why in chosen if why]
    head = f'''\
"""Convolution conformance tests of {_doc(adapter.name)} {_doc(adapter.version)}, generated by convwitness {__version__}.

Regenerate (do not edit by hand):
    {_doc(command)}

{_about(prof, seed)}
"""
'''
    xfail = any(inv.informational(adapter.capabilities) for inv, why in chosen if not why)
    lines = [head] + (["import pytest"] if xfail else []) + [
        "from hypothesis import given", "", "from convwitness import Suite", "",
        f"suite = Suite({spec!r}, profile={prof.name!r}, seed={seed!r}, here=__file__"
        + (f", isolation={isolation!r}" if isolation != "none" else "") + ")"]
    for inv, why in chosen:
        if why:
            continue
        lines += ["", ""]
        for pline in inv.property.splitlines():
            lines.append(("# " + pline).rstrip())
        if inv.informational(adapter.capabilities):
            lines.append(f"@pytest.mark.xfail(reason={('information only: the adapter does not claim ' + inv.informational_unless)!r}, strict=False)")
        lines += [f"@suite.settings({inv.id!r})", f"@given(suite.examples({inv.id!r}))",
                  f"def {_name(inv.id)}(cases):",
                  f'    """{_doc(inv.statement)}"""',
                  f"    suite.check({inv.id!r}, cases)"]
    if skipped:
        lines += ["", "", "# Not applicable to this adapter (no test generated):"]
        for inv, why in skipped:
            lines += textwrap.wrap(f"{inv.id}: {why}", 96, initial_indent="#   ", subsequent_indent="#       ")
    text = "\n".join(lines).rstrip() + "\n"
    compile(text, out_path, "exec")
    return text


def write_suite(adapter_spec: str, out_path: str, **options) -> str:
    """Generate and write the module; returns its path."""
    from ..report.outputs import write_text
    text = generate(adapter_spec, out_path, **options)
    folder = os.path.dirname(os.path.abspath(out_path))
    os.makedirs(folder, exist_ok=True)
    return write_text(out_path, text)
