"""The truthful certificate: checked vs skipped, passes from what the object implements,
one rule and one count in every view, exit codes a CI can trust.

Outside judges: scipy.signal (a third-party convolution, expected conformant on what it
claims), planted bugs whose wrongness is a fact of the trade (a flipped kernel, a doubled
input gradient: common practice, no source), the JUnit XML format as CI servers read it
(a <testsuite> with failures/errors counts and <failure>/<error>/<skipped> children;
common practice, no source) and Python's own HTML parser.
"""
from __future__ import annotations

import dataclasses
import io
import json
import os
import re
import xml.etree.ElementTree as ET
from html import unescape

import pytest

from convwitness.cli.main import ExitCode, parse_args, run
from convwitness.invariants import REGISTRY, Invariant, Needs, get
from convwitness.invariants.evidence import Evidence, combine
from convwitness.report.document import load_report
from convwitness.report.verdicts import OUTCOMES, judge

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIX = os.path.join(ROOT, "tests", "fixtures", "declared_adapters.py")


def cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    rc = run(parse_args(list(argv)), out, err)
    return rc, out.getvalue(), err.getvalue()


def _run(folder, adapter, only):
    return cli("run", "--adapter", adapter, "--only", only, "--seed", "0", "--report", str(folder),
               "--quiet", "--isolation", "none")


def _plain(md: str) -> str:
    """Markdown as text: backslash escapes and code spans removed, entities decoded."""
    return unescape(re.sub(r"\\(.)", r"\1", md).replace("`", ""))


def assert_views_agree(folder, rc=None, stdout=None):
    """Every view of the report in ``folder`` tells the verdict of judge(report.json)."""
    doc = load_report(str(folder))
    j = judge(doc)
    # report.json
    assert doc["conformant"] == j.conformant and doc["summary"] == j.counts
    assert doc["verdict"]["outcome"] == j.outcome and doc["verdict"]["line"] == j.line(doc)
    # exit code: 0 if and only if conformant
    if rc is not None:
        assert rc == j.exit_code == OUTCOMES[j.outcome][1]
        assert (rc == 0) == j.conformant
    # junit.xml: failures + errors are the invariants that keep the run from certifying
    root = ET.parse(os.path.join(folder, "junit.xml")).getroot()
    suite = root.find("testsuite")
    assert int(suite.get("failures")) + int(suite.get("errors")) == len(j.blocking)
    failing = {c.get("name") for c in suite.iter("testcase")
               if c.find("failure") is not None or c.find("error") is not None}
    assert failing == set(j.blocking)
    props = {p.get("name"): p.get("value") for p in suite.iter("property")}
    assert props["verdict"] == j.headline and props["verdict.line"] == j.line(doc)
    assert props["conformant"] == str(j.conformant).lower()
    for i, why in j.not_applicable:
        assert props[f"not-applicable.{i}"] == why
    # summary.md
    md = open(os.path.join(folder, "summary.md"), encoding="utf-8").read()
    assert j.headline in md.splitlines()[0]
    assert j.line(doc) in _plain(md)
    for i, _ in j.not_applicable:
        row = next(line for line in md.splitlines() if line.startswith(f"| `{i}` |"))
        assert row.split("|")[5].strip() == "–"          # no worst share where nothing was checked
    # report.html
    page = open(os.path.join(folder, "report.html"), encoding="utf-8").read()
    assert re.search(r'<div class="verdict">([^<]*)</div>', page).group(1) == j.headline
    line = re.search(r'<p class="line" id="verdict-line">([^<]*)</p>', page).group(1)
    assert unescape(line) == j.line(doc)
    for i, why in j.not_applicable:
        assert unescape(f"{i}</code>: {why}") in unescape(page)
    # terminal
    if stdout is not None:
        assert j.line(doc) in stdout
        for i, why in j.not_applicable:
            assert f"{i}: {why}" in stdout
    # a conformant headline never carries a count of failures
    if j.conformant:
        for text in (j.line(doc), props["verdict.line"], line):
            assert not re.search(r"\d+ (fail|error|crash|timeout|internal)\b", unescape(text))
    for p in j.unclaimed:
        note = f"{p} implemented, not claimed: untested"
        assert note in j.line(doc) and note in props["unclaimed"]
        assert all(note in text for text in (md, unescape(page)) + ((stdout,) if stdout else ()))
    return doc, j


# -- 1. checked vs skipped ------------------------------------------------------------
def test_a_skipped_measurement_is_not_a_pass():
    # combine() of skipped measurements is skipped; a checked one decides
    ok = Evidence(True, share=0.5, message="checked")
    assert combine(Evidence.skip("a"), Evidence.skip("b")).skipped == "a"
    assert combine().skipped == "nothing to compare"
    assert combine(Evidence.skip("a"), ok) is ok


