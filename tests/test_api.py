"""The Python API (``convwitness.certify`` -> ``Report``), and the README example of it.

Outside references: the report document is validated against its JSON Schema (draft
2020-12, ``report.schema.json``) by ``jsonschema`` when it is written, and read back
here with ``json``; the zoo adapter ``kernel-flipped`` carries a planted bug
(shared/BUG-CLASSES.md, kernel flip: convolution instead of cross-correlation) that the
forward reference invariant must catch.
"""
from __future__ import annotations

import json
import os
import re

import pytest

import convwitness
from convwitness.report.document import validate_report

ROOT = os.path.join(os.path.dirname(__file__), os.pardir)


def test_readme_example_runs(tmp_path, monkeypatch, capsys):
    with open(os.path.join(ROOT, "README.md"), encoding="utf-8") as fh:
        readme = fh.read()
    section = readme.split("### From Python", 1)[1]
    block = re.search(r"```python\n(.*?)```", section, flags=re.S).group(1)
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(block, "README.md 'From Python'", "exec"), namespace)  # noqa: S102
    report = namespace["report"]
    assert report.conformant and report.verdict == "CONFORMANT"
    assert "forward.reference" in report.scope["deciding"]
    # the same folder as `convwitness run`
    for name in ("report.json", "report.html", "summary.md", "junit.xml"):
        assert (tmp_path / "conv-report" / name).is_file(), name
    assert capsys.readouterr().out.startswith("CONFORMANT")


def test_a_failing_adapter_gives_witnesses_and_raises(tmp_path):
    from convwitness.adapters.zoo import ZOO
    report = convwitness.certify(ZOO["kernel_flipped"](), only="forward.reference",
                                 isolation="none", report_dir=str(tmp_path / "r"))
    assert not report.conformant and report.verdict == "NOT CONFORMANT"
    assert [r["id"] for r in report.failures] == ["forward.reference"]
    (w,) = report.witnesses
    assert w.invariant == "forward.reference" and os.path.isfile(w.path)
    case, meta = w.load()
    assert meta["invariant"] == "forward.reference" and case.x is not None
    # replay on a correct adapter passes, on the buggy one fails again
    assert w.replay("reference")[0] == "pass"
    assert w.replay(ZOO["kernel_flipped"]())[0] == "fail"
    with pytest.raises(convwitness.NotConformant, match="forward.reference: fail"):
        report.raise_for_failures()
    with pytest.raises(AssertionError):           # usable as a test assertion
        report.raise_for_failures()


def test_outputs(tmp_path):
    report = convwitness.certify("reference", only="forward.reference", isolation="none",
                                 report_dir=str(tmp_path))
    doc = json.loads(report.to_json())
    validate_report(doc)                          # JSON Schema draft 2020-12
    with open(tmp_path / "report.json", encoding="utf-8") as fh:
        assert json.load(fh) == doc
    page = report._repr_html_()
    assert page.startswith("<iframe srcdoc=") and "CONFORMANT" in page
    assert "reference" in repr(report) and report.raise_for_failures() is report


def test_default_report_dir_is_a_temporary_folder():
    report = convwitness.certify("reference", only=["forward.reference"], isolation="none")
    assert os.path.isfile(os.path.join(report.report_dir, "report.json"))


def test_process_isolation_with_a_spec_string(tmp_path):
    report = convwitness.certify("reference", only="forward.reference", report_dir=str(tmp_path))
    assert report.conformant


@pytest.mark.parametrize("kwargs, expected", [
    ({"adapter": object(), "isolation": "process"}, "isolation='process' needs an adapter spec"),
    ({"adapter": "reference", "isolation": "thread"}, "expected one of 'process', 'none'"),
    ({"adapter": "reference", "isolation": "none", "only": "no.such"}, "no invariant matched"),
])
def test_bad_input_is_one_line(kwargs, expected, tmp_path):
    with pytest.raises(convwitness.ConvWitnessError) as info:
        convwitness.certify(report_dir=str(tmp_path), **kwargs)
    assert expected in str(info.value) and "\n" not in str(info.value)
