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
steers hypothesis's targeting as in the runner. So for one seed the generated suite
and ``run`` draw the same examples, reach the same verdicts and fail with the same
anatomy message. It needs only convwitness and the library under test, and runs under
plain ``pytest`` or ``pytest -n auto`` (each test is self-contained).
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

    def invariant(self, inv_id: str):
        from ..invariants import get
        return get(inv_id)

    def examples(self, inv_id: str):
        """The strategy ``run`` draws from for this invariant (tuples of Cases, one geometry):
        ``Invariant.strategy``, as the runner calls it (an invariant with its own ``cases``,
        such as long_sum.* and quantized.*, draws from those)."""
        return self.invariant(inv_id).strategy(self.adapter.capabilities, self.profile)

    def settings(self, test):
        """Apply the profile's hypothesis settings and the seed, as ``run`` does."""
        import hypothesis
        from hypothesis.errors import Unsatisfiable
        from .runner import hypothesis_settings
        test = hypothesis_settings(self.profile, None)(test)
        if self.seed is not None:
            test = hypothesis.seed(self.seed)(test)

        @functools.wraps(test)
        def run_test(*args, **kwargs):
            try:
                return test(*args, **kwargs)
            except Unsatisfiable as exc:      # `run` reports this as not-applicable
                import pytest
                pytest.skip(f"not-applicable: no admitted geometry could be drawn: {exc}")
        return run_test

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
        inv, ctx = self.invariant(inv_id), self.context(inv_id)
        worst = 0.0
        for case in cases:
            ev = inv.check(self.adapter, case, ctx)
            worst = max(worst, min(float(ev.share), 1e12))
            if not ev.ok:
                raise InvariantFailure(ev)
        if inv.steer:
            hypothesis.target(worst, label="share of bound")
        return worst

    def informational(self, inv_id: str) -> bool:
        return self.invariant(inv_id).informational(self.adapter.capabilities)


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
        "the same anatomy message as the report. Run with `pytest` or `pytest -n auto`.", 88)


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
        lines += ["@suite.settings", f"@given(suite.examples({inv.id!r}))",
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