def test_an_invariant_whose_examples_all_skip_is_not_applicable_with_the_reason(tmp_path):
    from convwitness.boundary.loading import load_adapter
    from convwitness.run.runner import run_invariant
    base = get("forward.reference")
    always = dataclasses.replace(base, func=lambda adapter, case, ctx: Evidence.skip("no such geometry here"))
    res = run_invariant(load_adapter("reference"), always, "quick", seed=0)
    assert res.verdict == "not-applicable" and res.examples == 0 and res.geometries == 0
    assert res.skipped > 0 and "no such geometry here" in res.reason
    assert res.skip_reasons[0]["reason"] == "no such geometry here"


def test_skips_are_made_up_for_and_counted_apart(tmp_path, monkeypatch):
    # an invariant skips an example for a property of its values, not of its geometry
    # (backward.finite_differences skips results that may overflow their format); here
    # forward.reference skips every case whose value seed is divisible by 3, so that the
    # run has skips on every seed, and the checked examples must all pass
    from convwitness.invariants import REGISTRY
    base = get("forward.reference")         # loads the catalogue

    def some_skip(adapter, case, ctx):
        if case.seed % 3 == 0:
            return Evidence.skip("values whose result may overflow (every third value seed)")
        return base.func(adapter, case, ctx)
    monkeypatch.setitem(REGISTRY, "forward.reference", dataclasses.replace(base, func=some_skip))
    rc, out, _ = _run(tmp_path / "r", "reference", "forward.reference")
    doc = load_report(str(tmp_path / "r"))
    r = doc["invariants"][0]
    assert r["verdict"] == "pass" and r["examples"] > 0 and r["skipped"] > 0
    assert r["skip_reasons"] and sum(s["examples"] for s in r["skip_reasons"]) <= r["skipped"]
    profile = doc["profile"]["examples"]
    # more geometries were drawn so that the checked ones reach the planned count (the
    # covering schedule plus the free search, at least the profile's count), or the
    # shortfall is reported with both numbers
    short = re.search(r"checked (\d+) of the (\d+) planned geometries", r["reason"])
    if short:
        assert int(short.group(1)) == r["geometries"] < int(short.group(2))
    else:
        assert r["geometries"] >= profile
    assert "skipped" in out
    assert_views_agree(tmp_path / "r", rc, out)


# -- 2. passes from what the object implements ----------------------------------------
def test_declared_capabilities_and_a_buggy_backward_are_not_conformant(tmp_path):
    # the README's declaration (dtypes, ndims, no passes=) with a doubled input gradient
    rc, out, _ = _run(tmp_path / "r", f"{FIX}:DeclaredDoubledGradInput",
                      "forward.reference,grad_input.reference")
    assert rc == ExitCode.FAILED == 1
    doc, j = assert_views_agree(tmp_path / "r", rc, out)
    assert j.headline == "NOT CONFORMANT" and j.against == ["grad_input.reference"]
    assert "backward" in doc["adapter"]["capabilities"]["passes"]
    assert "backward" in j.scope["passes"]


def test_the_same_declaration_with_a_correct_backward_is_conformant(tmp_path):
    rc, out, _ = _run(tmp_path / "r", f"{FIX}:DeclaredCorrect", "forward.reference,grad_input.reference")
    doc, j = assert_views_agree(tmp_path / "r", rc, out)
    assert rc == 0 and j.scope["passes"] == ["forward", "backward"] and j.unclaimed == []


def test_an_implemented_pass_left_unclaimed_is_named_untested_in_every_view(tmp_path):
    rc, out, _ = _run(tmp_path / "r", f"{FIX}:ForwardOnlyClaim", "forward.reference,grad_input.reference")
    doc, j = assert_views_agree(tmp_path / "r", rc, out)
    assert j.unclaimed == ["backward", "transposed"] and rc == 0
    reason = dict(j.not_applicable)["grad_input.reference"]
    assert "implemented but not claimed" in reason and "offers" not in reason


# -- 3. one rule, one count, every view -------------------------------------------------
@pytest.mark.parametrize("adapter, only, outcome", [
    ("scipy", "forward.reference,forward.group_split,transposed.reference", "conformant"),
    ("reference", "forward.reference,grad_input.reference,grad_weight.reference", "conformant"),
    ("convwitness.adapters.zoo_forward:KernelFlipped", "forward.reference,forward.group_split,grad_input.reference",
     "not-conformant"),
    (f"{FIX}:NanAsZeroUnclaimed", "forward.special_values,forward.reference", "conformant"),
    (f"{FIX}:NanAsZeroUnclaimed", "forward.special_values", "nothing-certified"),
    ("scipy", "transposed.*", "nothing-certified"),
])
def test_every_view_agrees(tmp_path, adapter, only, outcome):
    rc, out, err = _run(tmp_path / "r", adapter, only)
    doc, j = assert_views_agree(tmp_path / "r", rc, out)
    assert j.outcome == outcome, out + err
    if outcome == "nothing-certified":
        assert rc == ExitCode.NOTHING_CERTIFIED and "nothing certified" in err
        assert len(err.strip().splitlines()) == 1


def test_information_only_deviation_has_its_own_word_and_does_not_decide(tmp_path):
    rc, out, _ = _run(tmp_path / "r", f"{FIX}:NanAsZeroUnclaimed", "forward.special_values,forward.reference")
    doc = load_report(str(tmp_path / "r"))
    r = next(r for r in doc["invariants"] if r["id"] == "forward.special_values")
    assert r["verdict"] == "info" and r["deviation"] == "fail" and doc["summary"]["fail"] == 0
    root = ET.parse(tmp_path / "r" / "junit.xml").getroot()
    case = next(c for c in root.iter("testcase") if c.get("name") == "forward.special_values")
    assert case.find("skipped") is not None and "information only" in case.find("skipped").get("message")


# -- 4. exit codes a CI can trust -----------------------------------------------------
def test_an_exception_inside_convwitness_is_internal_exit_4(tmp_path, monkeypatch):
    def broken(adapter, case, ctx):
        raise ZeroDivisionError("planted bug of convwitness")
    inv = get("forward.reference")
    monkeypatch.setitem(REGISTRY, inv.id, dataclasses.replace(inv, func=broken))
    rc, out, err = _run(tmp_path / "r", "reference", "forward.reference")
    assert rc == ExitCode.INTERNAL == 4
    line, = err.strip().splitlines()
    assert "bug in convwitness" in line and "traceback saved to" in line
    path = line.rsplit("traceback saved to ", 1)[1]
    assert "ZeroDivisionError" in open(path, encoding="utf-8").read()
    doc, j = assert_views_agree(tmp_path / "r", rc, out)
    assert doc["invariants"][0]["verdict"] == "internal" and j.headline == "INTERNAL ERROR"


def test_only_matching_nothing_is_a_usage_error_before_anything_is_written(tmp_path):
    rc, out, err = _run(tmp_path / "r", "reference", "forward.refrence")
    assert rc == ExitCode.USAGE and not (tmp_path / "r").exists()
    line, = err.strip().splitlines()
    assert "matches no invariant" in line and "did you mean forward.reference" in line


def test_report_pointing_at_a_file_is_a_one_line_error(tmp_path):
    f = tmp_path / "report.txt"
    f.write_text("keep me")
    rc, out, err = _run(f, "reference", "forward.reference")
    assert rc == ExitCode.USAGE and len(err.strip().splitlines()) == 1 and "is a file" in err
    assert f.read_text() == "keep me"


def test_diff_and_merge_accept_report_folders(tmp_path):
    rc, _, _ = _run(tmp_path / "a", "scipy", "forward.reference")
    assert rc == 0
    rc, out, err = cli("diff", str(tmp_path / "a"), str(tmp_path / "a"))
    assert rc == 0 and "no regression" in out and err == ""
    rc, out, err = cli("merge", str(tmp_path / "a"), "-o", str(tmp_path / "m") + os.sep)
    assert rc == 0 and (tmp_path / "m" / "report.json").is_file()
    rc, _, err = cli("diff", str(tmp_path), str(tmp_path / "a"))
    assert rc == ExitCode.USAGE and "without report.json" in err and len(err.strip().splitlines()) == 1


# -- the sample reports ------------------------------------------------------------------
def _samples():
    """The committed sample reports: every report folder under reports/ except the ones
    .gitignore keeps out (reports/quickstart/, written by the README's first command)."""
    ignored = []
    with open(os.path.join(ROOT, ".gitignore"), encoding="utf-8") as fh:
        ignored = [line.strip().strip("/") for line in fh if line.strip().startswith("/reports/")]
    out = []
    for base, _dirs, files in os.walk(os.path.join(ROOT, "reports")):
        rel = os.path.relpath(base, ROOT)
        if any(rel == i or rel.startswith(i + os.sep) for i in ignored):
            continue
        if "report.json" in files and "junit.xml" in files:
            out.append(base)
    return sorted(out)


@pytest.mark.parametrize("folder", _samples(), ids=lambda p: os.path.relpath(p, ROOT))
def test_every_view_of_every_sample_report_agrees(folder):
    # the files on disk, as scripts/regen_reports.py wrote them
    assert_views_agree(folder)
    with open(os.path.join(ROOT, "reports", "README.md"), encoding="utf-8") as fh:
        index = fh.read()
    doc = json.load(open(os.path.join(folder, "report.json"), encoding="utf-8"))
    j = judge(doc)
    where = os.path.relpath(folder, os.path.join(ROOT, "reports"))
    row = next(line for line in index.splitlines() if line.startswith(f"| `{where}` |"))
    assert j.counts_text() in row and j.headline.lower() in row.lower()
